"""Helpers for tests that start ``rtstage`` processes: a free loopback port and waiting for a log line."""

import re
import socket
import time

LOOPBACK = "127.0.0.1"


def free_port():
    """A TCP port on 127.0.0.1 that nobody listens on at the moment of asking."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def wait_for(path, pattern, proc, timeout_s=600):
    """The first match of ``pattern`` in the text file ``path`` (a process's stderr), waiting while ``proc`` runs."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        text = open(path).read()
        m = re.search(pattern, text)
        if m:
            return m
        assert proc.poll() is None, text
        time.sleep(0.05)
    raise AssertionError(f"no {pattern!r} in: {open(path).read()}")

