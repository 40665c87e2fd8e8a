"""Packed 24-bit output: three bytes per sample, for devices that take PortAudio's ``paInt24``.

By default a 17..24-bit word goes to the device left-justified in a 32-bit
container (``paInt32``).  Some devices and drivers take packed 24-bit
samples instead (``paInt24``: three bytes per sample, little-endian on the
machines PortAudio runs on, interleaved).  The kernel and the tap stay
exactly as they are: the callback writes the left-justified int32 words into
a scratch buffer the stream worker preallocated, and :func:`pack24` copies
their top three bytes into PortAudio's buffer (``w >> 8`` is the 24-bit word
exactly, since the container's low 8 bits are zero).

The scratch buffer's address and capacity, and the mode, live in ``ctl``
slots :data:`C_PACKED24`, :data:`C_PACK_ADDR`, :data:`C_PACK_FRAMES`
(written by the worker before the stream opens).  A callback with more frames
than the scratch holds outputs silence and is counted in
:data:`C_PACK_OVERRUNS` (none is expected: the stream's block size is fixed
and the scratch holds four blocks).

References
----------
.. [1] PortAudio, portaudio.h: ``paInt24`` ("packed 24 bit format").
"""

import numpy as np
from numba import carray, njit

from ._ptr import address_to_voidptr
from .timing import C_END as _TIMING_END

C_PACKED24 = _TIMING_END
"""1: the device takes packed 24-bit samples."""
C_PACK_ADDR = _TIMING_END + 1
"""Address (in the stream worker) of the int32 scratch the callback writes before packing."""
C_PACK_FRAMES = _TIMING_END + 2
"""Capacity of that scratch in frames."""
C_PACK_OVERRUNS = _TIMING_END + 3
"""Callbacks with more frames than the scratch holds (silence sent)."""
C_END = _TIMING_END + 4


@njit(nogil=True, error_model="numpy")
def pack24(src_addr, dst_addr, nsamples):
    """Top three bytes of ``nsamples`` int32 words at ``src_addr`` into packed little-endian bytes at ``dst_addr``."""
    src = carray(address_to_voidptr(src_addr), (nsamples,), np.int32)
    dst = carray(address_to_voidptr(dst_addr), (3 * nsamples,), np.uint8)
    for i in range(nsamples):
        w = np.int64(src[i]) >> 8
        dst[3 * i] = w & 0xFF
        dst[3 * i + 1] = (w >> 8) & 0xFF
        dst[3 * i + 2] = (w >> 16) & 0xFF


@njit(nogil=True, error_model="numpy")
def zero_bytes(dst_addr, nbytes):
    dst = carray(address_to_voidptr(dst_addr), (nbytes,), np.uint8)
    for i in range(nbytes):
        dst[i] = 0


def install(ctl, channels, max_frames, enabled):
    """In the stream worker, before the stream opens: allocate the scratch and write the mode; returns the scratch."""
    if not enabled:
        ctl[C_PACKED24] = 0
        return None
    scratch = np.zeros((4 * int(max_frames), int(channels)), dtype=np.int32)
    ctl[C_PACK_ADDR] = scratch.ctypes.data
    ctl[C_PACK_FRAMES] = scratch.shape[0]
    ctl[C_PACKED24] = 1
    return scratch
