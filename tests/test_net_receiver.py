"""RTP input: a known L24 signal sent to 127.0.0.1 with a lost packet, a reordered pair and a duplicate.

The packets are built here from RFC 3550 §5.1 and RFC 3190 §4, not with
rtstage's packer.  The tap must equal the render of the same signal with
exactly one packet of zeros where the loss was, and the status must count one
lost, one reordered and one duplicate packet.
"""

import json
import socket
import struct
import time

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import EngineSettings
from rtstage.live.sources import generate
from rtstage.net.netengine import NetEngine
from rtstage.net.receiver import JitterBuffer, JitterEstimator
from rtstage.net.source import RtpSource
from rtstage.render import render_array

LOOPBACK = "127.0.0.1"


def l24_packet(seq, timestamp, ssrc, words24, marker=False, payload_type=96):
    """RFC 3550 §5.1 header (V=2, no padding/extension/CSRC) and RFC 3190 §4 L24 payload (big-endian, interleaved)."""
    header = struct.pack("!BBHII", 0x80, (0x80 if marker else 0) | payload_type, seq & 0xFFFF, timestamp & 0xFFFFFFFF,
                         ssrc)
    flat = words24.reshape(-1).astype(np.int64) & 0xFFFFFF
    payload = np.stack([(flat >> 16) & 0xFF, (flat >> 8) & 0xFF, flat & 0xFF], axis=1).astype(np.uint8).tobytes()
    return header + payload


def test_loss_reorder_duplicate(tmp_path):
    samplerate, channels, fpp, npackets = 48000, 2, 48, 40
    # A known 24-bit signal: noise quantized to 24-bit words (exact in float64 as word / 2^23).
    x = generate("noise:level_dbfs=-10,seed=3", samplerate, channels, 0, fpp * npackets)
    words24 = np.clip(np.round(x * 2**23), -2**23, 2**23 - 1).astype(np.int64)
    settings = EngineSettings(bits=16, dither="tpdf", shaper="flat", seed=21)
    tap = tmp_path / "tap.wav"
    source = RtpSource(LOOPBACK, 0, "L24", samplerate, channels, payload_type=96, depth_ms=4.0, idle_s=0.3)
    engine = NetEngine(settings, source, tap=str(tap))
    engine.start()
    port = engine.receiver.port
    # Packet 5 is dropped; 10 and 11 are swapped; 15 is sent twice.  The sequence starts near the 16-bit wrap.
    order = [k for k in range(npackets) if k != 5]
    i10 = order.index(10)
    order[i10], order[i10 + 1] = order[i10 + 1], order[i10]
    order.insert(order.index(15) + 1, 15)
    first_seq, first_ts, ssrc = 65530, 2**32 - 100, 0x1234ABCD
    tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    try:
        for k in order:
            block = words24[k * fpp:(k + 1) * fpp]
            tx.sendto(l24_packet(first_seq + k, first_ts + k * fpp, ssrc, block, marker=(k == 0)), (LOOPBACK, port))
            time.sleep(0.0005)
    finally:
        tx.close()
    deadline = time.monotonic() + 10
    while not engine.finished and time.monotonic() < deadline:
        time.sleep(0.02)
    status = engine.stop()
    stream = status["streams"]["rtp_in"]
    assert (stream["lost"], stream["reordered"], stream["duplicated"], stream["late"]) == (1, 1, 1, 0)
    assert stream["packets_received"] == npackets - 1
    assert status["gaps"] == [{"engine_frame": 5 * fpp, "frames": fpp, "seq": (first_seq + 5) & 0xFFFF,
                               "reason": "lost packet (zeros)"}]

    expected_input = words24 / 2**23
    expected_input[5 * fpp:6 * fpp] = 0.0  # exactly one packet of zeros where the loss was
    expected, _ = render_array(expected_input, samplerate, settings)
    got, rate = sf.read(str(tap), dtype="int16", always_2d=True)
    assert rate == samplerate
    assert_array_equal(got, expected)
    sidecar = json.loads((tmp_path / "tap.wav.gaps.json").read_text())
    assert [g["engine_frame"] for g in sidecar["gaps"]] == [5 * fpp]


def test_jitter_buffer_counts_late_and_wraps():
    jb = JitterBuffer(depth_packets=2)
    released = []
    for seq in (65534, 65535, 0, 2, 3, 1, 4):  # 1 arrives after its slot was played (depth 2)
        released += jb.push(seq, seq)
    released += jb.flush()
    # Extended numbers continue across the 16-bit wrap (RFC 3550 Appendix A.1).
    assert [ext for ext, _ in released] == [65534, 65535, 65536, 65537, 65538, 65539, 65540]
    assert [item for _, item in released] == [65534, 65535, 0, None, 2, 3, 4]
    assert (jb.counts["lost"], jb.counts["late"], jb.counts["reordered"]) == (1, 1, 0)


def test_interarrival_jitter_rfc3550():
    # RFC 3550 §6.4.1: J(i) = J(i-1) + (|D(i-1,i)| - J(i-1))/16, D in timestamp units.
    est = JitterEstimator(8000)
    est.update(0.000, 0)
    est.update(0.020 + 0.001, 160)  # 1 ms late = 8 units
    assert est.jitter == 8 / 16
    est.update(0.040, 320)  # back on time: |D| = 8
    assert est.jitter == 0.5 + (8 - 0.5) / 16


def test_a_restarted_sender_is_followed(tmp_path):
    # RFC 3550 §8.2: a restarted sender draws a new SSRC (and new random sequence and timestamp starts).
    samplerate, channels, fpp = 48000, 1, 48
    x = generate("noise:level_dbfs=-10,seed=8", samplerate, channels, 0, fpp * 20)
    words24 = np.clip(np.round(x * 2**23), -2**23, 2**23 - 1).astype(np.int64)
    settings = EngineSettings(bits=24, dither="none", seed=1)  # 24-bit words pass unchanged
    tap = tmp_path / "tap.wav"
    engine = NetEngine(settings, RtpSource(LOOPBACK, 0, "L24", samplerate, channels, depth_ms=2.0, idle_s=1.5),
                       tap=str(tap))
    engine.start()
    port = engine.receiver.port
    tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    try:
        for k in range(10):
            tx.sendto(l24_packet(100 + k, 5000 + k * fpp, 0xAAAA0001, words24[k * fpp:(k + 1) * fpp]), (LOOPBACK, port))
            time.sleep(0.001)
        time.sleep(0.7)  # the first source falls silent (longer than rtstage.net.receiver.SSRC_SWITCH_S)
        for k in range(10, 20):
            tx.sendto(l24_packet(40000 + k, 9 + k * fpp, 0xBBBB0002, words24[k * fpp:(k + 1) * fpp]), (LOOPBACK, port))
            time.sleep(0.001)
    finally:
        tx.close()
    deadline = time.monotonic() + 10
    while not engine.finished and time.monotonic() < deadline:
        time.sleep(0.02)
    status = engine.stop()
    stream = status["streams"]["rtp_in"]
    assert stream["source_changes"] == 1 and stream["lost"] == 0 and stream["ssrc"] == 0xBBBB0002
    assert [g["engine_frame"] for g in status["gaps"]] == [10 * fpp]
    got, _ = sf.read(str(tap), dtype="int32", always_2d=True)
    assert_array_equal(got.astype(np.int64) >> 8, words24)
    sidecar = json.loads((tmp_path / "tap.wav.gaps.json").read_text())
    assert [(g["tap_frame"], g["frames"]) for g in sidecar["gaps"]] == [(10 * fpp, 0)]
