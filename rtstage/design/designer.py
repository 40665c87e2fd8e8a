"""The designer: the optimal error-feedback filter for a sample rate, tap count and weighting, under gain caps.

Part of :mod:`rtstage.design` (its notes describe the method, the weightings and the caps).
"""

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import RtstageError
from ..settings import MAX_SAMPLERATE, MIN_SAMPLERATE
from ..shapers import MAX_TAPS, Shaper, is_minimum_phase, noise_power_gain
from .curves import (AUDIBLE_LIMIT_HZ, AUDIBLE_LOW_HZ, WEIGHTING_TAGS, WEIGHTINGS, canonical_weighting, check_weighting_table,
                     design_weighting_db, weighting_db)
from .figures import GRID_POINTS, _grid_hz, _ntf_db_on_grid, shaper_figures


DEFAULT_RANGE_DB = 50.0
"""Default dynamic range of the weighting below its in-band peak (at 44.1 kHz and 9 taps it gives an NTF spanning about the same range, -26..+26 dB, as the published F-weighted 9-tap set)."""
MIN_SAMPLERATE_HZ = MIN_SAMPLERATE
"""Lowest design rate, Hz: the engine's (:data:`rtstage.settings.MIN_SAMPLERATE`)."""
MAX_SAMPLERATE_HZ = MAX_SAMPLERATE
"""Highest design rate, Hz: the engine's."""


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
    return f"{WEIGHTING_TAGS.get(canonical_weighting(weighting), weighting)}{ntaps}-{rate}"


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
    if canonical_weighting(weighting) not in WEIGHTINGS:
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

    freqs_hz = _grid_hz(samplerate, npoints)
    base_db = weighting_db(weighting, freqs_hz, table)  # evaluated once; floored per candidate range below
    audible = freqs_hz <= audible_limit_hz
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
    description = f"{ntaps}-tap design at {samplerate / 1000:g} kHz, {WEIGHTINGS[canonical_weighting(weighting)]}"
    if caps:
        description += " (" + ", ".join(caps) + ")"
    shaper = Shaper(
        sid,
        tuple(float(c) for c in coefs),
        float(samplerate),
        "rtstage shaper design: linear predictor of the weighting (Gerzon & Craven, AES 1989)",
        description,
    )
    w_db = design_weighting_db(weighting, freqs_hz, used, table, audible_limit_hz)
    figures = shaper_figures(shaper, samplerate, npoints)
    figures["weighted_noise_gain_db"] = weighted_noise_gain_db(coefs, 10.0 ** (w_db / 10.0))
    return ShaperDesign(
        shaper, float(samplerate), weighting, used, float(range_db), max_gain_db, max_noise_gain_db,
        float(audible_limit_hz), figures, table,
    )
