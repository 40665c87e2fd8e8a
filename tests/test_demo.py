"""The README's run-command: `rtstage demo` on a private JACK dummy server, switched over the real socket.

Checks the demo's own claims against theory: the tap equals the offline
re-render from the logged changes (bit for bit), flat TPDF adds Q²/4 of white
noise (Lipshitz, Wannamaker & Vanderkooy 1992) and its noise modulation is far
below RPDF's on this low-level programme.
"""

import json
import os
import subprocess
import sys

import numpy as np


def test_demo_runs_live_and_writes_its_report(tmp_path):
    out = tmp_path / "demo"
    proc = subprocess.run(
        [sys.executable, "-m", "rtstage", "demo", "--out", str(out)],
        capture_output=True, text=True, timeout=240, stdin=subprocess.DEVNULL,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert proc.stdout.strip().splitlines()[-1] == str(out)
    for name in ("tap.wav", "changes.jsonl", "report.json", "programme.wav", "status.json"):
        assert os.path.exists(out / name), name
    report = json.load(open(out / "report.json"))
    assert report["tap_equals_offline_render"] is True
    rpdf, tpdf, shaped = report["passes"]
    assert (rpdf["dither"], tpdf["dither"], shaped["dither"]) == ("rpdf", "tpdf", "tpdf")
    assert shaped["shaper"] != "flat"
    # Flat TPDF: white noise of power Q²/4, 20 Hz–20 kHz of 24 kHz, AES17 dBFS (10·log10(2·power)).
    q = 2.0**-15
    theory = 10 * np.log10(2 * q**2 / 4 * 19980 / 24000)
    for ch in tpdf["channels"]:
        assert abs(ch["added_noise_dbfs"]["unweighted"] - theory) < 0.5
    mod_rpdf = rpdf["channels"][0]["noise_modulation_db"]
    mod_tpdf = tpdf["channels"][0]["noise_modulation_db"]
    assert mod_tpdf is not None and mod_rpdf is not None
    assert mod_tpdf < 1.0 < 3.0 < mod_rpdf
    assert "took effect at sample" in proc.stderr
