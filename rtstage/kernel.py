"""The compiled requantization kernel shared by every driver.

One function, :func:`process_block`, does all the audio work: gain with a
linear ramp, replacement of non-finite samples, error-feedback noise shaping,
dither, rounding, clipping and word packing.  The offline renderer, the pipe
and the live callback call it with the same arrays, so their words agree bit
for bit by construction.

Real-time contract
------------------
``process_block`` is compiled with ``nopython`` and ``nogil``, without
``fastmath``; it allocates nothing, takes no lock, does no I/O and raises
nothing (``error_model="numpy"``).  All of its state lives in preallocated
arrays owned by the caller (see :class:`KernelState`), so processing a signal
block by block gives the same words as processing it in one call, for any
split, blocks of zero frames included.

Quantizer
---------
Input is in full-scale units (±1.0).  With ``bits`` = B the step is
Q = 2^-(B-1); the kernel works in LSB units, ``v = x·gain·2^(B-1)``.  The
output word is ``q = floor(v - fb + d + 1/2)`` (round to nearest, ties toward
+inf), limited to [-2^(B-1), 2^(B-1) - 1], and written as ``q << out_shift``
so that a shorter word sits left-justified in its container with the unused
low bits zero.

Dither from (seed, channel, sample index)
-----------------------------------------
For sample index n on channel c the kernel takes the four 64-bit words of
Philox4x64-10 with key ``(seed, c)`` and counter ``(n >> 2, 0, 0, 0)``; sample n
uses word ``n & 3``, whose low 32 bits are called a and high 32 bits b.  A
32-bit value w maps to a uniform ``U(w) = (w + 1/2)·2^-32 - 1/2`` in
(-1/2, 1/2), exactly symmetric about 0.  Then, in LSB and before the amplitude
scale:

* ``rpdf``: U(a)
* ``tpdf``: U(a) + U(b)
* ``tpdf-hp``: U(a[n]) - U(a[n-1]); for n = 0, a[-1] is the low half of word 3
  of counter 2^64 - 1 (the index wraps like the counter)
* ``gaussian``: 0.5·sqrt(-2 ln(U(a) + 1/2))·cos(2π(U(b) + 1/2))

One Philox block thus serves four samples of a channel.  The key's channel
is ``IP_CHANNEL0 + c`` (0 + c unless a driver runs a group of a stream's
channels on its own).

Speed without a changed word
----------------------------
The recurrence is serial per channel (the next word needs the last error),
so the kernel overlaps independent work around it, never reorders it:

* a block runs in chunks of at most CHUNK_FRAMES frames; each chunk's dither
  is computed for every channel first, in a loop of its own (the Philox
  blocks are independent of each other and of the feedback loop); a stereo
  block with RPDF or TPDF goes further: the lean loop of one chunk computes
  the next chunk's dither, a frame per step, so that the Philox work fills
  the feedback loop's latency instead of taking a phase of its own (11 %
  more throughput for stereo TPDF with a 9-tap shaper);
* when nothing moves (constant gain, requantized words, no mute or
  auto-mute) the frames go through a lean loop that runs channels in pairs,
  side by side, so the processor overlaps the two recurrences; each
  channel's newest error stays in a register, the older ones are read from
  a linear window at fixed distances, and the window is copied into the
  circular history at the chunk's end;
* the feedback sum is ``h_1·e[n-1] + h_2·e[n-2] + … + h_N·e[n-N]``,
  summed from k = 1 upwards as documented, starting from its first product
  rather than from ``0.0 + h_1·e[n-1]``.  The two sums differ only when
  every product is zero, and then only in the sign of that zero; ``u = v -
  fb`` differs only if v is also a zero (u is then +0 or -0), and then
  ``floor(u + d + 1/2)`` is the same word and ``e = q - u`` the same stored
  +0.  No word and no stored error changes (the reference tests compare
  both bit for bit);
* the denormal guard is a branch the processor predicts, not a data
  dependence on the critical path.

The scratch for all of it is ``rng_words`` (dither values as float64, error
windows, the Philox block in use); nothing is carried in it between calls.

Clip rule
---------
When a sample clips, the error fed back to the shaper is limited to
±``feedback_peak`` LSB, the largest error an unclipped sample can have (half a
step plus the dither's peak).  A clipped burst therefore disturbs the shaper
no more than ordinary noise does, and it cannot drive the loop unstable.  The
price is that the clipped excess is not spread into the noise: it is simply
lost, as in any clipper.  A non-finite input sample is replaced (NaN by 0,
±Inf by ±full scale), counted, and the channel's error history is cleared.
Fed-back errors smaller than 1e-30 LSB are stored as zero, so no denormal
value ever enters the state.

Monitor modes, mute, auto-mute
------------------------------
The requantized word q is computed for every sample in every mode, so the
shaper and the dither sequence never depend on the monitor mode (auto-mute
alone touches the shaper, below).  In container units (the container is
``bits + out_shift`` bits wide, C its full scale ``2^(bits-1+out_shift)``),
with ``v = x·gain·2^(B-1)`` the input in LSB before feedback:

* requantized: ``q << out_shift``, exactly (no float path at rest);
* error: ``(q - v)·2^out_shift·error_gain``, limited to ±``error_ceil``·C
  (a hard safety limit, -20 dBFS peak from the engine), then rounded;
* input: ``v·2^out_shift``, rounded at the container's full resolution (an
  A/B against the words is exact only when the container is finer than the
  audition word, e.g. bits=8 in a 16-bit container).

Rounding is ``floor(value + 1/2)``, limited to the container's range.  Each
mode has an integer crossfade weight 0..R (R = IP_RAMP_FRAMES, 10 ms) that
moves one step per frame toward R for the selected mode and 0 for the others;
while any weight is between, the output is ``Σ w_m·out_m / R`` times the mute
and auto-mute gains, rounded.  Mute is an integer position 0..R moving one
step per frame (gain ``1 - pos/R``), so it reaches exactly 0 and comes back.
The error gain ramps like the main gain.

Auto-mute, per channel (when IP_AUTO_MUTE is set): the kernel counts
consecutive input samples exactly equal to 0.0 (NaN and -0.0 aside: -0.0 ==
0.0 counts, NaN does not); from the sample that completes IP_HOLD_FRAMES of
them the channel is muted: its history is cleared and stays clear (the
fed-back error is stored as 0), its gain ramps to 0 over R frames (integer
position in ``counts[c, CNT_AM_POS]``), ``CNT_AM_MUTED`` is 1 and
``CNT_AM_FRAMES`` counts the frames.  The first non-zero sample, however
small, unmutes it and the gain ramps back.  All of it is integer state in the
arrays, so any block split gives the same words.

Meter words: ``yq`` receives ``q << out_shift`` whatever the mode, mute or
auto-mute, for meters that measure the real requantized output.
"""

import math

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

from ._philox import philox4x64
from .kernel_layout import (  # noqa: F401  (the layout, re-exported: drivers read K.IP_BITS, K.KernelState, ...)
    MAX_TAPS, IP_BITS, IP_DITHER, IP_NTAPS, IP_SEED, IP_OUT_SHIFT, IP_RAMP_FRAMES, IP_MONITOR, IP_MUTE,
    IP_AUTO_MUTE, IP_HOLD_FRAMES, IP_CHANNEL0, IP_LEN, FP_GAIN, FP_DITHER_SCALE, FP_FEEDBACK_PEAK, FP_ERROR_GAIN,
    FP_ERROR_CEIL, FP_COEF0, FP_LEN, CLK_FRAME, CLK_HPOS, CLK_RAMP_LEFT, CLK_ERAMP_LEFT, CLK_MUTE_POS, CLK_MON_W0,
    CLK_LEN, RAMP_GAIN, RAMP_STEP, RAMP_TARGET, RAMP_EGAIN, RAMP_ESTEP, RAMP_ETARGET, RAMP_LEN, CNT_CLIPPED,
    CNT_NONFINITE, CNT_ZERO_RUN, CNT_AM_MUTED, CNT_AM_POS, CNT_AM_FRAMES, CNT_LEN, MON_REQUANTIZED, MON_ERROR,
    MON_INPUT, N_MONITOR, HIST_LEN, HIST_MASK, FRAMES_PER_BLOCK_SHIFT, CHUNK_FRAMES, RNG_RING_BLOCKS,
    RNG_SCRATCH_ROW, DITHER_STRIDE, WINDOW_OFFSET, RNG_TAG_FRAME, RNG_TAG_SEED, RNG_TAG_LEN, DITHER_NONE,
    DITHER_RPDF, DITHER_TPDF, DITHER_TPDF_HP, DITHER_GAUSSIAN, container_bits_of, word_dtype, KernelState,
)

_TWO_PI = 2.0 * math.pi
_U_SCALE = 2.0**-32
_LOW32 = np.uint64(0xFFFFFFFF)
_DENORMAL_GUARD = 1e-30


@njit(nogil=True, cache=True, inline="always")
def _uniform(word):
    return (np.float64(word) + 0.5) * _U_SCALE - 0.5


@njit(nogil=True, cache=True, inline="always")
def _toward(pos, target):
    """One frame of an integer ramp position toward ``target``."""
    if pos < target:
        return pos + 1
    if pos > target:
        return pos - 1
    return pos


@njit(nogil=True, cache=True, inline="always")
def _start_ramp(ramp, base, clock, clk_left, target, ramp_frames):
    """Start a linear ramp to ``target`` if it is new.

    ``ramp[base]``, ``ramp[base + 1]`` and ``ramp[base + 2]`` are the value,
    the step per frame and the target (RAMP_GAIN/STEP/TARGET, or the
    error-monitor's RAMP_EGAIN/ESTEP/ETARGET); ``clock[clk_left]`` counts the
    frames left.
    """
    if target != ramp[base + 2]:
        ramp[base + 2] = target
        ramp[base + 1] = (target - ramp[base]) / ramp_frames
        clock[clk_left] = ramp_frames


@njit(nogil=True, cache=True, inline="always")
def _round_clamp(value, lo, hi):
    """``floor(value + 1/2)`` limited to [lo, hi], as an int64."""
    r = np.floor(value + 0.5)
    if r > hi:
        r = hi
    elif r < lo:
        r = lo
    return np.int64(r)


@njit(nogil=True, cache=True, error_model="numpy")
def _fill_dither(kind, seed, nch, channel0, first_index, count, dscale, rng_words, dith):
    """Dither of samples ``first_index .. first_index + count - 1`` of every channel, times ``dscale``.

    Channel c's values land in ``dith[_scratch(c) + 2 * j]``, j < count
    (``dith`` is the flat float64 view of ``rng_words``); the row
    ``c * RNG_RING_BLOCKS + RNG_SCRATCH_ROW`` holds the Philox block being
    used.  One call per chunk, ahead of the chunk's frame loop: the blocks are
    independent of each other and of the feedback loop, so they run back to
    back at full throughput instead of waiting between the loop's serial
    steps.  Channel c's key is ``(seed, channel0 + c)``.
    """
    for c in range(nch):
        base = _scratch(c)
        row = c * RNG_RING_BLOCKS + RNG_SCRATCH_ROW
        key = np.uint64(channel0 + c)
        a_prev = 0.0
        if kind == DITHER_TPDF_HP:
            before = first_index - 1
            philox4x64(np.uint64(before >> FRAMES_PER_BLOCK_SHIFT), np.uint64(0), np.uint64(0), np.uint64(0), seed,
                       key, rng_words, row)
            a_prev = _uniform(rng_words[row, before & 3] & _LOW32)
        for j in range(count):
            index = first_index + j
            if j == 0 or (index & 3) == 0:
                philox4x64(np.uint64(index >> FRAMES_PER_BLOCK_SHIFT), np.uint64(0), np.uint64(0), np.uint64(0), seed,
                           key, rng_words, row)
            w = rng_words[row, index & 3]
            a = _uniform(w & _LOW32)
            if kind == DITHER_TPDF:
                d = a + _uniform(w >> np.uint64(32))
            elif kind == DITHER_RPDF:
                d = a
            elif kind == DITHER_TPDF_HP:
                d = a - a_prev
                a_prev = a
            else:
                b = _uniform(w >> np.uint64(32))
                d = 0.5 * math.sqrt(-2.0 * math.log(a + 0.5)) * math.cos(_TWO_PI * (b + 0.5))
            dith[base + 2 * j] = d * dscale


@njit(nogil=True, cache=True, inline="always")
def _replace_nonfinite(xv):
    """NaN -> 0, +Inf -> +1, -Inf -> -1 (full scale)."""
    if math.isnan(xv):
        return 0.0
    return 1.0 if xv > 0.0 else -1.0


@njit(nogil=True, cache=True, inline="always")
def _feedback_rest(fparams, hist, c, hpos, ntaps, e1):
    """``h_1·e1 + h_2·e[n-2] + … + h_N·e[n-N]``, summed from k = 1 upwards, ``e1`` the newest error."""
    fb = fparams[FP_COEF0] * e1
    for k in range(2, ntaps + 1):
        fb += fparams[FP_COEF0 + k - 1] * hist[c, (hpos - k) & HIST_MASK]
    return fb


@njit(nogil=True, cache=True, inline="always")
def _limit(q, u, q_lo, q_hi, fb_peak):
    """Clip rule: the limited word and its fed-back error."""
    q = q_hi if q > q_hi else q_lo
    e = q - u
    if e > fb_peak:
        e = fb_peak
    elif e < -fb_peak:
        e = -fb_peak
    return q, e


@njit(nogil=True, cache=True, inline="always")
def _u(i):
    """An index as uint64: numba then emits no negative-index wraparound for it (the index is never negative)."""
    return np.uint64(i)


@intrinsic
def _unlikely(typingctx, cond):
    """``cond``, marked for the compiler as almost always false (``llvm.expect``).

    The compiler then keeps a branch on it, which the processor predicts,
    instead of a data dependence (a select) on the feedback loop's critical
    path.  It changes no value.
    """
    sig = types.boolean(types.boolean)

    def codegen(context, builder, signature, args):
        bit = ir.IntType(1)
        expect = builder.module.declare_intrinsic("llvm.expect", [bit], ir.FunctionType(bit, [bit, bit]))
        return builder.call(expect, [args[0], ir.Constant(bit, 0)])

    return sig, codegen


@intrinsic
def _words_as_float64(typingctx, words):
    """The C-contiguous 2-D uint64 array ``words`` seen as one flat float64 array (same memory, no copy).

    What ``words.view(np.float64).reshape(-1)`` gives, without the shape and
    layout checks numba compiles into those two calls: their error paths store
    a Python exception record, which the callback must not hold
    (``tests/test_callback_ir.py``).  The kernel's ``rng_words`` is always
    C-contiguous (:class:`KernelState`, the live shared block).
    """
    if not (isinstance(words, types.Array) and words.dtype == types.uint64 and words.ndim == 2 and words.layout == "C"):
        return None
    rtype = types.Array(types.float64, 1, "C")
    sig = rtype(words)

    def codegen(context, builder, signature, args):
        from numba.core.imputils import impl_ret_borrowed
        from numba.np.arrayobj import make_array, populate_array

        src = make_array(signature.args[0])(context, builder, args[0])
        out = make_array(rtype)(context, builder)
        shape = src.shape
        nitems = builder.mul(builder.extract_value(shape, 0), builder.extract_value(shape, 1))
        itemsize = context.get_constant(types.intp, 8)
        data = builder.bitcast(src.data, context.get_data_type(types.float64).as_pointer())
        populate_array(out, data=data, shape=[nitems], strides=[itemsize], itemsize=itemsize, meminfo=src.meminfo)
        return impl_ret_borrowed(context, builder, rtype, out._getvalue())

    return sig, codegen


@njit(nogil=True, cache=True, inline="always")
def _guard(e):
    """The fed-back error as stored: 0 below _DENORMAL_GUARD (no denormal ever enters the state)."""
    if _unlikely(abs(e) < _DENORMAL_GUARD):
        return 0.0
    return e


@njit(nogil=True, cache=True, inline="always")
def _scratch(c):
    """Offset of channel ``c``'s lane in the flat scratch: pairs (2i, 2i+1) share the area of channel 2i,
    lane 0 and lane 1 interleaved, so that one pair's values sit side by side."""
    return (c & ~1) * DITHER_STRIDE + (c & 1)


@njit(nogil=True, cache=True, error_model="numpy")
def _nonfinite_in(x, n, c, counts, hist, dith, w0, w):
    """Replace a non-finite sample of channel ``c``, count it, clear its history and window; returns the sample."""
    xv = np.float64(x[n, c])
    if math.isfinite(xv):
        return xv
    counts[c, CNT_NONFINITE] += 1
    for k in range(HIST_LEN):
        hist[c, k] = 0.0
    for k in range(w0, w, 2):
        dith[_u(k)] = 0.0
    return _replace_nonfinite(xv)


@njit(nogil=True, cache=True, error_model="numpy")
def _rest_quads(x, y, vq, yq, n_lo, count, hpos0, fparams, hist, counts, dith, dithered, ntaps, gain, scale,
                q_lo, q_hi, fb_peak, shift, tap, wtap, c_hi):
    """Channel quads (a .. a + 3, below ``c_hi``) of the lean loop: two pairs side by side, four recurrences
    in flight (see :func:`_rest_loop`); each pair keeps its own interleaved scratch area."""
    h1 = fparams[FP_COEF0]
    for a in range(0, c_hi - 3, 4):
        b = a + 1
        c = a + 2
        d = a + 3
        base = a * DITHER_STRIDE
        base2 = c * DITHER_STRIDE
        w0 = base + WINDOW_OFFSET
        w02 = base2 + WINDOW_OFFSET
        for k in range(1, ntaps + 1):
            slot = (hpos0 - k) & HIST_MASK
            dith[_u(w0 + 2 * (ntaps - k))] = hist[a, slot]
            dith[_u(w0 + 2 * (ntaps - k) + 1)] = hist[b, slot]
            dith[_u(w02 + 2 * (ntaps - k))] = hist[c, slot]
            dith[_u(w02 + 2 * (ntaps - k) + 1)] = hist[d, slot]
        slot = (hpos0 - 1) & HIST_MASK
        ea = hist[a, slot]
        eb = hist[b, slot]
        ec = hist[c, slot]
        ed = hist[d, slot]
        for j in range(count):
            n = _u(n_lo + j)
            w = w0 + 2 * (ntaps + j)
            w2 = w02 + 2 * (ntaps + j)
            xa = np.float64(x[n, a])
            xb = np.float64(x[n, b])
            xc = np.float64(x[n, c])
            xd = np.float64(x[n, d])
            if not (math.isfinite(xa) and math.isfinite(xb) and math.isfinite(xc) and math.isfinite(xd)):
                xa = _nonfinite_in(x, n, a, counts, hist, dith, w0, w)
                xb = _nonfinite_in(x, n, b, counts, hist, dith, w0 + 1, w + 1)
                xc = _nonfinite_in(x, n, c, counts, hist, dith, w02, w2)
                xd = _nonfinite_in(x, n, d, counts, hist, dith, w02 + 1, w2 + 1)
                if not math.isfinite(np.float64(x[n, a])):
                    ea = 0.0
                if not math.isfinite(np.float64(x[n, b])):
                    eb = 0.0
                if not math.isfinite(np.float64(x[n, c])):
                    ec = 0.0
                if not math.isfinite(np.float64(x[n, d])):
                    ed = 0.0
            va = xa * gain
            vb = xb * gain
            vc = xc * gain
            vd = xd * gain
            if tap:
                vq[n, a] = va
                vq[n, b] = vb
                vq[n, c] = vc
                vq[n, d] = vd
            va = va * scale
            vb = vb * scale
            vc = vc * scale
            vd = vd * scale
            ua = va
            ub = vb
            uc = vc
            ud = vd
            if ntaps > 0:
                fba = h1 * ea
                fbb = h1 * eb
                fbc = h1 * ec
                fbd = h1 * ed
                for k in range(2, ntaps + 1):
                    hk = fparams[FP_COEF0 + k - 1]
                    fba = fba + hk * dith[_u(w - 2 * k)]
                    fbb = fbb + hk * dith[_u(w - 2 * k + 1)]
                    fbc = fbc + hk * dith[_u(w2 - 2 * k)]
                    fbd = fbd + hk * dith[_u(w2 - 2 * k + 1)]
                ua = va - fba
                ub = vb - fbb
                uc = vc - fbc
                ud = vd - fbd
            da = 0.0
            db = 0.0
            dc = 0.0
            dd = 0.0
            if dithered:
                da = dith[_u(base + 2 * j)]
                db = dith[_u(base + 2 * j + 1)]
                dc = dith[_u(base2 + 2 * j)]
                dd = dith[_u(base2 + 2 * j + 1)]
            qa = np.floor(ua + da + 0.5)
            qb = np.floor(ub + db + 0.5)
            qc = np.floor(uc + dc + 0.5)
            qd = np.floor(ud + dd + 0.5)
            ea = qa - ua
            eb = qb - ub
            ec = qc - uc
            ed = qd - ud
            if (qa > q_hi or qa < q_lo or qb > q_hi or qb < q_lo or qc > q_hi or qc < q_lo or qd > q_hi
                    or qd < q_lo):
                if qa > q_hi or qa < q_lo:
                    counts[a, CNT_CLIPPED] += 1
                    qa, ea = _limit(qa, ua, q_lo, q_hi, fb_peak)
                if qb > q_hi or qb < q_lo:
                    counts[b, CNT_CLIPPED] += 1
                    qb, eb = _limit(qb, ub, q_lo, q_hi, fb_peak)
                if qc > q_hi or qc < q_lo:
                    counts[c, CNT_CLIPPED] += 1
                    qc, ec = _limit(qc, uc, q_lo, q_hi, fb_peak)
                if qd > q_hi or qd < q_lo:
                    counts[d, CNT_CLIPPED] += 1
                    qd, ed = _limit(qd, ud, q_lo, q_hi, fb_peak)
            ea = _guard(ea)
            eb = _guard(eb)
            ec = _guard(ec)
            ed = _guard(ed)
            dith[_u(w)] = ea
            dith[_u(w + 1)] = eb
            dith[_u(w2)] = ec
            dith[_u(w2 + 1)] = ed
            word_a = np.int64(qa) << shift
            word_b = np.int64(qb) << shift
            word_c = np.int64(qc) << shift
            word_d = np.int64(qd) << shift
            y[n, a] = word_a
            y[n, b] = word_b
            y[n, c] = word_c
            y[n, d] = word_d
            if wtap:
                yq[n, a] = word_a
                yq[n, b] = word_b
                yq[n, c] = word_c
                yq[n, d] = word_d
        for j in range(count):
            slot = (hpos0 + j) & HIST_MASK
            hist[a, slot] = dith[_u(w0 + 2 * (ntaps + j))]
            hist[b, slot] = dith[_u(w0 + 2 * (ntaps + j) + 1)]
            hist[c, slot] = dith[_u(w02 + 2 * (ntaps + j))]
            hist[d, slot] = dith[_u(w02 + 2 * (ntaps + j) + 1)]


@njit(nogil=True, cache=True, error_model="numpy")
def _rest_pairs(x, y, vq, yq, n_lo, count, hpos0, fparams, hist, counts, dith, dithered, ntaps, gain, scale,
                q_lo, q_hi, fb_peak, shift, tap, wtap, c_lo, ahead):
    """Channel pairs (a, a + 1) from ``c_lo`` on, lane by lane side by side (see :func:`_rest_loop`).

    With ``ahead`` = (kind, seed, channel0, first_index, count, dscale,
    rng_words) and count > 0 (a stereo block, RPDF or TPDF, with frames
    after this chunk), the loop also computes the dither of the next
    ``count`` frames, one frame per step, exactly as :func:`_fill_dither`
    would, and leaves it where :func:`_fill_dither` puts it.  The Philox
    blocks do not depend on the feedback loop, so the processor runs them
    in the shadow of its latency instead of in a phase of their own.
    """
    nch = hist.shape[0]
    h1 = fparams[FP_COEF0]
    kind, seed, channel0, ahead_first, ahead_count, dscale, rng_words = ahead
    for a in range(c_lo, nch - 1, 2):
        b = a + 1
        base = a * DITHER_STRIDE
        w0 = base + WINDOW_OFFSET  # lane a at even, lane b at odd offsets
        # The next chunk's dither goes to channel b's own area first (unused while b runs as lane 1 of
        # the pair), so that this chunk's values are not overwritten while they are read.
        ahead_base = b * DITHER_STRIDE
        row_a = a * RNG_RING_BLOCKS + RNG_SCRATCH_ROW
        row_b = b * RNG_RING_BLOCKS + RNG_SCRATCH_ROW
        key_a = np.uint64(channel0 + a)
        key_b = np.uint64(channel0 + b)
        for k in range(1, ntaps + 1):
            slot = (hpos0 - k) & HIST_MASK
            dith[_u(w0 + 2 * (ntaps - k))] = hist[a, slot]
            dith[_u(w0 + 2 * (ntaps - k) + 1)] = hist[b, slot]
        slot = (hpos0 - 1) & HIST_MASK
        ea = hist[a, slot]
        eb = hist[b, slot]
        for j in range(count):
            if j < ahead_count:
                index = ahead_first + j
                if j == 0 or (index & 3) == 0:
                    block = np.uint64(index >> FRAMES_PER_BLOCK_SHIFT)
                    philox4x64(block, np.uint64(0), np.uint64(0), np.uint64(0), seed, key_a, rng_words, row_a)
                    philox4x64(block, np.uint64(0), np.uint64(0), np.uint64(0), seed, key_b, rng_words, row_b)
                ra = rng_words[row_a, index & 3]
                rb = rng_words[row_b, index & 3]
                next_a = _uniform(ra & _LOW32)
                next_b = _uniform(rb & _LOW32)
                if kind == DITHER_TPDF:
                    next_a = next_a + _uniform(ra >> np.uint64(32))
                    next_b = next_b + _uniform(rb >> np.uint64(32))
                dith[_u(ahead_base + 2 * j)] = next_a * dscale
                dith[_u(ahead_base + 2 * j + 1)] = next_b * dscale
            n = _u(n_lo + j)
            w = w0 + 2 * (ntaps + j)  # this frame's slot of lane a in the window
            xa = np.float64(x[n, a])
            xb = np.float64(x[n, b])
            if not (math.isfinite(xa) and math.isfinite(xb)):
                xa = _nonfinite_in(x, n, a, counts, hist, dith, w0, w)
                xb = _nonfinite_in(x, n, b, counts, hist, dith, w0 + 1, w + 1)
                if not math.isfinite(np.float64(x[n, a])):
                    ea = 0.0
                if not math.isfinite(np.float64(x[n, b])):
                    eb = 0.0
            va = xa * gain
            vb = xb * gain
            if tap:
                vq[n, a] = va
                vq[n, b] = vb
            va = va * scale
            vb = vb * scale
            ua = va
            ub = vb
            if ntaps > 0:
                fba = h1 * ea
                fbb = h1 * eb
                for k in range(2, ntaps + 1):
                    hk = fparams[FP_COEF0 + k - 1]
                    fba = fba + hk * dith[_u(w - 2 * k)]
                    fbb = fbb + hk * dith[_u(w - 2 * k + 1)]
                ua = va - fba
                ub = vb - fbb
            da = 0.0
            db = 0.0
            if dithered:
                da = dith[_u(base + 2 * j)]
                db = dith[_u(base + 2 * j + 1)]
            qa = np.floor(ua + da + 0.5)
            qb = np.floor(ub + db + 0.5)
            ea = qa - ua
            eb = qb - ub
            if qa > q_hi or qa < q_lo or qb > q_hi or qb < q_lo:
                if qa > q_hi or qa < q_lo:
                    counts[a, CNT_CLIPPED] += 1
                    qa, ea = _limit(qa, ua, q_lo, q_hi, fb_peak)
                if qb > q_hi or qb < q_lo:
                    counts[b, CNT_CLIPPED] += 1
                    qb, eb = _limit(qb, ub, q_lo, q_hi, fb_peak)
            ea = _guard(ea)
            eb = _guard(eb)
            dith[_u(w)] = ea
            dith[_u(w + 1)] = eb
            word_a = np.int64(qa) << shift
            word_b = np.int64(qb) << shift
            y[n, a] = word_a
            y[n, b] = word_b
            if wtap:
                yq[n, a] = word_a
                yq[n, b] = word_b
        # the chunk's errors into the circular history (a clear above already zeroed the rest)
        for j in range(count):
            slot = (hpos0 + j) & HIST_MASK
            hist[a, slot] = dith[_u(w0 + 2 * (ntaps + j))]
            hist[b, slot] = dith[_u(w0 + 2 * (ntaps + j) + 1)]
        # the next chunk's dither to where the next chunk reads it
        for i in range(2 * ahead_count):
            dith[_u(base + i)] = dith[_u(ahead_base + i)]


@njit(nogil=True, cache=True, error_model="numpy")
def _rest_single(x, y, vq, yq, n_lo, count, hpos0, fparams, hist, counts, dith, dithered, ntaps, gain, scale,
                 q_lo, q_hi, fb_peak, shift, tap, wtap, a):
    """Channel ``a`` alone in the lean loop (the last of an odd channel count); lane 0 of its area."""
    base = a * DITHER_STRIDE
    w0 = base + WINDOW_OFFSET
    for k in range(1, ntaps + 1):
        dith[_u(w0 + 2 * (ntaps - k))] = hist[a, (hpos0 - k) & HIST_MASK]
    ea = hist[a, (hpos0 - 1) & HIST_MASK]
    for j in range(count):
        n = _u(n_lo + j)
        w = w0 + 2 * (ntaps + j)
        xa = np.float64(x[n, a])
        if not math.isfinite(xa):
            xa = _nonfinite_in(x, n, a, counts, hist, dith, w0, w)
            ea = 0.0
        va = xa * gain
        if tap:
            vq[n, a] = va
        va = va * scale
        ua = va
        if ntaps > 0:
            fba = fparams[FP_COEF0] * ea
            for k in range(2, ntaps + 1):
                fba = fba + fparams[FP_COEF0 + k - 1] * dith[_u(w - 2 * k)]
            ua = va - fba
        da = 0.0
        if dithered:
            da = dith[_u(base + 2 * j)]
        qa = np.floor(ua + da + 0.5)
        ea = qa - ua
        if qa > q_hi or qa < q_lo:
            counts[a, CNT_CLIPPED] += 1
            qa, ea = _limit(qa, ua, q_lo, q_hi, fb_peak)
        ea = _guard(ea)
        dith[_u(w)] = ea
        word_a = np.int64(qa) << shift
        y[n, a] = word_a
        if wtap:
            yq[n, a] = word_a
    for j in range(count):
        hist[a, (hpos0 + j) & HIST_MASK] = dith[_u(w0 + 2 * (ntaps + j))]


@njit(nogil=True, cache=True, error_model="numpy")
def _rest_loop(x, y, vq, yq, n_lo, n_hi, hpos0, fparams, hist, counts, dith, dithered, ntaps, gain, scale,
               q_lo, q_hi, fb_peak, shift, tap, wtap, ahead):
    """Frames ``n_lo..n_hi-1`` with everything at rest: constant gain, requantized words, no mute.

    The arithmetic of each sample is that of the general loop in
    :func:`_process`, operation for operation, so the words and the state
    are the same.  Channels run in pairs, the two lanes side by side in the
    same straight-line code, and from four channels on two pairs at once
    (quads): the recurrences are independent, so the processor overlaps
    them.  Each
    channel's newest error stays in a register (it is the only operand on
    the feedback loop's critical path); the older ones are read from a
    linear window in the scratch (the last ``ntaps`` errors before the
    chunk, then the chunk's), so that the taps are plain loads at fixed
    distances; the window is copied into the circular history at the end.
    The feedback sum starts from its first product ``h_1·e[n-1]`` instead
    of ``0.0 + h_1·e[n-1]``: the two differ only in the sign of an all-zero
    sum, which changes neither the word nor the stored error (see the
    module notes).  ``ahead`` is passed to :func:`_rest_pairs` (the next
    chunk's dither computed inside the loop).  Returns the history slot
    after the last frame.
    """
    nch = hist.shape[0]
    count = n_hi - n_lo
    quads = nch & ~3 if nch >= 4 else 0
    if quads:
        _rest_quads(x, y, vq, yq, n_lo, count, hpos0, fparams, hist, counts, dith, dithered, ntaps, gain, scale,
                    q_lo, q_hi, fb_peak, shift, tap, wtap, quads)
    if nch - quads >= 2:
        _rest_pairs(x, y, vq, yq, n_lo, count, hpos0, fparams, hist, counts, dith, dithered, ntaps, gain, scale,
                    q_lo, q_hi, fb_peak, shift, tap, wtap, quads, ahead)
    if nch & 1:
        _rest_single(x, y, vq, yq, n_lo, count, hpos0, fparams, hist, counts, dith, dithered, ntaps, gain, scale,
                     q_lo, q_hi, fb_peak, shift, tap, wtap, nch - 1)
    return (hpos0 + count) & HIST_MASK


@njit(nogil=True, cache=True, error_model="numpy")
def _process(x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag, yq):
    nch = hist.shape[0]
    bits = iparams[IP_BITS]
    kind = iparams[IP_DITHER]
    ntaps = iparams[IP_NTAPS]
    seed = np.uint64(iparams[IP_SEED])
    shift = iparams[IP_OUT_SHIFT]
    scale = math.ldexp(1.0, bits - 1)
    q_hi = scale - 1.0
    q_lo = -scale
    dscale = fparams[FP_DITHER_SCALE]
    fb_peak = fparams[FP_FEEDBACK_PEAK]
    ramp_frames = max(iparams[IP_RAMP_FRAMES], 1)
    inv_frames = 1.0 / ramp_frames
    # Container: bits + shift bits wide, in units of its own LSB.
    cscale = math.ldexp(1.0, shift)
    c_hi = math.ldexp(1.0, bits - 1 + shift) - 1.0
    c_lo = -math.ldexp(1.0, bits - 1 + shift)
    e_ceil = fparams[FP_ERROR_CEIL] * math.ldexp(1.0, bits - 1 + shift)
    mode = iparams[IP_MONITOR]
    if mode < 0 or mode >= N_MONITOR:
        mode = MON_REQUANTIZED
    mute_target = ramp_frames if iparams[IP_MUTE] != 0 else 0
    auto_mute = iparams[IP_AUTO_MUTE] != 0
    hold = max(iparams[IP_HOLD_FRAMES], 1)

    # A new gain (or error-monitor gain) target starts a linear ramp at this block boundary.
    target = fparams[FP_GAIN]
    _start_ramp(ramp, RAMP_GAIN, clock, CLK_RAMP_LEFT, target, ramp_frames)
    gain = ramp[RAMP_GAIN]
    step = ramp[RAMP_STEP]
    ramp_left = clock[CLK_RAMP_LEFT]
    etarget = fparams[FP_ERROR_GAIN]
    _start_ramp(ramp, RAMP_EGAIN, clock, CLK_ERAMP_LEFT, etarget, ramp_frames)
    egain = ramp[RAMP_EGAIN]
    estep = ramp[RAMP_ESTEP]
    eramp_left = clock[CLK_ERAMP_LEFT]
    mute_pos = min(clock[CLK_MUTE_POS], ramp_frames)
    w0 = min(clock[CLK_MON_W0], ramp_frames)
    w1 = min(clock[CLK_MON_W0 + 1], ramp_frames)
    w2 = min(clock[CLK_MON_W0 + 2], ramp_frames)

    frame0 = clock[CLK_FRAME]
    hpos = clock[CLK_HPOS]
    if not auto_mute and nframes > 0:
        for c in range(nch):
            counts[c, CNT_ZERO_RUN] = 0
            counts[c, CNT_AM_MUTED] = 0
    tap = vq.shape[0] >= nframes
    wtap = yq.shape[0] >= nframes
    dithered = kind != DITHER_NONE
    dith = _words_as_float64(rng_words)  # the flat float64 view, without a raising check

    # Many channels run in shorter chunks, so that a chunk's scratch stays in the first-level cache.
    chunk_frames = CHUNK_FRAMES if nch <= 8 else max(CHUNK_FRAMES // 4, (CHUNK_FRAMES * 8) // nch)
    # The block runs in chunks of at most CHUNK_FRAMES frames: first the chunk's dither
    # for every channel, then its frames, through the lean loop when nothing moves
    # (constant gain, requantized words, no mute or auto-mute) and the general loop otherwise.
    # A stereo block with RPDF or TPDF computes each next chunk's dither inside the lean loop of the
    # chunk before (see _rest_pairs); `prefilled` says the chunk's dither is already in place.
    look_ahead = nch == 2 and (kind == DITHER_TPDF or kind == DITHER_RPDF)
    channel0 = iparams[IP_CHANNEL0]
    prefilled = False
    n_lo = 0
    while n_lo < nframes:
        n_hi = min(n_lo + chunk_frames, nframes)
        if dithered and not prefilled:
            _fill_dither(kind, seed, nch, channel0, frame0 + n_lo, n_hi - n_lo, dscale, rng_words, dith)
        prefilled = False
        at_rest_all = (ramp_left == 0 and eramp_left == 0 and mode == MON_REQUANTIZED and w0 == ramp_frames
                       and w1 == 0 and w2 == 0 and mute_pos == 0 and mute_target == 0 and not auto_mute)
        if at_rest_all:
            for c in range(nch):
                if counts[c, CNT_AM_POS] != 0:
                    at_rest_all = False
        if at_rest_all:
            ahead_count = min(chunk_frames, nframes - n_hi) if look_ahead else 0
            ahead = (kind, seed, channel0, frame0 + n_hi, ahead_count, dscale, rng_words)
            hpos = _rest_loop(x, y, vq, yq, n_lo, n_hi, hpos, fparams, hist, counts, dith, dithered, ntaps,
                              gain, scale, q_lo, q_hi, fb_peak, shift, tap, wtap, ahead)
            prefilled = ahead_count > 0
            n_lo = n_hi
            continue
        for n in range(n_lo, n_hi):
            if ramp_left > 0:
                ramp_left -= 1
                gain = target if ramp_left == 0 else gain + step
            if eramp_left > 0:
                eramp_left -= 1
                egain = etarget if eramp_left == 0 else egain + estep
            w0 = _toward(w0, ramp_frames if mode == MON_REQUANTIZED else 0)
            w1 = _toward(w1, ramp_frames if mode == MON_ERROR else 0)
            w2 = _toward(w2, ramp_frames if mode == MON_INPUT else 0)
            mute_pos = _toward(mute_pos, mute_target)
            # At rest in one mode, unmuted: the words come straight from q, the error or the input.
            at_rest = mute_pos == 0 and ((mode == MON_REQUANTIZED and w0 == ramp_frames and w1 == 0 and w2 == 0)
                                         or (mode == MON_ERROR and w1 == ramp_frames and w0 == 0 and w2 == 0)
                                         or (mode == MON_INPUT and w2 == ramp_frames and w0 == 0 and w1 == 0))
            for c in range(nch):
                xv = np.float64(x[n, c])
                exact_zero = xv == 0.0
                if not math.isfinite(xv):
                    counts[c, CNT_NONFINITE] += 1
                    if math.isnan(xv):
                        xv = 0.0
                    elif xv > 0.0:
                        xv = 1.0
                    else:
                        xv = -1.0
                    for k in range(HIST_LEN):
                        hist[c, k] = 0.0
                # Auto-mute: exact digital zero held for `hold` frames mutes the channel.  With
                # auto-mute off (its counters cleared at the block start) only a ramp back in
                # after switching it off needs work, so the common path touches no counter.
                muted = False
                am_pos = 0
                if auto_mute:
                    if exact_zero:
                        if counts[c, CNT_ZERO_RUN] < hold:
                            counts[c, CNT_ZERO_RUN] += 1
                    else:
                        counts[c, CNT_ZERO_RUN] = 0
                    muted = counts[c, CNT_ZERO_RUN] >= hold
                    if muted:
                        if counts[c, CNT_AM_MUTED] == 0:
                            for k in range(HIST_LEN):
                                hist[c, k] = 0.0
                        counts[c, CNT_AM_MUTED] = 1
                        counts[c, CNT_AM_FRAMES] += 1
                    else:
                        counts[c, CNT_AM_MUTED] = 0
                    am_pos = _toward(min(counts[c, CNT_AM_POS], ramp_frames), ramp_frames if muted else 0)
                    counts[c, CNT_AM_POS] = am_pos
                elif counts[c, CNT_AM_POS] != 0:
                    am_pos = _toward(min(counts[c, CNT_AM_POS], ramp_frames), 0)
                    counts[c, CNT_AM_POS] = am_pos

                v = xv * gain
                if tap:
                    vq[n, c] = v
                v *= scale
                u = v
                if ntaps > 0:
                    fb = fparams[FP_COEF0] * hist[c, (hpos - 1) & HIST_MASK]
                    for k in range(2, ntaps + 1):
                        fb += fparams[FP_COEF0 + k - 1] * hist[c, (hpos - k) & HIST_MASK]
                    u -= fb
                d = 0.0
                if dithered:
                    d = dith[_scratch(c) + 2 * (n - n_lo)]
                q = np.floor(u + d + 0.5)
                e = q - u
                if q > q_hi or q < q_lo:
                    q = q_hi if q > q_hi else q_lo
                    counts[c, CNT_CLIPPED] += 1
                    e = q - u
                    if e > fb_peak:
                        e = fb_peak
                    elif e < -fb_peak:
                        e = -fb_peak
                if abs(e) < _DENORMAL_GUARD or muted:
                    e = 0.0
                hist[c, hpos] = e
                word = np.int64(q) << shift
                if wtap:
                    yq[n, c] = word
                if at_rest and am_pos == 0:
                    if mode == MON_REQUANTIZED:
                        y[n, c] = word
                    elif mode == MON_ERROR:
                        ev = (q - v) * cscale * egain
                        ev = min(max(ev, -e_ceil), e_ceil)
                        y[n, c] = _round_clamp(ev, c_lo, c_hi)
                    else:
                        y[n, c] = _round_clamp(v * cscale, c_lo, c_hi)
                else:
                    acc = 0.0
                    if w0 > 0:
                        acc += w0 * (q * cscale)
                    if w1 > 0:
                        ev = (q - v) * cscale * egain
                        acc += w1 * min(max(ev, -e_ceil), e_ceil)
                    if w2 > 0:
                        acc += w2 * (v * cscale)
                    acc *= inv_frames * ((ramp_frames - mute_pos) * inv_frames) * ((ramp_frames - am_pos) * inv_frames)
                    y[n, c] = _round_clamp(acc, c_lo, c_hi)
            hpos = (hpos + 1) & HIST_MASK
        n_lo = n_hi

    if nframes > 0:
        # The ring holds the blocks of the last chunk (a cache: nothing depends on it).
        rng_tag[RNG_TAG_FRAME] = frame0 + nframes if dithered else -1
        rng_tag[RNG_TAG_SEED] = iparams[IP_SEED]
    clock[CLK_FRAME] = frame0 + nframes
    clock[CLK_HPOS] = hpos
    clock[CLK_RAMP_LEFT] = ramp_left
    clock[CLK_ERAMP_LEFT] = eramp_left
    clock[CLK_MUTE_POS] = mute_pos
    clock[CLK_MON_W0] = w0
    clock[CLK_MON_W0 + 1] = w1
    clock[CLK_MON_W0 + 2] = w2
    ramp[RAMP_GAIN] = gain
    ramp[RAMP_EGAIN] = egain


@njit(nogil=True, cache=True, error_model="numpy")
def process_block(x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag, yq=None):
    """Requantize ``nframes`` frames of ``x`` into ``y``.

    Parameters
    ----------
    x : ndarray, shape (>= nframes, channels), float32 or float64
        Input in full-scale units.
    y : ndarray, shape (>= nframes, channels), integer
        Output words in container units: ``q << out_shift`` in the
        requantized monitor mode, otherwise the monitored signal (see the
        module notes on monitor modes, mute and auto-mute).
    vq : ndarray, shape (>= nframes, channels) or (0, channels), float64
        Meter tap: receives the input as it enters the quantizer, ``x·gain``
        in full-scale units (non-finite samples as replaced), so that a meter
        sees exactly the values the words were made from, gain ramps
        included.  An array with no rows turns the tap off.
    nframes : int
        Frames to process; 0 is allowed.
    iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag : ndarray
        Parameters and state, see :class:`KernelState`; state is updated in place.
    yq : ndarray, shape (>= nframes, channels) or (0, channels), integer, optional
        Meter words: the requantized words ``q << out_shift`` whatever the
        monitor mode, mute or auto-mute, so that meters measure the real
        requantized output.  Omitted or no rows: off.
    """
    if yq is None:
        _process(x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag, y[:0])
    else:
        _process(x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag, yq)
