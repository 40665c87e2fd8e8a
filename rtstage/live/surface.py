"""The live engine's control surface: new settings out through the seqlock, their sample index back.

:class:`ControlSurface` is the part of :class:`~rtstage.live.supervisor.LiveEngine`
the control layer (:class:`~rtstage.control.live_target.LiveTarget`) uses.
Settings go through the engine object (:meth:`rtstage.engine.Engine.apply`:
resolved, container checked, encoded), whose publish hook writes the seqlock
block; the callback takes them at its next block boundary and records the
sample index (:func:`rtstage.live.shared.applied`).
"""

import collections
import time

from ..errors import RtstageError
from ..log import log
from . import shared as S


APPLIED_LOG_KEPT = 100
"""Entries of ``applied_log`` (the status's ``settings_applied``): the latest settings taken by the callback.

The automation log keeps every change; this record is bounded so that a long run does not grow with its changes
(``tools/soak.py``: at most 1 MB over 30 minutes), and it is copied into every status.
"""


def applied_log():
    """An empty ``applied_log``: a ring of ``{"seq", "frame"}`` records, the oldest dropped past :data:`APPLIED_LOG_KEPT`."""
    return collections.deque(maxlen=APPLIED_LOG_KEPT)


class ControlSurface:
    """Mixin of :class:`~rtstage.live.supervisor.LiveEngine` and :class:`~rtstage.net.netengine.NetEngine`.

    Needs ``engine``, ``block``, ``settings``, ``samplerate``, ``blocksize``,
    ``applied_log`` (from :func:`applied_log`) and ``_logged_seq``.
    """

    def _publish_params(self, iparams, fparams):
        """The engine's publish hook: the seqlock write into the shared block; returns the sequence number."""
        return S.publish_into(self.block, iparams, fparams)

    def set_settings(self, settings):
        """Publish new settings; they take effect at the next block boundary.

        The seed is kept from the start, and the word length may not change
        the output container.  Gain changes ramp over
        :data:`rtstage.engine.GAIN_RAMP_SECONDS`.

        Returns
        -------
        int
            Sequence number to pass to :meth:`wait_applied`.
        """
        seq = self.engine.apply(settings)
        self.settings = self.engine.settings
        return seq

    def new_programme(self, label=None):
        """Start a new loudness programme (BS.1770 integrated loudness and EBU Tech 3342 range restart).

        The meter thread closes the current programme at its next chunk; the
        closed readings stay in the meters' ``loudness.programmes``.
        """
        live_meters = getattr(self, "live_meters", None)
        thread = live_meters.thread if live_meters is not None else getattr(self, "meter_thread", None)
        if thread is None:
            raise RtstageError("the meters are off (no loudness programme to start)")
        thread.new_programme(label)

    def last_applied(self):
        """(sequence number, sample index) of the settings the callback took last."""
        seq, frame = S.applied(self.block.ctl)
        return int(seq), int(frame)

    def block_waiter(self):
        """A :class:`~rtstage.live.handoff.BlockWaiter` on this engine's callbacks (wakes just after the next one)."""
        from .handoff import BlockWaiter

        return BlockWaiter(self.block.ctl, self.samplerate, self.blocksize)

    def wait_applied(self, seq, timeout_s=2.0):
        """Sample index at which settings ``seq`` took effect, or None after ``timeout_s``."""
        deadline = time.monotonic() + timeout_s
        while True:
            applied_seq, frame = self.last_applied()
            if applied_seq >= seq:
                self._log_applied()
                return frame
            if time.monotonic() >= deadline:
                return None
            time.sleep(0.001)

    def _log_applied(self):
        seq, frame = self.last_applied()
        if seq != self._logged_seq and seq != 0:
            self._logged_seq = seq
            self.applied_log.append({"seq": seq, "frame": frame})  # a ring (APPLIED_LOG_KEPT)
            log(f"settings #{seq // 2} took effect at sample {frame}")
