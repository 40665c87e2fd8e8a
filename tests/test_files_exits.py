"""How commands end (rtstage/files/exits.py): statuses, one line, the crash log, a closed stdout.

Checked against the operating system (a real pipe whose reader is closed,
files under XDG_STATE_HOME as the XDG Base Directory specification places the
state folder) and against the statuses the README documents.
"""

import os
import subprocess
import sys

import pytest

from rtstage.errors import RtstageError, RuntimeFailure
from rtstage.files import exits
from rtstage.files.policy import Interrupted

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def run(func, capsys):
    status = exits.run_guarded(func)
    err = capsys.readouterr().err.strip().splitlines()
    return status, err


def test_statuses_and_one_line(capsys, tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path))

    def bad():
        raise RtstageError("bad value")

    def io():
        raise RuntimeFailure("disk gone")

    def signalled():
        raise Interrupted(15)

    assert run(bad, capsys) == (2, ["rtstage: bad value"])
    assert run(io, capsys) == (1, ["rtstage: disk gone"])
    status, err = run(signalled, capsys)
    assert status == 143 and len(err) == 1 and "SIGTERM" in err[0]


def test_internal_error_goes_to_a_log_under_the_state_folder(capsys, tmp_path, monkeypatch):
    # XDG Base Directory specification: user state data lives under $XDG_STATE_HOME.
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path))

    def crash():
        return {}["missing"]

    status, err = run(crash, capsys)
    assert status == 1 and len(err) == 1 and err[0].startswith("rtstage: internal error (KeyError")
    logs = os.listdir(tmp_path / "rtstage")
    assert len(logs) == 1 and str(tmp_path / "rtstage" / logs[0]) in err[0]
    text = (tmp_path / "rtstage" / logs[0]).read_text()
    assert "Traceback (most recent call last)" in text and "KeyError" in text


def test_state_folder_default(monkeypatch):
    monkeypatch.delenv("XDG_STATE_HOME", raising=False)
    assert exits.state_folder() == os.path.join(os.path.expanduser("~"), ".local", "state", "rtstage")


def test_usage_errors_are_one_line():
    parser = exits.Parser(prog="rtstage render")
    parser.add_argument("--bits", type=int)
    exits.add_overwrite_options(parser)
    with pytest.raises(exits.UsageError, match="^render: argument --bits: invalid int value"):
        parser.parse_args(["--bits", "x"])
    with pytest.raises(exits.UsageError, match="--overwrite.*--accept-unsafe-shaping"):
        parser.parse_args(["--force"])


def test_closed_stdout_ends_quietly():
    # A reader that goes away (like `| head`) closes the pipe; POSIX write(2) then fails with EPIPE.
    code = "from rtstage.cli import main; raise SystemExit(main(['shaper', 'plot', 'wannamaker-f9', '--points', '60000']))"
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env=dict(os.environ, PYTHONPATH=ROOT))
    proc.stdout.readline()
    proc.stdout.close()
    err = proc.stderr.read()
    assert proc.wait(timeout=60) == 0
    assert err == b""
