"""Shared fixtures.

``jack_server``: a private JACK server (``jackd -d dummy``, ``--realtime`` where SCHED_FIFO is permitted, 48 kHz,
64-frame period) started for the test module and stopped (SIGTERM, then
SIGKILL) in teardown.  Clients get its name through
``jack_server.client_env()``.  The live tests need jackd and run in CI; they
are never skipped: a missing jackd is a failure.
"""

import pytest

from rtstage.live.jackserver import JackDummyServer


@pytest.fixture(scope="module")
def jack_server():
    """A running private JACK dummy server for one test module."""
    server = JackDummyServer(samplerate=48000, period_frames=64)
    server.start()
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture
def jack_server_factory():
    """Make JACK dummy servers inside a test; every one is stopped at teardown."""
    servers = []

    def make(**kwargs):
        server = JackDummyServer(**kwargs)
        servers.append(server)
        return server.start()

    try:
        yield make
    finally:
        for server in servers:
            server.stop()
