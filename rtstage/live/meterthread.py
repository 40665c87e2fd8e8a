"""The meter thread: drains the meter ring and feeds a :class:`~rtstage.meters.MeterBank`.

The callback (:mod:`rtstage.live.cfunc`) does no metering itself: the kernel
writes the quantizer's input ``x·gain`` into its meter tap, and the callback
copies it with the output words into the meter ring of
:mod:`rtstage.live.shared` (whole blocks, or counted drops; it never waits).
Everything else happens here, in a thread of the main process.

Chunks
------
A :class:`MeterBank` update costs a few dozen numpy calls whatever its
length, so at 64-frame blocks the call overhead would dominate.  The thread
therefore gathers the ring into chunks of ``chunk_frames`` (4096) frames and
updates the bank once per chunk; a partial chunk is flushed before each
report.  The bank's figures do not depend on how the signal is split, so the
chunking changes no value.

Settings changes
----------------
The bank's prediction depends on the word length, dither, dither scale and
shaper.  The thread watches the sample index at which the callback applied
new parameters (:func:`rtstage.live.shared.applied`), reads the kernel's
parameters once no other change is pending, and, when any of those four
differ (a gain change does not), starts a new bank at exactly that sample
index.  The report then covers the frames since the last such change
(``metered_from_frame``).  While the meter ring drops nothing its frame k is
the engine's sample index k; after a drop the split is placed by the count
of frames read, and ``meter_dropped_frames`` says so.  Two changes within one
poll (20 ms) are seen as one, at the later sample index.

Report
------
At ``report_hz`` the thread publishes a snapshot (:meth:`MeterThread.latest`):
the bank's :meth:`~rtstage.meters.MeterBank.report`, the engine's exact
clipped and non-finite counts since the start, and the fields every control
target's ``meters()`` carries: ``frame`` (sample index after the last metered
frame), ``peak_dbfs`` and ``rms_dbfs`` (output words over the frames read
since the previous snapshot, None for digital silence) and ``clipped`` /
``nonfinite`` (a snapshot with no new frames keeps the previous levels).
"""

import math
import threading
import time

import numpy as np

from ..engine import StateView
from ..meters import MeterBank
from ..threads import StoppableThread
from . import shared as S

CHUNK_FRAMES = 4096
"""Frames gathered from the ring per :meth:`MeterBank.update` call."""
POLL_S = 0.02
"""Sleep between drains of the ring."""
DEFAULT_REPORT_HZ = 10.0
"""Snapshots per second."""


def _peak_rms_dbfs(peak, sumsq, frames):
    """dBFS values (AES17: a full-scale sine's RMS reads 0 dBFS) from a peak and a sum of squares; None for silence."""
    peaks, rmss = [], []
    for p, s in zip(peak, sumsq):
        peaks.append(20.0 * math.log10(p) if frames and p > 0.0 else None)
        rmss.append(10.0 * math.log10(2.0 * s / frames) if frames and s > 0.0 else None)
    return peaks, rmss


class MeterThread:
    """Thread draining a :class:`~rtstage.live.shared.SharedBlock`'s meter ring into a :class:`MeterBank`.

    Parameters
    ----------
    block : SharedBlock
        Shared arrays with a meter ring (``meter_frames > 0``).
    samplerate : int
        Sample rate in Hz.
    shaper_name : callable or None
        Returns the shaper id to put in the report for a set of taps (called
        with the taps when a bank starts); None leaves it unnamed.
    chunk_frames : int
        Frames per bank update (see the module notes).
    report_hz : float
        Snapshots per second.
    loudness_target : rtstage.meters.loudness.LoudnessTarget or None
        Delivery target the snapshots' ``loudness`` section is checked against.
    engine : rtstage.engine.StateView or None
        Where the kernel's counters and applied parameters are read (the live
        engine's :class:`~rtstage.engine.Engine`); None: a view of the block's
        kernel state.
    """

    def __init__(self, block, samplerate, shaper_name=None, chunk_frames=CHUNK_FRAMES, report_hz=DEFAULT_REPORT_HZ,
                 loudness_target=None, engine=None):
        if block.ctl[S.C_METER_ON] == 0:
            raise ValueError("the shared block has no meter ring")
        self.block = block
        self.engine = engine if engine is not None else StateView(block.kernel)
        self.samplerate = int(samplerate)
        self.shaper_name = shaper_name
        self.chunk_frames = int(chunk_frames)
        self.report_interval_s = 1.0 / float(report_hz)
        self.loudness_target = loudness_target
        nch = block.channels
        self._chunk_x = np.zeros((self.chunk_frames, nch), dtype=np.float64)
        self._chunk_w = np.zeros((self.chunk_frames, nch), dtype=block.out_dtype)
        self._fill = 0
        self._read_frames = 0  # frames taken from the ring = next sample index while nothing is dropped
        self._bank = None
        self._bank_key = None
        self._bank_from = 0
        self._switch = None  # (frame, key) of a pending bank change
        self._seen_seq = 0
        self._peak = np.zeros(nch)
        self._sumsq = np.zeros(nch)
        self._level_frames = 0
        self._latest = None
        self._lock = threading.Lock()
        self._worker = StoppableThread(self._run, "rtstage-meters")
        self.error = None
        self.busy_s = 0.0
        """Thread CPU time spent draining, metering and reporting (seconds)."""
        key = self._kernel_key()
        self._start_bank(key if key is not None else self.engine.meter_key(), 0)

    # --- thread -----------------------------------------------------------------------
    def start(self):
        """Start draining."""
        self._worker.start()
        return self

    def stop(self):
        """Stop the thread after a last drain; returns the final snapshot."""
        if self._worker.alive:
            self._worker.stop()
        else:
            self._worker.request_stop()
            self.step(final=True)
        return self.latest()

    def _run(self):
        last_report = 0.0
        try:
            while not self._worker.wait(POLL_S):
                t0 = time.thread_time()
                now = time.monotonic()
                due = now - last_report >= self.report_interval_s
                self.step(final=due)
                if due:
                    last_report = now
                self.busy_s += time.thread_time() - t0
            self.step(final=True)
        except Exception as exc:  # kept for the caller; the audio side never waits for this thread
            self.error = exc

    # --- work -------------------------------------------------------------------------
    def _kernel_key(self):
        """The kernel's meter-relevant parameters, or None while a change is pending (read is then unsafe)."""
        ctl = self.block.ctl
        seq, _ = S.applied(ctl)
        if int(ctl[S.C_PARAM_SEQ]) != int(seq):
            return None
        key = self.engine.meter_key()
        seq2, _ = S.applied(ctl)
        if seq2 != seq or int(ctl[S.C_PARAM_SEQ]) != int(seq):
            return None
        return key

    def _start_bank(self, key, frame):
        bits, dither_id, dither_scale, coefs, out_shift = key
        name = self.shaper_name(coefs) if self.shaper_name is not None else None
        # The programme's loudness carries on across setting changes (the noise figures restart).
        self._bank = MeterBank(self.block.channels, self.samplerate, bits, coefs, dither_id, dither_scale, out_shift,
                               shaper_id=name, loudness_meter=self._bank.loudness_meter if self._bank else None,
                               loudness_target=self.loudness_target)
        self._bank_key = key
        self._bank_from = int(frame)

    def _watch_settings(self):
        """Note a change applied by the callback; returns a frame not to read past yet, or None."""
        seq, frame = S.applied(self.block.ctl)
        if seq == self._seen_seq:
            return None
        key = self._kernel_key()
        if key is None:
            return int(frame)  # another change is on its way: stop at this one's frame and look again
        self._seen_seq = seq
        if key != (self._switch[1] if self._switch else self._bank_key):
            self._switch = (int(frame), key)
        return None

    def new_programme(self, label=None):
        """Start a new loudness programme at the next chunk (thread-safe: the meter thread applies it)."""
        with self._lock:
            self._programme_request = (label,)

    def _flush(self):
        with self._lock:
            request, self._programme_request = getattr(self, "_programme_request", None), None
        if request is not None:
            self._flush_chunk()
            self._bank.loudness_meter.new_programme(request[0])
        self._flush_chunk()

    def _flush_chunk(self):
        if self._fill == 0:
            return
        x, w = self._chunk_x[: self._fill], self._chunk_w[: self._fill]
        self._bank.update(x, w)
        q = np.abs(w.astype(np.float64)) * (1.0 / float(2 ** (self._bank.container_bits - 1)))
        np.maximum(self._peak, q.max(axis=0), out=self._peak)
        self._sumsq += np.einsum("ij,ij->j", q, q)
        self._level_frames += self._fill
        self._fill = 0

    def step(self, final=False):
        """Drain the ring once; with ``final``, flush the partial chunk and publish a snapshot.

        Called by the thread; call it directly only when the thread is not running.
        """
        b = self.block
        # Head first, then the applied sample index: a change applied inside
        # the frames up to this head is then visible (the callback records it
        # before it writes the block).
        limit = self._read_frames + S.ring_backlog(b.ctl, S.C_MRING_HEAD, S.C_MRING_TAIL)
        hold = self._watch_settings()
        if hold is not None:
            limit = min(limit, max(hold, self._read_frames))
        while True:
            room = min(self.chunk_frames - self._fill, limit - self._read_frames)
            if self._switch is not None and self._switch[0] - self._read_frames <= room:
                room = max(self._switch[0] - self._read_frames, 0)
                if room == 0:
                    self._flush()
                    self._start_bank(self._switch[1], self._switch[0])
                    self._switch = None
                    continue
            if room <= 0:
                break
            n = S.meter_ring_read(b.ctl, b.meter_x, b.meter_words, self._chunk_x[: self._fill + room],
                                  self._chunk_w[: self._fill + room], self._fill)
            self._fill += n
            self._read_frames += n
            if self._fill == self.chunk_frames:
                self._flush()
            if n < room:
                break
        if final:
            self._flush()
            self._publish()

    def _publish(self):
        report = self._bank.report()
        clipped = self.engine.clipped.tolist()
        nonfinite = self.engine.nonfinite.tolist()
        for c, ch in enumerate(report["channels"]):
            ch["clipped_samples"] = int(clipped[c])
            ch["nonfinite_samples"] = int(nonfinite[c])
        if self._level_frames or self._latest is None:
            peak, rms = _peak_rms_dbfs(self._peak, self._sumsq, self._level_frames)
        else:  # nothing new since the last snapshot: keep its levels
            peak, rms = self._latest["peak_dbfs"], self._latest["rms_dbfs"]
        self._peak[:] = 0.0
        self._sumsq[:] = 0.0
        self._level_frames = 0
        ctl = self.block.ctl
        report.update({
            "frame": self._bank_from + self._bank.frames,
            "metered_from_frame": self._bank_from,
            "peak_dbfs": peak,
            "rms_dbfs": rms,
            "clipped": [int(v) for v in clipped],
            "nonfinite": [int(v) for v in nonfinite],
            "meter_dropped_frames": int(ctl[S.C_MRING_DROPPED]),
            "meter_backlog_frames": S.ring_backlog(ctl, S.C_MRING_HEAD, S.C_MRING_TAIL),
            "meter_thread_busy_s": round(self.busy_s, 6),
        })
        with self._lock:
            self._latest = report

    def latest(self):
        """The last snapshot (a dict; see the module notes), or None before the first."""
        with self._lock:
            return self._latest
