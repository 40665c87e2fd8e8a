"""The one single-producer/single-consumer ring: index logic and the block copies.

A ring is a preallocated array of ``cap`` frames plus three int64 counters in
the shared ``ctl`` array: ``head`` (frames written since the start), ``tail``
(frames read since the start) and ``dropped`` (frames the producer had no
room for).  The slot of frame k is ``k % cap``.  Only the producer writes the
head, only the consumer writes the tail, and each reads the other's counter
once, after a fence, so neither ever waits for the other:

* producer (the audio callback): :func:`reserve` checks that a whole block
  fits (else it adds the block to ``dropped`` and the block is skipped),
  the block is copied in with :func:`copy_in`, and :func:`publish` advances
  the head after a fence;
* consumer (a housekeeping thread): :func:`available` reads the head, then the
  tail, the frames are copied out with :func:`copy_out`, and :func:`release`
  advances the tail after a fence.

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


@njit(nogil=True, cache=True, error_model="numpy")
def reserve(ctl, head_at, tail_at, dropped_at, cap, nframes):
    """Producer: the head (frames written so far) if ``nframes`` fit whole, else -1 after counting them dropped."""
    head = ctl[head_at]
    fence()
    tail = ctl[tail_at]
    if cap - (head - tail) < nframes:
        ctl[dropped_at] += nframes
        return -1
    return head


@njit(nogil=True, cache=True, error_model="numpy")
def publish(ctl, head_at, head, nframes):
    """Producer: make ``nframes`` frames written from ``head`` visible to the consumer."""
    fence()
    ctl[head_at] = head + nframes


@njit(nogil=True, cache=True, error_model="numpy")
def available(ctl, head_at, tail_at, limit):
    """Consumer: ``(tail, n)``, the first frame to read and how many (at most ``limit``) are there."""
    head = ctl[head_at]
    fence()
    tail = ctl[tail_at]
    return tail, min(head - tail, limit)


@njit(nogil=True, cache=True, error_model="numpy")
def release(ctl, tail_at, tail, n):
    """Consumer: hand ``n`` frames read from ``tail`` back to the producer."""
    fence()
    ctl[tail_at] = tail + n


@njit(nogil=True, cache=True, error_model="numpy")
def copy_in(ring, frame, src, nframes):
    """Copy rows ``0..nframes`` of ``src`` into ``ring`` from the slot of ring frame ``frame``, wrapping."""
    cap = ring.shape[0]
    nch = ring.shape[1]
    slot = frame % cap
    for n in range(nframes):
        for c in range(nch):
            ring[slot, c] = src[n, c]
        slot += 1
        if slot == cap:
            slot = 0


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
