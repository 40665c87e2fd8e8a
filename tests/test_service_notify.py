"""sd_notify by hand, the journal prefixes, and ``rtstage run`` under a (test-owned) service manager socket.

The protocol's reference is systemd's sd_notify(3) manual page (from
memory): datagrams of newline-separated ``KEY=VALUE`` on an AF_UNIX socket
named by ``NOTIFY_SOCKET``, ``@`` for the abstract namespace,
``WATCHDOG_USEC`` / ``WATCHDOG_PID``, ``RELOADING=1`` with
``MONOTONIC_USEC``.  The journal prefix ``<N>`` and ``JOURNAL_STREAM`` are
from sd-daemon(3) and systemd.exec(5) (from memory).  The test plays the
service manager: it owns the socket and reads what arrives.
"""

import os
import signal
import socket
import subprocess
import sys
import time

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.live.sources import generate
from rtstage import log as journal
from rtstage.service.notify import Notifier, notify_address, watchdog_interval_s

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000


def test_addresses_and_watchdog_environment():
    assert notify_address("@rtstage/x") == b"\0rtstage/x"
    assert notify_address("/run/systemd/notify") == "/run/systemd/notify"
    assert notify_address("") is None and notify_address(None) is None and notify_address("relative") is None
    assert watchdog_interval_s({"WATCHDOG_USEC": "2000000"}) == 1.0
    assert watchdog_interval_s({"WATCHDOG_USEC": "2000000", "WATCHDOG_PID": "1"}, pid=2) is None  # not ours
    assert watchdog_interval_s({"WATCHDOG_USEC": "2000000", "WATCHDOG_PID": "7"}, pid=7) == 1.0
    assert watchdog_interval_s({}) is None and watchdog_interval_s({"WATCHDOG_USEC": "x"}) is None


def test_notifier_abstract_socket_datagrams():
    name = f"rtstage-test-{os.getpid()}"
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as manager:
        manager.bind(b"\0" + name.encode())
        manager.settimeout(5)
        n = Notifier({"NOTIFY_SOCKET": "@" + name})
        assert n.enabled
        n.ready("up")
        n.reloading()
        n.stopping()
        n.close()
        ready, reloading, stopping = (manager.recv(4096).decode() for _ in range(3))
    assert ready == "READY=1\nSTATUS=up"
    lines = reloading.split("\n")
    assert lines[0] == "RELOADING=1" and lines[1].startswith("MONOTONIC_USEC=")
    # CLOCK_MONOTONIC in microseconds, as systemd expects (sd_notify(3))
    assert abs(int(lines[1].split("=")[1]) - time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000) < 60_000_000
    assert stopping == "STOPPING=1"
    assert not Notifier({}).enabled and Notifier({}).ready() is False


def test_journal_stream_detection_and_prefixes(tmp_path):
    path = tmp_path / "err"
    with open(path, "w") as f:
        st = os.fstat(f.fileno())
        assert journal.journal_stream_matches(f.fileno(), {"JOURNAL_STREAM": f"{st.st_dev}:{st.st_ino}"})
        assert not journal.journal_stream_matches(f.fileno(), {"JOURNAL_STREAM": f"{st.st_dev}:{st.st_ino + 1}"})
        assert not journal.journal_stream_matches(f.fileno(), {})
        stream = journal.JournalStream(f)
        stream.write("rtstage: running: dummy\nrtstage: warning: hot")
        stream.write("\nrtstage: audio stream failed on 'x': gone; reopening\n")
        stream.flush()
    # sd-daemon(3): SD_INFO "<6>", SD_WARNING "<4>", SD_ERR "<3>"
    assert path.read_text().splitlines() == ["<6>rtstage: running: dummy", "<4>rtstage: warning: hot",
                                             "<3>rtstage: audio stream failed on 'x': gone; reopening"]


def test_run_under_journal_prefixes_lines(tmp_path):
    """A real process whose stderr is a file named by JOURNAL_STREAM gets prefixed lines."""
    err_path = tmp_path / "err"
    with open(err_path, "w") as err:
        st = os.fstat(err.fileno())
        env = dict(os.environ, PYTHONPATH=ROOT, JOURNAL_STREAM=f"{st.st_dev}:{st.st_ino}")
        result = subprocess.run([sys.executable, "-m", "rtstage", "run", "--blocksize", "0", "--control-port", "0"],
                                stderr=err, env=env, cwd=ROOT, timeout=120)
    assert result.returncode == 2
    lines = err_path.read_text().splitlines()
    assert lines and all(line[:3] in ("<3>", "<4>", "<6>") for line in lines), lines
    assert lines[-1].startswith("<3>rtstage: ")  # the closing error line carries the error priority


class Manager:
    """The test's service manager side: an abstract AF_UNIX datagram socket and the messages with arrival times."""

    def __init__(self):
        self.name = f"rtstage-notify-{os.getpid()}-{time.monotonic_ns()}"
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(b"\0" + self.name.encode())
        self.messages = []
        self._cursor = 0  # messages before it were looked at by wait_for

    @property
    def env_value(self):
        return "@" + self.name

    def collect(self, seconds):
        deadline = time.monotonic() + seconds
        got = []
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                return got
            self.sock.settimeout(left)
            try:
                data = self.sock.recv(4096).decode()
            except socket.timeout:
                return got
            got.append((time.monotonic(), data))
            self.messages.append(got[-1])

    def wait_for(self, prefix, timeout_s):
        """The next message (after the last one found) starting with ``prefix``."""
        deadline = time.monotonic() + timeout_s
        while True:
            while self._cursor < len(self.messages):
                t, m = self.messages[self._cursor]
                self._cursor += 1
                if m.startswith(prefix):
                    return t, m
            if time.monotonic() >= deadline:
                break
            self.collect(min(0.5, max(0.01, deadline - time.monotonic())))
        raise AssertionError(f"no {prefix!r} within {timeout_s} s; got {[m for _, m in self.messages][-10:]}")

    def close(self):
        self.sock.close()


def pings(messages):
    return [t for t, m in messages if m == "WATCHDOG=1"]


def test_ready_watchdog_freeze_and_resume(jack_server_factory, tmp_path):
    server = jack_server_factory(samplerate=SR, period_frames=256)
    manager = Manager()
    source = "noise:level_dbfs=-20,seed=5"
    settings = EngineSettings(bits=16, dither="tpdf", shaper="flat", seed=91)
    tap, status_path = str(tmp_path / "tap.wav"), str(tmp_path / "status.json")
    watchdog_usec = 1_000_000
    env = server.client_env()
    env.update(NOTIFY_SOCKET=manager.env_value, WATCHDOG_USEC=str(watchdog_usec), PYTHONPATH=ROOT)
    env.pop("WATCHDOG_PID", None)
    err_path = tmp_path / "err.txt"
    with open(err_path, "w") as err:
        proc = subprocess.Popen([sys.executable, "-m", "rtstage", "run", "--source", source, "--seed", "91",
                                 "--blocksize", "256", "--control-port", "0", "--quiet", "--tap", tap,
                                 "--status-file", status_path], env=env, cwd=ROOT, stderr=err,
                                stdout=subprocess.DEVNULL)
    try:
        _, ready = manager.wait_for("READY=1", 300)  # a cold cache compiles the callback first
        # READY only after audio went out: the status line in the same datagram names a sample index > 0
        sample = int(ready.split("sample ")[1].split(",")[0])
        assert sample > 0, ready
        steady = manager.collect(4.0)
        times = pings(steady)
        assert len(times) >= 4, steady
        gaps = np.diff(times)
        # pings every WATCHDOG_USEC/2 (sd_notify(3) recommends half); never a gap the manager would punish
        assert np.max(gaps) < watchdog_usec / 1e6, gaps
        assert 0.25 < np.median(gaps) < 0.75, gaps
        assert any(m.startswith("STATUS=") for _, m in steady)

        os.kill(server.process.pid, signal.SIGSTOP)  # freeze the audio server: the frame counter stops
        try:
            manager.collect(1.0)  # a ping already on its way may still arrive
            frozen = manager.collect(3.0)
            manager._cursor = len(manager.messages)
            assert pings(frozen) == [], frozen
        finally:
            os.kill(server.process.pid, signal.SIGCONT)
        manager.wait_for("WATCHDOG=1", 90)  # the engine reopened the stream on the thawed server: pings resume
        resumed = manager.collect(2.0)
        assert len(pings(resumed)) >= 2
        proc.send_signal(signal.SIGTERM)
        manager.wait_for("STOPPING=1", 30)
        assert proc.wait(60) == 0, err_path.read_text()
    finally:
        try:
            os.kill(server.process.pid, signal.SIGCONT)
        except (ProcessLookupError, AttributeError):
            pass
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        manager.close()
    import json

    status = json.load(open(status_path))
    assert status["restarts"] >= 1 and status["notify"]["ready"] is True
    assert status["notify"]["watchdog_missed"] >= 1  # the frozen intervals sent nothing
    # the stream resumed where it stopped: the tap (gap recorded, never padded) is the offline render
    words = sf.read(tap, dtype="int16", always_2d=True)[0]
    assert status["tap_dropped_frames"] == 0 and words.shape[0] == status["engine_frame"]
    assert_array_equal(words, Engine(settings, 2, SR).process(generate(source, SR, 2, 0, words.shape[0])))
