"""``rtstage linktest`` on the command line: help with the worked example, exit codes, one-line errors."""

import subprocess
import sys
import os

import pytest

from rtstage.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.mark.parametrize("action", [[], ["generate"], ["analyse"], ["run"]])
def test_help_ends_with_the_worked_example(action):
    result = subprocess.run([sys.executable, "-m", "rtstage", "linktest", *action, "--help"], cwd=ROOT,
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 0
    text = result.stdout
    assert "worked example" in text and "rtstage linktest generate bridge-check.wav --seed 2718" in text
    assert "rtstage linktest analyse far-end.wav --seed 2718" in text
    assert "caution" in text.lower() and "local codes" in text
    assert text.rstrip().endswith("exit status: 0 transparent, 1 not transparent, 2 bad usage or sequence not found.")


@pytest.mark.parametrize("argv,fragment", [
    (["linktest", "analyse", "nothing-here.wav", "--seed", "1"], "no such file"),
    (["linktest", "generate", "x.wav", "--seed", "1", "--bits", "30"], "8..24 bits"),
    (["linktest", "generate", "x.txt", "--seed", "1"], "output format"),
    (["linktest", "run", "--seed", "1", "--bits", "4"], "8..24 bits"),
])
def test_errors_are_one_line_with_status_2(tmp_path, capsys, argv, fragment, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) >= 1 and err[-1].startswith("rtstage:") and fragment in err[-1]


def test_usage_errors_are_one_line(capsys):
    assert main(["linktest", "generate", "x.wav"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("rtstage: linktest generate:") and "--seed" in err[0]


def test_run_with_an_unknown_device_fails_cleanly(tmp_path):
    env = dict(os.environ, JACK_NO_START_SERVER="1")
    result = subprocess.run([sys.executable, "-m", "rtstage", "linktest", "run", "--output-device", "no-such-device-here",
                             "--input-device", "no-such-device-here", "--seed", "1", "--seconds", "1"],
                            cwd=ROOT, env=env, capture_output=True, text=True, timeout=120)
    assert result.returncode == 2
    last = result.stderr.strip().splitlines()[-1]
    assert last.startswith("rtstage:") and "no-such-device-here" in last
    assert "caution" in result.stderr  # said before anything plays
