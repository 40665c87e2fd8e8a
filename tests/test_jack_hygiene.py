"""Nothing a killed process leaves behind may stop the next one from starting.

Two kinds of leftover were seen on a machine that ran the suite many times:

* JACK2's server table (``/dev/shm/jack-shm-registry``) has eight slots
  (``MAX_SERVERS`` in jack2's common/shm.h); jackd frees its own slot when it
  exits normally and frees a dead server's slot only for a server of the same
  name (``jack_register_server`` in common/shm.c).  Eight killed servers under
  unique names made every later ``jackd`` fail with "Too many servers already
  active".  :func:`rtstage.live.jackserver.reclaim_dead_server_slots` frees the
  slots of rtstage's own dead servers, under JACK's registry semaphore.
* The live engine's shared block was a named file under /dev/shm, unlinked only
  by a clean stop; a killed ``rtstage run`` left it behind.  It is now an
  anonymous memory file (``memfd_create``) handed to the stream worker by
  descriptor.
"""

import os
import signal
import subprocess
import sys
import time

from rtstage.live.jackserver import JackDummyServer, reclaim_dead_server_slots

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
JACK_MAX_SERVERS = 8  # jack2 common/shm.h


def test_killed_servers_do_not_use_up_jacks_server_table(jack_server_factory):
    # One more killed server than JACK has slots: without the reclaim, the ninth start fails.
    for _ in range(JACK_MAX_SERVERS + 1):
        server = jack_server_factory(samplerate=48000, period_frames=256)
        os.kill(server.process.pid, signal.SIGKILL)  # a crash: nothing of ours sees it happen
        server.process.wait()
    # Each start freed the slot of the server killed before it; the last one's slot is still taken.
    assert reclaim_dead_server_slots() == [server.name]
    assert reclaim_dead_server_slots() == []
    survivor = jack_server_factory(samplerate=48000, period_frames=256)
    assert survivor.running


def test_reclaim_frees_only_rtstage_servers_and_only_dead_ones(tmp_path):
    foreign = JackDummyServer(samplerate=48000, period_frames=256, name=f"hygiene-probe-{os.getpid()}")
    live = JackDummyServer(samplerate=48000, period_frames=256)
    foreign.start()
    try:
        live.start()
        try:
            foreign.kill()  # a dead server of another name: not ours to free
            freed = reclaim_dead_server_slots()
            assert foreign.name not in freed and live.name not in freed
            assert live.running
        finally:
            live.stop()
    finally:
        # jackd frees a dead slot for a server of the same name: start and stop it cleanly to give the slot back.
        foreign.start()
        foreign.stop()
    assert foreign.name not in reclaim_dead_server_slots()


def _shm_names():
    return {n for n in os.listdir("/dev/shm") if n.startswith("rtstage")} if os.path.isdir("/dev/shm") else set()


def test_killed_run_leaves_no_shared_memory_and_its_worker_ends(jack_server, tmp_path):
    before = _shm_names()
    err_path = tmp_path / "err.txt"
    with open(err_path, "w") as err:
        proc = subprocess.Popen([sys.executable, "-m", "rtstage", "run", "--source", "tone:level_dbfs=-20",
                                 "--blocksize", "256", "--status-file", str(tmp_path / "s.json")],
                                env=jack_server.client_env(), cwd=ROOT, stderr=err, stdout=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 90
        while "rtstage: running:" not in err_path.read_text():
            assert proc.poll() is None and time.monotonic() < deadline, err_path.read_text()
            time.sleep(0.05)
        assert _shm_names() == before  # the shared block has no name in any folder while it runs
        worker = _worker_pid(proc.pid)
        assert worker is not None
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        deadline = time.monotonic() + 10  # the worker sees its stdin close and stops its stream
        while os.path.exists(f"/proc/{worker}") and _state(worker) != "Z" and time.monotonic() < deadline:
            time.sleep(0.05)
        assert not os.path.exists(f"/proc/{worker}") or _state(worker) == "Z"
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait()
    assert _shm_names() == before


def _worker_pid(parent):
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                stat = open(f"/proc/{entry}/stat").read()
            except OSError:
                continue
            if int(stat.rsplit(")", 1)[1].split()[1]) == parent:
                return int(entry)
    return None


def _state(pid):
    try:
        return open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()[0]
    except OSError:
        return "gone"
