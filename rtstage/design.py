"""Noise shapers designed for any sample rate, and their stability and headroom figures.

Public surface
--------------
design_shaper
    The optimal error-feedback filter for a sample rate, tap count and
    weighting, under caps on the NTF's maximum gain and total noise gain.
weighting_db, iso226_threshold_db, terhardt_threshold_db, read_weighting_table
    The weightings a design can minimise.
weighted_noise_gain_db
    The criterion a design minimises, for any coefficient set.
shaper_figures, ntf_curve
    Gains at DC and Nyquist, the deepest notch, noise-power gain, log-mean,
    minimum phase, headroom; the NTF curve itself.
headroom_lsb, headroom_dbfs, headroom_warning
    The worst-case excursion the shaped error adds, the programme peak that
    leaves room for it, and the warning when a peak exceeds that (the one
    authority the engine and meter use).
rate_warning, preset_for_rate
    What to tell an engineer running a shaper at a rate it was not designed for.
design_to_toml, save_design
    Write a design as a shaper preset that ``render`` and ``run`` accept.

Design method
-------------
The added noise is ``NTF·e`` with ``e`` white, so the weighted noise power is
proportional to ``(1/π)∫₀^π W(ω)|NTF(e^jω)|² dω`` with
``NTF(z) = 1 - Σ_{k=1..N} h_k z^-k`` (the sign convention of
:mod:`rtstage.shapers`).  Writing ``r_k`` for the autocorrelation of ``W``
(its inverse Fourier transform, taken here by an inverse FFT of ``W`` sampled
on a dense grid from 0 to fs/2), the criterion is a quadratic form in ``h``
whose minimum solves the Toeplitz normal equations ``R h = r`` with
``R_ij = r_|i-j|`` (i, j = 1..N) and ``r = (r_1 … r_N)``:
``1 - Σ h_k z^-k`` is the prediction-error filter of a process whose power
spectrum is ``W``.  Such a filter is minimum phase, so the NTF's log-mean is
0 dB, and as N grows ``|NTF|²`` tends to ``c/W``: the noise follows the inverse
of the weighting (Gerzon & Craven, 1989).  The system is solved with
:func:`scipy.linalg.solve_toeplitz` (Levinson recursion).

Weightings
----------
A weighting is the ear's sensitivity to noise as a function of frequency, in
dB (higher = more audible; the design puts less noise there):

* ``threshold``: the inverse of the ISO 226:2003 threshold of hearing
  (its T_f values), ``W_dB = -T_f``;
* ``terhardt``: the inverse of Terhardt's 1979 approximation of the threshold;
* ``inv-a``: the IEC 61672-1 A-weighting's power gain, so the noise follows
  the inverse of A-weighting;
* ``inv-468``: the ITU-R BS.468-4 weighting's power gain;
* ``table``: a user table of (Hz, dB) rows, read as a weighting in dB
  (higher = more audible), interpolated linearly in dB over log frequency.

Outside the audible band
------------------------
Below 20 Hz every weighting is held at its 20 Hz value.  Above the audible
limit (20 kHz unless told otherwise) the ear hears nothing, so the weighting
is set to its floor (below): the design is free to push noise there, and the
gain caps keep what it pushes bounded.  At high sample rates most of the band
is ultrasonic, which is what lets a design lower the audible noise far more
than at 44.1 kHz for the same NTF gain.

Dynamic range and gain caps
---------------------------
The weighting, normalised to 0 dB at its in-band peak, is clipped from below
at ``-range_db`` (the floor).  The floor is what keeps the normal equations
well conditioned and the NTF's gain finite; it also is the one knob the caps
turn.  With an infinitely long filter ``NTF_dB = mean(W_dB) - W_dB``, so the
NTF's maximum gain is ``mean(W_dB) - floor`` and falls steadily as the floor
rises; at ``range_db = 0`` the weighting is flat and the NTF is 1 (0 dB
everywhere).  When a cap on the maximum NTF gain or on the total noise gain
``Σ n_k² = 1 + Σ h_k²`` is given, the designer bisects on ``range_db`` for the
largest range whose design meets both caps (each candidate is checked on a
dense grid).  Caps below 0 dB are impossible: a minimum-phase NTF with a
leading 1 has a 0 dB log-mean, so its maximum is at least 0 dB, and
``Σ n_k² ≥ 1``.

References
----------
.. [1] M. A. Gerzon, P. G. Craven, "Optimal noise shaping and dither of digital
   signals", 87th AES Convention, preprint 2822, 1989.
.. [2] R. A. Wannamaker, "Psychoacoustically optimal noise shaping",
   J. Audio Eng. Soc. 40(7/8), 1992.
.. [3] ISO 226:2003, "Acoustics -- Normal equal-loudness-level contours".
.. [4] E. Terhardt, "Calculating virtual pitch", Hearing Research 1, 1979.
.. [5] IEC 61672-1:2013, "Electroacoustics -- Sound level meters -- Part 1".
.. [6] ITU-R BS.468-4, "Measurement of audio-frequency noise voltage level in
   sound broadcasting", 1986.
"""

import math
import os
import re
from dataclasses import dataclass, field

import numpy as np

from .dither import DITHER_KINDS, DitherKind, feedback_peak_lsb
from .errors import RtstageError
from .shapers import MAX_TAPS, PRESET_SHAPER_DIR, Shaper, error_bound_lsb, is_minimum_phase, log_mean_db, noise_power_gain, preset_shapers

WEIGHTINGS = {
    "threshold": "inverse of the ISO 226:2003 threshold of hearing",
    "terhardt": "inverse of Terhardt's 1979 threshold approximation",
    "inv-a": "noise follows the inverse of IEC 61672-1 A-weighting",
    "inv-468": "noise follows the inverse of ITU-R BS.468-4 weighting",
    "table": "a user table of (Hz, dB) weighting rows",
}
"""Weighting ids the designer knows, with one line each."""

WEIGHTING_TAGS = {"threshold": "thr", "terhardt": "ter", "inv-a": "ia", "inv-468": "i468", "table": "tab"}
"""Short tags used in designed preset ids (``thr9-48k``)."""

AUDIBLE_LOW_HZ = 20.0
"""Below this the weighting is held at its value here."""
AUDIBLE_LIMIT_HZ = 20000.0
"""Default audible limit: above it the weighting sits at its floor."""
DEFAULT_RANGE_DB = 50.0
"""Default dynamic range of the weighting below its in-band peak (at 44.1 kHz and 9 taps it gives an NTF spanning about the same range, -26..+26 dB, as the published F-weighted 9-tap set)."""
GRID_POINTS = 1 << 15
"""Grid intervals from 0 to fs/2 for the weighting's autocorrelation and for figures."""
SHIPPED_RATES_HZ = (44100, 48000, 88200, 96000, 176400, 192000)
"""Sample rates the shipped presets are designed for."""
MIN_SAMPLERATE_HZ = 8000
MAX_SAMPLERATE_HZ = 384000
RATE_TOLERANCE_HZ = 0.5
"""A shaper counts as designed for a rate within this distance of it."""

# ISO 226:2003, Table 1, column T_f: threshold of hearing in dB SPL at the
# preferred one-third-octave frequencies 20 Hz .. 12.5 kHz.  Values written
# from memory of the standard's table.
_ISO226_FREQS_HZ = np.array(
    [20, 25, 31.5, 40, 50, 63, 80, 100, 125, 160, 200, 250, 315, 400, 500, 630, 800, 1000,
     1250, 1600, 2000, 2500, 3150, 4000, 5000, 6300, 8000, 10000, 12500],
    dtype=np.float64,
)
_ISO226_TF_DB = np.array(
    [78.5, 68.7, 59.5, 51.1, 44.0, 37.5, 31.5, 26.5, 22.1, 17.9, 14.4, 11.4, 8.6, 6.2, 4.4, 3.0, 2.2, 2.4,
     3.5, 1.7, -1.3, -4.2, -6.0, -5.4, -1.5, 6.0, 12.6, 13.9, 12.3],
    dtype=np.float64,
)


def terhardt_threshold_db(freqs_hz):
    """Terhardt's approximation of the threshold of hearing, in dB SPL.

    ``T(f) = 3.64 (f/kHz)^-0.8 - 6.5 exp(-0.6 (f/kHz - 3.3)^2) + 1e-3 (f/kHz)^4``.

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies in Hz, > 0.

    Returns
    -------
    ndarray
        Threshold in dB SPL.

    References
    ----------
    .. [1] E. Terhardt, "Calculating virtual pitch", Hearing Research 1, 1979
       (formula from memory).
    """
    f_khz = np.asarray(freqs_hz, dtype=np.float64) / 1000.0
    return 3.64 * f_khz**-0.8 - 6.5 * np.exp(-0.6 * (f_khz - 3.3) ** 2) + 1e-3 * f_khz**4


def iso226_threshold_db(freqs_hz):
    """The ISO 226:2003 threshold of hearing T_f, in dB SPL.

    Interpolated linearly in dB over log frequency between the standard's
    one-third-octave values (20 Hz .. 12.5 kHz).  Below 20 Hz the 20 Hz value
    is held.  The standard stops at 12.5 kHz; above it Terhardt's curve is
    used, shifted to join the table continuously at 12.5 kHz (it gives the
    steep rise of the threshold towards 20 kHz).

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies in Hz.

    Returns
    -------
    ndarray
        Threshold in dB SPL.

    References
    ----------
    .. [1] ISO 226:2003, Table 1 (T_f column; values from memory).
    .. [2] E. Terhardt, Hearing Research 1, 1979 (above 12.5 kHz).
    """
    f = np.maximum(np.asarray(freqs_hz, dtype=np.float64), _ISO226_FREQS_HZ[0])
    out = np.interp(np.log(f), np.log(_ISO226_FREQS_HZ), _ISO226_TF_DB)
    top = _ISO226_FREQS_HZ[-1]
    above = f > top
    if np.any(above):
        join = _ISO226_TF_DB[-1] - terhardt_threshold_db(top)
        out = np.where(above, terhardt_threshold_db(np.where(above, f, top)) + join, out)
    return out


def read_weighting_table(path):
    """Read a weighting table: rows of ``Hz dB`` (comma or white space), ``#`` comments.

    Parameters
    ----------
    path : str
        File name.

    Returns
    -------
    freqs_hz, gain_db : ndarray
        Increasing frequencies (Hz, > 0) and the weighting in dB (higher =
        more audible).
    """
    try:
        with open(path, encoding="utf-8") as f:
            lines = f.read().splitlines()
    except OSError as exc:
        raise RtstageError(f"cannot read weighting table {path}: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise RtstageError(f"weighting table {path}: not UTF-8 text (byte {exc.start})") from None
    rows = []
    for number, line in enumerate(lines, 1):
        text = line.split("#", 1)[0].replace(",", " ").split()
        if not text:
            continue
        try:
            if len(text) != 2:
                raise ValueError
            row = (float(text[0]), float(text[1]))
        except ValueError:
            raise RtstageError(f"weighting table {path}, line {number}: expected two numbers 'Hz dB'") from None
        if not (math.isfinite(row[0]) and math.isfinite(row[1])) or row[0] <= 0:
            raise RtstageError(f"weighting table {path}, line {number}: frequency must be > 0 and values finite")
        rows.append(row)
    return check_weighting_table(rows, path)


def check_weighting_table(rows, name="weighting table"):
    """Validate (Hz, dB) rows; returns ``(freqs_hz, gain_db)`` arrays."""
    if len(rows) < 2:
        raise RtstageError(f"{name}: needs at least two (Hz, dB) rows")
    table = np.asarray(rows, dtype=np.float64)
    if table.ndim != 2 or table.shape[1] != 2 or not np.all(np.isfinite(table)):
        raise RtstageError(f"{name}: rows must be pairs of finite numbers (Hz, dB)")
    if np.any(table[:, 0] <= 0) or np.any(np.diff(table[:, 0]) <= 0):
        raise RtstageError(f"{name}: frequencies must be positive and strictly increasing")
    return table[:, 0].copy(), table[:, 1].copy()


def weighting_db(weighting, freqs_hz, table=None):
    """A weighting's raw value in dB at ``freqs_hz`` (higher = more audible).

    Parameters
    ----------
    weighting : str
        One of :data:`WEIGHTINGS`.
    freqs_hz : array_like
        Frequencies in Hz.
    table : tuple of ndarray, optional
        ``(freqs_hz, gain_db)`` for ``weighting="table"``; held constant
        beyond its first and last rows.

    Returns
    -------
    ndarray
        Weighting in dB, with an arbitrary offset.  Below
        :data:`AUDIBLE_LOW_HZ` the value there is held; the audible limit and
        the floor are applied by :func:`design_weighting_db`.
    """
    f = np.maximum(np.asarray(freqs_hz, dtype=np.float64), AUDIBLE_LOW_HZ)
    if weighting == "threshold":
        return -iso226_threshold_db(f)
    if weighting == "terhardt":
        return -terhardt_threshold_db(f)
    if weighting in ("inv-a", "inv-468"):
        try:
            from . import weighting as curves
        except ImportError:
            raise RtstageError(f"weighting '{weighting}' needs rtstage.weighting, which is not installed") from None
        func = curves.a_weighting_db if weighting == "inv-a" else curves.itu468_weighting_db
        return np.asarray(func(f), dtype=np.float64)
    if weighting == "table":
        if table is None:
            raise RtstageError("weighting 'table' needs a table of (Hz, dB) rows (--table FILE)")
        tf, tdb = table
        return np.interp(np.log(f), np.log(tf), tdb)
    raise RtstageError(f"unknown weighting '{weighting}' (known: {', '.join(WEIGHTINGS)})")


def design_weighting_db(weighting, freqs_hz, range_db, table=None, audible_limit_hz=AUDIBLE_LIMIT_HZ):
    """The weighting a design minimises, in dB: 0 dB at its in-band peak, floored at ``-range_db``.

    Frequencies above ``audible_limit_hz`` sit at the floor (the ear does not
    hear there, so noise may go there, as far as the floor allows).

    Parameters
    ----------
    weighting : str
        One of :data:`WEIGHTINGS`.
    freqs_hz : array_like
        Frequencies in Hz.
    range_db : float
        Dynamic range kept below the peak, >= 0.
    table : tuple of ndarray, optional
        For ``weighting="table"``.
    audible_limit_hz : float
        Upper edge of the audible band.

    Returns
    -------
    ndarray
        Weighting in dB, in ``[-range_db, 0]``.
    """
    f = np.asarray(freqs_hz, dtype=np.float64)
    raw = weighting_db(weighting, f, table)
    audible = f <= audible_limit_hz
    if not np.any(audible):
        raise RtstageError(f"no grid frequency lies below the audible limit {audible_limit_hz:g} Hz")
    peak = float(np.max(raw[audible]))
    rel = np.where(audible, np.maximum(raw - peak, -range_db), -range_db)
    return rel


def _grid_hz(samplerate, npoints=GRID_POINTS):
    return np.linspace(0.0, samplerate / 2.0, npoints + 1)


def _lpc_from_power(power, ntaps):
    """Error-filter taps minimising ∫ power·|1 - Σ h_k e^-jkω|², by the Toeplitz normal equations.

    ``power`` samples the weighting on ``npoints + 1`` equally spaced
    frequencies from 0 to π; its autocorrelation is the inverse real FFT.
    """
    r = np.fft.irfft(power)
    if ntaps == 0:
        return np.zeros(0)
    import scipy.linalg  # here, not at import: the command line starts faster without scipy

    return scipy.linalg.solve_toeplitz(r[:ntaps], r[1 : ntaps + 1])


def _ntf_db_on_grid(coefs, npoints=GRID_POINTS):
    """20·log10|NTF| on ``npoints + 1`` frequencies from 0 to fs/2 (an FFT, so any rate)."""
    b = np.concatenate(([1.0], -np.asarray(coefs, dtype=np.float64)))
    return 20.0 * np.log10(np.maximum(np.abs(np.fft.rfft(b, 2 * npoints)), 1e-300))


def weighted_noise_gain_db(coefs, weighting_power):
    """The design criterion: weighted power of the shaped noise relative to unshaped noise, in dB.

    ``10·log10( ∫ W |NTF|² dω / ∫ W dω )``: negative when shaping puts the
    noise where the weighting is low.  The integrals are trapezoid sums on the
    grid on which ``weighting_power`` is sampled (``npoints + 1`` equally
    spaced frequencies from 0 to fs/2, as from :func:`design_weighting_db`).

    Parameters
    ----------
    coefs : sequence of float
        Error-filter taps ``h_1 … h_N``.
    weighting_power : ndarray
        Weighting power gain (linear) on the grid.

    Returns
    -------
    float
        Weighted noise gain in dB.
    """
    w = np.asarray(weighting_power, dtype=np.float64)
    npoints = w.size - 1
    ntf_pow = 10.0 ** (_ntf_db_on_grid(coefs, npoints) / 10.0)
    trap = np.ones_like(w)
    trap[0] = trap[-1] = 0.5
    return float(10.0 * np.log10(np.sum(trap * w * ntf_pow) / np.sum(trap * w)))


@dataclass(frozen=True)
class ShaperDesign:
    """A designed shaper with the settings that made it and its figures.

    Attributes
    ----------
    shaper : Shaper
        The coefficient set, with its design rate.
    samplerate : float
        Design sample rate, Hz.
    weighting : str
        Weighting id.
    range_db : float
        Weighting range actually used (below the requested one when a cap bound).
    requested_range_db : float
        Weighting range asked for.
    max_gain_db, max_noise_gain_db : float or None
        Caps asked for.
    audible_limit_hz : float
        Upper edge of the audible band used.
    figures : dict
        :func:`shaper_figures` of the result plus ``weighted_noise_gain_db``.
    table : tuple or None
        The user table for ``weighting="table"``.
    """

    shaper: Shaper
    samplerate: float
    weighting: str
    range_db: float
    requested_range_db: float
    max_gain_db: object
    max_noise_gain_db: object
    audible_limit_hz: float
    figures: dict = field(compare=False)
    table: object = field(default=None, compare=False)


def default_design_id(weighting, ntaps, samplerate):
    """Preset id built from what a design is: weighting tag, taps, rate (``thr9-48k``, ``thr9-44k1``)."""
    khz = samplerate / 1000.0
    whole = int(khz)
    tenths = int(round((khz - whole) * 10))
    if tenths == 10:
        whole, tenths = whole + 1, 0
    rate = f"{whole}k" if tenths == 0 else f"{whole}k{tenths}"
    return f"{WEIGHTING_TAGS.get(weighting, weighting)}{ntaps}-{rate}"


def _caps_hold(coefs, max_gain_db, max_noise_gain_db, npoints):
    if max_gain_db is not None and float(np.max(_ntf_db_on_grid(coefs, npoints))) > max_gain_db + 1e-9:
        return False
    if max_noise_gain_db is not None and 10.0 * math.log10(noise_power_gain(coefs)) > max_noise_gain_db + 1e-9:
        return False
    return True


def design_shaper(
    samplerate,
    ntaps,
    weighting="threshold",
    *,
    table=None,
    range_db=DEFAULT_RANGE_DB,
    max_gain_db=None,
    max_noise_gain_db=None,
    audible_limit_hz=AUDIBLE_LIMIT_HZ,
    shaper_id=None,
    npoints=GRID_POINTS,
):
    """Design the error-feedback filter that minimises the weighted added-noise power.

    Parameters
    ----------
    samplerate : float
        Sample rate in Hz, 8000..384000.
    ntaps : int
        Error-filter taps, 1..32.
    weighting : str
        One of :data:`WEIGHTINGS` (see the module notes).
    table : (freqs_hz, gain_db), optional
        The weighting table for ``weighting="table"``: two equal-length
        sequences, as :func:`read_weighting_table` returns.
    range_db : float
        Dynamic range of the weighting below its in-band peak, 0..120 dB.
    max_gain_db : float, optional
        Cap on the NTF's maximum gain, dB (>= 0).
    max_noise_gain_db : float, optional
        Cap on the total noise-power gain ``10·log10 Σ n_k²``, dB (>= 0).
    audible_limit_hz : float
        Upper edge of the audible band, Hz; the weighting is at its floor above it.
    shaper_id : str, optional
        Id of the result; default from :func:`default_design_id`.
    npoints : int
        Grid intervals from 0 to fs/2.

    Returns
    -------
    ShaperDesign
        The design, its settings and figures.

    Raises
    ------
    RtstageError
        For settings outside what is possible (a cap below 0 dB, too many
        taps, a rate outside 8..384 kHz, an unknown weighting).

    Notes
    -----
    The filter solves the Toeplitz normal equations of the weighting's
    autocorrelation (Gerzon & Craven, 1989); when caps are given, the
    weighting's range is bisected down to the largest range whose design
    meets them (see the module notes).

    References
    ----------
    .. [1] M. A. Gerzon, P. G. Craven, 87th AES Convention, preprint 2822, 1989.
    """
    if isinstance(samplerate, bool) or not isinstance(samplerate, (int, float, np.integer, np.floating)):
        raise RtstageError(f"sample rate must be a number, got {samplerate!r}")
    if not MIN_SAMPLERATE_HZ <= samplerate <= MAX_SAMPLERATE_HZ:
        raise RtstageError(f"sample rate must be between {MIN_SAMPLERATE_HZ} and {MAX_SAMPLERATE_HZ} Hz, got {samplerate:g}")
    if isinstance(ntaps, bool) or not isinstance(ntaps, (int, np.integer)) or not 1 <= ntaps <= MAX_TAPS:
        raise RtstageError(f"taps must be an integer from 1 to {MAX_TAPS}, got {ntaps!r}")
    if weighting not in WEIGHTINGS:
        raise RtstageError(f"unknown weighting '{weighting}' (known: {', '.join(WEIGHTINGS)})")
    if weighting == "table":
        if table is None:
            raise RtstageError("weighting 'table' needs a table of (Hz, dB) rows (--table FILE)")
        try:
            table_hz, table_db = (np.asarray(v, dtype=np.float64) for v in table)
        except (TypeError, ValueError):
            raise RtstageError("weighting table must be a pair (freqs_hz, gain_db) of equal-length sequences") from None
        if table_hz.ndim != 1 or table_hz.shape != table_db.shape:
            raise RtstageError("weighting table must be a pair (freqs_hz, gain_db) of equal-length sequences")
        table = check_weighting_table(np.column_stack((table_hz, table_db)))
    if not (math.isfinite(range_db) and 0.0 <= range_db <= 120.0):
        raise RtstageError(f"weighting range must be between 0 and 120 dB, got {range_db}")
    for name, cap in (("maximum NTF gain", max_gain_db), ("total noise gain", max_noise_gain_db)):
        if cap is not None and not (math.isfinite(cap) and cap >= 0.0):
            raise RtstageError(
                f"a cap of {cap} dB on the {name} is impossible: a minimum-phase NTF with a leading 1 has a "
                "0 dB log-mean, so its maximum and its noise gain are at least 0 dB"
            )
    if not AUDIBLE_LOW_HZ < audible_limit_hz:
        raise RtstageError(f"audible limit must be above {AUDIBLE_LOW_HZ:g} Hz, got {audible_limit_hz}")

    freqs = _grid_hz(samplerate, npoints)
    base_db = weighting_db(weighting, freqs, table)  # evaluated once; floored per candidate range below
    audible = freqs <= audible_limit_hz
    peak = float(np.max(base_db[audible]))

    def solve(rng):
        w_db = np.where(audible, np.maximum(base_db - peak, -rng), -rng)
        return _lpc_from_power(10.0 ** (w_db / 10.0), ntaps)

    used = float(range_db)
    coefs = solve(used)
    if not _caps_hold(coefs, max_gain_db, max_noise_gain_db, npoints):
        lo, hi = 0.0, used  # range 0 gives NTF = 1, which meets any cap >= 0 dB
        best = np.zeros(ntaps)
        for _ in range(40):
            mid = 0.5 * (lo + hi)
            trial = solve(mid)
            if _caps_hold(trial, max_gain_db, max_noise_gain_db, npoints):
                lo, best = mid, trial
            else:
                hi = mid
            if hi - lo < 1e-4:
                break
        used, coefs = lo, best
    coefs = np.asarray(coefs, dtype=np.float64)
    if not np.all(np.isfinite(coefs)) or not is_minimum_phase(coefs):
        raise RtstageError(
            f"design at {samplerate:g} Hz with {ntaps} taps is numerically unstable; lower the weighting range"
        )
    sid = shaper_id or default_design_id(weighting, ntaps, samplerate)
    caps = []
    if max_gain_db is not None:
        caps.append(f"max gain {max_gain_db:g} dB")
    if max_noise_gain_db is not None:
        caps.append(f"noise gain {max_noise_gain_db:g} dB")
    description = f"{ntaps}-tap design at {samplerate / 1000:g} kHz, {WEIGHTINGS[weighting]}"
    if caps:
        description += " (" + ", ".join(caps) + ")"
    shaper = Shaper(
        sid,
        tuple(float(c) for c in coefs),
        float(samplerate),
        "rtstage shaper design: linear predictor of the weighting (Gerzon & Craven, AES 1989)",
        description,
    )
    w_db = design_weighting_db(weighting, freqs, used, table, audible_limit_hz)
    figures = shaper_figures(shaper, samplerate, npoints)
    figures["weighted_noise_gain_db"] = weighted_noise_gain_db(coefs, 10.0 ** (w_db / 10.0))
    return ShaperDesign(
        shaper, float(samplerate), weighting, used, float(range_db), max_gain_db, max_noise_gain_db,
        float(audible_limit_hz), figures, table,
    )


# ----------------------------------------------------------------------------- figures


def ntf_curve(shaper, samplerate=None, npoints=1024):
    """The NTF's gain in dB on ``npoints + 1`` frequencies from 0 to fs/2.

    Parameters
    ----------
    shaper : Shaper
        The shaper.
    samplerate : float, optional
        Sample rate in Hz; default the shaper's design rate, else 44100.
    npoints : int
        Intervals from 0 to fs/2.

    Returns
    -------
    freqs_hz, gain_db : ndarray
    """
    rate = _rate_for(shaper, samplerate)
    return _grid_hz(rate, npoints), _ntf_db_on_grid(shaper.coefs, npoints)


def _rate_for(shaper, samplerate):
    if samplerate is not None:
        return float(samplerate)
    return float(shaper.design_samplerate_hz) if shaper.design_samplerate_hz else 44100.0


def shaper_figures(shaper, samplerate=None, npoints=GRID_POINTS):
    """A shaper's figures of merit.

    Parameters
    ----------
    shaper : Shaper
        The shaper.
    samplerate : float, optional
        Rate for the frequency figures; default the design rate, else 44100.
    npoints : int
        Grid intervals from 0 to fs/2.

    Returns
    -------
    dict
        ``samplerate_hz``, ``dc_gain_db``, ``nyquist_gain_db``, ``max_gain_db``
        and ``max_gain_hz``, ``min_gain_db`` and ``min_gain_hz`` (the deepest
        notch), ``noise_gain_db`` (``10·log10 Σ n_k²``), ``log_mean_db`` (0 dB
        when minimum phase), ``minimum_phase``, ``headroom_tpdf_lsb`` (worst-case
        excursion of the shaped error with TPDF dither, :func:`headroom_lsb`).
        Gains of an exact zero (``(1 - z^-1)`` at DC) are reported as -300 dB.
    """
    rate = _rate_for(shaper, samplerate)
    freqs = _grid_hz(rate, npoints)
    gain = np.maximum(_ntf_db_on_grid(shaper.coefs, npoints), -300.0)
    imax, imin = int(np.argmax(gain)), int(np.argmin(gain))
    return {
        "samplerate_hz": rate,
        "taps": shaper.ntaps,
        "dc_gain_db": float(gain[0]),
        "nyquist_gain_db": float(gain[-1]),
        "max_gain_db": float(gain[imax]),
        "max_gain_hz": float(freqs[imax]),
        "min_gain_db": float(gain[imin]),
        "min_gain_hz": float(freqs[imin]),
        "noise_gain_db": float(10.0 * math.log10(noise_power_gain(shaper.coefs))),
        "log_mean_db": float(log_mean_db(shaper.coefs)),
        "minimum_phase": bool(is_minimum_phase(shaper.coefs)),
        "headroom_tpdf_lsb": float(headroom_lsb(shaper, "tpdf")),
    }


# ----------------------------------------------------------------------------- headroom


def _dither_kind(dither_id):
    if isinstance(dither_id, DitherKind):
        return dither_id
    if dither_id not in DITHER_KINDS:
        raise RtstageError(f"unknown dither '{dither_id}' (known: {', '.join(DITHER_KINDS)})")
    return DITHER_KINDS[dither_id]


def headroom_lsb(shaper, dither_id, dither_scale=1.0):
    """Worst-case excursion, in LSB, that the shaped error adds to the programme.

    The output word is ``y = v + NTF·e`` (``v`` the programme in LSB), and every
    unclipped sample's total error ``e`` (rounding plus dither) lies within
    ``±(1/2 + dither peak)``.  The added term ``e[n] - Σ h_k e[n-k]`` is
    therefore bounded by ``(1/2 + peak)·(1 + Σ|h_k|)``, the error bound times
    the L1 norm of the NTF's impulse response; the bound is reached when the
    past errors line up in sign with the taps.  This function is the one
    authority for that figure (the engine's warning and the meter use it).

    Parameters
    ----------
    shaper : Shaper
        The shaper (``flat`` gives the plain requantizer's bound).
    dither_id : str or DitherKind
        Dither kind id.
    dither_scale : float
        Dither amplitude relative to the textbook amplitude.

    Returns
    -------
    float
        Excursion in LSB.

    Notes
    -----
    Gaussian dither has no peak; its bound uses four sigma, the same bound the
    kernel's clip rule feeds back (:func:`rtstage.dither.feedback_peak_lsb`), so
    for Gaussian dither the figure is exceeded with a very small probability.
    """
    kind = _dither_kind(dither_id)
    error_peak = feedback_peak_lsb(kind, dither_scale)  # 1/2 + dither peak
    return float(error_bound_lsb(shaper.coefs, error_peak - 0.5))


def headroom_dbfs(shaper, dither_id, bits, dither_scale=1.0):
    """Largest programme peak, in dBFS, that leaves room for :func:`headroom_lsb`.

    A programme sample of ``v`` LSB cannot clip while ``|v| + X < 2^(B-1)``,
    with ``X`` the excursion and ``B = bits`` (the word's range is
    ``[-2^(B-1), 2^(B-1) - 1]`` and the output is an integer), so the peak
    allowed is ``20·log10(1 - X/2^(B-1))`` dBFS.

    Parameters
    ----------
    shaper : Shaper
        The shaper.
    dither_id : str or DitherKind
        Dither kind id.
    bits : int
        Target word length.
    dither_scale : float
        Dither amplitude relative to the textbook amplitude.

    Returns
    -------
    float
        Peak in dBFS (negative); ``-inf`` when the excursion alone fills the
        word (short words with strong shapers), so no programme is safe.
    """
    excursion = headroom_lsb(shaper, dither_id, dither_scale)
    full_lsb = math.ldexp(1.0, int(bits) - 1)
    room = 1.0 - excursion / full_lsb
    return 20.0 * math.log10(room) if room > 0.0 else float("-inf")


def headroom_warning(shaper, dither_id, bits, peak_dbfs, dither_scale=1.0):
    """A warning when a programme peak leaves less room than the shaped error needs, else None.

    Parameters
    ----------
    shaper : Shaper
        The shaper.
    dither_id : str or DitherKind
        Dither kind id.
    bits : int
        Target word length.
    peak_dbfs : float
        The programme's peak after the engine's gain, dBFS.
    dither_scale : float
        Dither amplitude relative to the textbook amplitude.

    Returns
    -------
    str or None
        One line naming the peak, the limit from :func:`headroom_dbfs` and the
        excursion from :func:`headroom_lsb`; None when the peak is at or below the limit.
    """
    limit = headroom_dbfs(shaper, dither_id, bits, dither_scale)
    if peak_dbfs <= limit:
        return None
    excursion = headroom_lsb(shaper, dither_id, dither_scale)
    if limit == float("-inf"):
        return (
            f"shaper '{shaper.id}' with {_dither_kind(dither_id).id} dither can add {excursion:.1f} LSB, more than a "
            f"{bits}-bit word holds: any programme may clip; use a gentler shaper or a longer word"
        )
    return (
        f"programme peak {peak_dbfs:.2f} dBFS leaves less headroom than shaper '{shaper.id}' with "
        f"{_dither_kind(dither_id).id} dither needs ({excursion:.1f} LSB at {bits} bits): keep peaks at or below "
        f"{limit:.2f} dBFS (lower the gain) or expect clipped samples"
    )


# ----------------------------------------------------------------------------- rate check

_ID_PATTERN = re.compile(r"^([a-z]+[a-z0-9]*?)(\d+)-(\d+)k(\d?)$")


def _parse_id(sid):
    m = _ID_PATTERN.match(sid)
    if not m:
        return None
    return m.group(1), int(m.group(2))


def _same_rate(a_hz, b_hz):
    return abs(float(a_hz) - float(b_hz)) <= RATE_TOLERANCE_HZ


def preset_for_rate(shaper, samplerate, presets=None):
    """The shipped preset that best replaces ``shaper`` at ``samplerate``, or None.

    Candidates are the presets designed for ``samplerate``; the best has the
    same weighting tag as ``shaper`` (the published psychoacoustic sets count
    as threshold designs, ``thr``) and the tap count nearest to it.
    """
    presets = preset_shapers(PRESET_SHAPER_DIR) if presets is None else presets
    candidates = [p for p in presets.values() if p.design_samplerate_hz and _same_rate(p.design_samplerate_hz, samplerate)]
    if not candidates:
        return None
    parsed = _parse_id(shaper.id)
    family = parsed[0] if parsed and parsed[0] in WEIGHTING_TAGS.values() else WEIGHTING_TAGS["threshold"]

    def rank(p):
        q = _parse_id(p.id)
        return (0 if q and q[0] == family else 1, abs(p.ntaps - shaper.ntaps), p.ntaps, p.id)

    return min(candidates, key=rank)


def rate_warning(shaper, samplerate, presets=None):
    """A warning when ``shaper`` runs at a rate it was not designed for, else None.

    Parameters
    ----------
    shaper : Shaper
        The shaper in use.
    samplerate : float
        The rate the engine runs at, Hz.
    presets : dict, optional
        Presets to choose from (default: the shipped ones).

    Returns
    -------
    str or None
        None when the shaper is rate-independent (no design rate) or was
        designed for this rate; otherwise one line naming the shipped preset
        for this rate, or the design command when none is shipped.
    """
    design = shaper.design_samplerate_hz
    if design is None or _same_rate(design, samplerate):
        return None
    msg = (
        f"shaper '{shaper.id}' was designed for {design / 1000:g} kHz; at {samplerate / 1000:g} kHz its "
        "noise curve lands at the wrong frequencies"
    )
    best = preset_for_rate(shaper, samplerate, presets)
    if best is not None:
        return f"{msg}; use --shaper {best.id} (designed for {samplerate / 1000:g} kHz)"
    return (
        f"{msg}; no shipped preset fits this rate: design one with "
        f"'rtstage shaper design --samplerate {samplerate:g} --taps {max(shaper.ntaps, 1)} --weighting threshold --save FILE'"
    )


# ----------------------------------------------------------------------------- files


def _toml_value(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {type(value).__name__} to TOML")


def design_command(design):
    """The ``rtstage shaper design`` command line that reproduces ``design``."""
    parts = [
        "rtstage shaper design",
        f"--samplerate {design.samplerate:g}",
        f"--taps {design.shaper.ntaps}",
        "--table FILE" if design.weighting == "table" else f"--weighting {design.weighting}",
        f"--range-db {design.requested_range_db:g}",
    ]
    if design.max_gain_db is not None:
        parts.append(f"--max-gain-db {design.max_gain_db:g}")
    if design.max_noise_gain_db is not None:
        parts.append(f"--max-noise-gain-db {design.max_noise_gain_db:g}")
    if design.audible_limit_hz != AUDIBLE_LIMIT_HZ:
        parts.append(f"--audible-limit-hz {design.audible_limit_hz:g}")
    parts.append(f"--id {design.shaper.id}")
    return " ".join(parts)


def design_to_toml(design):
    """A design as a shaper preset file (TOML text) for :func:`rtstage.shapers.shaper_from_toml`.

    Besides ``id``, ``coefs``, ``design_samplerate_hz``, ``source`` and
    ``description``, the file records the design's settings (``[design]``)
    and figures (``[figures]``); readers ignore those tables.
    """
    s = design.shaper
    lines = [
        "# Noise shaper designed by 'rtstage shaper design'.",
        "# NTF(z) = 1 - sum_k coefs[k-1] z^-k (sign convention of rtstage.shapers).",
        f"# Made with: {design_command(design)}",
        f"id = {_toml_value(s.id)}",
        f"description = {_toml_value(s.description)}",
        f"source = {_toml_value(s.source)}",
        f"design_samplerate_hz = {_toml_value(float(design.samplerate))}",
        "coefs = [",
    ]
    lines += [f"    {_toml_value(c)}," for c in s.coefs]
    lines += ["]", "", "[design]"]
    settings = {
        "weighting": design.weighting,
        "taps": s.ntaps,
        "range_db": design.range_db,
        "requested_range_db": design.requested_range_db,
        "audible_limit_hz": design.audible_limit_hz,
    }
    if design.max_gain_db is not None:
        settings["max_gain_db"] = float(design.max_gain_db)
    if design.max_noise_gain_db is not None:
        settings["max_noise_gain_db"] = float(design.max_noise_gain_db)
    if design.table is not None:
        settings["table_hz"] = [float(v) for v in design.table[0]]
        settings["table_db"] = [float(v) for v in design.table[1]]
    lines += [f"{k} = {_toml_value(v)}" for k, v in settings.items()]
    lines += ["", "[figures]"]
    lines += [f"{k} = {_toml_value(v)}" for k, v in design.figures.items()]
    return "\n".join(lines) + "\n"


def save_design(design, path, plan=None, overwrite=False):
    """Write :func:`design_to_toml` to ``path`` through the output policy.

    With ``plan`` (checked, ``path`` declared in it) the caller commits;
    without, a plan of its own refuses an existing file unless ``overwrite``.
    """
    from .files.policy import OutputPlan

    text = design_to_toml(design)
    if plan is not None:
        plan.write_text(path, text)
        return
    own = OutputPlan(f"saving the shaper design {path}", overwrite=overwrite)
    own.add_file(path, "shaper file")
    with own:
        own.write_text(path, text)
