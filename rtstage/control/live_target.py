"""The control layer's target over the live engine: :class:`LiveTarget`.

:class:`LiveTarget` implements :class:`~rtstage.control.target.ControlTarget`
over a :class:`rtstage.live.supervisor.LiveEngine`, so the socket server, MIDI
input and presets drive ``rtstage run`` exactly as they drive the offline
stand-in :class:`~rtstage.control.target.EngineTarget`.

One publication in flight
-------------------------
The callback takes parameters from a seqlock block at a block boundary and
records only the *last* publication it took, with the sample index of that
block (``ctl[C_APPLIED_SEQ]``, ``ctl[C_APPLIED_FRAME]``).  To know the sample
index of *every* change without adding anything to the audio path, a
housekeeping thread (``rtstage-live-target``) keeps at most one publication in
flight:

1. :meth:`LiveTarget.submit` validates nothing more (the
   :class:`~rtstage.control.protocol.Controller` did), merges the change into
   a pending set under a lock and returns a ticket.  It never waits.
2. When nothing is in flight, the merged pending set is published at once,
   by :meth:`submit` itself, as one settings block
   (:meth:`LiveEngine.set_settings`: encode, then the seqlock write; tens of
   microseconds, no waiting on the audio thread).  Otherwise the
   housekeeping thread publishes it as soon as the one in flight is applied.
3. The thread sleeps until just after the next callback returns
   (:class:`rtstage.live.handoff.BlockWaiter`: the callback stamps its start
   and end with ``CLOCK_MONOTONIC``; one wake-up per block, no fixed poll)
   and looks at ``applied`` until the callback has taken that
   publication, then records ``(frame, values)``: in :attr:`applied`, in the
   automation log (:class:`~rtstage.control.automation.AutomationWriter`) and
   for :meth:`wait`.  Changes submitted meanwhile wait in the pending set and
   go out together in the next publication, all at one block boundary.

So every publication the callback applies is seen with its own sample index,
and the automation log lists the changes at the frames where they took
effect, which :func:`~rtstage.control.automation.process_with_automation`
re-renders bit for bit.  The cost is that two changes less than one block
apart are applied at the same boundary or at consecutive ones, never lost.

Every parameter reaches the kernel, ``monitor``, ``error_gain_db``,
``mute``, ``auto_mute`` and ``auto_mute_hold_s`` included.  The first change
that raises ``error_gain_db`` above 0 dB logs the hearing-safety caution
(:data:`rtstage.control.target.ERROR_GAIN_CAUTION`) on stderr, and
:meth:`caution` returns it for that ticket.  Status and meters carry
``auto_muted`` (per channel, read from the kernel's counters) and
``auto_muted_frames``.
"""

import collections
import threading
import time

from .. import params
from ..errors import RtstageError
from ..log import log
from ..threads import Startable, StoppableThread
from .target import ControlTarget

POLL_S = 0.0005
"""How often the housekeeping thread looks for the applied publication while one is in flight."""


APPLIED_KEPT = 256
"""Applied changes kept in :attr:`LiveTarget.applied` by default (the automation log has them all).

Each entry holds the change's values (a few hundred bytes); a run must not grow
with the changes it applies (the soak's goal, ``tools/soak.py``: at most 1 MB
over 30 minutes at 10 changes a second, about 55 bytes a change), so only the
latest ones are kept, in a ring that is full after the first few hundred.
"""


def _dbfs_none(channels):
    return [None] * int(channels)


class LiveTarget(ControlTarget, Startable):
    """Control target over a :class:`~rtstage.live.supervisor.LiveEngine`.

    Parameters
    ----------
    engine : rtstage.live.supervisor.LiveEngine
        A prepared engine (:meth:`LiveEngine.prepare` done: sample rate,
        container and seed are known).  Only this target may call its
        :meth:`~LiveEngine.set_settings` from now on.
    automation_log : rtstage.control.automation.AutomationWriter or None
        Receives every applied change with its sample index (written by the
        housekeeping thread, never by the audio thread).
    apply_timeout_s : float
        Default wait of :meth:`wait` for the block that applies a change.
    poll_s : float
        Poll interval of the housekeeping thread while a publication is in flight.
    applied_kept : int
        Applied changes kept in :attr:`applied` (the latest; :attr:`applied_count` counts them all).

    Notes
    -----
    Call :meth:`start` before the first change and :meth:`stop` after the
    engine stopped: :meth:`stop` records a publication the callback took in
    its last blocks and closes nothing it does not own (the automation log
    stays open for its owner to close).
    """

    def __init__(self, engine, automation_log=None, apply_timeout_s=1.0, poll_s=POLL_S, applied_kept=APPLIED_KEPT):
        if getattr(engine, "engine", None) is None:
            raise RtstageError("the live engine must be prepared before it can be controlled")
        self.engine = engine
        self.automation_log = automation_log
        self.apply_timeout_s = float(apply_timeout_s)
        self.poll_s = float(poll_s)
        self.applied = collections.deque(maxlen=int(applied_kept))
        """``(frame, values, monotonic_s)`` of the latest ``applied_kept`` applied changes, oldest first;
        ``monotonic_s`` is when the block that applied it started (from the callback's own clock), or when it was
        seen applied if that is unknown."""
        self.applied_count = 0
        """Changes applied since the start."""
        self.publications = 0
        self._values = params.defaults()
        self._values.update(params.values_from_settings(engine.settings))
        self._start_seed = engine.settings.seed
        self.core = engine.engine
        self._pending = {}
        self._pending_ticket = 0
        self._ticket = 0
        self._applied_ticket = 0
        self._applied_frame = {}
        self._inflight = None  # (engine seq, last ticket, values)
        self._pub_lock = threading.Lock()  # serializes publication and its bookkeeping
        self._lock = threading.Lock()
        self._cond = threading.Condition(self._lock)
        self._wake = threading.Event()
        self._worker = StoppableThread(self._run, "rtstage-live-target")

    # -- lifecycle ----------------------------------------------------------------------------
    def start(self):
        """Start the housekeeping thread; returns self."""
        if not self._worker.started:
            self._worker.start()
        return self

    def stop(self):
        """Stop the housekeeping thread after recording what the callback applied last."""
        self._worker.request_stop()
        self._wake.set()
        self._worker.stop()
        if self._inflight is not None:
            self._check_applied()
        with self._cond:
            self._cond.notify_all()

    # -- ControlTarget ------------------------------------------------------------------------
    def submit(self, values):
        ticket, _ = self._queue(values, lambda t: setattr(self, "_pending_ticket", t))
        self._try_publish()
        self._wake.set()
        return ticket

    def _stopping(self):
        return self._worker.stopping

    def status(self):
        live = self.engine.status()
        flags = live.get("xruns_after_settle", {})
        return {
            "state": "running" if live.get("state") == "running" else "idle",
            "frame": live.get("engine_frame", 0),
            "samplerate": live.get("samplerate"),
            "channels": live.get("channels"),
            "blocksize": live.get("blocksize"),
            "container_bits": self.core.container_bits,
            "uptime_s": live.get("uptime_s", 0.0),
            "xruns": int(flags.get("flagged_callbacks", 0)),
            "cpu_load": live.get("cpu_load", 0.0),
            "seed": self._start_seed,
            "settings": self.get(),
            "changes_applied": self.applied_count,
            "auto_muted": self._auto_muted(),
            "auto_muted_frames": self._auto_muted_frames(),
            "live": live,
        }

    def _auto_muted(self):
        return [bool(v) for v in self.core.auto_muted]

    def _auto_muted_frames(self):
        return [int(v) for v in self.core.auto_muted_frames]

    def meters(self):
        meters = getattr(self.engine, "meters", None)
        if callable(meters):
            snapshot = meters()
            if isinstance(snapshot, dict):
                snapshot = dict(snapshot, auto_muted=self._auto_muted())
            return snapshot
        live = self.engine.status()
        nch = live.get("channels") or 0
        return {
            "frame": live.get("engine_frame", 0),
            "peak_dbfs": _dbfs_none(nch),
            "rms_dbfs": _dbfs_none(nch),
            "clipped": live.get("clipped", []),
            "nonfinite": live.get("nonfinite", []),
            "auto_muted": self._auto_muted(),
            "levels_available": False,
        }

    # -- housekeeping -------------------------------------------------------------------------
    def _run(self):
        from ..live.realtime import enter_control_thread

        self.engine.control_thread_info = enter_control_thread()  # SCHED_FIFO below the audio thread, if permitted
        self._waiter = self.engine.block_waiter()
        while not self._worker.stopping:
            if self._inflight is not None:
                self._check_applied()
                if self._inflight is not None:
                    self._waiter.wait()  # until the next callback has returned, not a fixed poll
                    continue
            if self._try_publish():
                continue
            self._wake.wait(0.1)
            self._wake.clear()

    def _try_publish(self):
        """Publish the pending changes if nothing is in flight; True when it published."""
        with self._pub_lock:
            if self._inflight is not None or self._worker.stopping:
                return False
            with self._cond:
                values, ticket = self._pending, self._pending_ticket
                self._pending = {}
            if not values:
                return False
            eng = self.engine
            try:
                seq = eng.set_settings(params.settings_with(eng.settings, values))
            except RtstageError as exc:  # checked before submit; a refusal here is a bug, said on stderr
                log(f"control: change {values} refused by the live engine: {exc}")
                self._record(ticket, None, values)
                return False
            self.publications += 1
            self._inflight = (seq, ticket, values)
            return True

    def _check_applied(self):
        with self._pub_lock:
            if self._inflight is None:
                return
            seq, ticket, values = self._inflight
            applied_seq, frame = self.engine.last_applied()
            if applied_seq >= seq:
                self._inflight = None
                waiter = getattr(self, "_waiter", None)
                self._record(ticket, int(frame), values, waiter.effect_time_s(frame) if waiter else None)

    def _record(self, ticket, frame, values, effect_s=None):
        now = time.monotonic() if effect_s is None else effect_s
        if frame is not None:
            self.applied.append((frame, values, now))  # a ring: the oldest entry goes (a long run must not grow)
            self.applied_count += 1
            if self.automation_log is not None:
                self.automation_log.write(frame, values)
        with self._cond:
            self._record_applied(ticket, frame)
