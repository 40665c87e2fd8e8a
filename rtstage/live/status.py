"""The live engine's status: status-flag windows and the plain-data status report.

PortAudio sets status flags (underflow, overflow, priming) on a callback;
the callback counts them in the shared block.  A stream's first seconds
after each start are noisy on any system, so :class:`FlagWindows` remembers
the counters at every stream start and once its settle time has passed, and
reports the flags after settling apart (``xruns_after_settle``).
"""

import time

from . import shared as S
from .realtime import engine_realtime
from .timing import port_status


def read_flags(block):
    """The status-flag counters by name (:data:`rtstage.live.shared.FLAG_COUNTERS`)."""
    return {name: block.counter(idx) for name, idx in S.FLAG_COUNTERS}


class FlagWindows:
    """Status-flag counters at each stream start and after its settle time.

    Parameters
    ----------
    settle_s : float
        Start-up time after each stream start whose flags are reported apart.
    """

    def __init__(self, settle_s):
        self.settle_s = float(settle_s)
        self._windows = []

    def opened(self, now, flags):
        """A stream started at monotonic time ``now`` with counters ``flags``."""
        self._windows.append({"start": now, "at_start": flags, "at_settle": None})

    def tick(self, now, block):
        """Record the counters once the current window's settle time has passed."""
        window = self._windows[-1] if self._windows else None
        if window is not None and window["at_settle"] is None and now - window["start"] >= self.settle_s:
            window["at_settle"] = read_flags(block)

    @property
    def settled(self):
        """True once the current stream start is past its settle time."""
        return bool(self._windows) and self._windows[-1]["at_settle"] is not None

    def after_settle(self, flags):
        """``flags`` less what every start-up window added."""
        after = dict(flags)
        for w in self._windows:
            end = w["at_settle"] if w["at_settle"] is not None else flags
            for name in after:
                after[name] -= end[name] - w["at_start"][name]
        return after


def live_status(live):
    """Plain-data status of a :class:`~rtstage.live.supervisor.LiveEngine` (safe to call from any thread)."""
    b = live.block
    engine = live.engine if b is not None else None
    flags = read_flags(b) if b is not None else {}
    uptime = 0.0 if live._start_time is None else time.monotonic() - live._start_time
    settings = live.settings
    result = {
        "state": live.state,
        "uptime_s": round(uptime, 3),
        "samplerate": live.samplerate,
        "blocksize": live.blocksize,
        "channels": live.channels,
        "callback": live.callback_mode,
        "device": {"output": getattr(live, "output_name", None), "input": getattr(live, "input_name", None),
                   "hostapi": getattr(live, "hostapi_name", None)},
        "source": live.source_spec.describe() if live.source_spec else "input",
        "settings": settings.to_dict() if hasattr(settings, "to_dict") else None,
        "seed": getattr(settings, "seed", None),
        "blocks": b.counter(S.C_CALLBACKS) if b else 0,
        "frames": b.counter(S.C_FRAMES) if b else 0,
        "engine_frame": engine.frame if engine else 0,
        "xruns": flags,
        "xruns_after_settle": live.flag_windows.after_settle(flags),
        "settle_s": live.settle_s,
        "cpu_load": round(live.cpu_load, 6),
        "cpu_load_max": round(live.cpu_load_max, 6),
        "restarts": live.restarts,
        "discontinuities": len(live.gaps),
        "gaps": list(live.gaps),
        "source_done": bool(b.counter(S.C_SRC_DONE)) if b else False,
        "source_loops": b.counter(S.C_LOOPS) if b else 0,
        "tap_frames": b.counter(S.C_RING_HEAD) if b else 0,
        "tap_dropped_frames": b.counter(S.C_RING_DROPPED) if b else 0,
        "clipped": engine.clipped.tolist() if engine else [],
        "nonfinite": engine.nonfinite.tolist() if engine else [],
        "auto_muted": engine.auto_muted.tolist() if engine else [],
        "auto_muted_frames": engine.auto_muted_frames.tolist() if engine else [],
        "settings_applied": list(live.applied_log),
        "realtime": engine_realtime(live),
        "port": port_status(b.ctl, live.samplerate, live.blocksize, getattr(live, "port_late", None)) if b else {},
    }
    if getattr(live, "net_out", None) is not None:
        result["streams"] = {"rtp_out": live.net_out.stats()}
    return result
