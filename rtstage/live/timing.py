"""What the port delivers: the callback's own clock and the server's frame time, checked every callback.

Two measurements run inside the compiled callback, around
:func:`rtstage.live.cfunc.callback_core`, in machine code (no Python):

Execution time
    :func:`cycle_begin` and :func:`cycle_end` read ``CLOCK_MONOTONIC`` with
    ``clock_gettime`` (a C library call the compiled code makes directly; the
    vDSO makes it a few tens of nanoseconds, no system call) and keep the
    longest and the latest callback duration in nanoseconds.
Server cycles against frames delivered
    With JACK, the stream worker keeps a JACK client of its own that it never
    activates (:class:`JackFrameClock`) and hands the callback the addresses
    of ``jack_last_frame_time`` and ``jack_frames_since_cycle_start`` with its
    handle; both read the server's frame timer from shared memory, without a
    lock or a system call.  ``jack_last_frame_time`` is the exact frame count
    at the start of the current cycle (not an estimate).  The difference
    ``d = (cycle start - cycle start at the first callback) - (frames
    delivered since the first callback)`` is constant while every cycle calls
    the callback once (whatever the block size: PortAudio's buffer processor
    calls a larger block at the same phase of every k-th cycle).  A cycle that
    passes without the callback (the port delivered a stale or silent buffer:
    a period is missing) raises ``d`` by one period; a cycle served twice
    lowers it.  After :data:`REF_CALLBACKS` callbacks set the reference, the
    callback keeps ``k = (d - ref) / P``, the net number of periods the port
    is off, and records every change of ``k`` with the engine's sample index
    and the tap frame index at which it was seen; the supervisor turns each
    change into a gap record in the status and the tap's sidecar
    (:func:`check_port`).

Why PortAudio alone cannot tell
    PortAudio's JACK host API reports JACK's xrun callback as
    ``paOutputUnderflow | paInputOverflow`` on the next callback: it says that
    *some* client of the graph was late, never whether a period of *this*
    port was lost.  The time it passes, ``timeInfo->currentTime =
    (jack_frame_time(client) - t0) / samplerate`` (pa_jack.c,
    ``RealProcess``), is ``jack_frame_time``: an interpolation of the server's
    delay-locked loop between cycles, which moves with scheduling delays, so
    comparing it with the frames delivered reports periods that were never
    lost (tried and measured here: tens of false "missing" periods a minute).
    The exact cycle start needs ``jack_last_frame_time``, which PortAudio
    does not pass on.

The check runs only with JACK (elsewhere ``ctl[C_HOST_PERIOD]`` stays 0).
The counters live in ``ctl`` slots from :data:`C_BASE` on (see
:mod:`rtstage.live.shared`, ``C_LEN``).

References
----------
.. [1] PortAudio, ``src/hostapi/jack/pa_jack.c`` (``RealProcess``,
   ``JackCallback``, ``JackXRunCb``), v19.6.
.. [2] JACK API: ``jack_frame_time``, ``jack_last_frame_time``,
   ``jack_get_buffer_size``, ``jack_set_xrun_callback`` (jack/jack.h).
.. [3] clock_gettime(2), ``CLOCK_MONOTONIC``.
"""

import ctypes
import ctypes.util
import math

import numpy as np
from llvmlite import ir
from numba import carray, njit, types
from numba.extending import intrinsic

from ._ptr import address_to_voidptr

C_BASE = 48
C_TS_SEC = C_BASE + 0
"""Scratch: ``struct timespec`` for ``clock_gettime`` (seconds, then nanoseconds)."""
C_TS_NSEC = C_BASE + 1
C_CB_NS_MAX = C_BASE + 2
"""Longest callback execution, ns (after :data:`REF_CALLBACKS` callbacks, so warm-up faults are excluded)."""
C_CB_NS_LAST = C_BASE + 3
C_CB_NS_SUM = C_BASE + 4
C_HOST_PERIOD = C_BASE + 5
"""Server period in frames (JACK), written by the stream worker; 0 turns the frame-time check off."""
C_TIME_N = C_BASE + 6
"""Callbacks seen by the frame-time check since the stream (re)started (the worker resets it)."""
C_TIME_REF = C_BASE + 7
"""Reference ``d`` in frames: server frames advanced minus frames delivered, at the end of the first callbacks."""
C_SLIP_NET = C_BASE + 8
"""Net periods the port is off: + missing (cycles without a callback), - repeated."""
C_SLIP_EVENTS = C_BASE + 9
"""Changes of ``C_SLIP_NET`` seen by the callback."""
C_SLIP_FRAME = C_BASE + 10
"""Engine sample index of the block in which the last change was seen."""
C_SLIP_TAP = C_BASE + 11
"""Tap ring frame index (frames written so far) at the last change."""
C_SLIP_DELTA = C_BASE + 12
"""Size of the last change, in periods."""
C_PHASE_MAX = C_BASE + 13
"""Most frames of its cycle already past when a callback started (``jack_frames_since_cycle_start``)."""
C_SLIP_TOTAL = C_BASE + 14
"""Sum of |change| over all changes: periods missing or repeated in total."""
C_JACK_LFT = C_BASE + 15
"""Address of libjack's ``jack_last_frame_time`` (0: no JACK), written by the stream worker."""
C_JACK_FSCS = C_BASE + 16
"""Address of libjack's ``jack_frames_since_cycle_start``."""
C_JACK_CLIENT = C_BASE + 17
"""The worker's own (never activated) JACK client handle those calls take."""
C_CYCLE0 = C_BASE + 18
C_FRAMES0 = C_BASE + 19
C_SLIP_PEND = C_BASE + 20
"""1 while a new offset waits for the next callback: it holds (periods lost) or comes back (a late cycle)."""
C_SLIP_CAND = C_BASE + 21
C_SLIP_CAND_FRAME = C_BASE + 22
C_SLIP_CAND_TAP = C_BASE + 23
C_LATE_CYCLES = C_BASE + 24
"""Callbacks that ran in the cycle after their own and were caught up by the next one (nothing lost)."""
C_LATE_AT = C_BASE + 26
"""Server frame (cycle start) at which the last late cycle was seen."""
C_SLIP_AT = C_BASE + 27
"""Server frame (cycle start) at which the last lasting change was first seen."""
C_SLIP_CAND_AT = C_BASE + 28
C_CB_HIST = C_BASE + 29
"""Histogram of callback durations: bin 0 below 1 us, bin b (1..CB_HIST_BINS-1) from 2^(b-1) us, the last open."""
CB_HIST_BINS = 14
C_CB_START_NS = C_CB_HIST + CB_HIST_BINS
"""CLOCK_MONOTONIC (ns) at which the latest callback started: before it took pending parameters."""
C_CB_DONE_NS = C_CB_START_NS + 1
"""CLOCK_MONOTONIC (ns) at which the latest callback returned."""
C_CB_START_FRAME = C_CB_DONE_NS + 1
"""Engine sample index of the first frame of the latest callback (written with ``C_CB_START_NS``)."""
C_LAST_CYCLE = C_CB_START_FRAME + 1
"""Server frame at the start of the latest cycle the check saw."""
C_END = C_LAST_CYCLE + 1

REF_CALLBACKS = 16
"""Callbacks after a stream start that set the reference and are not timed."""
CLOCK_MONOTONIC = 1
"""Linux value (from memory, <time.h>)."""

_clock_gettime = types.ExternalFunction("clock_gettime", types.intc(types.intc, types.voidptr))


@njit(nogil=True, inline="always", error_model="numpy")
def _now_ns(ctl_addr, ctl):
    _clock_gettime(CLOCK_MONOTONIC, address_to_voidptr(ctl_addr + 8 * C_TS_SEC))
    return ctl[C_TS_SEC] * 1000000000 + ctl[C_TS_NSEC]


@intrinsic
def _call_u32(typingctx, fn_address, arg):
    """Call the C function ``uint32_t f(void *)`` at address ``fn_address`` (int64) with ``arg`` (int64)."""
    sig = types.uint32(types.int64, types.int64)

    def codegen(context, builder, signature, args):
        ptr_t = ir.IntType(8).as_pointer()
        fnty = ir.FunctionType(ir.IntType(32), [ptr_t])
        fn = builder.inttoptr(args[0], fnty.as_pointer())
        return builder.call(fn, [builder.inttoptr(args[1], ptr_t)])

    return sig, codegen


@njit(nogil=True, error_model="numpy")
def cycle_begin(ctl_addr, time_info_addr, frames_before, engine_frame, tap_head):
    """Start of a callback: the cycle check, then the start time (ns) for :func:`cycle_end`."""
    ctl = carray(address_to_voidptr(ctl_addr), (C_END,), np.int64)
    period = ctl[C_HOST_PERIOD]
    if period > 0 and ctl[C_JACK_LFT] != 0:
        cycle = np.int64(_call_u32(ctl[C_JACK_LFT], ctl[C_JACK_CLIENT]))  # jack_last_frame_time: this cycle's start
        since = np.int64(_call_u32(ctl[C_JACK_FSCS], ctl[C_JACK_CLIENT]))  # jack_frames_since_cycle_start
        n = ctl[C_TIME_N]
        ctl[C_LAST_CYCLE] = cycle
        if n == 0:
            ctl[C_CYCLE0] = cycle
            ctl[C_FRAMES0] = frames_before
        # Frames the server advanced minus frames this stream delivered since the stream started (mod 2^32:
        # the server's frame counter is 32 bits).
        advanced = (cycle - ctl[C_CYCLE0]) & 0xFFFFFFFF
        d = advanced - (frames_before - ctl[C_FRAMES0])
        if n < REF_CALLBACKS:
            ctl[C_TIME_REF] = d
            ctl[C_SLIP_NET] = 0
            ctl[C_SLIP_PEND] = 0
        else:
            if since > ctl[C_PHASE_MAX]:
                ctl[C_PHASE_MAX] = since
            diff = d - ctl[C_TIME_REF]
            k = diff // period if diff >= 0 else -((-diff + period - 1) // period)
            if k == ctl[C_SLIP_NET]:
                if ctl[C_SLIP_PEND] != 0:
                    # The offset came back: the previous callback ran in the next cycle and this one caught up.
                    ctl[C_LATE_AT] = ctl[C_SLIP_CAND_AT]
                    ctl[C_LATE_CYCLES] += 1
                    ctl[C_SLIP_PEND] = 0
            elif ctl[C_SLIP_PEND] == 0 or ctl[C_SLIP_CAND] != k:
                ctl[C_SLIP_CAND] = k
                ctl[C_SLIP_PEND] = 1
                ctl[C_SLIP_CAND_FRAME] = engine_frame
                ctl[C_SLIP_CAND_TAP] = tap_head
                ctl[C_SLIP_CAND_AT] = cycle
            else:
                # The offset held for a second callback: periods were lost (or served twice) for good.
                delta = k - ctl[C_SLIP_NET]
                ctl[C_SLIP_NET] = k
                ctl[C_SLIP_PEND] = 0
                ctl[C_SLIP_DELTA] = delta
                ctl[C_SLIP_FRAME] = ctl[C_SLIP_CAND_FRAME]
                ctl[C_SLIP_TAP] = ctl[C_SLIP_CAND_TAP]
                ctl[C_SLIP_AT] = ctl[C_SLIP_CAND_AT]
                ctl[C_SLIP_TOTAL] += delta if delta > 0 else -delta
                ctl[C_SLIP_EVENTS] += 1
        ctl[C_TIME_N] = n + 1
    t0 = _now_ns(ctl_addr, ctl)
    ctl[C_CB_START_FRAME] = engine_frame
    ctl[C_CB_START_NS] = t0
    return t0


@njit(nogil=True, error_model="numpy")
def cycle_end(ctl_addr, t0_ns):
    """End of a callback: record its duration."""
    ctl = carray(address_to_voidptr(ctl_addr), (C_END,), np.int64)
    t1 = _now_ns(ctl_addr, ctl)
    ctl[C_CB_DONE_NS] = t1
    dt = t1 - t0_ns
    ctl[C_CB_NS_LAST] = dt
    ctl[C_CB_NS_SUM] += dt
    if ctl[C_TIME_N] >= REF_CALLBACKS or ctl[C_HOST_PERIOD] == 0:
        if dt > ctl[C_CB_NS_MAX]:
            ctl[C_CB_NS_MAX] = dt
        b = 0
        us = dt // 1000
        while us > 0 and b < CB_HIST_BINS - 1:
            us >>= 1
            b += 1
        ctl[C_CB_HIST + b] += 1


# --- Python side ------------------------------------------------------------------------------
class JackFrameClock:
    """A JACK client of the stream worker that is never activated: it only lends its handle to the frame clock.

    ``jack_last_frame_time`` and ``jack_frames_since_cycle_start`` read the
    server's frame timer from shared memory (no lock, no system call), so the
    callback may call them.  The client joins the server named by
    ``JACK_DEFAULT_SERVER`` and never starts one.

    Parameters
    ----------
    enabled : bool
        False makes an object that only turns the check off (host APIs other than JACK).

    Attributes
    ----------
    period_frames : int
        The server's period (``jack_get_buffer_size``); 0 when there is no server.
    """

    def __init__(self, enabled=True):
        self.period_frames = 0
        self._client = None
        self._lib = None
        if not enabled:
            return
        name = ctypes.util.find_library("jack") or "libjack.so.0"
        try:
            lib = ctypes.CDLL(name)
        except OSError:
            return
        lib.jack_client_open.restype = ctypes.c_void_p
        lib.jack_client_open.argtypes = [ctypes.c_char_p, ctypes.c_int, ctypes.c_void_p]
        lib.jack_get_buffer_size.restype = ctypes.c_uint32
        lib.jack_get_buffer_size.argtypes = [ctypes.c_void_p]
        lib.jack_client_close.argtypes = [ctypes.c_void_p]
        status = ctypes.c_int(0)
        client = lib.jack_client_open(b"rtstage-clock", 0x01, ctypes.byref(status))  # JackNoStartServer
        if not client:
            return
        self._lib, self._client = lib, client
        self.period_frames = int(lib.jack_get_buffer_size(client))

    def install(self, ctl):
        """Write the period, the function addresses and the handle into ``ctl``; restart the check."""
        ctl[C_TIME_N] = 0
        ctl[C_SLIP_NET] = 0
        ctl[C_SLIP_PEND] = 0
        if self._client is None:
            ctl[C_HOST_PERIOD] = 0
            ctl[C_JACK_LFT] = 0
            return
        addr = lambda f: ctypes.cast(f, ctypes.c_void_p).value  # noqa: E731
        ctl[C_JACK_CLIENT] = int(self._client)
        ctl[C_JACK_FSCS] = addr(self._lib.jack_frames_since_cycle_start)
        ctl[C_JACK_LFT] = addr(self._lib.jack_last_frame_time)
        ctl[C_HOST_PERIOD] = self.period_frames

    def close(self, ctl=None):
        """Turn the check off in ``ctl`` (when given), then close the client."""
        if ctl is not None:
            ctl[C_JACK_LFT] = 0
        if self._client is not None:
            self._lib.jack_client_close(self._client)
            self._client = None


def port_status(ctl, samplerate, blocksize, late_at=None):
    """The ``port`` section of the status: callback timing and the per-cycle check.

    ``late_at`` lists the server frames of late cycles (``engine.port_late``).
    """
    from .packing import C_PACK_OVERRUNS, C_PACKED24

    period = int(ctl[C_HOST_PERIOD])
    block_s = blocksize / float(samplerate)
    max_ns = int(ctl[C_CB_NS_MAX])
    return {
        "host_period_frames": period,
        "cycle_check": period > 0,
        "packed24": bool(ctl[C_PACKED24]),
        "packed24_overruns": int(ctl[C_PACK_OVERRUNS]),
        "slip_events": int(ctl[C_SLIP_EVENTS]),
        "periods_off": int(ctl[C_SLIP_NET]),
        "periods_missing_or_repeated": int(ctl[C_SLIP_TOTAL]),
        "late_cycles": int(ctl[C_LATE_CYCLES]),
        "late_at_server_frame": list(late_at or []),
        "first_server_frame": (int(ctl[C_CYCLE0]) + REF_CALLBACKS * period) % 2**32 if period else None,
        "last_server_frame": int(ctl[C_LAST_CYCLE]) if period else None,
        "late_start_max_frames": int(ctl[C_PHASE_MAX]),
        "callback_max_us": round(max_ns / 1e3, 3),
        "callback_last_us": round(int(ctl[C_CB_NS_LAST]) / 1e3, 3),
        "callback_max_fraction_of_block": round(max_ns * 1e-9 / block_s, 6),
        "callback_p999_us_at_most": _hist_quantile(ctl, 0.999),
        "callback_histogram_us": {(f"<{1 << b}" if b < CB_HIST_BINS - 1 else f">={1 << (b - 1)}"): int(ctl[C_CB_HIST + b])
                                  for b in range(CB_HIST_BINS) if ctl[C_CB_HIST + b]},
    }


def _hist_quantile(ctl, q):
    """Upper edge (us) of the histogram bin holding quantile ``q`` of the callback durations (None: no data)."""
    counts = [int(ctl[C_CB_HIST + b]) for b in range(CB_HIST_BINS)]
    total = sum(counts)
    if total == 0:
        return None
    acc = 0
    for b, c in enumerate(counts):
        acc += c
        if acc >= q * total:
            return float(1 << b) if b < CB_HIST_BINS - 1 else None
    return None


def check_port(engine, seen):
    """Supervisor step: turn each new lasting change of the port check into a gap record; returns the new count.

    ``seen`` is the count already turned into records.  Changes closer than
    one poll apart share one record (its ``events`` says how many).  Late
    cycles (nothing lost) are listed in ``engine.port_late`` by the server
    frame at which they were seen (the last 1000).
    """
    ctl = engine.block.ctl
    late = int(ctl[C_LATE_CYCLES])
    late_list = engine.__dict__.setdefault("port_late", [])
    if late != engine.__dict__.get("_port_late_seen", 0):
        engine._port_late_seen = late
        late_list.append(int(ctl[C_LATE_AT]))
        del late_list[:-1000]
    events = int(ctl[C_SLIP_EVENTS])
    if events == seen:
        return seen
    delta = int(ctl[C_SLIP_DELTA])
    period = int(ctl[C_HOST_PERIOD])
    if delta > 0:
        what = f"{delta} server cycle(s) of {period} frames passed without this stream"
    else:
        what = f"{-delta} server cycle(s) of {period} frames served twice"
    gap = {"tap_frame": int(ctl[C_SLIP_TAP]), "engine_frame": int(ctl[C_SLIP_FRAME]),
           "gap_s": round(delta * period / float(engine.samplerate), 6),
           "reason": f"port: {what} (server frame counter against frames delivered)",
           "periods": delta, "server_frame": int(ctl[C_SLIP_AT]), "events": events - seen}
    engine.gaps.append(gap)
    if engine.tap is not None:
        engine.tap.gaps.append(gap)
    from ..log import log

    log(f"{gap['reason']} at sample {gap['engine_frame']}")
    return events
