"""RTP as a second output of ``rtstage run`` on a JACK dummy server: the packets carry the tap's words.

The callback only writes the tap ring; the RTP thread drains it.  Checked
with the packet reader written from the RFCs (tests/test_net_rtp.py) and
against :class:`rtstage.Engine` on the same float64 source, which is what
``rtstage render`` computes.  Every packet goes to 127.0.0.1.
"""

import json
import os
import subprocess
import sys

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.live.sources import generate

from test_net_rtp import LOOPBACK, PacketCollector, read_rfc_packets

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000


def test_live_rtp_second_output(jack_server, tmp_path):
    import sdp_transform

    nframes = 24000
    x = generate("noise:level_dbfs=-10,seed=4", SR, 2, 0, nframes)
    src = str(tmp_path / "src.wav")
    sf.write(src, x, SR, subtype="DOUBLE")
    tap, st, sdp = (str(tmp_path / n) for n in ("tap.wav", "status.json", "out.sdp"))
    sink = PacketCollector()
    result = subprocess.run(
        [sys.executable, "-m", "rtstage", "run", "--source", src, "--bits", "24", "--dither", "tpdf", "--seed", "5",
         "--blocksize", "64", "--tap", tap, "--status-file", st, "--rtp-out", f"{LOOPBACK}:{sink.port}",
         "--rtp-ptime-ms", "0.25", "--rtp-sdp", sdp, "--control-port", "0", "--quiet"],
        env=jack_server.client_env({**os.environ, "PYTHONPATH": ROOT}), cwd=ROOT, capture_output=True, text=True,
        timeout=600)  # generous: a cold numba cache compiles the callback first
    assert result.returncode == 0, result.stderr
    packets = sink.stop()
    status = json.load(open(st))
    assert status["streams"]["rtp_out"]["packets_sent"] == len(packets)
    got = read_rfc_packets(packets, 96, 12, 2, 3)  # L24, 0.25 ms = 12 frames at 48 kHz (AES67 §7.2)
    words, _ = sf.read(tap, dtype="int32", always_2d=True)
    expected = Engine(EngineSettings(bits=24, dither="tpdf", shaper="flat", seed=5), 2, SR).process(x)
    # The device got the file, then digital zero for the rest of its last buffer (the tap keeps what was sent).
    assert_array_equal(words[:nframes], expected)
    assert_array_equal(got[:words.shape[0]], words.astype(np.int64) >> 8)
    assert not got[words.shape[0]:].any()
    # RFC 7273: the device's clock paces this stream, so the SDP ties its timestamps to no reference clock.
    media = sdp_transform.parse(open(sdp).read())["media"][0]
    assert media["mediaClk"]["mediaClockName"] == "sender"
    assert media["port"] == sink.port and media["rtp"][0]["codec"] == "L24" and media["ptime"] == 0.25
