"""A shaper's figures: NTF curve, gains at DC and Nyquist, deepest notch, noise-power gain, log-mean, headroom.

Part of :mod:`rtstage.design` (its notes describe the method, the weightings and the caps).
"""

import math

import numpy as np

from ..shapers import is_minimum_phase, log_mean_db, noise_power_gain
from .headroom import headroom_lsb


GRID_POINTS = 1 << 15
"""Grid intervals from 0 to fs/2 for the weighting's autocorrelation and for figures."""


def _grid_hz(samplerate, npoints=GRID_POINTS):
    return np.linspace(0.0, samplerate / 2.0, npoints + 1)


def _ntf_db_on_grid(coefs, npoints=GRID_POINTS):
    """20·log10|NTF| on ``npoints + 1`` frequencies from 0 to fs/2 (an FFT, so any rate)."""
    b = np.concatenate(([1.0], -np.asarray(coefs, dtype=np.float64)))
    return 20.0 * np.log10(np.maximum(np.abs(np.fft.rfft(b, 2 * npoints)), 1e-300))


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
    freqs_hz = _grid_hz(rate, npoints)
    gain = np.maximum(_ntf_db_on_grid(shaper.coefs, npoints), -300.0)
    imax, imin = int(np.argmax(gain)), int(np.argmin(gain))
    return {
        "samplerate_hz": rate,
        "taps": shaper.ntaps,
        "dc_gain_db": float(gain[0]),
        "nyquist_gain_db": float(gain[-1]),
        "max_gain_db": float(gain[imax]),
        "max_gain_hz": float(freqs_hz[imax]),
        "min_gain_db": float(gain[imin]),
        "min_gain_hz": float(freqs_hz[imin]),
        "noise_gain_db": float(10.0 * math.log10(noise_power_gain(shaper.coefs))),
        "log_mean_db": float(log_mean_db(shaper.coefs)),
        "minimum_phase": bool(is_minimum_phase(shaper.coefs)),
        "headroom_tpdf_lsb": float(headroom_lsb(shaper, "tpdf")),
    }
