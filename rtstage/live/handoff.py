"""Waking the control hand-off thread at the callback's block boundary instead of polling.

The callback cannot signal anyone (no system call, no lock on the audio
thread), but it writes ``CLOCK_MONOTONIC`` at the start and at the end of
every callback (:data:`rtstage.live.timing.C_CB_START_NS`,
:data:`~rtstage.live.timing.C_CB_DONE_NS`).  Blocks come one block period
apart, so the thread waiting for the callback to acknowledge a publication
sleeps until the predicted end of the next callback (last end + one block
period + a small margin) and looks once; if the stream stalled, it falls
back to short sleeps.  One wake-up per block while a change is in flight,
instead of one every 0.5 ms, and the acknowledgement is seen within the
margin of the callback's return instead of within the poll interval.

The start time of the block that applied a change (read when its
acknowledgement is seen) is the change's time of effect.
"""

import time

from .timing import C_CB_DONE_NS, C_CB_START_FRAME, C_CB_START_NS

MARGIN_NS = 30_000
"""Wake this long after the predicted end of the next callback (wake-up latency of a SCHED_FIFO thread)."""
FALLBACK_S = 0.0005
"""Sleep while no callback has run yet or the stream stalled."""


class BlockWaiter:
    """Sleeps until just after the next callback of a live engine.

    Parameters
    ----------
    ctl : ndarray of int64
        The engine's ``ctl`` array (shared with the stream worker).
    samplerate : int
        Sample rate in Hz.
    blocksize : int
        Frames per callback.
    """

    def __init__(self, ctl, samplerate, blocksize):
        self.ctl = ctl
        self.samplerate = float(samplerate)
        self.block_ns = int(round(1e9 * blocksize / samplerate))

    def wait(self):
        """Sleep until the predicted end of the next callback (or :data:`FALLBACK_S`)."""
        done_ns = int(self.ctl[C_CB_DONE_NS])
        now = time.monotonic_ns()
        if done_ns == 0 or now - done_ns > 4 * self.block_ns:
            time.sleep(FALLBACK_S)
            return
        target = done_ns + self.block_ns + MARGIN_NS
        while target <= now:
            target += self.block_ns
        time.sleep((target - now) * 1e-9)

    def effect_time_s(self, frame):
        """Monotonic time (s) at which sample ``frame`` started through the callback, or None when unknown.

        From the latest callback's start time and sample index, one block
        period per block back to ``frame`` (exact when ``frame`` is that
        callback's, which it is when the acknowledgement is seen at once).
        """
        start_ns = int(self.ctl[C_CB_START_NS])
        if start_ns == 0:
            return None
        start_frame = int(self.ctl[C_CB_START_FRAME])
        return start_ns * 1e-9 - (start_frame - int(frame)) / self.samplerate
