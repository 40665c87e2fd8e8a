"""The one single-producer/single-consumer ring: index logic and the block copies.

A ring is a preallocated array of ``cap`` frames plus three int64 counters in
the shared ``ctl`` array: ``head`` (frames written since the start), ``tail``
(frames read since the start) and ``dropped`` (frames the producer had no
room for).  The slot of frame k is ``k % cap``.  Only the producer writes the
head, only the consumer writes the tail, and each reads the other's counter
once, after a fence, so neither ever waits for the other:

* producer (the audio callback): :func:`reserve` checks that a whole block
  fits (else it adds the block to ``dropped`` and the block is skipped),
  the block is copied in with :func:`copy_in`, and :func:`advance` moves
  the head after a fence;
* consumer (a housekeeping thread): :func:`available` reads the head, then the
  tail, the frames are copied out with :func:`copy_out`, and :func:`advance`
  moves the tail after a fence.

The tap ring and the meter ring of :mod:`rtstage.live.shared` are two rings of
this kind.  Every function here is compiled with ``error_model="numpy"``, so
none of them contains a path that raises a Python exception (``k % cap`` with
``cap == 0`` gives 0 instead of raising ZeroDivisionError): they run inside the
compiled callback, where nothing may call back into Python.

References
----------
.. [1] L. Lamport, "Specifying concurrent program modules", ACM TOPLAS 5(2),
   1983 (the single-producer/single-consumer queue with free-running counters; from memory).
"""

from numba import njit

from ._ptr import fence


@njit(nogil=True, cache=True, error_model="numpy", inline="always")
def _free(ctl, head_at, tail_at, cap_at):
    """Producer: ``(head, frames free)``; the consumer's tail is read once, after a fence."""
    head = ctl[head_at]
    fence()
    return head, ctl[cap_at] - (head - ctl[tail_at])


@njit(nogil=True, cache=True, error_model="numpy")
def reserve(ctl, on_at, head_at, tail_at, dropped_at, cap_at, nframes):
    """Producer: the head (frames written so far) if ``nframes`` frames fit whole, else -1.

    -1 also when the ring is off (``ctl[on_at] == 0``) or ``nframes`` is 0;
    frames that do not fit are added to ``ctl[dropped_at]``.  The capacity
    is ``ctl[cap_at]``.
    """
    if ctl[on_at] == 0 or nframes == 0:
        return -1
    head, free = _free(ctl, head_at, tail_at, cap_at)
    if free < nframes:
        ctl[dropped_at] += nframes
        return -1
    return head


@njit(nogil=True, cache=True, error_model="numpy")
def reserve_in_place(ctl, on_at, head_at, tail_at, cap_at, nframes):
    """Producer: the ring row from which ``nframes`` frames can be written in place, without wrapping, else -1.

    -1 also when the ring is off or ``nframes`` is 0; nothing is counted as
    dropped (the caller falls back to :func:`reserve` and a copy).  Publish
    the rows with :func:`advance` after writing them.
    """
    if ctl[on_at] == 0 or nframes == 0:
        return -1
    head, free = _free(ctl, head_at, tail_at, cap_at)
    slot = head % ctl[cap_at]
    if free < nframes or slot + nframes > ctl[cap_at]:
        return -1
    return slot


@njit(nogil=True, cache=True, error_model="numpy")
def advance(ctl, counter_at, start, n):
    """After a fence, move a counter from ``start`` by ``n`` frames: the producer publishes frames it wrote
    (the head), the consumer hands back frames it read (the tail)."""
    fence()
    ctl[counter_at] = start + n


@njit(nogil=True, cache=True, error_model="numpy")
def available(ctl, head_at, tail_at, limit):
    """Consumer: ``(tail, n)``, the first frame to read and how many (at most ``limit``) are there."""
    head = ctl[head_at]
    fence()
    tail = ctl[tail_at]
    return tail, min(head - tail, limit)


@njit(nogil=True, cache=True, error_model="numpy")
def copy_in(ring, frame, src, nframes):
    """Copy rows ``0..nframes`` of ``src`` into ``ring`` from the slot of ring frame ``frame``, wrapping."""
    cap = ring.shape[0]
    nch = ring.shape[1]
    slot = frame % cap
    # At most two runs of whole rows (before and after the ring's end), each a plain copy loop.
    first = min(nframes, cap - slot)
    for n in range(first):
        for c in range(nch):
            ring[slot + n, c] = src[n, c]
    for n in range(first, nframes):
        for c in range(nch):
            ring[n - first, c] = src[n, c]


@njit(nogil=True, cache=True, error_model="numpy")
def copy_out(ring, frame, dst, start, n):
    """Copy ``n`` ring frames from ring frame ``frame`` into rows ``start..start + n`` of ``dst``, wrapping."""
    cap = ring.shape[0]
    nch = ring.shape[1]
    slot = frame % cap
    for k in range(start, start + n):
        for c in range(nch):
            dst[k, c] = ring[slot, c]
        slot += 1
        if slot == cap:
            slot = 0
