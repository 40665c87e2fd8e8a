"""render --quiet and --json: one summary object on stdout, nothing else."""

import json

import numpy as np
import soundfile as sf

from rtstage.cli import main


def test_json_summary_and_quiet(tmp_path, capsys):
    src, out = str(tmp_path / "in.wav"), str(tmp_path / "out.wav")
    x = 0.25 * np.sin(2 * np.pi * 997 / 48000 * np.arange(48000 * 2))
    x[100] = 2.0  # one sample beyond full scale: the 16-bit word clips
    sf.write(src, np.stack([x, x], axis=1), 48000, subtype="FLOAT")
    assert main(["render", src, out, "--preset", "link16", "--seed", "5", "--quiet", "--json"]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    summary = json.loads(captured.out)
    assert captured.out.count("\n") == 1
    # Figures checked against soundfile's reading of the files and the preset file's settings.
    assert summary["frames"] == sf.info(out).frames == x.size
    assert summary["settings"]["bits"] == 16 and summary["settings"]["shaper"] == "gentle9-48k"
    assert summary["seed"] == 5 and summary["seed_drawn"] is False
    assert summary["clipped"] == 2 and summary["replaced"] == 0
    # The over-full-scale peak leaves the shaper no headroom: the warning is in the summary.
    assert len(summary["warnings"]) == 1 and "headroom" in summary["warnings"][0]
    assert summary["loudness"] is None


def test_loudness_target_in_the_summary(tmp_path, capsys):
    src, out = str(tmp_path / "in.wav"), str(tmp_path / "out.wav")
    # EBU Tech 3341 case 1: stereo 1 kHz at -23 dBFS reads -23.0 LUFS (from memory).
    x = 10 ** (-23 / 20) * np.sin(2 * np.pi * 1000 / 48000 * np.arange(48000 * 10))
    sf.write(src, np.stack([x, x], axis=1), 48000, subtype="FLOAT")
    assert main(["render", src, out, "--seed", "5", "--json", "--loudness-target", "ebu-r128"]) == 0
    captured = capsys.readouterr()
    summary = json.loads(captured.out)
    assert abs(summary["loudness"]["integrated_lufs"] + 23.0) < 0.1
    assert summary["loudness"]["target"]["pass"] is True
    assert "ebu-r128 PASS" in captured.err
