"""Server limits and authentication: oversized lines, request rate, client count, slow and idle clients, tokens.

Every drop must be stated to the client (a ``closing`` event with a reason) and
must leave the server serving others.  Only 127.0.0.1 is ever bound.
"""

import json
import os
import socket
import time

import pytest

from rtstage.control.protocol import Controller
from rtstage.control.server import ControlServer, is_loopback, read_token_file
from rtstage.control.testing import control_stack
from rtstage.errors import RtstageError

QUIET = lambda message: None  # noqa: E731


def read_all(sock, timeout_s=5.0):
    """Lines until the server closes the connection."""
    sock.settimeout(timeout_s)
    data = b""
    while True:
        chunk = sock.recv(65536)
        if not chunk:
            break
        data += chunk
    return [json.loads(line) for line in data.splitlines() if line.strip()]


def still_serving(stack):
    with stack.client() as c:
        return c.request({"op": "hello"})["ok"]


def test_oversized_line_gets_reply_then_drop():
    with control_stack(logger=QUIET, server_options={"max_line_bytes": 1024}) as stack:
        sock = socket.create_connection(("127.0.0.1", stack.server.port))
        try:
            sock.sendall(b'{"op": "get", "pad": "' + b"x" * 5000 + b'"}\n')
            lines = read_all(sock)
        finally:
            sock.close()
        assert lines[0]["event"] == "greeting"
        assert lines[1] == {"id": None, "ok": False, "error": "request line longer than 1024 bytes"}
        assert lines[2] == {"event": "closing", "reason": "oversized line (more than 1024 bytes)"}
        assert still_serving(stack)


def test_line_at_the_limit_is_served():
    with control_stack(logger=QUIET, server_options={"max_line_bytes": 1024}) as stack, stack.client() as c:
        line = json.dumps({"op": "hello", "id": "x" * 10})
        line = line[:-1] + " " * (1024 - len(line)) + "}"
        assert len(line) == 1024
        c.send_line(line.encode() + b"\n")
        assert c.read_line()["ok"]


def test_rate_limit_replies_then_drops():
    options = {"rate_hz": 1.0, "burst": 5, "max_refused": 20}
    with control_stack(logger=QUIET, server_options=options) as stack:
        sock = socket.create_connection(("127.0.0.1", stack.server.port))
        try:
            sock.sendall(b'{"op": "hello"}\n' * 40)
            lines = read_all(sock)
        finally:
            sock.close()
        replies = [r for r in lines if "ok" in r]
        assert sum(r["ok"] for r in replies) == 5  # the burst
        refused = [r for r in replies if not r["ok"]]
        assert len(refused) == 20 and all("rate limit" in r["error"] for r in refused)
        assert lines[-1] == {"event": "closing", "reason": "rate limit exceeded by 20 requests in a row"}
        assert still_serving(stack)


def test_too_many_clients():
    with control_stack(logger=QUIET, server_options={"max_clients": 2}) as stack:
        with stack.client() as a, stack.client() as b:
            sock = socket.create_connection(("127.0.0.1", stack.server.port))
            try:
                assert read_all(sock) == [{"event": "closing", "reason": "too many clients (at most 2)"}]
            finally:
                sock.close()
            assert a.request({"op": "hello"})["ok"] and b.request({"op": "hello"})["ok"]


def test_idle_client_dropped():
    with control_stack(logger=QUIET, server_options={"idle_timeout_s": 0.3}) as stack:
        sock = socket.create_connection(("127.0.0.1", stack.server.port))
        try:
            lines = read_all(sock)
        finally:
            sock.close()
        assert lines[-1] == {"event": "closing", "reason": "idle for 0.3 s"}


def test_client_that_does_not_read_is_dropped_and_others_are_served():
    # A client that pipelines requests with large replies (the parameter list)
    # and never reads: the kernel's socket buffers fill, then the server's own
    # buffer passes max_buffer_bytes and the client is dropped, while another
    # client keeps getting replies.
    options = {"max_buffer_bytes": 4096, "rate_hz": 1e6, "burst": 1e6}
    with control_stack(logger=QUIET, server_options=options) as stack:
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)  # before connect, so the window stays small
        sock.connect(("127.0.0.1", stack.server.port))
        try:
            sock.sendall(b'{"op": "list"}\n' * 5000)
            deadline = time.monotonic() + 30.0
            while stack.server.drops.get("client is not reading") is None and time.monotonic() < deadline:
                assert still_serving(stack)
                time.sleep(0.05)
            assert stack.server.drops.get("client is not reading") == 1
        finally:
            sock.close()
        assert still_serving(stack)


def test_end_of_input_without_newline():
    with control_stack(logger=QUIET) as stack:
        sock = socket.create_connection(("127.0.0.1", stack.server.port))
        try:
            sock.sendall(b'{"op": "hello"}')
            sock.shutdown(socket.SHUT_WR)
            lines = read_all(sock)
        finally:
            sock.close()
        assert lines[-1]["ok"] is False and "not terminated" in lines[-1]["error"]


class TestAuthentication:
    def test_non_loopback_without_token_refused(self):
        # Refused before any socket is bound, so nothing listens off loopback.
        with control_stack(logger=QUIET) as stack:
            with pytest.raises(RtstageError, match="needs a token"):
                ControlServer(Controller(stack.target), host="0.0.0.0", port=0)
            with pytest.raises(RtstageError, match="needs a token"):
                ControlServer(Controller(stack.target), host="192.0.2.1", port=0)  # RFC 5737 documentation address

    def test_loopback_detection(self):
        # RFC 1122 (127.0.0.0/8) and RFC 4291 (::1)
        assert is_loopback("127.0.0.1") and is_loopback("127.3.2.1") and is_loopback("::1")
        assert is_loopback("localhost")
        assert not is_loopback("0.0.0.0") and not is_loopback("::") and not is_loopback("192.0.2.1")  # RFC 5737

    def test_token_required_first(self):
        with control_stack(logger=QUIET, token="s3cret-token") as stack:
            with stack.client() as c:  # sends auth with the token
                assert c.greeting["auth"] == "required"
                assert c.request({"op": "set", "values": {"bits": 12}})["ok"]
            for first in (b'{"op": "get"}\n', b'{"op": "auth", "token": "wrong"}\n', b'{"op": "auth"}\n', b"junk\n"):
                sock = socket.create_connection(("127.0.0.1", stack.server.port))
                try:
                    sock.sendall(first + b'{"op": "set", "values": {"bits": 4}}\n')
                    lines = read_all(sock)
                finally:
                    sock.close()
                assert lines[1]["ok"] is False
                assert lines[-1]["event"] == "closing"
                assert len(lines) == 3  # the set after a failed auth is never looked at
            assert stack.engine.settings.bits == 12

    def test_token_file_permissions(self, tmp_path):
        path = tmp_path / "token"
        path.write_text("abc123\n")
        os.chmod(path, 0o600)
        assert read_token_file(str(path)) == "abc123"
        os.chmod(path, 0o640)
        with pytest.raises(RtstageError, match="chmod 600"):
            read_token_file(str(path))
        empty = tmp_path / "empty"
        empty.write_text("\n")
        os.chmod(empty, 0o600)
        with pytest.raises(RtstageError, match="empty"):
            read_token_file(str(empty))
        with pytest.raises(RtstageError, match="cannot read"):
            read_token_file(str(tmp_path / "missing"))

    def test_bind_failure_is_an_error(self):
        with control_stack(logger=QUIET) as stack:
            with pytest.raises(RtstageError, match="cannot listen"):
                ControlServer(Controller(stack.target), host="127.0.0.1", port=stack.server.port, logger=QUIET).start()
