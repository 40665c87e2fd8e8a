"""The compiled PortAudio callback.

:func:`callback_core` is the whole audio-thread program: count status flags,
take pending parameters at the block boundary (seqlock), fetch input (the
device's float32 buffer, the preloaded file, or the generator), run
:func:`rtstage.kernel.process_block`, write the words to PortAudio's output
buffer, copy them into the tap ring, and copy the meter tap (the
quantizer's input, ``x·gain``) with the requantized words (not the monitored
output) into the meter ring.  :func:`build_callback` wraps it in a
numba ``cfunc`` with PortAudio's ``PaStreamCallback`` signature, so PortAudio
calls machine code directly: no Python, no GIL, no allocation, no lock and no
I/O inside the callback.

The same :func:`callback_core` also serves the diagnostic Python-callback mode
(``rtstage run --callback python``), called through cffi with the same
addresses; it is never the default.

Numba cache
-----------
The cfunc is cached in ``$NUMBA_CACHE_DIR`` when set, otherwise in
``$XDG_CACHE_HOME/rtstage/numba`` (``~/.cache/rtstage/numba``), in a
subdirectory named by a digest of every source file the compiled callback
depends on: numba's cache checks only the cfunc's own file, so an edited
kernel must not load a stale callback.
"""

import hashlib
import os

import numba
import numpy as np
from numba import carray, njit

from .. import kernel as K
from . import shared as S
from . import packing, timing
from ._ptr import address_to_voidptr, voidptr_to_address
from .sources import fill_generated

from .pa_abi import (
    CALLBACK_SIGNATURE,
    PA_COMPLETE,
    PA_CONTINUE,
    PA_INPUT_OVERFLOW,
    PA_INPUT_UNDERFLOW,
    PA_OUTPUT_OVERFLOW,
    PA_OUTPUT_UNDERFLOW,
    PA_PRIMING_OUTPUT,
)


@njit(nogil=True, inline="always", error_model="numpy")
def _view(table, slot, shape, dtype):
    return carray(address_to_voidptr(table[slot]), shape, dtype)


@njit(nogil=True, error_model="numpy")
def _run(x, y, n, table, ctl, nch):
    """Kernel on ``n`` frames of ``x`` into ``y``, then the words into the tap ring and the meter ring.

    The tap ring gets ``y``, exactly what the device receives; the meter ring
    gets the requantized words (the kernel's ``yq``), whatever the monitor
    mode, mute or auto-mute.
    """
    meter_on = ctl[S.C_METER_ON] != 0
    rows = ctl[S.C_MAX_FRAMES] if meter_on else 0  # no rows: taps off
    vq = _view(table, S.T_VQ, (rows, nch), np.float64)
    yq = _view(table, S.T_YQ, (rows, nch), y.dtype)
    # The kernel's taps write straight into the meter ring when the block fits before its end.
    slot = S.meter_ring_reserve(ctl, n)
    if slot >= 0:
        mrows = ctl[S.C_MRING_FRAMES]
        vq = _view(table, S.T_MX, (mrows, nch), np.float64)[slot : slot + n]
        yq = _view(table, S.T_MW, (mrows, nch), y.dtype)[slot : slot + n]
    K.process_block(
        x, y, vq, n,
        _view(table, S.T_KIP, (K.IP_LEN,), np.int64),
        _view(table, S.T_KFP, (K.FP_LEN,), np.float64),
        _view(table, S.T_HIST, (nch, K.HIST_LEN), np.float64),
        _view(table, S.T_COUNTS, (nch, K.CNT_LEN), np.int64),
        _view(table, S.T_CLOCK, (K.CLK_LEN,), np.int64),
        _view(table, S.T_RAMP, (K.RAMP_LEN,), np.float64),
        _view(table, S.T_RNGW, (nch * K.RNG_RING_BLOCKS, 4), np.uint64),
        _view(table, S.T_RNGT, (K.RNG_TAG_LEN,), np.int64),
        yq,
    )
    ring = _view(table, S.T_RING, (ctl[S.C_RING_FRAMES], nch), y.dtype)
    S.ring_write(ctl, ring, y, n)
    if slot >= 0:
        S.meter_ring_commit(ctl, n)
    elif meter_on:
        mrows = ctl[S.C_MRING_FRAMES]
        S.meter_ring_write(ctl, _view(table, S.T_MX, (mrows, nch), np.float64), _view(table, S.T_MW, (mrows, nch), y.dtype),
                           vq, yq, n)


@njit(nogil=True, error_model="numpy")
def _blocks(in_addr, y, frames, table, ctl, nch):
    """Feed ``frames`` frames from the configured input to the kernel, in pieces of at most max_frames.

    Returns the number of frames produced (less than ``frames`` only when a
    file source ends).
    """
    max_frames = ctl[S.C_MAX_FRAMES]
    mode = ctl[S.C_IN_MODE]
    done = 0
    while done < frames:
        n = min(frames - done, max_frames)
        if mode == S.IN_DEVICE:
            x32 = carray(address_to_voidptr(in_addr + done * nch * 4), (n, nch), np.float32)
            _run(x32, y[done:], n, table, ctl, nch)
        elif mode == S.IN_FILE:
            pos = ctl[S.C_SRC_POS]
            avail = ctl[S.C_SRC_FRAMES] - pos
            if avail <= 0 and ctl[S.C_SRC_LOOP] != 0 and ctl[S.C_SRC_FRAMES] > 0:
                pos = 0
                ctl[S.C_LOOPS] += 1
                avail = ctl[S.C_SRC_FRAMES]
            if avail <= 0:
                ctl[S.C_SRC_DONE] = 1
                return done
            n = min(n, avail)
            src = _view(table, S.T_SRC, (ctl[S.C_SRC_FRAMES], nch), np.float64)
            _run(src[pos : pos + n], y[done:], n, table, ctl, nch)
            ctl[S.C_SRC_POS] = pos + n
        else:
            xbuf = _view(table, S.T_XBUF, (max_frames, nch), np.float64)
            genf = _view(table, S.T_GENF, (4,), np.float64)
            words = _view(table, S.T_GENW, (nch, 4), np.uint64)
            pos = ctl[S.C_SRC_POS]
            fill_generated(ctl[S.C_GEN_KIND], genf[0], genf[1], ctl[S.C_GEN_SEED], ctl[S.C_SAMPLERATE], pos, xbuf, n, words)
            _run(xbuf, y[done:], n, table, ctl, nch)
            ctl[S.C_SRC_POS] = pos + n
        done += n
    return done


@njit(nogil=True, error_model="numpy")
def callback_core(in_addr, out_addr, frames, status_flags, table_addr):
    """One PortAudio callback, on raw addresses; returns paContinue or paComplete.

    Parameters
    ----------
    in_addr, out_addr : int
        Addresses of PortAudio's interleaved input (float32) and output buffers.
    frames : int
        Frames in this callback (any number, zero included).
    status_flags : int
        PortAudio's ``PaStreamCallbackFlags``.
    table_addr : int
        Address of :attr:`SharedBlock.table`.
    """
    table = carray(address_to_voidptr(table_addr), (S.T_LEN,), np.int64)
    ctl = _view(table, S.T_CTL, (S.C_LEN,), np.int64)
    nch = ctl[S.C_NCH]
    ctl[S.C_CALLBACKS] += 1
    if status_flags != 0:
        ctl[S.C_FLAGGED] += 1
        if status_flags & PA_INPUT_UNDERFLOW:
            ctl[S.C_IN_UNDERFLOW] += 1
        if status_flags & PA_INPUT_OVERFLOW:
            ctl[S.C_IN_OVERFLOW] += 1
        if status_flags & PA_OUTPUT_UNDERFLOW:
            ctl[S.C_OUT_UNDERFLOW] += 1
        if status_flags & PA_OUTPUT_OVERFLOW:
            ctl[S.C_OUT_OVERFLOW] += 1
        if status_flags & PA_PRIMING_OUTPUT:
            ctl[S.C_PRIMING] += 1

    clock = _view(table, S.T_CLOCK, (K.CLK_LEN,), np.int64)
    S.take_params(
        ctl,
        _view(table, S.T_PIP, (K.IP_LEN,), np.int64),
        _view(table, S.T_PFP, (K.FP_LEN,), np.float64),
        _view(table, S.T_SIP, (K.IP_LEN,), np.int64),
        _view(table, S.T_SFP, (K.FP_LEN,), np.float64),
        _view(table, S.T_KIP, (K.IP_LEN,), np.int64),
        _view(table, S.T_KFP, (K.FP_LEN,), np.float64),
        clock[K.CLK_FRAME],
    )

    if ctl[S.C_SRC_DONE] != 0:
        produced = 0
    elif ctl[S.C_CONTAINER_BITS] == 16:
        y16 = carray(address_to_voidptr(out_addr), (frames, nch), np.int16)
        produced = _blocks(in_addr, y16, frames, table, ctl, nch)
    else:
        y32 = carray(address_to_voidptr(out_addr), (frames, nch), np.int32)
        produced = _blocks(in_addr, y32, frames, table, ctl, nch)
    ctl[S.C_FRAMES] += frames
    if produced < frames:
        # The file source ended: the rest of the buffer is digital zero, and the stream completes.
        width = 2 if ctl[S.C_CONTAINER_BITS] == 16 else 4
        pad = carray(address_to_voidptr(out_addr + produced * nch * width), ((frames - produced) * nch * width,), np.uint8)
        for i in range(pad.shape[0]):
            pad[i] = 0
        return PA_COMPLETE
    return PA_CONTINUE


def _callback(input_ptr, output_ptr, frames, time_info, status_flags, user_data):
    # Around the core: the frame-time check and the execution time (rtstage.live.timing).
    table_addr = voidptr_to_address(user_data)
    table = carray(address_to_voidptr(table_addr), (S.T_LEN,), np.int64)
    ctl = _view(table, S.T_CTL, (S.C_LEN,), np.int64)
    clock = _view(table, S.T_CLOCK, (K.CLK_LEN,), np.int64)
    t0_ns = timing.cycle_begin(table[S.T_CTL], voidptr_to_address(time_info), ctl[S.C_FRAMES], clock[K.CLK_FRAME],
                               ctl[S.C_RING_HEAD])
    out_addr = voidptr_to_address(output_ptr)
    if ctl[packing.C_PACKED24] == 0:
        result = callback_core(voidptr_to_address(input_ptr), out_addr, frames, status_flags, table_addr)
    elif frames <= ctl[packing.C_PACK_FRAMES]:
        # Packed 24-bit device: the words go left-justified into the worker's scratch, then three bytes each.
        result = callback_core(voidptr_to_address(input_ptr), ctl[packing.C_PACK_ADDR], frames, status_flags, table_addr)
        packing.pack24(ctl[packing.C_PACK_ADDR], out_addr, frames * ctl[S.C_NCH])
    else:
        packing.zero_bytes(out_addr, 3 * frames * ctl[S.C_NCH])
        ctl[packing.C_PACK_OVERRUNS] += 1
        result = PA_CONTINUE
    timing.cycle_end(table[S.T_CTL], t0_ns)
    return result


_DEPENDS = ("kernel.py", "_philox.py", "live/_ptr.py", "live/ring.py", "live/shared.py", "live/sources.py", "live/cfunc.py",
            "live/timing.py", "live/packing.py")


def source_digest():
    """Digest of the sources compiled into the callback (names the cache subdirectory)."""
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    h = hashlib.sha256(numba.__version__.encode())
    for name in _DEPENDS:
        with open(os.path.join(root, name), "rb") as f:
            h.update(f.read())
    return h.hexdigest()[:16]


def cache_dir():
    """Per-user directory holding the compiled callback (see the module notes)."""
    base = os.environ.get("NUMBA_CACHE_DIR")
    if not base:
        xdg = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        base = os.path.join(xdg, "rtstage", "numba")
    return os.path.join(base, "live-" + source_digest())


_BUILT = {}


def compile_callback(cache=False):
    """Compile the PortAudio callback as a numba ``cfunc`` (``error_model="numpy"``, like everything it calls)."""
    return numba.cfunc(CALLBACK_SIGNATURE, nopython=True, cache=cache, error_model="numpy")(_callback)


def build_callback():
    """Compile (or load from the cache) the PortAudio callback; returns the numba ``CFunc``.

    Its ``.address`` is the C function pointer handed to PortAudio.
    """
    if "cfunc" in _BUILT:
        return _BUILT["cfunc"]
    saved = numba.config.CACHE_DIR
    path = cache_dir()
    try:
        os.makedirs(path, exist_ok=True)
        numba.config.CACHE_DIR = path
        compiled = compile_callback(cache=True)
    finally:
        numba.config.CACHE_DIR = saved
    _BUILT["cfunc"] = compiled
    return compiled
