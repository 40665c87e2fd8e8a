"""RTP output: packets on 127.0.0.1 read by a reader written here from the RFCs, and by the `rtp` package.

Every packet in this file goes to 127.0.0.1.  The words carried must equal
``rtstage render`` of the same source and settings, bit for bit.
"""

import ipaddress
import os
import socket
import struct
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import EngineSettings, RtstageError
from rtstage.live.sources import generate, parse_source
from rtstage.net.netengine import NetEngine
from rtstage.net.rtp import (RtpOutConfig, apply_socket_options, frames_per_packet, parse_dscp, parse_hostport,
                             set_multicast_options)
from rtstage.net.sap import SapAnnouncer
from rtstage.net.sdp import build_sdp, parse_sdp

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
LOOPBACK = "127.0.0.1"


class PacketCollector:
    """Receives every datagram on a loopback port until stopped."""

    def __init__(self):
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 8 << 20)
        self.sock.bind((LOOPBACK, 0))
        self.sock.settimeout(0.05)
        self.port = self.sock.getsockname()[1]
        self.packets = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self):
        while not self._stop.is_set():
            try:
                self.packets.append(self.sock.recv(65536))
            except socket.timeout:
                continue

    def stop(self, linger_s=0.2):
        self._stop.wait(linger_s)
        self._stop.set()
        self._thread.join()
        self.sock.close()
        return self.packets


def read_rfc_packets(packets, payload_type, frames, channels, sample_bytes):
    """Check and decode packets from RFC 3550 §5.1 (header) and RFC 3551 §4.5.11 / RFC 3190 §4 (payload).

    Written from the RFC text, independently of rtstage.net.rtp.  Returns
    the decoded samples as int64 values of ``8·sample_bytes`` bits, shape (frames, channels).
    """
    assert packets, "no packet arrived"
    seqs, stamps, ssrcs, blocks = [], [], [], []
    for i, p in enumerate(packets):
        b0, b1 = p[0], p[1]
        assert b0 >> 6 == 2  # RFC 3550 §5.1: version 2
        assert (b0 >> 5) & 1 == 0 and (b0 >> 4) & 1 == 0 and b0 & 0x0F == 0  # no padding, extension, CSRC
        assert (b1 >> 7) == (1 if i == 0 else 0)  # RFC 3551 §4.1: marker on the first packet of the stream
        assert b1 & 0x7F == payload_type
        seq, ts, ssrc = struct.unpack("!HII", p[2:12])
        seqs.append(seq)
        stamps.append(ts)
        ssrcs.append(ssrc)
        payload = p[12:]
        assert len(payload) == frames * channels * sample_bytes
        raw = np.frombuffer(payload, dtype=np.uint8).reshape(-1, sample_bytes).astype(np.int64)
        value = np.zeros(raw.shape[0], dtype=np.int64)
        for b in range(sample_bytes):  # big-endian (network byte order)
            value = (value << 8) | raw[:, b]
        top = 1 << (8 * sample_bytes - 1)
        value = np.where(value >= top, value - 2 * top, value)  # two's complement
        blocks.append(value.reshape(frames, channels))
    # RFC 3550 §5.1: sequence +1 per packet modulo 2^16; timestamp +frames modulo 2^32; one SSRC.
    assert all((b - a) % 65536 == 1 for a, b in zip(seqs, seqs[1:]))
    assert all((b - a) % 2**32 == frames for a, b in zip(stamps, stamps[1:]))
    assert len(set(ssrcs)) == 1
    return np.concatenate(blocks)


def read_with_rtp_package(packets, channels, sample_bytes):
    """Second, independent reader: the `rtp` package (RFC 3550 header) and numpy big-endian views."""
    from rtp import RTP

    blocks = []
    for p in packets:
        pkt = RTP().fromBytes(p)
        assert pkt.version == 2
        payload = bytes(pkt.payload)
        if sample_bytes == 2:
            blocks.append(np.frombuffer(payload, dtype=">i2").astype(np.int64).reshape(-1, channels))
        else:
            padded = np.zeros((len(payload) // 3, 4), dtype=np.uint8)
            padded[:, :3] = np.frombuffer(payload, dtype=np.uint8).reshape(-1, 3)
            blocks.append((padded.view(">i4")[:, 0].astype(np.int64) >> 8).reshape(-1, channels))
    first = RTP().fromBytes(packets[0])
    return np.concatenate(blocks), first


def _render_cli(tmp_path, source_wav, settings_args):
    out = tmp_path / "render.wav"
    result = subprocess.run([sys.executable, "-m", "rtstage", "render", str(source_wav), str(out), *settings_args],
                            cwd=ROOT, env={**os.environ, "PYTHONPATH": ROOT}, capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    info = sf.info(str(out))
    words, _ = sf.read(str(out), dtype="int16" if info.subtype == "PCM_16" else "int32", always_2d=True)
    return words


CASES = [
    # (bits, encoding, channels, ptime_ms)
    (16, "L16", 1, "1"),
    (24, "L24", 8, "0.333"),
    (16, "L24", 8, "0.125"),  # a 16-bit word left-justified in L24
    (20, "L24", 1, "4"),
    (16, "L16", 8, "0.25"),
]


@pytest.mark.parametrize("bits,encoding,channels,ptime", CASES)
def test_rtp_words_equal_render(tmp_path, bits, encoding, channels, ptime):
    samplerate = 48000
    nframes = 9000  # not a multiple of every packet size: the last packet is padded with zero words
    x = generate("noise:level_dbfs=-12,seed=5", samplerate, channels, 0, nframes)
    src = tmp_path / "source.wav"
    sf.write(str(src), x, samplerate, subtype="DOUBLE")
    settings = EngineSettings(bits=bits, dither="tpdf", shaper="flat", seed=11)
    sink = PacketCollector()
    out = {"host": LOOPBACK, "port": sink.port, "encoding": encoding, "ptime_ms": ptime}
    if ptime == "1":
        out["first_seq"] = 65500  # just below the 16-bit wrap, so that the stream crosses it
    engine = NetEngine(settings, parse_source(str(src)), rtp_out=out).prepare()
    if ptime == "1":
        # The timestamp of clock sample s is ts_offset + s: put the 2^32 wrap about 0.1 s ahead (inside the stream).
        now_samples = time.clock_gettime_ns(time.CLOCK_MONOTONIC) * samplerate // 10**9
        engine.out.ts_offset = (2**32 - now_samples - samplerate // 10) % 2**32
    status = engine.run(install_signals=False)
    packets = sink.stop()
    fpp = frames_per_packet(ptime, samplerate)
    sample_bytes = 2 if encoding == "L16" else 3
    got = read_rfc_packets(packets, 96, fpp, channels, sample_bytes)
    assert len(packets) == -(-nframes // fpp)
    if ptime == "1":
        seqs = [struct.unpack("!H", p[2:4])[0] for p in packets]
        stamps = [struct.unpack("!I", p[4:8])[0] for p in packets]
        assert seqs[0] == 65500 and 0 in seqs  # the 16-bit sequence wrapped inside the stream
        assert any(b < a for a, b in zip(stamps, stamps[1:]))  # and so did the 32-bit timestamp
    assert status["streams"]["rtp_out"]["packets_sent"] == len(packets)

    words = _render_cli(tmp_path, src, ["--bits", str(bits), "--dither", "tpdf", "--seed", "11"])
    # Left-justified: the word's value times 2^(encoding bits - word bits) (RFC 3190 §4 carries 24-bit samples;
    # shorter words sit in the most significant bits).
    expect = words.astype(np.int64)
    if words.dtype == np.int16:
        expect = expect << (8 * sample_bytes - 16)
    else:
        expect = expect >> (32 - 8 * sample_bytes)
    assert_array_equal(got[:nframes], expect)
    assert not got[nframes:].any()

    second, first = read_with_rtp_package(packets, channels, sample_bytes)
    assert_array_equal(second, got)
    assert first.marker is True and int(first.payloadType.value) == 96
    assert first.ssrc == status["streams"]["rtp_out"]["ssrc"]


def test_frames_per_packet_aes67_list():
    # AES67-2018 §7.2 packet times; at 48 kHz: 6, 12, 16 (0.333 ms = 1/3 ms), 48 and 192 frames.
    assert [frames_per_packet(p, 48000) for p in ("0.125", "0.25", "0.333", "1", "4")] == [6, 12, 16, 48, 192]
    assert frames_per_packet("1", 96000) == 96
    with pytest.raises(RtstageError, match="whole number"):
        frames_per_packet("1", 44100)  # 44.1 frames
    with pytest.raises(RtstageError, match="AES67"):
        frames_per_packet("2", 48000)


def test_dscp_names_and_ef_refused():
    # RFC 2597: AF41 = 34; RFC 3246: EF = 46, which AES67 Annex B keeps for the clock.
    assert parse_dscp("AF41") == 34 and parse_dscp("cs0") == 0 and parse_dscp("26") == 26
    with pytest.raises(RtstageError, match="clock"):
        parse_dscp("EF")
    with pytest.raises(RtstageError):
        parse_dscp("64")


def test_socket_options_on_a_loopback_socket():
    config = RtpOutConfig(host=LOOPBACK, port=9, samplerate=48000, channels=2, bits=16, dscp="AF41", ttl=7)
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    try:
        apply_socket_options(sock, config)
        # RFC 2474 §3: the DSCP is the upper six bits of the TOS byte: 34 << 2 = 136.
        assert sock.getsockopt(socket.IPPROTO_IP, socket.IP_TOS) == 136
        assert sock.getsockopt(socket.IPPROTO_IP, socket.IP_TTL) == 7
        # Multicast options set on the same socket, which only ever sends to loopback.
        set_multicast_options(sock, ttl=4, interface=LOOPBACK)
        assert sock.getsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_TTL) == 4
        assert sock.getsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_IF, 4) == socket.inet_aton(LOOPBACK)
    finally:
        sock.close()


def test_multicast_destination_parsed_not_sent():
    # An address from RFC 5771's IPv4 multicast block, computed (never written as a literal), only parsed here.
    group = str(ipaddress.IPv4Address((224 << 24) | (1 << 8) | 23))
    assert RtpOutConfig(host=group, port=5004, samplerate=48000, channels=2, bits=24, ttl=16).multicast
    assert parse_hostport(f"{group}:5004") == (group, 5004)
    assert parse_hostport("[::1]:5004") == ("::1", 5004)
    with pytest.raises(RtstageError):
        parse_hostport("localhost:5004")  # numeric addresses only


def test_sdp_read_by_sdp_transform():
    import sdp_transform

    config = RtpOutConfig(host=LOOPBACK, port=5004, samplerate=48000, channels=8, bits=24, ptime_ms="0.333",
                          payload_type=97)
    text = build_sdp(config, LOOPBACK)
    parsed = sdp_transform.parse(text)  # an independent RFC 4566 parser
    media = parsed["media"][0]
    assert parsed["version"] == 0
    assert parsed["connection"]["ip"] == LOOPBACK
    assert media["type"] == "audio" and media["port"] == 5004 and media["protocol"] == "RTP/AVP"
    rtp = media["rtp"][0]
    # RFC 3190 §4 / RFC 3551 §4.5.11: encoding name / clock rate / channels.
    assert (rtp["payload"], rtp["codec"], rtp["rate"], rtp["encoding"]) == (97, "L24", 48000, 8)
    assert media["ptime"] == 0.333
    # RFC 7273: a free-running monotonic clock is "local"; the offset is the stream's timestamp offset.
    assert media["tsRefClocks"] == [{"clksrc": "local"}]
    assert media["mediaClk"]["mediaClockName"] == "direct"
    assert int(media["mediaClk"]["mediaClockValue"]) == config.ts_offset
    # rtstage's own reader agrees.
    back = parse_sdp(text)
    assert (back.host, back.port, back.payload_type, back.encoding, back.samplerate, back.channels, back.ptime_ms) == \
        (LOOPBACK, 5004, 97, "L24", 48000, 8, "0.333")


def test_sdp_tai_clock_states_what_the_user_says():
    import sdp_transform

    config = RtpOutConfig(host=LOOPBACK, port=5004, samplerate=48000, channels=2, bits=16)
    text = build_sdp(config, LOOPBACK, clock="tai", ts_refclk="ptp=IEEE1588-2008:39-A7-94-FF-FE-07-CB-D0:0")
    media = sdp_transform.parse(text)["media"][0]
    assert media["tsRefClocks"] == [{"clksrc": "ptp", "clksrcExt": "IEEE1588-2008:39-A7-94-FF-FE-07-CB-D0:0"}]
    with pytest.raises(RtstageError):
        build_sdp(config, LOOPBACK, ts_refclk="my clock")


def test_sap_announcement_and_deletion_on_loopback():
    import sdp_transform

    sink = PacketCollector()
    config = RtpOutConfig(host=LOOPBACK, port=5004, samplerate=48000, channels=2, bits=16)
    text = build_sdp(config, LOOPBACK)
    sap = SapAnnouncer(LOOPBACK, sink.port, text, LOOPBACK, interval_s=60).start()
    sap.stop()
    packets = sink.stop()
    assert len(packets) == 2
    for packet, deletion in zip(packets, (0, 1)):
        # RFC 2974 §3: V=1, A=0 (IPv4 origin), R=0, T (0 announce, 1 delete), E=0, C=0; no authentication.
        assert packet[0] >> 5 == 1 and (packet[0] >> 4) & 1 == 0 and (packet[0] >> 2) & 1 == deletion
        assert packet[0] & 0b11 == 0 and packet[1] == 0
        assert packet[4:8] == socket.inet_aton(LOOPBACK)
        body = packet[8:]
        mime = b"application/sdp\x00"
        assert body.startswith(mime)
        parsed = sdp_transform.parse(body[len(mime):].decode())
        assert parsed["media"][0]["rtp"][0]["codec"] == "L16"
    assert packets[0][2:4] == packets[1][2:4] != b"\x00\x00"  # the same message id hash


def test_sdp_source_reads_the_stream_format(tmp_path):
    from rtstage.net.source import parse_net_source

    config = RtpOutConfig(host=LOOPBACK, port=5008, samplerate=96000, channels=8, bits=24, payload_type=100,
                          ptime_ms="0.25")
    path = tmp_path / "feed.sdp"
    path.write_text(build_sdp(config, LOOPBACK))
    src = parse_net_source(f"sdp:{path}", depth_ms=2.0)
    assert (src.host, src.port, src.encoding, src.samplerate, src.channels, src.payload_type) == \
        (LOOPBACK, 5008, "L24", 96000, 8, 100)
    with pytest.raises(RtstageError, match="disagrees"):
        parse_net_source(f"sdp:{path}", samplerate=48000)
    with pytest.raises(RtstageError, match="needs"):
        parse_net_source(f"rtp:{LOOPBACK}:5008")


def test_tai_clock_timestamps_follow_the_tai_clock():
    # RFC 7273 a=mediaclk:direct=OFFSET: the timestamp of the sample due at clock time t is OFFSET + t·rate (mod 2^32).
    sink = PacketCollector()
    engine = NetEngine(EngineSettings(bits=16, seed=1), parse_source("silence"), samplerate=48000, channels=1,
                       rtp_out={"host": LOOPBACK, "port": sink.port}, clock="tai")
    engine.prepare()
    before_s = time.clock_gettime(time.CLOCK_TAI)
    engine.start()
    time.sleep(0.1)
    engine.stop()
    packets = sink.stop()
    first_ts = struct.unpack("!I", packets[0][4:8])[0]
    assert first_ts == (engine.out.ts_offset + engine.start_sample) % 2**32
    # The first sample lies a little after the TAI clock's reading at the start (within a second: not a timing test,
    # a check that the count is of TAI seconds and not of another clock's).
    assert 0 <= engine.start_sample / 48000 - before_s < 1.0
    text = build_sdp(engine.out, LOOPBACK, clock="tai")
    assert f"a=mediaclk:direct={engine.out.ts_offset}" in text


def test_ipv6_loopback_stream():
    sock = socket.socket(socket.AF_INET6, socket.SOCK_DGRAM)
    sock.bind(("::1", 0))
    sock.settimeout(2.0)
    port = sock.getsockname()[1]
    try:
        engine = NetEngine(EngineSettings(bits=24, seed=2), parse_source("tone"), samplerate=48000, channels=2,
                           rtp_out={"host": "::1", "port": port, "dscp": "CS0"})
        engine.prepare()
        engine.start()
        first = sock.recv(2048)
        engine.stop()
    finally:
        sock.close()
    assert first[0] >> 6 == 2 and first[1] == 0x80 | 96  # RFC 3550 §5.1: V=2; marker on the first packet
    assert len(first) == 12 + 48 * 2 * 3
