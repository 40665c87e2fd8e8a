"""Frequency weightings for noise measurement: IEC 61672-1 A and ITU-R BS.468-4.

Both curves are evaluated from their analytic definitions at any frequency,
so a measurement can weight a power spectrum in the frequency domain over the
whole band up to fs/2 at any sample rate.  A bilinear-transform IIR version of
either curve departs from the analogue response near Nyquist (frequency
warping): at 48 kHz it reads white noise roughly 0.9 dB low A-weighted, which
is why rtstage weights spectra instead of filtering samples.

Public API
----------
a_weighting_db(freqs_hz)
    A-weighting gain in dB, 0 dB at 1 kHz (IEC 61672-1, Annex E).
itu468_weighting_db(freqs_hz)
    ITU-R BS.468-4 weighting gain in dB, 0 dB at 1 kHz.
weighting_db(weighting, freqs_hz)
    Either curve, or 0 dB for ``"unweighted"``, by name.
weighting_power(weighting, freqs_hz)
    The same as a linear power gain (0 where the curve is -inf dB).
band_power(psd, freqs_hz, weighting, band_hz=None)
    Weighted power of a one-sided power spectral density.

References
----------
.. [1] IEC 61672-1:2013, "Electroacoustics - Sound level meters - Part 1:
   Specifications", Annex E (analytic frequency weightings), Table 3.
.. [2] ITU-R Recommendation BS.468-4, "Measurement of audio-frequency noise
   voltage level in sound broadcasting", 1986, Table 1.
"""

import numpy as np

from .errors import RtstageError

# IEC 61672-1 Annex E: pole frequencies of the A and C weightings (Hz).
IEC_F1_HZ = 20.598997
"""Low double pole (E.2: f1 = 20.60 Hz, exact value from the standard's equations)."""
IEC_F2_HZ = 107.65265
"""A-weighting single pole f2 (E.3)."""
IEC_F3_HZ = 737.86223
"""A-weighting single pole f3 (E.3)."""
IEC_F4_HZ = 12194.217
"""High double pole (E.2: f4 = 12 194 Hz, exact value)."""
IEC_A1000_DB = -2.000
"""Normalisation constant A1000: the unnormalised A response at 1 kHz, in dB (E.6)."""

# ITU-R BS.468-4: the weighting network's response as a rational function of f.
# These are the polynomial coefficients commonly used to evaluate the network
# of the Recommendation's Figure 1 (written from memory); the tests check the
# result against the Recommendation's Table 1 within its tolerances.
_ITU468_H1 = (-4.737338981378384e-24, 2.043828333606125e-15, -1.363894795463638e-07, 1.0)
"""h1(f) = c6 f^6 + c4 f^4 + c2 f^2 + c0."""
_ITU468_H2 = (1.306612257412824e-19, -2.118150887518656e-11, 5.559488023498642e-04)
"""h2(f) = c5 f^5 + c3 f^3 + c1 f."""
_ITU468_K = 1.246332637532143e-04
"""Numerator constant of R(f) = k f / |h1 + j h2|."""

WEIGHTINGS = ("unweighted", "a", "itu468")
"""Weighting names accepted by :func:`weighting_db` and :func:`band_power`."""


def _as_freqs(freqs_hz):
    f = np.asarray(freqs_hz, dtype=np.float64)
    if np.any(f < 0) or not np.all(np.isfinite(f)):
        raise RtstageError("weighting frequencies must be finite and non-negative")
    return f


def _a_raw_db(f):
    f2 = f * f
    num = (IEC_F4_HZ**2) * f2 * f2
    den = (f2 + IEC_F1_HZ**2) * np.sqrt(f2 + IEC_F2_HZ**2) * np.sqrt(f2 + IEC_F3_HZ**2) * (f2 + IEC_F4_HZ**2)
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(num / den)


def a_weighting_db(freqs_hz):
    """A-weighting gain in dB at ``freqs_hz``, per IEC 61672-1 Annex E.

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies in Hz (>= 0).

    Returns
    -------
    ndarray
        Gain in dB; ``-inf`` at 0 Hz.

    Notes
    -----
    Equation (E.6) of the standard:

    .. math:: A(f) = 20 \\log_{10}\\left[\\frac{f_4^2 f^4}{(f^2 + f_1^2)
       (f^2 + f_2^2)^{1/2} (f^2 + f_3^2)^{1/2} (f^2 + f_4^2)}\\right] - A_{1000}

    with f1 = 20.598997 Hz, f2 = 107.65265 Hz, f3 = 737.86223 Hz,
    f4 = 12194.217 Hz and A1000 = -2.000 dB, so that A(1 kHz) = 0 dB to
    within 0.001 dB.

    References
    ----------
    .. [1] IEC 61672-1:2013, Annex E.
    """
    return _a_raw_db(_as_freqs(freqs_hz)) - IEC_A1000_DB


def itu468_weighting_db(freqs_hz):
    """ITU-R BS.468-4 weighting gain in dB at ``freqs_hz``, 0 dB at 1 kHz.

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies in Hz (>= 0).

    Returns
    -------
    ndarray
        Gain in dB (about +12.2 dB at 6.3 kHz, the curve's peak); ``-inf`` at 0 Hz.

    Notes
    -----
    The network of the Recommendation has the response
    ``R(f) = k f / |h1(f) + j h2(f)|`` with even and odd polynomials h1, h2
    of the frequency.  The gain is normalised here to exactly 0 dB at
    1 kHz, where Table 1 of the Recommendation sets its reference.

    References
    ----------
    .. [1] ITU-R BS.468-4, Table 1 and Figure 1.
    """
    return _itu468_raw_db(_as_freqs(freqs_hz)) - _ITU468_REF_DB


def _itu468_raw_db(f):
    f2 = f * f
    c6, c4, c2, c0 = _ITU468_H1
    c5, c3, c1 = _ITU468_H2
    h1 = ((c6 * f2 + c4) * f2 + c2) * f2 + c0
    h2 = ((c5 * f2 + c3) * f2 + c1) * f
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(_ITU468_K * f / np.hypot(h1, h2))


_ITU468_REF_DB = float(_itu468_raw_db(np.array(1000.0)))


def weighting_db(weighting, freqs_hz):
    """Gain in dB of the named weighting (``"unweighted"``, ``"a"``, ``"itu468"``)."""
    if weighting == "unweighted":
        return np.zeros_like(_as_freqs(freqs_hz))
    if weighting == "a":
        return a_weighting_db(freqs_hz)
    if weighting == "itu468":
        return itu468_weighting_db(freqs_hz)
    raise RtstageError(f"unknown weighting '{weighting}' (known: {', '.join(WEIGHTINGS)})")


def weighting_power(weighting, freqs_hz):
    """Linear power gain of the named weighting, ``10^(dB/10)`` (0 where the curve is -inf)."""
    return 10.0 ** (weighting_db(weighting, freqs_hz) / 10.0)


def band_power(psd, freqs_hz, weighting="unweighted", band_hz=None):
    """Weighted power of a one-sided power spectral density on a uniform grid.

    Parameters
    ----------
    psd : array_like, shape (..., nfreqs)
        One-sided power spectral density (power per Hz) on ``freqs_hz``.
    freqs_hz : array_like, shape (nfreqs,)
        Uniformly spaced frequencies from 0 Hz (an ``rfftfreq`` grid).
    weighting : str
        ``"unweighted"``, ``"a"`` or ``"itu468"``.
    band_hz : (float, float) or None
        Keep only bins whose centre lies in ``[low, high]``; None keeps all.

    Returns
    -------
    ndarray or float
        ``Σ psd·W(f)·Δf`` over the kept bins, where W is the weighting's power gain.
    """
    freqs = _as_freqs(freqs_hz)
    if freqs.size < 2:
        raise RtstageError("band_power needs at least two frequencies")
    df = freqs[1] - freqs[0]
    gain = weighting_power(weighting, freqs)
    if band_hz is not None:
        low, high = band_hz
        gain = np.where((freqs >= low) & (freqs <= high), gain, 0.0)
    return np.asarray(psd, dtype=np.float64) @ gain * df
