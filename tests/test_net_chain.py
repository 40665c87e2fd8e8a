"""Two ``rtstage run --device none`` processes in a chain over 127.0.0.1: 24 bits unchanged, then 16 bits with TPDF.

A: a file at 24 bits without dither (the words pass unchanged), RTP L24 out.
The test relays A's packets to B and keeps them.  B: ``--source rtp:`` at 16
bits with TPDF, RTP L16 out to the test.  B's words must equal ``rtstage
render`` to 16 bits of A's words, bit for bit.  Every packet goes to 127.0.0.1.
"""

import json
import os
import socket
import subprocess
import sys
import threading

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage.live.sources import generate

from test_net_rtp import LOOPBACK, PacketCollector, read_rfc_packets, read_with_rtp_package

from procs import wait_for

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000
ENV = {**os.environ, "PYTHONPATH": ROOT}


def _run(*args):
    return [sys.executable, "-m", "rtstage", "run", *args]


class Relay:
    """Receives on a loopback port, keeps every packet, forwards it to another loopback port."""

    def __init__(self, to_port):
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 8 << 20)
        self.sock.bind((LOOPBACK, 0))
        self.sock.settimeout(0.05)
        self.port = self.sock.getsockname()[1]
        self.to = (LOOPBACK, to_port)
        self.packets = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self):
        while not self._stop.is_set():
            try:
                data = self.sock.recv(65536)
            except socket.timeout:
                continue
            self.packets.append(data)
            self.sock.sendto(data, self.to)

    def stop(self):
        self._stop.set()
        self._thread.join()
        self.sock.close()
        return self.packets



def test_chain_24_bit_feed_to_16_bit_link(tmp_path):
    nframes = 14400  # 0.3 s, 300 packets of 1 ms
    x = generate("noise:level_dbfs=-8,seed=6", SR, 2, 0, nframes)
    src = tmp_path / "src.wav"
    sf.write(str(src), x, SR, subtype="DOUBLE")
    sink = PacketCollector()
    err_b = tmp_path / "b.err"
    status_b = tmp_path / "b.json"
    with open(err_b, "w") as err:
        proc_b = subprocess.Popen(
            _run("--device", "none", "--source", f"rtp:{LOOPBACK}:0", "--rtp-in-encoding", "L24", "--samplerate",
                 str(SR), "--channels", "2", "--bits", "16", "--dither", "tpdf", "--seed", "7",
                 "--rtp-out", f"{LOOPBACK}:{sink.port}", "--rtp-in-idle-s", "1.0", "--status-file", str(status_b),
                 "--rtp-jitter-ms", "3"),
            cwd=ROOT, env=ENV, stderr=err, stdout=subprocess.DEVNULL)
    relay = None
    try:
        port_b = int(wait_for(err_b, r"receiving RTP L24 on 127\.0\.0\.1:(\d+)", proc_b).group(1))
        relay = Relay(port_b)
        sdp_a = tmp_path / "a.sdp"
        result_a = subprocess.run(
            _run("--device", "none", "--source", str(src), "--bits", "24", "--dither", "none",
                 "--rtp-out", f"{LOOPBACK}:{relay.port}", "--rtp-sdp", str(sdp_a), "--status-file",
                 str(tmp_path / "a.json")),
            cwd=ROOT, env=ENV, capture_output=True, text=True, timeout=600)
        assert result_a.returncode == 0, result_a.stderr
        assert proc_b.wait(timeout=600) == 0, open(err_b).read()
    finally:
        if proc_b.poll() is None:
            proc_b.kill()
            proc_b.wait()
        packets_a = relay.stop() if relay is not None else []
    packets_b = sink.stop()

    # A: 24 bits, no dither: the words are the source's 24-bit quantization (RFC 3190 L24, 1 ms = 48 frames).
    words_a = read_rfc_packets(packets_a, 96, 48, 2, 3)[:nframes]
    second, _ = read_with_rtp_package(packets_a, 2, 3)
    assert_array_equal(second[:nframes], words_a)
    a_wav = tmp_path / "a_words.wav"
    sf.write(str(a_wav), (words_a << 8).astype(np.int32), SR, subtype="PCM_24")
    # A's SDP, read by sdp-transform, describes what A sent.
    import sdp_transform

    media = sdp_transform.parse(sdp_a.read_text())["media"][0]
    assert media["port"] == relay.port and media["rtp"][0]["codec"] == "L24" and media["rtp"][0]["encoding"] == 2

    # B: what `rtstage render` makes of A's words at 16 bits, TPDF, seed 7.
    out = tmp_path / "render16.wav"
    r = subprocess.run([sys.executable, "-m", "rtstage", "render", str(a_wav), str(out), "--bits", "16", "--dither",
                        "tpdf", "--seed", "7"], cwd=ROOT, env=ENV, capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    expected, _ = sf.read(str(out), dtype="int16", always_2d=True)
    words_b = read_rfc_packets(packets_b, 96, 48, 2, 2)
    assert_array_equal(words_b[:nframes], expected.astype(np.int64))
    status = json.loads(status_b.read_text())
    stream = status["streams"]["rtp_in"]
    assert (stream["lost"], stream["late"], stream["duplicated"]) == (0, 0, 0)
    assert stream["packets_received"] == len(packets_a)
