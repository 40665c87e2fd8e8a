"""``rtstage send``: one request or an interactive session against a server on 127.0.0.1.

Replies printed on stdout must be the server's JSON lines (RFC 8259, decoded
with Python's ``json``); the exit status is 0 only for an ok reply.
"""

import io
import json
import os
import socket

import pytest

from rtstage.cli import main
from rtstage.control.client import parse_words
from rtstage.control.testing import control_stack
from rtstage.errors import RtstageError

QUIET = lambda message: None  # noqa: E731


@pytest.fixture
def stack():
    with control_stack(logger=QUIET) as s:
        yield s


def run(capsys, *argv):
    status = main(list(argv))
    out = capsys.readouterr()
    return status, out.out, out.err


class TestParseWords:
    def test_json(self):
        assert parse_words(['{"op":', '"get"}']) == {"op": "get"}

    def test_shorthand(self):
        assert parse_words(["set", "bits=12", "dither=rpdf", "mute=true"]) == {
            "op": "set", "values": {"bits": 12, "dither": "rpdf", "mute": True}}
        assert parse_words(["get", "bits", "dither"]) == {"op": "get", "names": ["bits", "dither"]}
        assert parse_words(["subscribe", "rate_hz=5"]) == {"op": "subscribe", "rate_hz": 5}
        assert parse_words(["preset_load", "desk"]) == {"op": "preset_load", "name": "desk"}

    @pytest.mark.parametrize("words", [[], ["{bad"], ["{", "1}"], ["set", "bits"], ["status", "extra"]])
    def test_refused(self, words):
        with pytest.raises(RtstageError):
            parse_words(words)


def test_send_ok(capsys, stack):
    status, out, _ = run(capsys, "send", "--port", str(stack.server.port), "set", "bits=12")
    reply = json.loads(out)
    assert status == 0 and reply["ok"] and reply["values"] == {"bits": 12}
    assert stack.engine.settings.bits == 12


def test_send_json_request(capsys, stack):
    status, out, _ = run(capsys, "send", "--port", str(stack.server.port), '{"op": "get", "names": ["bits"], "id": "z"}')
    assert status == 0 and json.loads(out) == {"id": "z", "ok": True, "values": {"bits": 16}}


def test_send_not_ok_exits_1(capsys, stack):
    status, out, _ = run(capsys, "send", "--port", str(stack.server.port), "set", "bits=99")
    assert status == 1 and "between 2 and 24" in json.loads(out)["error"]


def test_send_no_server_exits_1(capsys):
    """No server is a run-time failure: exit status 1 (the exit statuses documented in README.md)."""
    with socket.socket() as s:  # a port nobody listens on: bind, read it, close
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    status, out, err = run(capsys, "send", "--port", str(port), "status")
    assert status == 1 and out == "" and "cannot connect" in err


def test_interactive(capsys, monkeypatch, stack):
    monkeypatch.setattr("sys.stdin", io.StringIO('get bits\n\nset bits=99\n{"op": "hello", "id": 5}\nbogus=\n'))
    status, out, err = run(capsys, "send", "--port", str(stack.server.port), "-i")
    lines = [json.loads(line) for line in out.splitlines()]
    assert lines[0]["event"] == "greeting"
    assert lines[1]["values"] == {"bits": 16}
    assert lines[2]["ok"] is False
    assert lines[3]["id"] == 5 and lines[3]["ok"]
    assert lines[4]["ok"] is False and "unknown op" in lines[4]["error"]
    assert status == 1


def test_token_file(capsys, tmp_path):
    token = tmp_path / "token"
    token.write_text("k3y\n")
    os.chmod(token, 0o600)
    with control_stack(logger=QUIET, token="k3y") as stack:
        status, out, _ = run(capsys, "send", "--port", str(stack.server.port), "--token-file", str(token), "status")
        assert status == 0 and json.loads(out)["status"]["server"]["token_required"] is True
        status, out, err = run(capsys, "send", "--port", str(stack.server.port), "status")
        assert status == 1 and "authentication failed" in json.loads(out)["error"]
