"""A link test over rtstage's RTP output: the packets received on 127.0.0.1 are the capture.

``rtstage run --device none`` plays the generated sequence (24 bits without
dither: the words pass unchanged; or 16 bits with TPDF) as RTP L24 or L16.
The test receives every packet on a loopback socket and decodes it with the
`rtp` package (RFC 3550 header) and numpy's big-endian views (RFC 3190 L24,
RFC 3551 L16), the readers of tests/test_net_rtp.py; the analyser must find
the stream transparent, or dithered to 16 bits.  Every packet goes to
127.0.0.1.
"""

import os
import subprocess
import sys

import pytest

from rtstage.cli import main
from rtstage.linktest.analyse import analyse

from test_net_rtp import LOOPBACK, PacketCollector, read_with_rtp_package

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000
SEED = 616
ENV = {**os.environ, "PYTHONPATH": ROOT}


@pytest.mark.parametrize("bits,dither,encoding,verdict", [(24, "none", "L24", ("none", 24)),
                                                          (16, "tpdf", "L16", ("dithered", 16))])
def test_rtp_output_path(tmp_path, bits, dither, encoding, verdict):
    src = str(tmp_path / "seq.wav")
    assert main(["linktest", "generate", src, "--seed", str(SEED), "--seconds", "2"]) == 0
    sink = PacketCollector()
    try:
        result = subprocess.run(
            [sys.executable, "-m", "rtstage", "run", "--device", "none", "--control-port", "0", "--blocksize", "48",
             "--source", src,
             "--bits", str(bits), "--dither", dither, "--seed", "3", "--rtp-out", f"{LOOPBACK}:{sink.port}",
             "--rtp-encoding", encoding, "--quiet"],
            cwd=ROOT, env=ENV, capture_output=True, text=True, timeout=180)
    finally:
        packets = sink.stop()
    assert result.returncode == 0, result.stderr
    sample_bytes = 3 if encoding == "L24" else 2
    words, _ = read_with_rtp_package(packets, 2, sample_bytes)
    report = analyse(words / 2.0 ** (8 * sample_bytes - 1), SR, SEED, bits=24)
    assert report["found"] is True and report["transparent"] is (verdict[0] == "none")
    for i, ch in enumerate(report["channels"]):
        # docs/rtp.md: 24 bits without dither pass the words unchanged; 16 bits with TPDF requantize them.
        assert (ch["source_channel"], ch["requantization"], ch["bits_passed"]) == (i, *verdict)
        assert (ch["slips"], ch["damaged"], ch["gain_db"], ch["polarity"], ch["drift_ppm"], ch["clipped"]) == \
            ([], [], 0.0, 1, 0.0, 0)
