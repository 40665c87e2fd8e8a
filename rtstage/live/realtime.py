"""Realtime scheduling and locked memory for the process that owns the stream.

A live engine on air needs three things from the operating system, and says
plainly which of them it got:

* **SCHED_FIFO** for the audio thread (the JACK server and its clients' process
  threads, or PortAudio's callback thread) and, below it, for the thread that
  hands control changes to the callback.  :func:`realtime_permitted` probes it
  on a throwaway thread (set, then restore); :func:`set_thread_realtime` asks
  for it on the calling thread.
* **Locked memory**: :func:`lock_memory` calls ``mlockall(MCL_CURRENT |
  MCL_FUTURE)``, so neither the pages mapped now nor those mapped later (thread
  stacks, the JIT's code) can be paged out; :func:`touch_pages` reads one byte
  of every page of a buffer so that the shared block, the rings and the kernel
  state are resident before the first callback.
* **A report**: :func:`thread_report` lists every thread of a process with its
  name, policy and priority (from ``/proc`` and ``sched_getscheduler``), and
  :func:`memory_locked` reads ``VmLck`` of a process.

When realtime was asked for and refused, :data:`GRANT_HINT` is the one line
that says how to grant it.

Everything here is Linux-specific and harmless elsewhere: a missing call
reports "not permitted" and nothing more.

References
----------
.. [1] Linux man-pages: sched(7), sched_setscheduler(2), mlockall(2),
   getrlimit(2) (RLIMIT_RTPRIO, RLIMIT_MEMLOCK), proc(5).
.. [2] systemd.exec(5): ``LimitRTPRIO=``, ``LimitMEMLOCK=``.
"""

import ctypes
import ctypes.util
import os
import resource
import threading
import time

import numpy as np

MCL_CURRENT = 1
MCL_FUTURE = 2
MCL_ONFAULT = 4
"""``mlockall`` flags (Linux values, mlockall(2)); ``MCL_ONFAULT`` (Linux 4.4) locks pages as they are first
touched instead of making the whole address space resident (hundreds of MB of libraries nobody calls)."""
PR_SET_NAME = 15
"""``prctl`` option naming the calling thread (prctl(2))."""

CONTROL_PRIORITY_BELOW_AUDIO = 1
"""The control hand-off thread runs this many steps below the audio thread's SCHED_FIFO priority."""
DEFAULT_AUDIO_PRIORITY = 5
"""Priority assumed for the audio thread until it is known: a JACK2 client's process thread under a server
started with the default priority (measured here with ``ps -L -o rtprio``)."""

GRANT_HINT = ("realtime scheduling or memory locking was refused: grant it with rtprio and memlock limits "
              "(e.g. '@audio - rtprio 95' and '@audio - memlock unlimited' in /etc/security/limits.d/, then log in "
              "again) or, under systemd, LimitRTPRIO=95 and LimitMEMLOCK=infinity in the unit")
"""One line telling how to grant realtime scheduling and locked memory on Linux (limits.conf(5), systemd.exec(5))."""

_POLICY_NAMES = {getattr(os, n): n[len("SCHED_"):].lower() for n in
                 ("SCHED_OTHER", "SCHED_FIFO", "SCHED_RR", "SCHED_BATCH", "SCHED_IDLE") if hasattr(os, n)}

_libc = None


def _lib():
    global _libc
    if _libc is None:
        _libc = ctypes.CDLL(ctypes.util.find_library("c") or None, use_errno=True)
    return _libc


def _fifo_available():
    return hasattr(os, "sched_setscheduler") and hasattr(os, "SCHED_FIFO")


def realtime_permitted(priority=1):
    """True when this process may put a thread under SCHED_FIFO at ``priority``.

    The probe runs on a throwaway thread: it asks for SCHED_FIFO and, if that
    succeeds, returns the thread to SCHED_OTHER before it ends.  It is the
    answer the kernel gives (capabilities, RLIMIT_RTPRIO, cgroup realtime
    budget all included), not a guess from the limits.
    """
    if not _fifo_available():
        return False
    result = []

    def probe():
        try:
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(int(priority)))
        except OSError:
            result.append(False)
            return
        result.append(True)
        try:
            os.sched_setscheduler(0, os.SCHED_OTHER, os.sched_param(0))
        except OSError:
            pass

    t = threading.Thread(target=probe, name="rtstage-rt-probe")
    t.start()
    t.join()
    return bool(result and result[0])


def limits():
    """RLIMIT_RTPRIO and RLIMIT_MEMLOCK (soft values; None means unlimited) and whether we are root."""

    def soft(which):
        value = resource.getrlimit(which)[0]
        return None if value == resource.RLIM_INFINITY else int(value)

    return {"rtprio": soft(resource.RLIMIT_RTPRIO), "memlock_bytes": soft(resource.RLIMIT_MEMLOCK),
            "root": os.geteuid() == 0}


def name_thread(name):
    """Give the calling thread a kernel-visible name (``comm``, 15 bytes), so reports and ``ps -L`` show it."""
    try:
        _lib().prctl(PR_SET_NAME, ctypes.c_char_p(name.encode()[:15]), 0, 0, 0)
    except (AttributeError, OSError):
        pass


def set_thread_realtime(priority):
    """Put the calling thread under SCHED_FIFO at ``priority``; returns True when granted."""
    if not _fifo_available() or priority < 1:
        return False
    try:
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(int(priority)))
        return True
    except OSError:
        return False


def control_priority(audio_priority=None):
    """SCHED_FIFO priority for the control hand-off thread: below the audio thread, at least 1."""
    audio = DEFAULT_AUDIO_PRIORITY if audio_priority is None else int(audio_priority)
    return max(1, audio - CONTROL_PRIORITY_BELOW_AUDIO)


def lock_memory():
    """``mlockall(MCL_CURRENT | MCL_FUTURE | MCL_ONFAULT)`` (without ``MCL_ONFAULT`` on kernels that lack it).

    Every page already touched and every page touched later stays resident;
    :func:`touch_pages` then makes the buffers the callback uses resident.

    Returns
    -------
    tuple
        (locked, error message or None).
    """
    try:
        fn = _lib().mlockall
    except AttributeError:
        return False, "mlockall is not available on this system"
    rc = fn(MCL_CURRENT | MCL_FUTURE | MCL_ONFAULT)
    if rc != 0 and ctypes.get_errno() == 22:  # EINVAL: a kernel without MCL_ONFAULT
        rc = fn(MCL_CURRENT | MCL_FUTURE)
    if rc == 0:
        return True, None
    return False, f"mlockall failed: {os.strerror(ctypes.get_errno())}"


def touch_pages(buffer):
    """Read one byte of every page of ``buffer`` (anything numpy can view as bytes); returns the page count.

    Reading never changes memory another process may be writing; with the
    pages locked, a read fault makes each page resident for good.
    """
    data = np.frombuffer(buffer, dtype=np.uint8)
    page = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096
    if data.size == 0:
        return 0
    # Summing a strided view reads each page once; the result is irrelevant.
    int(data[::page].sum(dtype=np.uint64))
    return (data.size + page - 1) // page


def _status_kb(pid, key):
    try:
        with open(f"/proc/{pid or 'self'}/status") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def memory_locked(pid=None):
    """Size of the locked mappings of a process in bytes (``VmLck`` of /proc/PID/status), or None when unknown.

    With ``MCL_ONFAULT`` this is the size of every locked mapping, not what is
    resident: :func:`memory_resident` gives that.
    """
    return _status_kb(pid, "VmLck")


def memory_resident(pid=None):
    """Resident memory of a process in bytes (``VmRSS``), or None when unknown."""
    return _status_kb(pid, "VmRSS")


def thread_report(pid=None):
    """Every thread of process ``pid`` (default: this one): tid, name, policy and priority.

    Returns
    -------
    list of dict
        ``{"tid", "name", "policy", "priority"}``; ``policy`` is ``other``,
        ``fifo``, ``rr``, ``batch`` or ``idle``.
    """
    pid = os.getpid() if pid is None else int(pid)
    out = []
    try:
        tids = sorted(int(t) for t in os.listdir(f"/proc/{pid}/task"))
    except OSError:
        return out
    for tid in tids:
        try:
            with open(f"/proc/{pid}/task/{tid}/comm") as f:
                name = f.read().strip()
            policy = os.sched_getscheduler(tid)
            priority = os.sched_getparam(tid).sched_priority
        except OSError:
            continue
        out.append({"tid": tid, "name": name, "policy": _POLICY_NAMES.get(policy, str(policy)),
                    "priority": int(priority)})
    return out


def highest_fifo_priority(pid):
    """Highest SCHED_FIFO/RR priority among the threads of ``pid`` (the audio thread), or None."""
    prios = [t["priority"] for t in thread_report(pid) if t["policy"] in ("fifo", "rr")]
    return max(prios) if prios else None


def summary(pid=None):
    """Plain-data realtime report of one process: threads, locked bytes."""
    return {"pid": os.getpid() if pid is None else int(pid), "memory_locked_bytes": memory_locked(pid),
            "threads": thread_report(pid)}


def prepare_stream_process(*buffers):
    """In the process that owns the stream, before it opens: lock memory, then touch every page of ``buffers``.

    Returns
    -------
    dict
        ``memory_locked`` (bool), ``lock_error`` (str or None),
        ``pages_touched`` (int), ``realtime_permitted`` (bool).
    """
    locked, error = lock_memory()
    pages = sum(touch_pages(b) for b in buffers)
    return {"memory_locked": locked, "lock_error": error, "pages_touched": int(pages),
            "realtime_permitted": realtime_permitted()}


def enter_control_thread(name="rtstage-control", audio_priority=None):
    """Called first thing by the control hand-off thread: name it and ask for SCHED_FIFO below the audio thread.

    Returns
    -------
    dict
        ``tid``, ``name``, ``requested_priority``, ``granted`` (bool).
    """
    name_thread(name)
    priority = control_priority(audio_priority)
    granted = set_thread_realtime(priority)
    return {"tid": threading.get_native_id(), "name": name, "requested_priority": priority, "granted": granted}


def _python_thread_names():
    return {t.native_id: t.name for t in threading.enumerate() if t.native_id is not None}


def engine_status(worker_pid, worker_info, control_thread=None):
    """The ``realtime`` section of ``rtstage run``'s status.

    Parameters
    ----------
    worker_pid : int or None
        The stream worker's process id (None while no stream runs).
    worker_info : dict or None
        What the worker reported from :func:`prepare_stream_process`.
    control_thread : dict or None
        What :func:`enter_control_thread` returned (None without control).

    Returns
    -------
    dict
        ``stream_process`` (pid, memory locked, size of the locked mappings and
        resident bytes, pages
        touched, every thread with policy and priority), ``audio_thread``
        (policy and priority of the stream process's highest-priority
        thread), ``control_process`` (this process's threads, with their
        Python names), ``control_thread`` and ``hint`` (:data:`GRANT_HINT`
        when realtime or locking was asked for and refused, else None).
    """
    info = dict(worker_info or {})
    stream_threads = thread_report(worker_pid) if worker_pid else []
    rt_threads = [t for t in stream_threads if t["policy"] in ("fifo", "rr")]
    audio = max(rt_threads, key=lambda t: t["priority"]) if rt_threads else None
    names = _python_thread_names()
    own = thread_report()
    for t in own:
        t["name"] = names.get(t["tid"], t["name"])
    refused = (info.get("memory_locked") is False) or (control_thread is not None and not control_thread.get("granted"))
    return {
        "stream_process": {"pid": worker_pid, "memory_locked": info.get("memory_locked"),
                           "locked_vm_bytes": memory_locked(worker_pid) if worker_pid else None,
                           "resident_bytes": memory_resident(worker_pid) if worker_pid else None,
                           "lock_error": info.get("lock_error"), "pages_touched": info.get("pages_touched"),
                           "promoted_threads": info.get("promoted_threads"),
                           "threads": stream_threads},
        "audio_thread": ({"policy": audio["policy"], "priority": audio["priority"], "tid": audio["tid"]}
                         if audio else {"policy": "other", "priority": 0, "tid": None}),
        "control_process": {"pid": os.getpid(), "threads": own},
        "control_thread": control_thread,
        "hint": GRANT_HINT if refused else None,
    }


def engine_realtime(engine):
    """The ``realtime`` status section of a :class:`~rtstage.live.supervisor.LiveEngine`.

    Read live while the stream worker runs; after it stopped, the last
    reading taken while it ran (kept on the engine), so the final status
    still says what the stream had.
    """
    worker = getattr(engine, "worker", None)
    reply = getattr(engine, "_worker_reply", None) or {}
    control = getattr(engine, "control_thread_info", None)
    if worker is not None and worker.poll() is None:
        last = getattr(engine, "_realtime_last", None)
        now = time.monotonic()
        if last is not None and last["stream_process"]["pid"] == worker.pid and now - engine._realtime_at < 1.0:
            return dict(last, control_thread=control)  # /proc is read at most once a second
        report = engine_status(worker.pid, reply.get("realtime"), control)
        engine._realtime_last, engine._realtime_at = report, now
        return report
    last = getattr(engine, "_realtime_last", None)
    if last is not None:
        last = dict(last, control_thread=control)
        return last
    return engine_status(None, reply.get("realtime"), control)


def start_notice(engine):
    """After the stream opens (once per engine): put the control thread below the audio thread, log one line
    on what realtime the stream got, and the grant hint when something was refused."""
    if getattr(engine, "_realtime_noticed", False):
        return
    engine._realtime_noticed = True
    report = engine_realtime(engine)
    audio = report["audio_thread"]
    ctl = report.get("control_thread")
    if ctl is not None and ctl["granted"] and audio["policy"] in ("fifo", "rr") and ctl["requested_priority"] >= audio["priority"]:
        priority = max(1, audio["priority"] - CONTROL_PRIORITY_BELOW_AUDIO)
        try:
            os.sched_setscheduler(ctl["tid"], os.SCHED_FIFO, os.sched_param(priority))
            ctl["requested_priority"] = priority
        except OSError:
            pass
    locked = report["stream_process"]["memory_locked"]
    line = f"realtime: audio thread {audio['policy']} {audio['priority']}, memory {'locked' if locked else 'not locked'}"
    if ctl is not None:
        line += f", control thread {'fifo ' + str(ctl['requested_priority']) if ctl['granted'] else 'other'}"
    _log(line)
    if report["hint"]:
        _log(report["hint"])


def _log(message):
    from ..log import log

    log(message)


def warm_meter_thread(block, samplerate, thread_class, **thread_kwargs):
    """Run one complete meter-thread step on a scratch copy of ``block``'s layout, before the stream starts.

    Everything the meter thread calls that numba compiles (the meter ring
    read, the bank's kernels, the snapshot) is compiled, or loaded from the
    cache, here; otherwise the thread's first step compiles it while audio
    runs, holding the GIL for seconds with a cold cache and starving the
    control, MIDI and hand-off threads (and publishing no snapshot until it is
    done).
    """
    from . import shared as S

    nch, container_bits, max_frames = block.geometry[0], block.geometry[1], block.geometry[2]
    scratch = S.SharedBlock(nch, container_bits, max_frames, 0, 0, 8 * max_frames)
    scratch.kernel.iparams[:] = block.kernel.iparams
    scratch.kernel.fparams[:] = block.kernel.fparams
    frames = 2 * max_frames
    words = np.zeros((frames, nch), dtype=scratch.out_dtype)
    S.meter_ring_write(scratch.ctl, scratch.meter_x, scratch.meter_words, np.zeros((frames, nch)), words, frames)
    thread = thread_class(scratch, samplerate, **thread_kwargs)
    thread.step(final=True)
    return thread.latest()


ALSA_AUDIO_PRIORITY = 70
"""SCHED_FIFO priority given to PortAudio's ALSA callback thread (the level JACK clients run at under our servers)."""


def thread_ids():
    """Kernel thread ids of this process."""
    try:
        return {int(t) for t in os.listdir("/proc/self/task")}
    except OSError:
        return set()


def promote_new_threads(before, priority=ALSA_AUDIO_PRIORITY):
    """Put every thread of this process that is not in ``before`` under SCHED_FIFO at ``priority``.

    Called right after PortAudio's ALSA host API started a stream: the new
    thread is its callback thread, which it creates with the default policy
    (``PaAlsa_EnableRealtimeScheduling`` sets attributes that glibc ignores
    without ``PTHREAD_EXPLICIT_SCHED``: tried here, the thread stayed
    SCHED_OTHER).  Returns the thread ids promoted.
    """
    done = []
    for tid in sorted(thread_ids() - set(before)):
        try:
            os.sched_setscheduler(tid, os.SCHED_FIFO, os.sched_param(int(priority)))
            done.append(tid)
        except OSError:
            pass
    return done
