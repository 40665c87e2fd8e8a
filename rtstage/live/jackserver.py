"""A private JACK server with the dummy backend, for tests, benchmarks and machines without a sound card.

Examples
--------
>>> with JackDummyServer(samplerate=48000, period_frames=64) as server:   # doctest: +SKIP
...     subprocess.run([..., "rtstage", "run", ...], env=server.client_env())

The server runs under a unique name (``-n``); clients find it through
``JACK_DEFAULT_SERVER`` in their environment (:meth:`JackDummyServer.client_env`),
with ``JACK_NO_START_SERVER=1`` so that no client starts a server of its own.
The dummy backend runs the graph from a timer, which is all an rtstage test
needs: deterministic input comes from ``--source``.
"""

import itertools
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time

from ..errors import RtstageError

_COUNTER = itertools.count()


def jackd_path():
    """Path of ``jackd``, or None."""
    return shutil.which("jackd")


_NOTICE = []


def _notice_once():
    if not _NOTICE:
        _NOTICE.append(1)
        from ..log import log

        log("notice: SCHED_FIFO is not permitted here; JACK dummy servers run --no-realtime")


class JackDummyServer:
    """Start and stop ``jackd -d dummy`` under a private name.

    Parameters
    ----------
    samplerate : int
        Server sample rate in Hz.
    period_frames : int
        JACK period (buffer size) in frames.
    channels : int
        Capture and playback ports of the dummy device.
    name : str or None
        Server name; None makes a unique one.
    realtime : bool or None
        Run ``--realtime`` (SCHED_FIFO); None (the default) asks for it when
        this process may use SCHED_FIFO (:func:`rtstage.live.realtime.realtime_permitted`)
        and otherwise runs ``--no-realtime`` with a one-line notice.
    priority : int
        SCHED_FIFO priority of the server's process thread when realtime
        (``-P``); JACK2 runs its clients' process threads 5 below it.  The
        default, 75, puts the audio threads above the usual desktop and
        default-configured realtime threads (jackd's own default is 10).
    ready_timeout_s : float
        How long :meth:`start` waits for the server to accept clients.
    """

    def __init__(self, samplerate=48000, period_frames=64, channels=2, name=None, realtime=None, priority=75, ready_timeout_s=15.0):
        self.samplerate = int(samplerate)
        self.period_frames = int(period_frames)
        self.channels = int(channels)
        self.name = name or f"rtstage-{os.getpid()}-{next(_COUNTER)}"
        if realtime is None:
            from .realtime import realtime_permitted

            realtime = realtime_permitted()
            if not realtime:
                _notice_once()
        self.realtime = bool(realtime)
        self.priority = int(priority)
        self.ready_timeout_s = ready_timeout_s
        self.process = None
        self.log_path = os.path.join(tempfile.gettempdir(), f"{self.name}.jackd.log")

    def client_env(self, base=None):
        """Environment for a client process of this server."""
        env = dict(os.environ if base is None else base)
        env["JACK_DEFAULT_SERVER"] = self.name
        env["JACK_NO_START_SERVER"] = "1"
        env["JACK_NO_AUDIO_RESERVATION"] = "1"
        return env

    def command(self):
        """The jackd command line."""
        rt = ["--realtime", "-P", str(self.priority)] if self.realtime else ["--no-realtime"]
        return [jackd_path() or "jackd", *rt, "-n", self.name, "-d", "dummy", "-r", str(self.samplerate),
                "-p", str(self.period_frames), "-C", str(self.channels), "-P", str(self.channels)]

    def start(self):
        """Start the server and wait until it accepts clients."""
        if jackd_path() is None:
            raise RtstageError("jackd is not installed (package jackd2)")
        if self.running:
            return self
        env = self.client_env()
        log = open(self.log_path, "ab")
        try:
            self.process = subprocess.Popen(self.command(), stdin=subprocess.DEVNULL, stdout=log, stderr=log, env=env,
                                            start_new_session=True)
        finally:
            log.close()
        deadline = time.monotonic() + self.ready_timeout_s
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RtstageError(f"jackd exited with status {self.process.returncode} (log: {self.log_path})")
            if self._accepts_clients(env):
                return self
            time.sleep(0.1)
        self.stop()
        raise RtstageError(f"jackd did not accept clients within {self.ready_timeout_s} s (log: {self.log_path})")

    @staticmethod
    def _accepts_clients(env):
        lsp = shutil.which("jack_lsp")
        if lsp is None:
            time.sleep(1.0)
            return True
        result = subprocess.run([lsp], env=env, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, timeout=10)
        return result.returncode == 0 and b"playback" in result.stdout

    @property
    def running(self):
        """True while the server process is alive."""
        return self.process is not None and self.process.poll() is None

    def stop(self, timeout_s=5.0):
        """SIGTERM, then SIGKILL after ``timeout_s``; waits for the process."""
        if self.process is None:
            return
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.process = None

    def kill(self):
        """SIGKILL the server (simulates a crash)."""
        if self.process is not None and self.process.poll() is None:
            self.process.kill()
            self.process.wait()
        self.process = None

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()


def main(argv=None):
    """``python -m rtstage.live.jackserver [SECONDS]``: run a dummy server and print its name on stdout."""
    argv = sys.argv[1:] if argv is None else argv
    seconds = float(argv[0]) if argv else 3600.0
    with JackDummyServer() as server:
        print(server.name, flush=True)
        try:
            time.sleep(seconds)
        except KeyboardInterrupt:
            pass
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
