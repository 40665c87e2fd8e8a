"""Built-in noise shapers: measured error spectra, minimum phase and log-mean.

Theory: with TPDF dither the total quantization error e is white with
variance Q^2/4 (Lipshitz, Wannamaker & Vanderkooy, JAES 40(5), 1992), and the
error-feedback loop adds NTF·e to the signal, NTF(z) = 1 - Σ h_k z^-k
(rtstage.shapers sign convention), so the added noise has the power spectral
density (Q^2/4)·|NTF(e^jω)|^2.  A minimum-phase NTF with leading coefficient
1 has a log-mean of 0 dB over the unit circle (Gerzon & Craven, "Optimal
noise shaping and dither of digital signals", AES 87th Convention, preprint
2822, 1989; it is Jensen's formula).  Reference tools: scipy.signal.welch,
scipy.signal.freqz, numpy.roots.
"""

import numpy as np
import pytest
import scipy.signal as sps

from rtstage import BUILTIN_SHAPERS, Engine, EngineSettings

SAMPLERATE = 44100
NFRAMES = 1 << 20
NCHANNELS = 4
NPERSEG = 2048
BAND_LO_HZ = 200.0
N_SIGMA = 6.0
WINDOW_BIAS_DB = 0.15
"""Allowance for the Hann window's smoothing of a steep spectrum (largest near the
double zero of diff2 at DC, about 0.1 dB at 200 Hz here), on top of six sigma."""

SHAPED = list(BUILTIN_SHAPERS)


def _shaped_noise(shaper_id):
    """Added noise q - v in LSB of a 16-bit TPDF engine fed a -12 dBFS 997 Hz sine."""
    n = np.arange(NFRAMES)
    x = np.empty((NFRAMES, NCHANNELS))
    for c in range(NCHANNELS):
        x[:, c] = 0.25 * np.sin(2 * np.pi * 997.0 / SAMPLERATE * n + c)
    engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper=shaper_id, seed=1989), NCHANNELS, SAMPLERATE)
    q = engine.process(x).astype(np.float64)
    assert np.all(engine.clipped == 0)
    return q - x * 2.0**15


def _welch_relative_sigma(nframes, nperseg, channels):
    """Relative standard deviation of a Hann, 50 %-overlap Welch estimate averaged over channels.

    Welch (IEEE Trans. Audio Electroacoust. AU-15, 1967; from memory): for K
    segments overlapping only with their neighbours, var/mean^2 =
    (1 + 2·ρ(1))/K with ρ(1) = (Σ w[n]·w[n+S])^2 / (Σ w[n]^2)^2.
    """
    w = sps.get_window("hann", nperseg)
    hop = nperseg // 2
    k = (nframes - nperseg) // hop + 1
    rho = (np.dot(w[hop:], w[:-hop]) / np.dot(w, w)) ** 2
    return np.sqrt((1.0 + 2.0 * rho) / (k * channels))


@pytest.fixture(scope="module", params=SHAPED)
def shaped(request):
    """(shaper id, added noise); module scope so each shaper's run serves both tests."""
    return request.param, _shaped_noise(request.param)


def test_error_spectrum_matches_quarter_lsb2_times_ntf_squared(shaped):
    shaper_id, noise = shaped
    freqs_hz, psd = sps.welch(noise, fs=SAMPLERATE, window="hann", nperseg=NPERSEG, detrend=False, axis=0)
    psd = psd.mean(axis=1)
    _, ntf = sps.freqz(BUILTIN_SHAPERS[shaper_id].ntf_b, worN=freqs_hz, fs=SAMPLERATE)
    # One-sided density of white noise of variance Q^2/4 (Q = 1 LSB): 2·(1/4)/fs per Hz.
    theory = 2.0 * 0.25 / SAMPLERATE * np.abs(ntf) ** 2
    band = (freqs_hz >= BAND_LO_HZ) & (freqs_hz < SAMPLERATE / 2 - 2 * SAMPLERATE / NPERSEG)
    sigma = _welch_relative_sigma(NFRAMES, NPERSEG, NCHANNELS)
    lo_db = 10 * np.log10(1 - N_SIGMA * sigma) - WINDOW_BIAS_DB
    hi_db = 10 * np.log10(1 + N_SIGMA * sigma) + WINDOW_BIAS_DB
    ratio_db = 10 * np.log10(psd[band] / theory[band])
    worst = freqs_hz[band][np.argmax(np.abs(ratio_db))]
    assert lo_db < ratio_db.min() and ratio_db.max() < hi_db, (shaper_id, ratio_db.min(), ratio_db.max(), worst, lo_db, hi_db)


def test_total_noise_power_is_quarter_lsb2_times_power_gain(shaped):
    # Parseval: the noise power is (Q^2/4)·Σ b_k^2 with b = [1, -h_1, ..., -h_N].
    # Standard error of the mean square of a linear process (Gaussian approximation,
    # Bartlett, from memory): sqrt(2·Σ_l r(l)^2 / N) with r the autocovariance,
    # r(l) = (1/4)·Σ_i b_i·b_(i+l); TPDF error's excess kurtosis is small and ignored
    # by taking 8 instead of 6 standard errors.
    shaper_id, noise = shaped
    b = BUILTIN_SHAPERS[shaper_id].ntf_b
    r = 0.25 * np.correlate(b, b, mode="full")
    expected = r[b.size - 1]
    se = np.sqrt(2.0 * np.sum(r**2) / (NFRAMES * NCHANNELS))
    measured = np.mean(noise**2)
    assert abs(measured - expected) < 8.0 * se, (measured, expected, se)


@pytest.mark.parametrize("shaper_id", [s for s in SHAPED if BUILTIN_SHAPERS[s].ntaps])
def test_ntf_is_minimum_phase(shaper_id):
    # numpy.roots of z^N·NTF(z) = z^N - h_1 z^(N-1) - ... - h_N: all zeros on or inside
    # the unit circle (zeros on it only for the pure differencers diff1 and diff2).
    roots = np.roots(BUILTIN_SHAPERS[shaper_id].ntf_b)
    radius = np.abs(roots)
    assert np.all(radius <= 1.0 + 1e-9)
    if not shaper_id.startswith("diff"):
        assert np.all(radius < 1.0 - 1e-3)


@pytest.mark.parametrize("shaper_id", SHAPED)
def test_log_mean_is_zero_db(shaper_id):
    # Gerzon & Craven 1989: mean over the circle of 20·log10|NTF| = 0 dB for a monic
    # minimum-phase NTF.  Two independent computations:
    b = BUILTIN_SHAPERS[shaper_id].ntf_b
    # (1) Jensen's formula from the roots: mean log|NTF| = Σ log max(1, |r_k|).
    roots = np.roots(b) if b.size > 1 else np.zeros(0)
    jensen_db = 20.0 * np.sum(np.log10(np.maximum(1.0, np.abs(roots))))
    assert abs(jensen_db) < 1e-6
    # (2) scipy.signal.freqz on 2^16 midpoints of (0, π) (the circle's mean by conjugate
    # symmetry); midpoints avoid the log singularity of zeros at DC.  Tolerance 1e-3 dB:
    # the midpoint rule's error for the log singularity of (1 - z^-1)^2 is about 1e-4 dB.
    m = 1 << 16
    _, h = sps.freqz(b, worN=(np.arange(m) + 0.5) * np.pi / m)
    grid_db = np.mean(20.0 * np.log10(np.abs(h)))
    assert abs(grid_db) < 1e-3


def test_non_minimum_phase_ntf_has_positive_log_mean():
    # Power check of the log-mean computation (Jensen): NTF = 1 - 2 z^-1 has its zero at
    # z = 2, so its log-mean is 20·log10(2) = 6.02 dB, not 0.
    m = 1 << 16
    _, h = sps.freqz([1.0, -2.0], worN=(np.arange(m) + 0.5) * np.pi / m)
    assert abs(np.mean(20.0 * np.log10(np.abs(h))) - 20.0 * np.log10(2.0)) < 1e-6
