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

import ctypes
import ctypes.util
import glob
import itertools
import mmap
import os
import struct
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

# JACK2's server table (common/shm.h, common/shm.c): a header in /dev/shm/jack-shm-registry holding
# MAX_SERVERS = 8 slots of (pid, name); guarded by the SysV semaphore with key 0x282929.  jackd frees its
# slot when it exits normally; a jackd that is killed (SIGKILL, a crash) leaves its slot taken, and jackd
# reclaims a dead slot only for a server of the same name, so eight such deaths under distinct names make
# every later server fail with "Too many servers already active".
_REGISTRY_PATH = "/dev/shm/jack-shm-registry"
_REGISTRY_MAGIC = 0x4A41434B  # "JACK"
_REGISTRY_SEM_KEY = 0x282929
_MAX_SERVERS = 8
_SLOTS_OFFSET = 24  # magic u32, protocol u16 (+2), type, size, hdr_len, entry_len (i32 each)


class _Sembuf(ctypes.Structure):
    _fields_ = [("sem_num", ctypes.c_ushort), ("sem_op", ctypes.c_short), ("sem_flg", ctypes.c_short)]


def _registry_lock(libc, op):
    """Take (op=-1) or give back (op=+1) JACK's registry semaphore; False when it cannot be used."""
    semid = libc.semget(_REGISTRY_SEM_KEY, 1, 0)
    if semid < 0:
        return False
    buf = _Sembuf(0, op, 0x1000)  # SEM_UNDO: released by the kernel should this process die holding it
    return libc.semop(semid, ctypes.byref(buf), 1) == 0


def _pid_alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def reclaim_dead_server_slots(prefix="rtstage-", path=_REGISTRY_PATH):
    """Free JACK server-table slots left by killed servers whose name starts with ``prefix``.

    jackd itself frees a dead server's slot only when a server of the same name
    starts again; rtstage's private servers have unique names, so a server that
    was killed (the restart test does it on purpose; a wedged server is killed
    after its stop timeout) would hold its slot until the next reboot.  This
    does for rtstage's own dead servers what jackd does for same-named ones,
    under JACK's registry semaphore.  Slots of other servers are never touched.

    The freed servers' socket and semaphore files in /dev/shm go with them.

    Returns
    -------
    list of str
        Names of the slots freed (empty when the table is absent or unrecognised).
    """
    if not os.path.exists(path):
        return []
    libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
    freed = []
    with open(path, "r+b") as f:
        size = os.fstat(f.fileno()).st_size
        if size < _SLOTS_OFFSET:
            return []
        with mmap.mmap(f.fileno(), size) as table:
            magic = struct.unpack_from("<I", table, 0)[0]
            hdr_len = struct.unpack_from("<i", table, 16)[0]
            stride = (hdr_len - _SLOTS_OFFSET) // _MAX_SERVERS
            if magic != _REGISTRY_MAGIC or stride < 8 or hdr_len > size:
                return []
            if not _registry_lock(libc, -1):
                return []
            try:
                for slot in range(_MAX_SERVERS):
                    at = _SLOTS_OFFSET + slot * stride
                    pid = struct.unpack_from("<i", table, at)[0]
                    raw = bytes(table[at + 4 : at + stride]).split(b"\0", 1)[0]
                    name = raw.decode(errors="replace").split(":", 1)[-1]  # "jack-<uid>:<server name>:"
                    if pid > 0 and name.startswith(prefix) and not _pid_alive(pid):
                        table[at : at + stride] = bytes(stride)
                        freed.append(name.rstrip(":"))
            finally:
                _registry_lock(libc, +1)
    shm_dir = os.path.dirname(path)
    for name in freed:  # the dead server's sockets and semaphores ("_" ends the name in each file name)
        for leftover in glob.glob(os.path.join(shm_dir, f"jack_{glob.escape(name)}_*")) + \
                glob.glob(os.path.join(shm_dir, f"jack_sem.{os.getuid()}_{glob.escape(name)}_*")):
            try:
                os.unlink(leftover)
            except OSError:
                pass
    return freed


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
    cpus : set of int or None
        Run the server on these CPUs only (``sched_setaffinity``); None leaves
        it free.  Tests that compare clients cycle by cycle put the server and
        every client on one CPU, so that a stall of that CPU (a hypervisor
        descheduling it, for instance) reaches all of them at once.
    """

    def __init__(self, samplerate=48000, period_frames=64, channels=2, name=None, realtime=None, priority=75, ready_timeout_s=15.0,
                 cpus=None):
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
        self.cpus = None if cpus is None else set(cpus)
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
        reclaim_dead_server_slots()
        env = self.client_env()
        log = open(self.log_path, "ab")
        try:
            self.process = subprocess.Popen(self.command(), stdin=subprocess.DEVNULL, stdout=log, stderr=log, env=env,
                                            start_new_session=True, preexec_fn=self.pin if self.cpus else None)
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

    def pin(self):
        """Restrict the calling process to this server's CPUs (a ``preexec_fn`` for its clients); no-op when free."""
        if self.cpus:
            os.sched_setaffinity(0, self.cpus)

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
                from ..log import log

                log(f"warning: jackd '{self.name}' did not stop within {timeout_s:g} s of SIGTERM; killed")
                self.process.kill()
                self.process.wait()
                reclaim_dead_server_slots()
        self.process = None

    def kill(self):
        """SIGKILL the server (simulates a crash)."""
        if self.process is not None and self.process.poll() is None:
            self.process.kill()
            self.process.wait()
            reclaim_dead_server_slots()
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
