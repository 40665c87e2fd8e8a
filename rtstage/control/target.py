"""What the control layer drives: the :class:`ControlTarget` interface.

The socket server and the MIDI input never touch an engine directly.  They
validate a change with :func:`rtstage.params.validate_values` against
``target.get()``, then hand it to ``target.set``.  Anything that provides the
five methods below can be controlled: the live engine (``rtstage.live``) and,
here, :class:`EngineTarget`, an in-process target over the offline
:class:`rtstage.engine.Engine`, driven block by block by the caller or by a
:class:`BlockDriver` thread.

The contract a target must keep
-------------------------------
``get() -> dict``
    Current value of every parameter in :data:`rtstage.params.PARAMS` (the
    last accepted values, including ones not yet applied).
``check(values) -> None``
    Raise :class:`~rtstage.errors.RtstageError` for changes this target
    cannot take although they are valid in general (for example ``bits``
    beyond the word container chosen at start).  Called before ``set``.
``submit(values) -> ticket``
    Queue already validated, canonical changes atomically: all of them take
    effect together at the next block boundary, never half of them.  Never
    blocks (a few microseconds: it writes the parameter block); safe from any
    non-audio thread; never makes the audio thread wait.  Returns an
    increasing integer ticket.
``wait(ticket, timeout_s=None) -> int | None``
    Block until the changes of ``ticket`` (or a later one) took effect and
    return the sample index of the block that applied them, or None after
    the timeout (they still take effect).
``set(values) -> int | None``
    ``wait(submit(values))`` (provided by :class:`ControlTarget`).
``status() -> dict``
    At least ``state`` (``"running"`` or ``"idle"``), ``frame``,
    ``samplerate``, ``channels``, ``blocksize``, ``uptime_s``, ``xruns``,
    ``cpu_load`` (0..1, share of the block period spent processing),
    ``seed`` (the seed in use) and ``settings`` (``get()``).
``meters() -> dict``
    At least ``frame`` (sample index after the metered block),
    ``peak_dbfs`` and ``rms_dbfs`` (lists, one per channel, None for digital
    silence), ``clipped`` and ``nonfinite`` (lists of counts since start).

Hearing-safety caution
----------------------
The first change that raises ``error_gain_db`` above 0 dB on a target logs
:data:`ERROR_GAIN_CAUTION` on stderr, and :meth:`ControlTarget.caution`
returns it for that change's ticket, so that a control surface can show it
(the socket reply's ``caution`` field).

Targets may also offer ``applied`` (a sequence of ``(frame, values,
monotonic_s)`` of applied changes) for benchmarks and tests.
"""

import math
import threading
import time

import numpy as np

from .. import params
from ..log import log
from ..threads import Startable, StoppableThread


ERROR_GAIN_CAUTION = (
    "caution: error monitor make-up gain above 0 dB: the added error of a short word, raised by this gain, can be "
    "loud (limited at -20 dBFS peak); turn the listening level down first, protect your hearing, and follow local "
    "codes and licensed practice for listening levels"
)
"""Logged (and returned by :meth:`ControlTarget.caution`) the first time ``error_gain_db`` goes above 0 dB."""


TICKETS_KEPT = 512
"""Tickets whose sample index :meth:`ControlTarget.wait` can still return (the latest; older ones return a later
change's index or None)."""


class ControlTarget:
    """The interface the control layer drives (see the module docstring)."""

    _cautioned = False
    _cautions = None
    core = None
    """The :class:`rtstage.engine.Engine` behind the target (settings, container, counters), if any."""

    def note_caution(self, values, ticket):
        """Log the hearing-safety caution the first time ``values`` raise ``error_gain_db`` above 0 dB.

        Returns the caution text for that change, else None.
        """
        gain_db = values.get("error_gain_db")
        if gain_db is None or gain_db <= 0.0 or self._cautioned:
            return None
        self._cautioned = True
        if self._cautions is None:
            self._cautions = {}
        self._cautions[ticket] = ERROR_GAIN_CAUTION
        log(ERROR_GAIN_CAUTION)
        return ERROR_GAIN_CAUTION

    def caution(self, ticket):
        """The hearing-safety caution raised by the change of ``ticket``, or None."""
        return (self._cautions or {}).get(ticket)

    def get(self):
        """Current value of every parameter, by name (targets keep ``_values`` under ``_lock``)."""
        with self._lock:
            return dict(self._values)

    def _queue(self, values, under_lock=None):
        """Check ``values``, merge them into the current and pending values and give them the next ticket.

        ``under_lock(ticket)``, when given, runs with ``_cond`` held and its result is returned with the
        ticket: ``(ticket, result)``.  Logs the hearing-safety caution when the change calls for it.
        """
        self.check(values)
        with self._cond:
            self._values.update(values)
            self._pending.update(values)
            self._ticket += 1
            ticket = self._ticket
            result = under_lock(ticket) if under_lock is not None else None
        self.note_caution(values, ticket)
        return ticket, result

    def new_programme(self, label=None):
        """Close the loudness programme and start the next one (``label`` names it) at the next metered chunk.

        The closed programme's readings stay in the meters' ``loudness.programmes``.
        """
        starter = getattr(self.core_engine(), "new_programme", None)
        if starter is None:
            raise RtstageError("this engine has no loudness meter to start a programme on")
        starter(label)

    def core_engine(self):
        """The engine object that runs the meters (the live or deviceless engine), or None."""
        return getattr(self, "engine", None)

    def check(self, values):
        """Raise :class:`RtstageError` for valid changes this target cannot take (a word that does not fit)."""
        bits = values.get("bits")
        if bits is not None and self.core is not None:
            self.core.check_bits(bits)

    def submit(self, values):
        """Queue validated changes atomically for the next block boundary, without waiting; returns a ticket."""
        raise NotImplementedError

    def wait(self, ticket, timeout_s=None):
        """Wait (at most ``timeout_s``) until the changes of ``ticket`` took effect; their sample index, or None.

        Provided for targets that keep ``_cond`` (a Condition), ``_applied_ticket``, ``_applied_frame`` and
        ``apply_timeout_s`` and call :meth:`_record_applied` when changes take effect.
        """
        timeout_s = self.apply_timeout_s if timeout_s is None else timeout_s
        with self._cond:
            self._cond.wait_for(lambda: self._applied_ticket >= ticket or self._stopping(), timeout=timeout_s)
            for t in range(ticket, self._applied_ticket + 1):
                if t in self._applied_frame:
                    return self._applied_frame[t]
            return None

    def _stopping(self):
        """True when :meth:`wait` should give up at once (the target is stopping)."""
        return False

    def _record_applied(self, ticket, frame):
        """With ``_cond`` held: the changes up to ``ticket`` took effect at ``frame`` (None: not applied); wakes waiters."""
        for t in range(self._applied_ticket + 1, ticket + 1):
            self._applied_frame[t] = frame
        # Tickets are recorded in increasing order, so the dict's first keys are the oldest: drop them one by one
        # and the record stays the same size once full (a long run must not grow with its changes).
        while len(self._applied_frame) > TICKETS_KEPT:
            del self._applied_frame[next(iter(self._applied_frame))]
        self._applied_ticket = max(self._applied_ticket, ticket)
        self._cond.notify_all()

    def set(self, values):
        """Apply validated changes atomically; return the sample index they took effect at, or None."""
        return self.wait(self.submit(values))

    def status(self):
        """Engine status (see the module docstring for the fields)."""
        raise NotImplementedError

    def meters(self):
        """Meter snapshot (see the module docstring for the fields)."""
        raise NotImplementedError


def _dbfs(value):
    return None if value <= 0.0 else round(20.0 * math.log10(value), 3)


class EngineTarget(ControlTarget):
    """In-process target over an offline :class:`rtstage.engine.Engine`.

    Parameters
    ----------
    engine : rtstage.engine.Engine
        The engine to drive.  Only :meth:`process` may run it afterwards.
    blocksize : int
        Block size the driver uses, in frames (reported in status).
    automation_log : rtstage.control.automation.AutomationWriter or None
        Receives every applied change with its sample index.
    apply_timeout_s : float
        How long :meth:`set` waits for the next block boundary while running.

    Notes
    -----
    Changes are queued by :meth:`set` and applied by :meth:`process` before
    the block it is given, so they take effect at a block boundary, all
    together.  While no driver runs (``running`` false) :meth:`set` applies
    them at once, at the engine's current frame.  Every parameter reaches the
    kernel (``monitor``, ``mute`` and ``auto_mute`` included); the meters
    measure the requantized words whatever the monitor mode, and report
    ``auto_muted`` per channel.
    """

    def __init__(self, engine, blocksize=256, automation_log=None, apply_timeout_s=0.5):
        self.engine = self.core = engine
        self.blocksize = int(blocksize)
        self.automation_log = automation_log
        self.apply_timeout_s = float(apply_timeout_s)
        self.applied = []
        self.running = False
        self.xruns = 0
        self.cpu_load = 0.0
        self._values = params.defaults()
        self._values.update(params.values_from_settings(engine.settings))
        self._start_seed = engine.settings.seed
        self._pending = {}
        self._ticket = 0
        self._applied_ticket = 0
        self._applied_frame = {}
        self._lock = threading.Lock()
        self._cond = threading.Condition(self._lock)
        self._engine_lock = threading.Lock()
        self._t0 = time.monotonic()
        self._meters = self._meter_frame(None)

    # -- ControlTarget ------------------------------------------------------------------------
    def submit(self, values):
        seq, running = self._queue(values, lambda ticket: self.running)
        if not running:
            with self._engine_lock:
                self._apply_pending()
        return seq

    def status(self):
        with self._lock:
            settings = dict(self._values)
        return {
            "state": "running" if self.running else "idle",
            "frame": self.engine.frame,
            "samplerate": self.engine.samplerate,
            "channels": self.engine.channels,
            "blocksize": self.blocksize,
            "container_bits": self.engine.container_bits,
            "uptime_s": round(time.monotonic() - self._t0, 3),
            "xruns": self.xruns,
            "cpu_load": round(self.cpu_load, 4),
            "seed": self._start_seed,
            "settings": settings,
            "changes_applied": len(self.applied),
        }

    def meters(self):
        with self._lock:
            return dict(self._meters)

    # -- driving ------------------------------------------------------------------------------
    def _apply_pending(self):
        """Apply queued changes at the engine's current frame (engine lock held)."""
        with self._cond:
            pending, self._pending = self._pending, {}
            seq = self._ticket
        if pending:
            frame = self.engine.frame
            self.engine.apply(params.settings_with(self.engine.settings, pending))
            self.applied.append((frame, pending, time.monotonic()))
            if self.automation_log is not None:
                self.automation_log.write(frame, pending)
        else:
            frame = None
        with self._cond:
            if seq > self._applied_ticket:
                self._record_applied(seq, frame)

    def process(self, x, out=None):
        """Apply pending changes, then requantize block ``x``; returns the words."""
        with self._engine_lock:
            self._apply_pending()
            x = np.asarray(x)
            requantized = np.empty(x.shape, dtype=self.engine.dtype)
            y = self.engine.process(x, out=out, requantized=requantized)
        meters = self._meter_frame(requantized)
        with self._lock:
            self._meters = meters
        return y

    def _meter_frame(self, y):
        nch = self.engine.channels
        full_scale = self.engine.full_scale
        if y is None or len(y) == 0:
            peak = [None] * nch
            rms = [None] * nch
        else:
            yf = y.astype(np.float64) / full_scale
            peak = [_dbfs(v) for v in np.max(np.abs(yf), axis=0)]
            rms = [_dbfs(v) for v in np.sqrt(np.mean(yf * yf, axis=0))]
        return {
            "frame": self.engine.frame,
            "peak_dbfs": peak,
            "rms_dbfs": rms,
            "clipped": [int(v) for v in self.engine.clipped],
            "nonfinite": [int(v) for v in self.engine.nonfinite],
            "auto_muted": [bool(v) for v in self.engine.auto_muted],
        }


def sine_block(frame, nframes, channels, samplerate, level_dbfs=-20.0, frequency_hz=997.0):
    """A deterministic sine block at ``frequency_hz`` (997 Hz, AES17's test frequency) from ``frame``.

    Each channel is offset by a quarter period so channels differ.
    """
    n = np.arange(frame, frame + nframes, dtype=np.float64)[:, None]
    phase = 2.0 * np.pi * frequency_hz * n / samplerate + (np.pi / 2.0) * np.arange(channels)[None, :]
    return (10.0 ** (level_dbfs / 20.0)) * np.sin(phase)


class BlockDriver(Startable):
    """A thread that runs an :class:`EngineTarget` in real time, as a stand-in for the live engine.

    Parameters
    ----------
    target : EngineTarget
        Target to drive.
    nblocks : int or None
        Blocks to process before stopping; None runs until :meth:`stop`.
    realtime : bool
        Pace blocks at the block period (True) or run as fast as possible.
    source : callable or None
        ``source(frame, nframes) -> ndarray (nframes, channels)``; None: :func:`sine_block`.
    tap : bool
        Keep every output block in ``self.tap`` (a list of arrays).

    Notes
    -----
    ``xruns`` counts blocks that started more than one block period late;
    ``cpu_load`` is a moving average of processing time over the block period.
    """

    def __init__(self, target, nblocks=None, realtime=True, source=None, tap=True):
        self.target = target
        self.nblocks = nblocks
        self.realtime = realtime
        eng = target.engine
        self.source = source or (lambda f, n: sine_block(f, n, eng.channels, eng.samplerate))
        self.tap = [] if tap else None
        self.block_times_s = []
        self._worker = StoppableThread(self._run, "rtstage-block-driver")
        self.error = None

    def start(self):
        """Start the thread; the target reports ``running`` from now on."""
        self.target.running = True
        self._worker.start()
        return self

    def stop(self):
        """Stop the thread and wait for it."""
        self._worker.stop()
        self.target.running = False

    def wait(self, timeout_s=None):
        """Wait until ``nblocks`` are done; returns True when the thread has ended."""
        self._worker.join(timeout_s)
        return not self._worker.alive

    def _run(self):
        target = self.target
        eng = target.engine
        blocksize = target.blocksize
        period_s = blocksize / eng.samplerate
        t_next = time.monotonic()
        count = 0
        try:
            while not self._worker.stopping and (self.nblocks is None or count < self.nblocks):
                if self.realtime:
                    delay = t_next - time.monotonic()
                    if delay > 0:
                        time.sleep(delay)
                    elif -delay > period_s:
                        target.xruns += 1
                        t_next = time.monotonic()
                t_start = time.monotonic()
                x = self.source(eng.frame, blocksize)
                y = target.process(x)
                t_end = time.monotonic()
                self.block_times_s.append(t_start)
                if self.tap is not None:
                    self.tap.append(y)
                target.cpu_load = 0.9 * target.cpu_load + 0.1 * ((t_end - t_start) / period_s)
                t_next += period_s
                count += 1
        except Exception as exc:  # reported to the test or tool that owns the driver
            self.error = exc
        finally:
            target.running = False
            with target._cond:
                target._cond.notify_all()
