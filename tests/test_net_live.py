"""RTP as a second output of the live engine on a JACK dummy server: the packets carry the tap's words.

The callback only writes the tap ring; the RTP thread drains it.  Checked
with the packet reader written from the RFCs (tests/test_net_rtp.py) and
against :class:`rtstage.Engine` on the same float64 source, which is what
``rtstage render`` computes.
"""

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.live.sources import generate
from rtstage.live.supervisor import LiveEngine

from test_net_rtp import LOOPBACK, PacketCollector, read_rfc_packets

SR = 48000


def test_live_rtp_second_output(jack_server, tmp_path, monkeypatch):
    for key, value in jack_server.client_env({}).items():
        monkeypatch.setenv(key, value)
    nframes = 24000
    x = generate("noise:level_dbfs=-10,seed=4", SR, 2, 0, nframes)
    src = str(tmp_path / "src.wav")
    sf.write(src, x, SR, subtype="DOUBLE")
    settings = EngineSettings(bits=24, dither="tpdf", shaper="flat", seed=5)
    tap = str(tmp_path / "tap.wav")
    sink = PacketCollector()
    engine = LiveEngine(settings, source=src, blocksize=64, tap=tap,
                        rtp_out={"host": LOOPBACK, "port": sink.port, "ptime_ms": "0.25"})
    engine.meter_ring_s = 0
    status = engine.run(duration_s=30, install_signals=False)
    packets = sink.stop()
    assert status["streams"]["rtp_out"]["packets_sent"] == len(packets)
    got = read_rfc_packets(packets, 96, 12, 2, 3)  # L24, 0.25 ms = 12 frames at 48 kHz (AES67 §7.2)
    words, _ = sf.read(tap, dtype="int32", always_2d=True)
    expected = Engine(settings, 2, SR).process(x)
    # The device got the file, then digital zero for the rest of its last buffer (the tap keeps what was sent).
    assert_array_equal(words[:nframes], expected)
    assert_array_equal(got[:words.shape[0]], words.astype(np.int64) >> 8)
    assert not got[words.shape[0]:].any()
