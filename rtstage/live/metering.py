"""The live engine's meters: the meter thread on the meter ring, warmed before the stream opens.

:class:`LiveMeters` owns the :class:`~rtstage.live.meterthread.MeterThread`
of one live engine; :func:`meter_snapshot` joins its latest snapshot with the
engine's health for the display, the control socket and the final status.
"""

import numpy as np

from ..log import log
from . import shared as S

WARM_FRAMES = 4096
"""Frames the meter bank is run on once before the stream opens (compiles its kernels)."""


class LiveMeters:
    """The meter thread of a live engine (started once; it carries on across stream restarts).

    Parameters
    ----------
    block : SharedBlock
        The shared arrays with the meter ring.
    engine : rtstage.engine.Engine
        The live engine's engine object (settings, counters, applied parameters).
    samplerate : int
        Sample rate in Hz.
    """

    def __init__(self, block, engine, samplerate):
        self.block = block
        self.engine = engine
        self.samplerate = int(samplerate)
        self.thread = None
        self._shaper_ids = {}

    @property
    def available(self):
        """True when the block has a meter ring."""
        return self.block.counter(S.C_METER_ON) != 0

    def start(self, loudness_target=None):
        """Warm every meter kernel with the real types, then start the thread; returns self.

        ``loudness_target`` (:class:`rtstage.meters.loudness.LoudnessTarget` or None) is what the
        snapshots' ``loudness`` section is checked against.
        """
        if self.thread is not None or not self.available:
            return self
        from ..meters import MeterBank
        from .meterthread import MeterThread
        from .realtime import warm_meter_thread

        s = self.engine.settings
        shaper = s.shaper
        nch = self.block.channels
        # Compile (or load from the cache) every meter kernel now, with the real types: compiling
        # them in the meter thread's first update would hold the GIL for seconds while audio runs,
        # starving the control and MIDI threads.
        warm = MeterBank(nch, self.samplerate, s.bits, shaper.coefs, s.dither, s.dither_scale,
                         out_shift=self.engine.out_shift, shaper_id=shaper.id)
        warm.update(np.zeros((WARM_FRAMES, nch)), np.zeros((WARM_FRAMES, nch), dtype=self.block.out_dtype))
        warm.report()
        self._shaper_ids = {tuple(shaper.coefs): shaper.id}
        warm_meter_thread(self.block, self.samplerate, MeterThread,  # the ring read and snapshot path too
                          loudness_target=loudness_target)
        self.thread = MeterThread(self.block, self.samplerate, shaper_name=self._shaper_name,
                                  loudness_target=loudness_target, engine=self.engine).start()
        return self

    def _shaper_name(self, coefs):
        shaper = self.engine.settings.shaper
        if hasattr(shaper, "coefs"):
            self._shaper_ids.setdefault(tuple(shaper.coefs), shaper.id)
        return self._shaper_ids.get(tuple(coefs))

    def stop(self):
        """Stop the thread after a last drain; returns True when it ran."""
        if self.thread is None:
            return False
        self.thread.stop()
        if self.thread.error is not None:
            log(f"meter thread failed: {self.thread.error}")
        return True

    def latest(self):
        """The thread's last snapshot, or None."""
        return self.thread.latest() if self.thread is not None else None


def meter_snapshot(snap, status, channels):
    """A meter snapshot (or None before the first) joined with the engine's health from ``status``."""
    if snap is None:
        snap = {"frame": 0, "peak_dbfs": [None] * (channels or 0), "rms_dbfs": [None] * (channels or 0),
                "clipped": status["clipped"], "nonfinite": status["nonfinite"]}
    out = dict(snap)
    out.update({
        "state": status["state"],
        "xruns": status["xruns"]["flagged_callbacks"],
        "xruns_after_settle": status["xruns_after_settle"]["flagged_callbacks"],
        "cpu_load": status["cpu_load"],
        "cpu_load_max": status["cpu_load_max"],
        "restarts": status["restarts"],
        "auto_muted": status["auto_muted"],
    })
    if "streams" in status:
        out["streams"] = status["streams"]
    return out
