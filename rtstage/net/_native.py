"""Compiled helpers for the network drivers: clocks, sleeping to deadlines, sending, SPSC word rings.

The C library's ``clock_gettime``, ``clock_nanosleep`` and ``send`` are
reached through :mod:`ctypes`, which numba calls from compiled code directly:
a loop built from these runs without the GIL and without any Python.

Deadlines are absolute (``TIMER_ABSTIME``), so a late wake-up never shifts
later ones: the schedule is a pure function of the start and the packet count.

Word ring (single producer, single consumer)
--------------------------------------------
``ctl[head]`` and ``ctl[tail]`` count frames written and read since the
start; frame k lives in row ``k % rows``.  The producer writes a block only if
it fits whole (otherwise it adds its frames to ``ctl[dropped]``) and advances
the head after a fence; the consumer copies, then advances the tail after a
fence.  The index logic and the copies are those of the one ring,
:mod:`rtstage.live.ring`; only the counters' places differ (no on/off or
capacity slot: the capacity is the ring array's length).
"""

import ctypes
import ctypes.util

import numpy as np
from numba import njit, types

from ..live import ring as R
from ..live._ptr import address_to_voidptr, fence

CLOCK_REALTIME = 0
CLOCK_MONOTONIC = 1
CLOCK_TAI = 11
TIMER_ABSTIME = 1
EINTR = 4
NS_PER_S = 1_000_000_000
RING_UNLIMITED = 1 << 62
"""A read limit larger than any ring's backlog."""

# C functions called from compiled code by symbol name (resolved in the running process, so numba can
# cache the loops; a ctypes function pointer would forbid the cache).
clock_gettime = types.ExternalFunction("clock_gettime", types.intc(types.intc, types.voidptr))
clock_nanosleep = types.ExternalFunction("clock_nanosleep", types.intc(types.intc, types.intc, types.voidptr, types.voidptr))
c_send = types.ExternalFunction("send", types.intp(types.intc, types.voidptr, types.uintp, types.intc))

_libc = ctypes.CDLL(ctypes.util.find_library("c") or None, use_errno=True)
_prctl = _libc.prctl
_prctl.argtypes = [ctypes.c_int, ctypes.c_ulong, ctypes.c_ulong, ctypes.c_ulong, ctypes.c_ulong]
_prctl.restype = ctypes.c_int
PR_SET_TIMERSLACK = 29


@njit(nogil=True, cache=True)
def send_bytes(fd, buf, nbytes):
    """``send(2)`` of ``buf[:nbytes]`` (uint8) on a connected socket; returns its result (-1 on error)."""
    return c_send(fd, address_to_voidptr(buf.ctypes.data), nbytes, 0)


@njit(nogil=True, cache=True)
def now_ns(clock_id, ts):
    """The clock's time in ns (``ts``: int64 scratch of 2, a ``struct timespec``)."""
    clock_gettime(clock_id, address_to_voidptr(ts.ctypes.data))
    return ts[0] * NS_PER_S + ts[1]


@njit(nogil=True, cache=True)
def sleep_until(clock_id, deadline_ns, ts):
    """Sleep to an absolute deadline on the clock (returns at once if it has passed)."""
    ts[0] = deadline_ns // NS_PER_S
    ts[1] = deadline_ns - ts[0] * NS_PER_S
    while clock_nanosleep(clock_id, TIMER_ABSTIME, address_to_voidptr(ts.ctypes.data), address_to_voidptr(0)) == EINTR:  # interrupted: same deadline again
        pass


@njit(nogil=True, cache=True)
def sleep_for(clock_id, ns, ts):
    """Sleep a short relative time (used only while waiting for data)."""
    ts[0] = ns // NS_PER_S
    ts[1] = ns - ts[0] * NS_PER_S
    clock_nanosleep(clock_id, 0, address_to_voidptr(ts.ctypes.data), address_to_voidptr(0))


@njit(nogil=True, cache=True)
def sample_time_ns(q0, r0, rate, j):
    """Clock time of the stream's sample j: ceil((s0 + j)·1e9 / rate) with ``q0, r0 = divmod(s0·1e9, rate)``.

    Split as j = a·rate + b so that nothing overflows int64 for centuries of samples.
    """
    a = j // rate
    b = j - a * rate
    return q0 + a * NS_PER_S + (r0 + b * NS_PER_S + rate - 1) // rate


@njit(nogil=True, cache=True, error_model="numpy")
def ring_avail(ctl, head, tail):
    """Frames the consumer may read."""
    return R.available(ctl, head, tail, RING_UNLIMITED)[1]


@njit(nogil=True, cache=True, error_model="numpy")
def ring_write(ctl, head, tail, dropped, ring, words, nframes):
    """Append ``words[:nframes]`` whole, or count them dropped; returns True when written."""
    h = ctl[head]
    fence()
    t = ctl[tail]
    if ring.shape[0] - (h - t) < nframes:
        ctl[dropped] += nframes
        return False
    R.copy_in(ring, h, words, nframes)
    R.advance(ctl, head, h, nframes)
    return True


@njit(nogil=True, cache=True, error_model="numpy")
def ring_read(ctl, head, tail, ring, out, nframes):
    """Copy up to ``nframes`` frames into ``out``; returns the number copied."""
    t, n = R.available(ctl, head, tail, nframes)
    R.copy_out(ring, t, out, 0, n)
    R.advance(ctl, tail, t, n)
    return n


def set_timer_slack(ns=1):
    """Shrink the calling thread's timer slack (wake-ups otherwise coalesce by 50 µs)."""
    _prctl(PR_SET_TIMERSLACK, int(ns), 0, 0, 0)


def try_realtime(priority):
    """Put the calling thread under SCHED_FIFO at ``priority``; returns True when granted.

    On Linux ``sched_setscheduler(0, ...)`` acts on the calling thread only.
    """
    import os

    if priority <= 0:
        return False
    try:
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(int(priority)))
        return True
    except (OSError, AttributeError):
        return False


def clock_now_ns(clock_id):
    """Python-side reading of a clock (same source as the compiled loops)."""
    ts = np.zeros(2, dtype=np.int64)
    return int(now_ns(clock_id, ts))
