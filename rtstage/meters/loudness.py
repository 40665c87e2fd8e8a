"""Programme loudness (ITU-R BS.1770-4) and loudness range (EBU Tech 3342), streamed.

The meter K-weights every channel, squares, and sums the squares over 100 ms
*hops*; every reading is formed from those hop sums:

* **momentary** loudness: the last 400 ms (4 hops);
* **short-term** loudness: the last 3 s (30 hops);
* **integrated** loudness: 400 ms gating blocks every 100 ms (75 % overlap),
  gated at −70 LUFS (absolute) and then 10 LU below the loudness of the
  blocks that passed the absolute gate (relative);
* **loudness range** (EBU Tech 3342): the short-term values every 100 ms,
  gated at −70 LUFS and 20 LU below their own power mean, spread between the
  10th and 95th percentiles.

The K-weighting filter is designed for the stream's own sample rate from the
analog prototype of its two stages (a high shelf and a high-pass), by the
bilinear transform prewarped at each stage's centre frequency.  The
prototype's parameters are those of the two 48 kHz biquads printed in
BS.1770-4 (Tables 1 and 2), recovered by inverting the bilinear transform at
48 kHz; designed at 48 kHz, the filter reproduces the printed coefficients
(``tests/test_loudness.py`` checks it against them).

The filter and the hop sums run sample by sample in one compiled loop whose
state is carried from block to block, so every reading is the same, bit for
bit, however the signal is split into blocks.

References
----------
.. [1] ITU-R BS.1770-4, "Algorithms to measure audio programme loudness and
   true-peak audio level", 2015, Annex 1 (K-weighting, gating, Tables 1-3).
.. [2] EBU Tech 3341, "Loudness metering: 'EBU mode' metering to supplement
   EBU R 128 loudness normalization", v4, 2016 (momentary, short-term, test
   signals).
.. [3] EBU Tech 3342, "Loudness range: a measure to supplement EBU R 128
   loudness normalization", v4, 2016.
.. [4] EBU R 128, "Loudness normalisation and permitted maximum level of audio
   signals", v4, 2020 (−23 LUFS, −1 dBTP).
"""

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from ..errors import RtstageError

LOUDNESS_OFFSET_DB = -0.691
"""BS.1770-4 eq. (2): the constant that makes a 1 kHz sine's loudness equal its level."""

HOP_S = 0.1
"""Hop between readings and gating blocks: 100 ms (75 % overlap of 400 ms blocks)."""
MOMENTARY_HOPS = 4
"""Momentary window: 400 ms (EBU Tech 3341)."""
SHORT_TERM_HOPS = 30
"""Short-term window: 3 s (EBU Tech 3341)."""
ABSOLUTE_GATE_LUFS = -70.0
"""Absolute gate of the integrated loudness and the loudness range (BS.1770-4, Tech 3342)."""
RELATIVE_GATE_LU = -10.0
"""Relative gate of the integrated loudness (BS.1770-4)."""
LRA_RELATIVE_GATE_LU = -20.0
"""Relative gate of the loudness range (EBU Tech 3342)."""
REFRESH_DIVISOR = 6000
"""In :meth:`LoudnessMeter.report`, the gated figures are recomputed once ``hops // 6000`` new hops
have arrived: every 100 ms for the first 10 minutes, then at most 1/6000 of the programme behind
(a meter read ten times a second all day would otherwise spend a third of a core on them)."""
MAX_PROGRAMMES = 100
"""Closed programmes a meter keeps (the oldest are dropped)."""
LRA_PERCENTILES = (10.0, 95.0)
"""Lower and upper percentiles of the loudness range (EBU Tech 3342)."""

# Analog prototype of the K-weighting filter, recovered from the 48 kHz
# coefficients of BS.1770-4 Tables 1 and 2 by inverting the bilinear
# transform (K = tan(pi f0 / fs)):
#   K^2 = (1 + a1 + a2) / (1 - a1 + a2),  D = 1 + K/Q + K^2 = 4 / (1 - a1 + a2),
#   K/Q = D (1 - a2) / 2,  Vh = D (b0 - b1 + b2) / 4,  Vb = D (b0 - b2) / (2 K/Q).
# Stage 1, high shelf: H(s) = (Vh s^2 + Vb (w0/Q) s + w0^2) / (s^2 + (w0/Q) s + w0^2)
SHELF_F0_HZ = 1681.9744509555323
SHELF_Q = 0.7071752369554193
SHELF_HF_GAIN = 1.5848647011308556  # Vh: +4.0 dB above the shelf
SHELF_MID_GAIN = 1.2587209302325613  # Vb
# Stage 2, high-pass: H(s) = G s^2 / (s^2 + (w0/Q) s + w0^2); G is the printed table's
# high-frequency gain (its numerator is 1, -2, 1 unnormalised), kept at every rate.
HIGHPASS_F0_HZ = 38.13547087611304
HIGHPASS_Q = 0.5003270373250421
HIGHPASS_HF_GAIN = 1.0049948987146884


def k_weighting_sos(samplerate):
    """K-weighting filter for ``samplerate`` as second-order sections.

    Parameters
    ----------
    samplerate : float
        Sample rate in Hz.

    Returns
    -------
    sos : ndarray, shape (2, 6)
        ``[b0, b1, b2, 1, a1, a2]`` per stage (scipy.signal's layout):
        row 0 the high shelf, row 1 the high-pass.

    Notes
    -----
    Each stage is the bilinear transform of its analog prototype, prewarped
    at the stage's centre frequency (``K = tan(pi f0 / fs)``).  At 48 kHz the
    result equals the coefficients printed in BS.1770-4.

    References
    ----------
    .. [1] ITU-R BS.1770-4, Annex 1, Tables 1 and 2.
    """
    fs = float(samplerate)
    if not fs > 2 * SHELF_F0_HZ:
        raise RtstageError(f"loudness: sample rate {samplerate} Hz is too low for K-weighting")
    k = math.tan(math.pi * SHELF_F0_HZ / fs)
    kq = k / SHELF_Q
    d = 1.0 + kq + k * k
    shelf = [
        (SHELF_HF_GAIN + SHELF_MID_GAIN * kq + k * k) / d,
        2.0 * (k * k - SHELF_HF_GAIN) / d,
        (SHELF_HF_GAIN - SHELF_MID_GAIN * kq + k * k) / d,
        1.0,
        2.0 * (k * k - 1.0) / d,
        (1.0 - kq + k * k) / d,
    ]
    k = math.tan(math.pi * HIGHPASS_F0_HZ / fs)
    kq = k / HIGHPASS_Q
    d = 1.0 + kq + k * k
    g = HIGHPASS_HF_GAIN / d
    highpass = [g, -2.0 * g, g, 1.0, 2.0 * (k * k - 1.0) / d, (1.0 - kq + k * k) / d]
    return np.array([shelf, highpass], dtype=np.float64)


def default_channel_weights(channels):
    """BS.1770-4 Table 3 channel weights for the usual layouts.

    1 for every channel, except 5 channels (L, R, C, Ls, Rs: surrounds 1.41)
    and 6 channels (L, R, C, LFE, Ls, Rs: LFE 0, surrounds 1.41).
    """
    if channels == 5:
        return (1.0, 1.0, 1.0, 1.41, 1.41)
    if channels == 6:
        return (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)
    return (1.0,) * int(channels)


@njit(nogil=True, cache=True)
def _kweight_hops(x, nframes, sos, state, acc, count, hop, out):
    """K-weight ``x[:nframes]``, add the squares into ``acc`` and emit a row of ``out`` per full hop.

    ``state`` (channels, 4) holds the two transposed direct-form-II biquads'
    states; ``count[0]`` the frames already in ``acc``.  Returns the rows written.
    """
    nch = x.shape[1]
    rows = 0
    c0 = count[0]
    for n in range(nframes):
        for c in range(nch):
            v = x[n, c]
            y = sos[0, 0] * v + state[c, 0]
            state[c, 0] = sos[0, 1] * v - sos[0, 4] * y + state[c, 1]
            state[c, 1] = sos[0, 2] * v - sos[0, 5] * y
            z = sos[1, 0] * y + state[c, 2]
            state[c, 2] = sos[1, 1] * y - sos[1, 4] * z + state[c, 3]
            state[c, 3] = sos[1, 2] * y - sos[1, 5] * z
            acc[c] += z * z
        c0 += 1
        if c0 == hop:
            for c in range(nch):
                out[rows, c] = acc[c]
                acc[c] = 0.0
            rows += 1
            c0 = 0
    count[0] = c0
    return rows


def _lufs(power):
    return LOUDNESS_OFFSET_DB + 10.0 * math.log10(power) if power > 0.0 else None


def _power_of(lufs):
    """Weighted mean-square power whose loudness is ``lufs``."""
    return 10.0 ** ((lufs - LOUDNESS_OFFSET_DB) / 10.0)


def _gated(powers, relative_lu):
    """The relative gate (LUFS) and the mask of ``powers`` passing both gates; (None, None) if none pass the absolute gate.

    Gates are compared in the power domain (the same comparison as in LUFS,
    without a logarithm per block).
    """
    above = powers > _power_of(ABSOLUTE_GATE_LUFS)
    if not above.any():
        return None, None
    threshold = LOUDNESS_OFFSET_DB + 10.0 * math.log10(powers[above].mean()) + relative_lu
    return threshold, above & (powers > _power_of(threshold))


class _Series:
    """A growing float64 array (amortised appends)."""

    def __init__(self):
        self._data = np.zeros(1024)
        self.size = 0

    def extend(self, values):
        need = self.size + len(values)
        if need > self._data.size:
            self._data = np.concatenate((self._data, np.zeros(max(need, 2 * self._data.size) - self._data.size)))
        self._data[self.size:need] = values
        self.size = need

    @property
    def values(self):
        return self._data[: self.size]


class LoudnessMeter:
    """BS.1770-4 loudness of one programme of ``channels`` channels, fed block by block.

    Parameters
    ----------
    channels : int
        Channel count.
    samplerate : float
        Sample rate in Hz; the K-weighting filter is designed for it.
    channel_weights : sequence of float or None
        Weight of each channel's power (BS.1770-4 Table 3); None takes
        :func:`default_channel_weights`.

    Notes
    -----
    Input is in full-scale units (1.0 = digital full scale), finite.  The
    meter keeps one 100 ms power sum per hop and the power of every 400 ms and
    3 s window ending on a hop (10 values a second each, 36 000 an hour),
    formed once as the window's last hop arrives; the gated readings are
    formed from them on demand.  A hop is 0.1 s
    rounded to whole frames (exact at 44.1, 48, 88.2, 96, 176.4 and 192 kHz).
    Readings are None (JSON null) until their window is full, or while the
    signal is silent.
    """

    def __init__(self, channels, samplerate, channel_weights=None):
        self.channels = int(channels)
        self.samplerate = float(samplerate)
        weights = default_channel_weights(self.channels) if channel_weights is None else tuple(float(w) for w in channel_weights)
        if len(weights) != self.channels:
            raise RtstageError(f"loudness: {len(weights)} channel weights for {self.channels} channels")
        self.channel_weights = weights
        self._weights = np.asarray(weights, dtype=np.float64)
        self.sos = k_weighting_sos(self.samplerate)
        self.hop_frames = max(1, int(round(HOP_S * self.samplerate)))
        _kweight_hops(np.zeros((0, self.channels)), 0, self.sos, np.zeros((self.channels, 4)),
                      np.zeros(self.channels), np.zeros(1, np.int64), self.hop_frames, np.zeros((1, self.channels)))
        self.programmes = []
        """Reports of the programmes closed by :meth:`new_programme`, oldest first (at most MAX_PROGRAMMES)."""
        self.programme_label = None
        self.reset()

    def new_programme(self, label=None):
        """Close the current programme (its report goes to :attr:`programmes`) and start the next one.

        ``label`` names the new programme (for instance the item's title in
        the station's running order); the closed one keeps its own.
        """
        if self.frames:
            closed = self.report(exact=True)
            self.programmes.append(closed)
            del self.programmes[:-MAX_PROGRAMMES]
        self.programme_label = None if label is None else str(label)[:200]
        self.reset()

    def reset(self):
        """Start a new programme: clear the filter, the hops and every reading."""
        self._state = np.zeros((self.channels, 4), dtype=np.float64)
        self._acc = np.zeros(self.channels, dtype=np.float64)
        self._count = np.zeros(1, dtype=np.int64)
        self._hops = _Series()  # channel-weighted K-weighted power sums, one per 100 ms hop
        self._momentary = _Series()  # mean power of every 400 ms block (one per hop once 4 hops are in)
        self._short = _Series()  # mean power of every 3 s block
        self._cache = None  # (hops, integrated, loudness range) of the last report
        self.frames = 0

    def update(self, x):
        """Take one block ``x`` of shape (frames, channels), full-scale units, finite."""
        x = np.ascontiguousarray(x, dtype=np.float64)
        if x.ndim != 2 or x.shape[1] != self.channels:
            raise RtstageError(f"loudness block: expected shape (frames, {self.channels}), got {x.shape}")
        out = np.empty((x.shape[0] // self.hop_frames + 1, self.channels), dtype=np.float64)
        rows = _kweight_hops(x, x.shape[0], self.sos, self._state, self._acc, self._count, self.hop_frames, out)
        if rows:
            first = self._hops.size
            self._hops.extend(out[:rows] @ self._weights)
            # Each window's power is the sum of its own hops, formed once when its last hop arrives.
            for series, nhops in ((self._momentary, MOMENTARY_HOPS), (self._short, SHORT_TERM_HOPS)):
                start = max(first, nhops - 1)
                if self._hops.size > start:
                    tail = self._hops.values[start - nhops + 1:]
                    windows = np.lib.stride_tricks.sliding_window_view(tail, nhops)
                    series.extend(windows.sum(axis=1) / (nhops * self.hop_frames))
        self.frames += x.shape[0]

    # Readings -----------------------------------------------------------------------------
    def _window_powers(self, nhops):
        """Mean weighted power of every complete window of ``nhops`` hops, one per hop."""
        return (self._momentary if nhops == MOMENTARY_HOPS else self._short).values

    def _last_window_power(self, nhops):
        series = self._window_powers(nhops)
        return float(series[-1]) if series.size else None

    def momentary_lufs(self):
        """Loudness of the last 400 ms, LUFS (None before 400 ms or in silence)."""
        p = self._last_window_power(MOMENTARY_HOPS)
        return None if p is None else _lufs(p)

    def short_term_lufs(self):
        """Loudness of the last 3 s, LUFS (None before 3 s or in silence)."""
        p = self._last_window_power(SHORT_TERM_HOPS)
        return None if p is None else _lufs(p)

    def momentary_series(self):
        """Momentary loudness every 100 ms since the programme began, LUFS (−inf for silence)."""
        with np.errstate(divide="ignore"):
            return LOUDNESS_OFFSET_DB + 10.0 * np.log10(self._window_powers(MOMENTARY_HOPS))

    def short_term_series(self):
        """Short-term loudness every 100 ms since the programme began, LUFS (−inf for silence)."""
        with np.errstate(divide="ignore"):
            return LOUDNESS_OFFSET_DB + 10.0 * np.log10(self._window_powers(SHORT_TERM_HOPS))

    def integrated(self):
        """Integrated loudness and its gating figures.

        Returns
        -------
        dict
            ``integrated_lufs`` (None when no block passes the absolute gate),
            ``relative_gate_lufs``, ``gated_blocks`` (blocks that passed both
            gates), ``blocks`` (400 ms blocks measured).

        References
        ----------
        .. [1] ITU-R BS.1770-4, Annex 1, eqs. (3)-(7): gating blocks of
           400 ms with 75 % overlap, absolute gate −70 LUFS, relative gate −10 LU.
        """
        powers = self._window_powers(MOMENTARY_HOPS)
        threshold, keep = _gated(powers, RELATIVE_GATE_LU)
        if threshold is None:
            return {"integrated_lufs": None, "relative_gate_lufs": None, "gated_blocks": 0, "blocks": int(powers.size)}
        return {
            "integrated_lufs": _lufs(float(powers[keep].mean())),
            "relative_gate_lufs": threshold,
            "gated_blocks": int(keep.sum()),
            "blocks": int(powers.size),
        }

    def loudness_range(self):
        """Loudness range (EBU Tech 3342), LU, and its figures.

        Returns
        -------
        dict
            ``loudness_range_lu`` (None before one gated 3 s block),
            ``low_lufs`` and ``high_lufs`` (the 10th and 95th percentiles),
            ``relative_gate_lufs``.

        Notes
        -----
        Short-term values every 100 ms; absolute gate −70 LUFS; relative gate
        20 LU below the power mean of the values above the absolute gate;
        percentiles by nearest rank on the sorted values, index
        ``round((n - 1) p / 100)`` (Tech 3342's description, from memory).

        References
        ----------
        .. [1] EBU Tech 3342 v4, 2016, section 3 and Annex.
        """
        powers = self._window_powers(SHORT_TERM_HOPS)
        threshold, keep = _gated(powers, LRA_RELATIVE_GATE_LU)
        if threshold is None or not keep.any():
            return {"loudness_range_lu": None, "low_lufs": None, "high_lufs": None, "relative_gate_lufs": threshold}
        values = powers[keep]
        n = values.size
        ranks = [int(round((n - 1) * p / 100.0)) for p in LRA_PERCENTILES]
        picked = np.partition(values, ranks)[ranks]  # loudness is monotonic in power: the same ranks
        low, high = (_lufs(float(p)) for p in picked)
        return {"loudness_range_lu": high - low, "low_lufs": low, "high_lufs": high, "relative_gate_lufs": threshold}

    def report(self, exact=False):
        """Every reading as plain data (docs/meters.md, "Loudness"); ``exact`` skips the refresh rule."""
        size = self._hops.size
        if exact or self._cache is None or size - self._cache[0] >= max(1, size // REFRESH_DIVISOR):
            self._cache = (size, self.integrated(), self.loudness_range())
        _, integrated, lra = self._cache
        top = lambda s: _lufs(float(s.max())) if s.size else None  # noqa: E731
        return {
            "method": "ITU-R BS.1770-4, EBU Tech 3342",
            "programme": len(self.programmes) + 1,
            "programme_label": self.programme_label,
            "channel_weights": list(self.channel_weights),
            "duration_s": self.frames / self.samplerate,
            "momentary_lufs": self.momentary_lufs(),
            "short_term_lufs": self.short_term_lufs(),
            "momentary_max_lufs": top(self._window_powers(MOMENTARY_HOPS)),
            "short_term_max_lufs": top(self._window_powers(SHORT_TERM_HOPS)),
            "integrated_lufs": integrated["integrated_lufs"],
            "integrated_relative_gate_lufs": integrated["relative_gate_lufs"],
            "integrated_gated_blocks": integrated["gated_blocks"],
            "loudness_range_lu": lra["loudness_range_lu"],
            "loudness_range_low_lufs": lra["low_lufs"],
            "loudness_range_high_lufs": lra["high_lufs"],
        }


def integrated_loudness(x, samplerate, channel_weights=None):
    """Integrated loudness of a whole signal ``x`` (frames, channels), LUFS (None if gated out)."""
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    meter = LoudnessMeter(x.shape[1], samplerate, channel_weights)
    meter.update(x)
    return meter.integrated()["integrated_lufs"]


# Targets ------------------------------------------------------------------------------------

@dataclass(frozen=True)
class LoudnessTarget:
    """A delivery target: integrated loudness within a tolerance, and limits.

    Parameters
    ----------
    integrated_lufs : float
        Target integrated loudness, LUFS.
    tolerance_lu : float
        Allowed deviation either side, LU.
    true_peak_max_dbtp : float or None
        Highest permitted true peak, dBTP (None: not checked).
    loudness_range_max_lu : float or None
        Largest permitted loudness range, LU (None: not checked).
    name : str
        How the target is shown.
    """

    integrated_lufs: float
    tolerance_lu: float = 0.5
    true_peak_max_dbtp: float = None
    loudness_range_max_lu: float = None
    name: str = "custom"

    def check(self, integrated_lufs, true_peak_dbtp=None, loudness_range_lu=None):
        """Pass or fail of each limit and overall.

        Returns
        -------
        dict
            ``target`` (the settings), ``checks`` (one entry per limit with
            ``what``, ``value``, ``limit`` and ``pass``, None when the value is
            not yet defined) and ``pass`` (True when every defined check passes
            and the integrated loudness is defined, None while it is not).
        """
        checks = []
        lo, hi = self.integrated_lufs - self.tolerance_lu, self.integrated_lufs + self.tolerance_lu
        checks.append({
            "what": "integrated_lufs", "value": integrated_lufs, "limit": [lo, hi],
            "pass": None if integrated_lufs is None else bool(lo - 1e-9 <= integrated_lufs <= hi + 1e-9),
        })
        if self.true_peak_max_dbtp is not None:
            checks.append({
                "what": "true_peak_dbtp", "value": true_peak_dbtp, "limit": self.true_peak_max_dbtp,
                # Silence (no peak) is within any limit.
                "pass": True if true_peak_dbtp is None else bool(true_peak_dbtp <= self.true_peak_max_dbtp + 1e-9),
            })
        if self.loudness_range_max_lu is not None:
            checks.append({
                "what": "loudness_range_lu", "value": loudness_range_lu, "limit": self.loudness_range_max_lu,
                "pass": None if loudness_range_lu is None else bool(loudness_range_lu <= self.loudness_range_max_lu + 1e-9),
            })
        verdict = None if checks[0]["pass"] is None else all(c["pass"] is not False for c in checks)
        return {"target": self.as_dict(), "checks": checks, "pass": verdict}

    def as_dict(self):
        return {
            "name": self.name,
            "integrated_lufs": self.integrated_lufs,
            "tolerance_lu": self.tolerance_lu,
            "true_peak_max_dbtp": self.true_peak_max_dbtp,
            "loudness_range_max_lu": self.loudness_range_max_lu,
        }

    def describe(self):
        """One line, e.g. ``ebu-r128: -23.0 LUFS ± 0.5 LU, true peak ≤ -1.0 dBTP``."""
        text = f"{self.name}: {self.integrated_lufs:.1f} LUFS ± {self.tolerance_lu:.1f} LU"
        if self.true_peak_max_dbtp is not None:
            text += f", true peak ≤ {self.true_peak_max_dbtp:.1f} dBTP"
        if self.loudness_range_max_lu is not None:
            text += f", loudness range ≤ {self.loudness_range_max_lu:.1f} LU"
        return text


NAMED_TARGETS = {
    # EBU R 128 v4: programme loudness -23.0 LUFS, maximum true peak -1 dBTP; the +-0.5 LU
    # tolerance is R 128's for programmes where an exact target is feasible (from memory).
    "ebu-r128": LoudnessTarget(-23.0, 0.5, -1.0, None, "ebu-r128"),
}
"""Targets known by name (the station's own is given as numbers, see :func:`parse_target`)."""


def parse_target(text):
    """A target from ``NAME`` or ``LUFS[:TOLERANCE_LU[:TRUE_PEAK_DBTP[:LRA_MAX_LU]]]``.

    Examples: ``ebu-r128``; ``-24:1:-2`` (−24 LUFS ± 1 LU, true peak ≤ −2 dBTP);
    ``-16:1`` (no true-peak check).
    """
    text = str(text).strip()
    if text in NAMED_TARGETS:
        return NAMED_TARGETS[text]
    parts = text.split(":")
    try:
        values = [float(p) if p.strip() not in ("", "-") else None for p in parts]
    except ValueError:
        raise RtstageError(
            f"loudness target {text!r}: expected {', '.join(NAMED_TARGETS)} or LUFS[:TOLERANCE_LU[:TRUE_PEAK_DBTP[:LRA_MAX_LU]]]"
        ) from None
    if not 1 <= len(values) <= 4 or values[0] is None:
        raise RtstageError(f"loudness target {text!r}: expected LUFS[:TOLERANCE_LU[:TRUE_PEAK_DBTP[:LRA_MAX_LU]]]")
    values += [None] * (4 - len(values))
    integrated, tolerance, true_peak, lra = values
    tolerance = 0.5 if tolerance is None else tolerance
    if not (-100.0 < integrated < 0.0) or not 0.0 <= tolerance <= 20.0:
        raise RtstageError(f"loudness target {text!r}: the loudness must lie in -100..0 LUFS and the tolerance in 0..20 LU")
    return LoudnessTarget(integrated, tolerance, true_peak, lra, text)


# Report and display ---------------------------------------------------------------------------

def loudness_report(meter, true_peaks=None, target=None):
    """The report's ``loudness`` section: the meter's readings, the programme's true peak, the verdict.

    Parameters
    ----------
    meter : LoudnessMeter
        The programme's meter.
    true_peaks : sequence of float or None
        Per-channel true peaks (linear, full scale = 1); their maximum is the
        programme's ``true_peak_dbtp``.
    target : LoudnessTarget or None
        When given, ``target`` holds :meth:`LoudnessTarget.check`'s result.
    """
    report = meter.report()
    report["programmes"] = [dict(p) for p in meter.programmes]
    peak = None
    if true_peaks is not None and len(true_peaks):
        top = float(np.max(true_peaks))
        peak = 20.0 * math.log10(top) if top > 0.0 else None
    report["true_peak_dbtp"] = peak
    report["target"] = None if target is None else target.check(
        report["integrated_lufs"], peak, report["loudness_range_lu"])
    return report


def _num(value, digits=1, width=6):
    return f"{value:{width}.{digits}f}" if value is not None else "-".rjust(width)


def verdict_text(verdict):
    """``PASS``, ``FAIL`` or ``WAIT`` (integrated loudness not yet defined) for a target check."""
    if verdict is None:
        return ""
    return {True: "PASS", False: "FAIL", None: "WAIT"}[verdict["pass"]]


def loudness_line(section):
    """One line for the displays from a report's ``loudness`` section (empty string without one)."""
    if not section:
        return ""
    text = (f"loudness LUFS  M {_num(section.get('momentary_lufs'))}  S {_num(section.get('short_term_lufs'))}  "
            f"I {_num(section.get('integrated_lufs'))}  LRA {_num(section.get('loudness_range_lu'), width=4)} LU  "
            f"TP {_num(section.get('true_peak_dbtp'))} dBTP")
    verdict = section.get("target")
    if verdict:
        name = (verdict.get("target") or {}).get("name", "target")
        failed = [c["what"] for c in verdict.get("checks", []) if c.get("pass") is False]
        text += f"  {name} {verdict_text(verdict)}" + (f" ({', '.join(failed)})" if failed else "")
    return text
