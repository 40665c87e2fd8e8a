"""Find the link test sequence in a capture and name what the path did to it.

The analyser regenerates the sequence from (seed, bits, samplerate, channels,
frames) and compares the capture with it word for word.  Steps, per captured
channel:

1. **Start marker.**  The normalised cross-correlation of the channel with
   every source channel's head marker (a binary pseudo-random sequence) has
   one sharp peak: its position is the latency (exact to the frame), its
   sign the polarity, and the source channel whose marker peaks is the one
   the captured channel carries.  Gain, polarity and delay leave the peak's
   height near 1; foreign material before and after does not correlate.
2. **Length.**  Unless given, the distance to the tail marker gives the
   sequence's length (lengths are on a 4096-frame grid).
3. **Alignment.**  In 2048-frame segments of the loud sections, the integer
   lag of the best match and the fractional delay (slope of the
   cross-spectrum's phase over the lower 40 % of the band) follow the
   alignment through the sequence.  A steady slope of the delay is drift
   (``drift_ppm``: capture samples per source sample, minus one, times 10^6);
   an isolated whole-sample step is a slip, located to the exact sample by
   the split that minimises the squared error.
4. **Gain, DC, clipping.**  A least-squares fit ``c = g s + b`` on the words
   of at most half scale gives polarity and gain; the mean of the ``silence``
   section gives the DC offset (a biased rounding such as truncation leaves
   digital silence at zero, so a bias of the words is not taken for DC);
   captured words stuck at the channel's extreme where the source asks for
   more are clipped.
   Words that miss by far more than any requantization error (more than 64
   grid steps, 32 robust standard deviations and -60 dB of full scale) in
   under 5 % of the sequence are **damaged** stretches (a dropout, a glitch,
   a concealed lost block): they are reported with their frames and kept out
   of the fits and of the verdict on the rest.
5. **Words.**  The residual ``e = c - (s g + dc)`` is classified against the
   capture's grid step ``q`` (the lowest bit that ever toggles):

   * ``none``: ``e`` is zero (or below half a step of the source's own N-bit
     grid, as after a gain stage that rounds at N bits);
   * ``truncation``: ``c = q floor(s / q)`` (or toward zero) for every word:
     the error is deterministic, between -q and 0, biased by -q/2;
   * ``rounding``: ``|e| <= q/2`` for every word: deterministic and
     signal-dependent, mean zero on a busy signal;
   * ``dithered``: ``e`` is not a function of the source word's low bits
     (words equal modulo ``q`` get different errors), has zero mean and an
     rms of at most 8 steps (noise-shaped dither included); the dither also
     shows in digital silence unless the path mutes it or uses RPDF;
   * ``other``: anything else (a resampler, a codec, a wrong gain law).

   ``bits_passed`` is the word length the path carries: N for ``none``, the
   capture's word length for ``truncation``, ``rounding`` and ``dithered``,
   and for ``other`` the longest length whose top bits arrived unchanged in
   every word (for words that are not integers, the longest length whose LSB
   still bounds the error; 0 when the path resamples: no word arrives as a
   word).

The statistics are textbook ones: truncation error uniform on (-q, 0] with
mean -q/2; rounding error on (-q/2, q/2], a deterministic function of the
input; non-subtractive RPDF/TPDF dither makes the total error independent of
the signal in its first moments [1]_, and is present in digital silence.

References
----------
.. [1] S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and
   dither: a theoretical survey", J. Audio Eng. Soc. 40(5), 1992.
"""

import json
import math

import numpy as np
from scipy import signal

from ..errors import RtstageError
from . import sequence as seq

MARKER_THRESHOLD = 0.5
"""Normalised correlation above which a marker counts as found (foreign noise stays near 4/sqrt(8192) = 0.04)."""

SEGMENT_FRAMES = 2048
SEARCH_FRAMES = 16
"""Lag searched around the previous segment's, each side (drift up to 8000 ppm, slips of up to 16 frames)."""

WIDE_SEARCH_FRAMES = 8192
"""Lag searched when the narrow search fails (a lost or inserted block of up to this many frames)."""

DRIFT_MIN_PPM = 1.0
"""Smaller slopes are reported as 0: over a few seconds they move the alignment by well under a frame."""

DITHER_MAX_RMS_STEPS = 8.0
"""Largest error rms (in steps of the capture's grid) still taken for dither; noise shaping raises it to a few steps."""

DAMAGE_MAX_FRACTION = 0.05
"""Above this share of damaged words the change is taken as the path's nature (``other``), not as damage."""

DAMAGE_MERGE_FRAMES = 64
"""Damaged words closer than this form one stretch."""

REQUANTIZATIONS = ("none", "truncation", "rounding", "dithered", "other")


# --------------------------------------------------------------------------- helpers


def _norm_xcorr(x, ref):
    """Normalised cross-correlation of ``x`` with ``ref`` (mode 'valid'): one value per start frame."""
    n = ref.shape[0]
    if x.shape[0] < n:
        return np.zeros(0)
    corr = signal.correlate(x, ref, mode="valid", method="fft")
    c2 = np.concatenate(([0.0], np.cumsum(x * x)))
    energy = c2[n:] - c2[:-n]
    denom = np.sqrt(np.maximum(energy, 0.0) * float(np.dot(ref, ref)))
    out = np.zeros_like(corr)
    ok = denom > 1e-12 * max(1.0, float(denom.max(initial=0.0)))
    out[ok] = corr[ok] / denom[ok]
    return out


def _fractional_delay(x, s):
    """Delay of ``x`` relative to ``s`` in frames (|delay| < 1), from the cross-spectrum phase below 0.4 fs."""
    n = s.shape[0]
    window = np.hanning(n)
    cross = np.fft.rfft(x * window) * np.conj(np.fft.rfft(s * window))
    k = np.arange(cross.shape[0])
    band = (k > 0) & (k < 0.4 * n)
    f = k[band] / n
    phase = np.angle(cross[band])
    w = np.abs(cross[band])
    denom = 2 * np.pi * np.sum(w * f * f)
    return float(-np.sum(w * f * phase) / denom) if denom > 0 else 0.0


def _grid_step(values):
    """Largest power of two dividing every (integer) value; 1 for non-integers; 0 when all are zero."""
    r = np.round(values)
    if values.size == 0 or np.max(np.abs(values - r)) > 1e-6:
        return 1
    ints = np.abs(r.astype(np.int64))
    acc = np.bitwise_or.reduce(ints) if ints.size else 0
    if acc == 0:
        return 0
    return int(acc & -acc)


def _deterministic(keys, errors):
    """True when equal keys always come with equal errors."""
    if keys.size == 0:
        return True
    order = np.lexsort((errors, keys))
    k = keys[order]
    e = errors[order]
    same = k[1:] == k[:-1]
    return not bool(np.any(same & (np.abs(e[1:] - e[:-1]) > 1e-9)))


# --------------------------------------------------------------------------- the analyser


class _Channel:
    """Working data of one captured channel."""

    def __init__(self, index, x):
        self.index = index
        self.x = x
        self.source = None
        self.head = None
        self.rho = 0.0


def analyse(capture, samplerate, seed, bits=24, channels=None, frames=None):
    """Analyse a capture of the link test sequence.

    Parameters
    ----------
    capture : array_like
        Captured audio, shape ``(frames, channels)`` (or 1-D), full scale = 1.0
        (what :func:`soundfile.read` returns as float64).
    samplerate : int
        Sample rate in Hz of the sequence (and of the capture).
    seed : int
        The sequence's seed.
    bits : int
        The sequence's word length N.
    channels : int or None
        The sequence's channel count; None: the capture's.
    frames : int or None
        The sequence's length; None: read from the tail marker.

    Returns
    -------
    dict
        The report (see :func:`report_keys` and docs/guide.md): ``found``,
        ``latency_frames``, ``transparent``, ``channels`` (one entry per
        captured channel) and ``summary`` (lines of text).
    """
    x = np.asarray(capture, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[1] < 1:
        raise RtstageError("capture must have shape (frames, channels)")
    bits = int(bits)
    if not seq.MIN_BITS <= bits <= seq.MAX_BITS:
        raise RtstageError(f"--bits must be {seq.MIN_BITS}..{seq.MAX_BITS}, got {bits}")
    nsrc = int(channels) if channels else x.shape[1]
    scale = float(1 << (bits - 1))
    x = x * scale
    if not np.all(np.isfinite(x)):
        x = np.nan_to_num(x, nan=0.0, posinf=scale, neginf=-scale)

    heads = [seq.marker(seed, bits, j, "head") for j in range(nsrc)]
    chans = [_Channel(i, x[:, i]) for i in range(x.shape[1])]
    for ch in chans:
        best = (0.0, None, None)
        for j in range(nsrc):
            rho = _norm_xcorr(ch.x, heads[j])
            if rho.size == 0:
                continue
            k = int(np.argmax(np.abs(rho)))
            if abs(rho[k]) > abs(best[0]):
                best = (float(rho[k]), j, k)
        ch.rho = best[0]
        if abs(best[0]) >= MARKER_THRESHOLD:
            ch.source, ch.head = best[1], best[2]
    found = [ch for ch in chans if ch.source is not None]
    report = {"found": bool(found), "seed": int(seed), "bits": bits, "samplerate": int(samplerate),
              "sequence_channels": nsrc, "capture_frames": int(x.shape[0]), "capture_channels": int(x.shape[1])}
    if not found:
        report.update({"latency_frames": None, "transparent": False, "sequence_frames": frames,
                       "channels": [_missing_channel(ch) for ch in chans]})
        report["summary"] = summary_lines(report)
        return report

    if frames is None:
        frames = _length_from_tail(found, seed, bits, samplerate)
    seq.check_shape(bits, samplerate, nsrc, frames)
    words = seq.sequence_words(seed, bits, samplerate, nsrc, frames).astype(np.float64)
    secs = {s.name: s for s in seq.sections(samplerate, frames)}
    results = []
    for ch in chans:
        if ch.source is None:
            results.append(_missing_channel(ch))
        else:
            results.append(_analyse_channel(ch, words[:, ch.source], secs, bits, frames))
    present = sorted(r["source_channel"] for r in results if r["source_channel"] is not None)
    report.update({
        "sequence_frames": int(frames),
        "latency_frames": int(found[0].head),
        "transparent": bool(len(results) == nsrc and present == list(range(nsrc)) and all(r["transparent"] for r in results)),
        "channels": results,
    })
    report["summary"] = summary_lines(report)
    return report


def _missing_channel(ch):
    return {"channel": ch.index, "source_channel": None, "transparent": False, "marker_correlation": round(abs(ch.rho), 4),
            "latency_frames": None, "word_errors": None, "bits_passed": 0, "polarity": None, "gain_db": None,
            "dc_offset_lsb": None, "slips": [], "drift_ppm": None, "clipped": None, "requantization": None,
            "frames_compared": 0, "frames_missing": None, "dither_in_silence": None, "damaged": [],
            "damaged_frames": 0}


def _length_from_tail(found, seed, bits, samplerate):
    for ch in found:
        tail = seq.marker(seed, bits, ch.source, "tail")
        after = ch.x[ch.head + seq.MARKER_FRAMES :]
        rho = _norm_xcorr(after, tail)
        if rho.size == 0:
            continue
        k = int(np.argmax(np.abs(rho)))
        if abs(rho[k]) >= MARKER_THRESHOLD:
            return seq.snap_frames(samplerate, k + 2 * seq.MARKER_FRAMES)
    raise RtstageError("the end marker is not in the capture (cut short?); give the sequence length with --seconds")


def _segments(secs, frames):
    """Start frames of the tracking segments (loud sections only)."""
    starts = []
    for name in ("head", "full", "near", "tail"):
        s = secs[name]
        starts.extend(range(s.start, s.stop - SEGMENT_FRAMES + 1, SEGMENT_FRAMES))
    return np.array(starts, dtype=np.int64)


def _match(x, ref, lo, hi):
    """Best start in ``x[lo:hi]`` for ``ref``: (start, dot) or None when the correlation stays below 0.5."""
    lo, hi = max(lo, 0), min(hi, x.shape[0])
    if hi - lo < ref.shape[0]:
        return None
    window = x[lo:hi]
    if hi - lo - ref.shape[0] <= 2 * SEARCH_FRAMES:
        dots = np.lib.stride_tricks.sliding_window_view(window, ref.shape[0]) @ ref
    else:
        dots = signal.correlate(window, ref, mode="valid", method="fft")
    k = int(np.argmax(np.abs(dots)))
    seg = window[k : k + ref.shape[0]]
    energy = float(np.dot(ref, ref))
    if energy == 0 or abs(dots[k]) < 0.5 * math.sqrt(energy * float(np.dot(seg, seg)) + 1e-30):
        return None
    return lo + k, float(np.dot(seg, ref))


def _track(ch, s, starts):
    """Integer lag, fractional delay and LS gain of each segment; None where the capture has no match.

    The lag is searched within 16 frames of the previous segment's, then, if that fails (a lost or
    inserted block), within 8192 frames.
    """
    x = ch.x
    lag = int(ch.head)
    out = []
    for u in starts:
        ref = s[u : u + SEGMENT_FRAMES]
        hit = _match(x, ref, u + lag - SEARCH_FRAMES, u + lag + SEARCH_FRAMES + SEGMENT_FRAMES)
        if hit is None:
            hit = _match(x, ref, u + lag - WIDE_SEARCH_FRAMES, u + lag + WIDE_SEARCH_FRAMES + SEGMENT_FRAMES)
        if hit is None:
            out.append(None)
            continue
        start, dot = hit
        lag = start - u
        seg = x[start : start + SEGMENT_FRAMES]
        frac = _fractional_delay(np.sign(dot) * seg, ref)
        out.append((lag, lag + frac, dot / float(np.dot(ref, ref))))
    return out


def _locate_slip(x, s, d1, d2, u_from, u_to, g):
    """Exact capture index of a slip between source frames u_from..u_to (offsets d1 before, d2 after).

    The split minimises the squared error of the words before it (offset d1) and after it (offset
    d2); inserted samples (d2 > d1) match neither and are left out.  Among equal splits the latest
    is taken, so that a repeated sample counts as the inserted one.
    """
    count = d2 - d1
    t_lo = max(u_from + min(d1, d2), 0)
    t_hi = min(u_to + max(d1, d2), x.shape[0])
    t = np.arange(t_lo, t_hi)
    i1 = np.clip(t - d1, 0, s.shape[0] - 1)
    i2 = np.clip(t - d2, 0, s.shape[0] - 1)
    e1 = (x[t] - g * s[i1]) ** 2
    e2 = (x[t] - g * s[i2]) ** 2
    before = np.concatenate(([0.0], np.cumsum(e1)))
    after = np.concatenate((np.cumsum(e2[::-1])[::-1], [0.0]))
    skip = max(count, 0)
    cost = before[: before.shape[0] - skip] + after[skip:]
    k = int(cost.shape[0] - 1 - np.argmin(cost[::-1]))
    return int(t_lo + k)


def _analyse_channel(ch, s, secs, bits, frames):
    x = ch.x
    starts = _segments(secs, frames)
    track = _track(ch, s, starts)
    valid = [(u, t) for u, t in zip(starts, track) if t is not None]
    if not valid:
        return _missing_channel(ch)
    us = np.array([u for u, _ in valid], dtype=np.float64)
    lags = np.array([t[0] for _, t in valid], dtype=np.int64)
    taus = np.array([t[1] for _, t in valid])
    seg_gain = np.median([t[2] for _, t in valid])

    # Slips are whole-frame steps of the delay beyond what a steady slope explains.
    jumps = np.zeros(len(valid), dtype=np.int64)
    rate = 0.0
    if len(valid) > 1:
        du = np.diff(us)
        dt = np.diff(taus)
        rate = float(np.median(dt / du))
        jumps[1:] = np.round(dt - rate * du).astype(np.int64)
    steady = taus - np.cumsum(jumps)
    drift_ppm = 0.0
    slope = 0.0
    if len(valid) > 2:
        slope = float(np.polyfit(us, steady, 1)[0])
        drift_ppm = round(float(slope) * 1e6, 1)
        if abs(drift_ppm) < DRIFT_MIN_PPM:
            drift_ppm = 0.0
    drifting = drift_ppm != 0.0

    slips = []
    # Offsets (capture index minus source index) piecewise: list of (first source frame, offset).
    pieces = [(0, int(lags[0]))]
    missing_sources = []
    for k in np.nonzero(jumps)[0]:
        count = int(jumps[k])
        d1 = pieces[-1][1]
        d2 = d1 + count
        u_from, u_to = int(us[k - 1]), int(us[k]) + SEGMENT_FRAMES
        if drifting:
            t_star = int(round(us[k])) + d2
        else:
            t_star = _locate_slip(x, s, d1, d2, u_from, u_to, seg_gain)
        u0 = t_star - d1
        slips.append({"frame": int(u0), "capture_frame": int(t_star), "count": count})
        if count < 0:
            missing_sources.extend(range(u0, u0 - count))
            pieces.append((u0 - count, d2))
        else:
            pieces.append((u0, d2))

    # The aligned pairs (source frame, capture frame) for every source frame the capture holds.
    u = np.arange(frames)
    offset = np.zeros(frames, dtype=np.int64)
    for first, d in pieces:
        offset[first:] = d
    present = np.ones(frames, dtype=bool)
    if missing_sources:
        present[np.clip(np.array(missing_sources), 0, frames - 1)] = False
    t = u + offset
    if drifting:
        t = t + np.round(slope * u).astype(np.int64)  # nearest capture frame on the drifting clock
    present &= (t >= 0) & (t < x.shape[0])
    frames_missing = int(frames - present.sum() - len(missing_sources))
    su = u[present]
    sw = s[present]
    cw = x[t[present]]
    names = np.empty(frames, dtype="<U8")
    for sec in secs.values():
        names[sec.start : sec.stop] = sec.name
    sname = names[present]

    half = float(1 << (bits - 2))
    top = float((1 << (bits - 1)) - 1)
    result = {"channel": ch.index, "source_channel": int(ch.source), "marker_correlation": round(abs(ch.rho), 4),
              "latency_frames": int(ch.head), "slips": slips, "drift_ppm": drift_ppm,
              "frames_compared": int(su.size), "frames_missing": frames_missing}

    if drifting:
        return _drifting_channel(result, ch, s, starts, track, x, bits, sw, cw)

    # Gain and polarity from the full-range words of at most half scale (no path with less than +6 dB
    # of gain clips them; the markers' single magnitude would make a rounding error look like gain).
    fit = (np.abs(sw) <= half) & (sname == "full")
    if fit.sum() < 16:
        fit = sname != "silence"
    a = np.vstack([sw[fit], np.ones(fit.sum())]).T
    (g, b), *_ = np.linalg.lstsq(a, cw[fit], rcond=None)
    damaged_mask, damaged = _damage(sw, cw, su, g, b, fit, bits)
    if damaged:
        # Fit again without the damaged stretches, which would pull the gain.
        refit = fit & ~damaged_mask
        if refit.sum() >= 16:
            a = np.vstack([sw[refit], np.ones(refit.sum())]).T
            (g, b), *_ = np.linalg.lstsq(a, cw[refit], rcond=None)
    intact = ~damaged_mask
    polarity = 1 if g >= 0 else -1
    gain_db = round(20 * math.log10(max(abs(g), 1e-30)), 2)
    if abs(gain_db) < 0.005:
        gain_db = 0.0
    g_used = polarity * (1.0 if gain_db == 0.0 else abs(g))

    # DC from digital silence: constant words there are an offset; dither averages to zero.
    quiet = cw[(sname == "silence") & intact]
    dc = 0.0
    dither_in_silence = False
    if quiet.size:
        mean = float(np.mean(quiet))
        sd = float(np.std(quiet))
        dither_in_silence = sd > 0
        if abs(mean) > 4 * sd / math.sqrt(quiet.size) and abs(mean) > 1e-9:
            dc = mean
    dc_report = round(dc, 3)

    expected = g_used * sw + dc
    c_max, c_min = float(cw[intact].max()), float(cw[intact].min())
    step = _grid_step(cw[intact])
    tol = max(2.0 * max(step, 1), 1e-6 * top)
    at_max, at_min = intact & (cw >= c_max - 1e-9), intact & (cw <= c_min + 1e-9)
    # A channel clips at its extreme when some source word asks for clearly more (beyond the
    # requantization error); then every word stuck there whose source asks for more is clipped.
    clips_high = bool(np.any(at_max & (expected > c_max + tol)))
    clips_low = bool(np.any(at_min & (expected < c_min - tol)))
    clipped_mask = (clips_high & at_max & (expected > c_max + 1e-9)) | (clips_low & at_min & (expected < c_min - 1e-9))
    clipped = int(clipped_mask.sum())
    # Words whose source lies within two steps of the extremes may be saturated by the requantizer
    # itself (a word rounded up past full scale): they count as word errors, not as evidence of the kind.
    edge_step = 2.0 * max(step, 1)
    keep = intact & ~clipped_mask & (expected <= c_max - edge_step) & (expected >= c_min + edge_step)
    e = cw[keep] - expected[keep]
    ref = expected[keep]
    word_errors = int(np.count_nonzero(np.abs(cw - polarity * sw) > 1e-9))
    step = _grid_step(cw[keep]) or (1 << (bits - 1))
    step = min(step, 1 << (bits - 1))
    grid_bits = bits - int(round(math.log2(step))) if step >= 1 else bits

    requant, bits_passed = _classify(e, ref, step, grid_bits, bits)
    # Error statistics on the full-range words, whose low bits are uniform (the textbook's assumption).
    e_full = e[sname[keep] == "full"]
    result.update({
        "polarity": polarity, "gain_db": gain_db, "dc_offset_lsb": dc_report, "clipped": clipped,
        "damaged": damaged, "damaged_frames": int(damaged_mask.sum()),
        "word_errors": word_errors, "requantization": requant, "bits_passed": bits_passed,
        "dither_in_silence": bool(dither_in_silence),
        "error_mean_lsb": round(float(np.mean(e_full)), 4) if e_full.size else 0.0,
        "error_rms_lsb": round(float(np.sqrt(np.mean(e_full * e_full))), 4) if e_full.size else 0.0,
    })
    result["transparent"] = bool(
        result["source_channel"] == ch.index and word_errors == 0 and not slips and frames_missing == 0
        and polarity == 1 and gain_db == 0.0 and dc_report == 0.0 and clipped == 0 and requant == "none"
        and not damaged)
    return result


def _damage(sw, cw, su, g, b, fit, bits):
    """Stretches of words far beyond any requantization error: a dropout, a glitch, a concealed lost block.

    A word is damaged when it misses ``g s + b`` by more than 64 grid steps, 32 robust standard
    deviations of the error of the full-range words, and 2^(N-10) LSB (-60 dB of full scale), and
    is not stuck at the channel's extreme (clipping is counted apart).  Damaged words less than 64
    frames apart form one stretch.  When more than 5 % of the words would be damaged, the change
    is the path's nature, not damage: nothing is set apart.

    Returns
    -------
    (numpy.ndarray, list of dict)
        Mask over the compared words, and the stretches as ``{"frame", "frames"}`` in sequence frames.
    """
    mask = np.zeros(cw.shape[0], dtype=bool)
    if cw.size == 0:
        return mask, []
    expected = g * sw + b
    resid = cw - expected
    r_fit = resid[fit]
    sigma = 1.4826 * float(np.median(np.abs(r_fit - np.median(r_fit)))) if r_fit.size else 0.0
    step = max(_grid_step(cw), 1)
    threshold = max(64.0 * step, 32.0 * sigma, float(1 << (bits - 10)))
    c_max, c_min = float(cw.max()), float(cw.min())
    stuck = ((cw >= c_max - 1e-9) & (expected > c_max)) | ((cw <= c_min + 1e-9) & (expected < c_min))
    idx = np.nonzero((np.abs(resid) > threshold) & ~stuck)[0]
    if idx.size == 0 or idx.size > DAMAGE_MAX_FRACTION * cw.size:
        return mask, []
    breaks = np.nonzero(np.diff(idx) > DAMAGE_MERGE_FRAMES)[0]
    firsts = np.concatenate(([idx[0]], idx[breaks + 1]))
    lasts = np.concatenate((idx[breaks], [idx[-1]]))
    stretches = []
    for first, last in zip(firsts, lasts):
        mask[first : last + 1] = True
        stretches.append({"frame": int(su[first]), "frames": int(su[last] - su[first] + 1)})
    return mask, stretches


def _classify(e, ref, step, grid_bits, bits):
    """Requantization class and bits passed from the residual (see the module notes)."""
    if e.size == 0:
        return "none", bits
    peak = float(np.max(np.abs(e)))
    slack = 0.05  # LSB: room for the fitted gain's own error
    if peak <= 1e-9 or (step == 1 and peak <= 0.5 + slack):
        return "none", bits
    q = float(step)
    c = ref + e
    integer_ref = np.max(np.abs(ref - np.round(ref))) <= 1e-9
    if step > 1:
        if integer_ref:
            # Exact source words: truncation is an exact match, floor (two's complement) or toward zero.
            for cut in (np.floor, np.trunc):
                if np.all(np.abs(c - q * cut(ref / q)) <= 1e-9):
                    return "truncation", grid_bits
        else:
            # After a gain the fitted gain's own error blurs the step boundaries by a little: truncation
            # is then an error inside (-q, 0] (with that slack) whose mean is -q/2.
            slack += 0.01 * q
            if float(np.max(e)) <= slack and float(np.min(e)) >= -q - slack and abs(float(np.mean(e)) + q / 2) < 0.05 * q:
                return "truncation", grid_bits
    if step > 1 and peak <= q / 2 + slack:
        return "rounding", grid_bits
    if integer_ref:
        # Words equal modulo the step must get equal errors unless the requantizer adds something random.
        deterministic = _deterministic(np.mod(np.round(ref), q), np.round(e, 9))
    else:
        deterministic = False  # not rounding (errors beyond half a step) and not truncation, by the tests above
    mean = float(np.mean(e))
    sd = float(np.std(e))
    if not deterministic and step > 1 and abs(mean) <= 4 * sd / math.sqrt(e.size) + 0.02 * q and sd <= DITHER_MAX_RMS_STEPS * q:
        return "dithered", grid_bits
    if integer_ref and np.max(np.abs(c - np.round(c))) <= 1e-9:
        # Integer words: the longest length whose top bits arrived unchanged in every word.
        ci, ri = np.round(c).astype(np.int64), np.round(ref).astype(np.int64)
        passed = 0
        for n in range(grid_bits, 0, -1):
            if np.array_equal(ci >> (bits - n), ri >> (bits - n)):
                passed = n
                break
        return "other", passed
    passed = bits - int(math.ceil(math.log2(peak))) if peak >= 1 else bits
    return "other", max(0, min(grid_bits, passed))


def _drifting_channel(result, ch, s, starts, track, x, bits, sw, cw):
    """A resampled path: gain from the passband of each segment after its fractional delay, words not comparable."""
    gains = []
    for u, tr in zip(starts, track):
        if tr is None:
            continue
        lag, tau, _ = tr
        seg = x[u + lag : u + lag + SEGMENT_FRAMES]
        ref = s[u : u + SEGMENT_FRAMES]
        window = np.hanning(SEGMENT_FRAMES)
        xs = np.fft.rfft(seg * window)
        ss = np.fft.rfft(ref * window)
        k = np.arange(xs.shape[0])
        band = (k > 0) & (k < 0.25 * SEGMENT_FRAMES)
        rot = np.exp(2j * np.pi * k[band] / SEGMENT_FRAMES * (tau - lag))
        num = np.sum(xs[band] * np.conj(ss[band]) * rot).real
        den = np.sum(np.abs(ss[band]) ** 2)
        if den > 0:
            gains.append(num / den)
    g = float(np.median(gains)) if gains else 1.0
    polarity = 1 if g >= 0 else -1
    gain_db = round(20 * math.log10(max(abs(g), 1e-30)), 2)
    if abs(gain_db) < 0.005:
        gain_db = 0.0
    extreme = 0
    for value in (cw.max(), cw.min()):
        n = int(np.count_nonzero(cw == value))
        extreme += n if n >= 3 else 0
    result.update({
        "polarity": polarity, "gain_db": gain_db, "dc_offset_lsb": 0.0, "clipped": extreme,
        "word_errors": int(np.count_nonzero(np.abs(cw - polarity * sw) > 1e-9)),
        "requantization": "other", "bits_passed": 0, "dither_in_silence": None,
        "damaged": [], "damaged_frames": 0, "transparent": False,
    })
    return result


# --------------------------------------------------------------------------- files and text


def read_capture(path):
    """``(samples, samplerate)`` of a sound file as float64, full scale 1.0."""
    import soundfile as sf

    try:
        data, samplerate = sf.read(path, dtype="float64", always_2d=True)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot read {path}: {exc}") from None
    return data, int(samplerate)


def analyse_file(path, seed, bits=24, channels=None, frames=None):
    """:func:`analyse` on a sound file."""
    data, samplerate = read_capture(path)
    return analyse(data, samplerate, seed, bits=bits, channels=channels, frames=frames)


def report_keys():
    """Keys every report has (top level) and every channel entry has."""
    top = ("found", "latency_frames", "transparent", "channels", "summary")
    channel = ("channel", "source_channel", "transparent", "word_errors", "bits_passed", "polarity", "gain_db",
               "dc_offset_lsb", "slips", "drift_ppm", "clipped", "requantization")
    return top, channel


def _channel_line(r):
    name = f"channel {r['channel'] + 1}"
    if r["source_channel"] is None:
        return f"{name}: no link test marker (best correlation {r['marker_correlation']})"
    bits_text = f"{r['bits_passed']} bits"
    parts = []
    if r["source_channel"] != r["channel"]:
        parts.append(f"carries sequence channel {r['source_channel'] + 1}")
    if r["polarity"] == -1:
        parts.append("polarity inverted")
    if r["gain_db"]:
        parts.append(f"gain {r['gain_db']:+.2f} dB")
    if r["dc_offset_lsb"]:
        parts.append(f"DC offset {r['dc_offset_lsb']:+g} LSB")
    if r["drift_ppm"]:
        parts.append(f"resampled, drift {r['drift_ppm']:+.1f} ppm")
    for slip in r["slips"]:
        what = "dropped" if slip["count"] < 0 else "inserted"
        parts.append(f"{abs(slip['count'])} sample(s) {what} at sequence frame {slip['frame']}")
    if r["clipped"]:
        parts.append(f"{r['clipped']} sample(s) clipped")
    if r.get("damaged"):
        first = r["damaged"][0]["frame"]
        parts.append(f"{r['damaged_frames']} frame(s) damaged in {len(r['damaged'])} stretch(es) "
                     f"(a dropout or glitch; the first at sequence frame {first})")
    req = r["requantization"]
    if req == "truncation":
        parts.append(f"truncated to {bits_text} (error biased by half a step)")
    elif req == "rounding":
        parts.append(f"rounded to {bits_text}")
    elif req == "dithered":
        parts.append(f"requantized to {bits_text} with dither" + (" (dither present in digital silence)" if r.get("dither_in_silence") else ""))
    elif req == "other" and not r["drift_ppm"]:
        parts.append(f"words changed in a way that is neither truncation, rounding nor dither ({bits_text} within one LSB)")
    if r["frames_missing"]:
        parts.append(f"{r['frames_missing']} sequence frames not in the capture")
    if r["transparent"]:
        return f"{name}: transparent at {bits_text} (latency {r['latency_frames']} frames)"
    return f"{name}: NOT transparent: " + "; ".join(parts or [f"{r['word_errors']} word errors"])


def summary_lines(report):
    """The short human summary of a report, as a list of lines."""
    if not report["found"]:
        return ["link test sequence not found (wrong seed or bits, or nothing arrived)"]
    head = "TRANSPARENT" if report["transparent"] else "NOT TRANSPARENT"
    lines = [f"{head}: {report['bits']}-bit sequence, seed {report['seed']}, latency {report['latency_frames']} frames "
             f"({report['latency_frames'] / report['samplerate'] * 1000:.3f} ms)"]
    lines.extend(_channel_line(r) for r in report["channels"])
    sources = [r["source_channel"] for r in report["channels"] if r["source_channel"] is not None]
    for j in range(report["sequence_channels"]):
        if sources.count(j) == 0:
            lines.append(f"sequence channel {j + 1} did not arrive")
        elif sources.count(j) > 1:
            lines.append(f"sequence channel {j + 1} arrived on {sources.count(j)} channels")
    return lines


def report_json(report):
    """The report as indented JSON text."""
    return json.dumps(report, indent=1)
