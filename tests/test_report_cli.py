"""`rtstage render --plot` and `rtstage report`: the four figures and the summary of a report."""

import json
import os

import numpy as np
import pytest
import soundfile as sf

from rtstage.cli import main

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
FIGURES = ("error-spectrum.png", "error-histogram.png", "noise-modulation.png", "shaper-ntf.png")


@pytest.fixture
def source(tmp_path):
    samplerate = 48000
    t = np.arange(samplerate * 8) / samplerate
    # A sine far below one 16-bit LSB plus a little broadband content (a scenario of our own).
    x = np.stack([3e-6 * np.sin(2 * np.pi * 997 * t)] * 2, axis=1)
    path = str(tmp_path / "in.wav")
    sf.write(path, x, samplerate, subtype="DOUBLE")
    return path


def test_render_plot_writes_the_four_figures(tmp_path, source, capsys):
    out_dir = tmp_path / "figs"
    report = tmp_path / "r.json"
    assert main(["render", source, str(tmp_path / "o.wav"), "--seed", "3", "--shaper", "thr9-48k",
                 "--report", str(report), "--plot", str(out_dir)]) == 0
    for name in FIGURES:
        with open(out_dir / name, "rb") as f:
            assert f.read(8) == PNG_SIGNATURE, name
    capsys.readouterr()
    # The summary of the same report: one line per channel with noise against prediction.
    assert main(["report", str(report)]) == 0
    text = capsys.readouterr().out
    assert "16-bit tpdf, shaper thr9-48k" in text
    assert text.count("ch") >= 2 and "noise modulation" in text


def test_report_reads_demo_passes_and_live_status(tmp_path, source, capsys):
    report = tmp_path / "r.json"
    assert main(["render", source, str(tmp_path / "o.wav"), "--seed", "3", "--report", str(report)]) == 0
    single = json.load(open(report))
    demo_like = tmp_path / "demo.json"
    demo_like.write_text(json.dumps({"passes": [single, single]}))
    status_like = tmp_path / "status.json"
    status_like.write_text(json.dumps({"frames": 1, "meters": single}))
    capsys.readouterr()
    assert main(["report", str(demo_like), "--plot", str(tmp_path / "p")]) == 0
    assert "pass-1" in capsys.readouterr().out
    assert os.path.exists(tmp_path / "p" / "pass-2" / "shaper-ntf.png")
    assert main(["report", str(status_like)]) == 0


def test_report_errors(tmp_path, capsys):
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    assert main(["report", str(bad)]) == 2
    assert "not valid JSON" in capsys.readouterr().err
    other = tmp_path / "other.json"
    other.write_text("{}")
    assert main(["report", str(other)]) == 2
    assert "not a meter report" in capsys.readouterr().err
    assert main(["report", str(tmp_path / "missing.json")]) == 2
