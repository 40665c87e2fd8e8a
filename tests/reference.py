"""A slow, independent reference of the documented requantizer, in plain numpy.

Written from the module docstring of :mod:`rtstage.kernel` (quantizer, dither
mapping, clip rule) and from the tables of :mod:`rtstage.dither`; it shares no
code with the kernel.  The random words come from :class:`numpy.random.Philox`
(numpy's own Philox4x64-10), not from :mod:`rtstage._philox`.

Arithmetic order
----------------
Every sample is computed with Python floats (IEEE binary64) in the order the
documentation states the formulas: ``v = (x·gain)·2^(B-1)``, the feedback
``Σ_k h_k e[n-k]`` summed from k = 1 upwards, ``q = floor((u + d) + 1/2)``.
Where the kernel uses the same order the two agree bit for bit; a vectorised
``numpy.dot`` for the feedback would not, because numpy may add the products
in a different order (pairwise or SIMD lanes) and floating-point addition is
not associative.  The Gaussian mapping uses :mod:`math` (the C library's
``log``, ``cos`` and ``sqrt``), as a compiled kernel does.

References
----------
.. [1] J. K. Salmon, M. A. Moraes, R. O. Dror, D. E. Shaw, "Parallel random
   numbers: as easy as 1, 2, 3", Proc. SC11, 2011 (Philox4x64-10).
.. [2] S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and
   dither: a theoretical survey", J. Audio Eng. Soc. 40(5), 1992.
"""

import math

import numpy as np

UINT64_MASK = (1 << 64) - 1
DENORMAL_GUARD_LSB = 1e-30
"""Fed-back errors below this magnitude are stored as zero (kernel docstring)."""

DITHER_PEAK_LSB = {"none": 0.0, "rpdf": 0.5, "tpdf": 1.0, "tpdf-hp": 1.0, "gaussian": 2.0}
"""Peak dither magnitude at scale 1 used by the clip rule: the tables of rtstage.dither
(Gaussian: four sigma of 0.5 LSB)."""


def numpy_counter_before(block):
    """The 256-bit counter numpy must start from to produce Philox block ``block`` first.

    numpy's Philox increments its counter (a 256-bit little-endian number,
    four uint64 words) before it generates, so block ``c`` needs ``c - 1``:
    for ``c = 0`` that is 2^256 - 1, all four words set.
    """
    block = int(block) & UINT64_MASK
    if block == 0:
        return np.full(4, UINT64_MASK, dtype=np.uint64)
    return np.array([block - 1, 0, 0, 0], dtype=np.uint64)


def philox_words_numpy(seed, channel, first_block, nblocks):
    """Philox4x64-10 words of counters ``(first_block + i, 0, 0, 0)``, i < nblocks, from numpy.

    The run must not cross 2^64 (numpy would carry into the second counter
    word, the kernel wraps); callers split runs at the wrap.

    Returns
    -------
    ndarray, shape (nblocks, 4), uint64
    """
    first_block = int(first_block) & UINT64_MASK
    if nblocks == 0:
        return np.zeros((0, 4), dtype=np.uint64)
    if first_block + nblocks - 1 > UINT64_MASK:
        raise ValueError("run crosses 2^64; split it")
    key = np.array([int(seed) & UINT64_MASK, int(channel)], dtype=np.uint64)
    gen = np.random.Philox(key=key, counter=numpy_counter_before(first_block))
    return gen.random_raw(4 * nblocks).reshape(nblocks, 4)


def uniform_from_word(half):
    """``U(w) = (w + 1/2)·2^-32 - 1/2`` of a 32-bit value, as a Python float (kernel docstring)."""
    return (int(half) + 0.5) * 2.0**-32 - 0.5


class _Words:
    """Philox words of one (seed, channel), fetched from numpy in runs and cached by block."""

    def __init__(self, seed, channel):
        self.seed = seed
        self.channel = channel
        self.cache = {}

    def prefetch(self, first_index, last_index):
        """Fetch the blocks holding sample indices first_index..last_index (may be negative)."""
        lo = first_index >> 2
        hi = last_index >> 2
        blocks = [b & UINT64_MASK for b in range(lo, hi + 1)]
        runs = []
        for b in blocks:
            if runs and runs[-1][1] + 1 == b:
                runs[-1][1] = b
            else:
                runs.append([b, b])
        for start, stop in runs:
            words = philox_words_numpy(self.seed, self.channel, start, stop - start + 1)
            for i in range(stop - start + 1):
                self.cache[start + i] = words[i]

    def word(self, index, which):
        """Low (``which`` = 0, a) or high (1, b) 32 bits of word ``index & 3`` of block ``index >> 2``.

        The counter is taken mod 2^64.
        """
        block = (index >> 2) & UINT64_MASK
        if block not in self.cache:
            self.prefetch(index, index)
        word = int(self.cache[block][index & 3])
        return (word >> 32) if which else (word & 0xFFFFFFFF)


def dither_lsb(kind, words, index):
    """Dither of sample ``index`` in LSB at amplitude scale 1, by the documented mapping."""
    if kind == "none":
        return 0.0
    if kind == "tpdf-hp":
        return uniform_from_word(words.word(index, 0)) - uniform_from_word(words.word(index - 1, 0))
    a = uniform_from_word(words.word(index, 0))
    if kind == "rpdf":
        return a
    b = uniform_from_word(words.word(index, 1))
    if kind == "tpdf":
        return a + b
    if kind == "gaussian":
        return 0.5 * math.sqrt(-2.0 * math.log(a + 0.5)) * math.cos(2.0 * math.pi * (b + 0.5))
    raise ValueError(f"unknown dither {kind!r}")


def dither_sequence(kind, seed, channel, start_index, nframes):
    """Dither values (LSB, scale 1) for sample indices start_index .. start_index + nframes - 1."""
    words = _Words(seed, channel)
    words.prefetch(start_index - 1, start_index + nframes - 1)
    return np.array([dither_lsb(kind, words, start_index + n) for n in range(nframes)], dtype=np.float64)


def reference_requantize(x, bits, dither="tpdf", coefs=(), seed=0, gain_db=0.0, dither_scale=1.0, start_frame=0):
    """Requantize ``x`` (frames, channels) sample by sample, as documented.

    Parameters
    ----------
    x : array_like, shape (frames, channels)
        Input in full-scale units.
    bits : int
        Word length B; step Q = 2^-(B-1).
    dither : str
        ``none``, ``rpdf``, ``tpdf``, ``tpdf-hp`` or ``gaussian``.
    coefs : sequence of float
        Error-filter taps h_1..h_N, NTF(z) = 1 - Σ h_k z^-k.
    seed : int
        Dither seed (0..2^64-1).
    gain_db : float
        Constant gain in dB (no ramp: the engine starts at its gain).
    dither_scale : float
        Dither amplitude scale.
    start_frame : int
        Sample index of the first frame.

    Returns
    -------
    dict
        ``q`` (int64 words on the B-bit grid), ``err`` (fed-back error per
        sample, LSB), ``v`` (scaled input, LSB, after replacement of
        non-finite samples), ``clipped`` and ``nonfinite`` (counts per channel),
        ``history`` (shape (channels, N): the error history at the end,
        ``history[c, k-1] = e[n-k]``, cleared by non-finite samples).
    """
    x = np.asarray(x, dtype=np.float64)
    nframes, nch = x.shape
    scale = 2.0 ** (bits - 1)
    q_hi = scale - 1.0
    q_lo = -scale
    gain = 10.0 ** (gain_db / 20.0)
    fb_peak = 0.5 + DITHER_PEAK_LSB[dither] * dither_scale
    ntaps = len(coefs)
    h = [float(c) for c in coefs]
    q_out = np.zeros((nframes, nch), dtype=np.int64)
    err_out = np.zeros((nframes, nch), dtype=np.float64)
    v_out = np.zeros((nframes, nch), dtype=np.float64)
    clipped = np.zeros(nch, dtype=np.int64)
    nonfinite = np.zeros(nch, dtype=np.int64)
    final_history = np.zeros((nch, ntaps), dtype=np.float64)
    for c in range(nch):
        words = _Words(seed, c)
        if dither != "none" and nframes:
            words.prefetch(start_frame - 1, start_frame + nframes - 1)
        history = [0.0] * ntaps  # history[k-1] = e[n-k]
        for n in range(nframes):
            xv = float(x[n, c])
            if not math.isfinite(xv):
                nonfinite[c] += 1
                xv = 0.0 if math.isnan(xv) else math.copysign(1.0, xv)
                history = [0.0] * ntaps
            v = xv * gain * scale
            v_out[n, c] = v
            u = v
            if ntaps:
                fb = 0.0
                for k in range(ntaps):
                    fb += h[k] * history[k]
                u = u - fb
            d = dither_lsb(dither, words, start_frame + n) * dither_scale if dither != "none" else 0.0
            q = math.floor(u + d + 0.5)
            e = q - u
            if q > q_hi or q < q_lo:
                q = q_hi if q > q_hi else q_lo
                clipped[c] += 1
                e = min(max(q - u, -fb_peak), fb_peak)
            if abs(e) < DENORMAL_GUARD_LSB:
                e = 0.0
            if ntaps:
                history = [e] + history[:-1]
            q_out[n, c] = int(q)
            err_out[n, c] = e
        final_history[c] = history
    return {"q": q_out, "err": err_out, "v": v_out, "clipped": clipped, "nonfinite": nonfinite, "history": final_history}


def pack_words(q, bits, format_bits=None):
    """Left-justify B-bit words in their container: int16 (B <= 16) or int32 (shift 32 - B)."""
    if format_bits is None:
        format_bits = 16 if bits <= 16 else 24
    width = 16 if format_bits == 16 else 32
    dtype = np.int16 if format_bits == 16 else np.int32
    return (np.asarray(q, dtype=np.int64) << (width - bits)).astype(dtype)
