"""Added-noise levels (unweighted, A, BS.468-4) and the level theory predicts.

Levels are RMS levels in dBFS with the AES17 reference: 0 dBFS is the RMS of
a full-scale sine, so a mean power P (full-scale units²) reads
``10·log10(2P)`` dBFS.  They are computed from a one-sided PSD by weighting in
the frequency domain (see :mod:`rtstage.weighting`), which follows the
standards' curves exactly at every frequency up to fs/2.

References
----------
.. [1] AES17-2015, "AES standard method for digital audio engineering -
   Measurement of digital audio equipment" (dBFS, 20 kHz measurement band).
.. [2] IEC 61672-1:2013, Annex E (A-weighting).
.. [3] ITU-R BS.468-4 (noise weighting; rtstage uses an RMS detector after the
   weighting network, not the Recommendation's quasi-peak detector).
.. [4] S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and
   dither: a theoretical survey", J. Audio Eng. Soc. 40(5), 1992.
.. [5] M. A. Gerzon, P. G. Craven, "Optimal noise shaping and dither of
   digital signals", 87th AES Convention, preprint 2822, 1989.
"""

import math

import numpy as np

from ..dither import DITHER_KINDS
from ..errors import RtstageError
from ..shapers import ntf_response
from ..weighting import band_power

UNWEIGHTED_BAND_HZ = (20.0, 20000.0)
"""Band of the unweighted reading (AES17's 20 kHz measurement band, 20 Hz high-pass)."""

READINGS = {"unweighted": "unweighted", "a_weighted": "a", "itu468": "itu468"}
"""Report key -> weighting name of :mod:`rtstage.weighting`."""

QUANTIZATION_VARIANCE_LSB2 = 1.0 / 12.0
"""Variance of the rounding error, Q²/12 (exact for TPDF dither, on average for RPDF)."""


def power_to_dbfs(power):
    """``10·log10(2·power)``: dBFS re a full-scale sine (AES17); None for zero power."""
    power = float(power)
    if not power > 0.0 or not math.isfinite(power):
        return None
    return 10.0 * math.log10(2.0 * power)


def amplitude_to_dbfs(peak):
    """``20·log10(peak)`` for a linear peak (1.0 = full scale); None for zero."""
    peak = float(peak)
    if not peak > 0.0 or not math.isfinite(peak):
        return None
    return 20.0 * math.log10(peak)


def reading_powers(psd, freqs_hz, samplerate):
    """Mean powers of the three readings from a one-sided PSD.

    Parameters
    ----------
    psd : ndarray, shape (..., nfreqs)
        One-sided PSD on the ``rfftfreq`` grid ``freqs_hz``.
    freqs_hz : ndarray
        Uniform frequencies from 0 Hz to fs/2.
    samplerate : float
        Sample rate in Hz.

    Returns
    -------
    dict
        ``unweighted``: power in 20 Hz - min(20 kHz, fs/2);
        ``a_weighted``, ``itu468``: weighted power over 0 Hz - fs/2.
    """
    low, high = UNWEIGHTED_BAND_HZ
    out = {}
    for key, weighting in READINGS.items():
        band = (low, min(high, samplerate / 2.0)) if weighting == "unweighted" else None
        out[key] = band_power(psd, freqs_hz, weighting, band)
    return out


def error_variance_lsb2(dither_id, dither_scale=1.0, freqs_hz=None, samplerate=None):
    """Theoretical total-error power density of the quantizer, in LSB² per sample.

    Parameters
    ----------
    dither_id : str
        Dither kind id.
    dither_scale : float
        Dither amplitude relative to the textbook amplitude.
    freqs_hz, samplerate : ndarray, float, optional
        Needed for ``tpdf-hp``, whose dither is not white.

    Returns
    -------
    float or ndarray
        ``Q²/12 + σ_d²`` (rounding plus dither), as a constant, or per
        frequency for ``tpdf-hp``: ``Q²/12 + (s²/12)·4 sin²(πf/fs)``.

    Notes
    -----
    With TPDF dither the total error has variance Q²/4 whatever the signal
    (Lipshitz, Wannamaker & Vanderkooy 1992).  With RPDF its conditional
    variance is a(Q - a) for an input a above a step, Q²/6 on average over a
    uniformly spread a; with no dither Q²/12 holds only for signals spanning
    many steps.  Other scales are approximated by the same sum.
    """
    if dither_id not in DITHER_KINDS:
        raise RtstageError(f"unknown dither '{dither_id}'")
    kind = DITHER_KINDS[dither_id]
    if kind.iid:
        return QUANTIZATION_VARIANCE_LSB2 + kind.variance_lsb2 * dither_scale**2
    if freqs_hz is None or samplerate is None:
        raise RtstageError(f"dither '{dither_id}' is not white: give freqs_hz and samplerate")
    rect = 1.0 / 12.0
    return QUANTIZATION_VARIANCE_LSB2 + rect * dither_scale**2 * 4.0 * np.sin(np.pi * np.asarray(freqs_hz) / samplerate) ** 2


def predicted_psd(freqs_hz, samplerate, bits, shaper_coefs, dither_id, dither_scale=1.0):
    """PSD of the added noise that theory predicts, on an ``rfftfreq`` grid.

    Parameters
    ----------
    freqs_hz : ndarray
        Uniform frequencies from 0 Hz to fs/2 (as :class:`WelchSpectrum` uses).
    samplerate : float
        Sample rate in Hz.
    bits : int
        Word length B; the step is Q = 2^-(B-1) full scale.
    shaper_coefs : sequence of float
        Error-filter taps h_1..h_N (NTF = 1 - Σ h_k z^-k).
    dither_id : str
        Dither kind id.
    dither_scale : float
        Dither amplitude scale.

    Returns
    -------
    ndarray
        ``c·σ²(f)·Q²·|NTF(f)|²/fs`` with c = 2 inside the band and 1 at 0 Hz
        and Nyquist, the convention of the measured PSD, so that on a grid of
        N/2 + 1 points the sum times Δf is σ²Q²·Σ n_k² exactly for a white
        error (Gerzon & Craven 1989).
    """
    step = math.ldexp(1.0, -(bits - 1))
    sigma2 = error_variance_lsb2(dither_id, dither_scale, freqs_hz, samplerate)
    ntf2 = np.abs(ntf_response(shaper_coefs, freqs_hz, samplerate)) ** 2
    factor = np.full(len(freqs_hz), 2.0)
    factor[0] = 1.0
    factor[-1] = 1.0
    return factor * sigma2 * step * step * ntf2 / samplerate
