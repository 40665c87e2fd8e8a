"""Added-noise levels: dBFS convention (AES17), known noise against scipy, engine output against theory."""

import math

import numpy as np
import pytest
from scipy import signal

from rtstage import Engine, EngineSettings
from rtstage.meters import MeterBank
from rtstage.meters.noise import power_to_dbfs, predicted_psd, reading_powers
from rtstage.meters.spectrum import WelchSpectrum

IEC_POLES_HZ = (20.598997, 20.598997, 107.65265, 737.86223, 12194.217, 12194.217)
"""IEC 61672-1 Annex E pole frequencies (from memory)."""


def _scipy_weighting_power(name, freqs_hz):
    """|W(f)|² evaluated by scipy from the standards' analogue forms, 0 dB at 1 kHz."""
    w = np.concatenate(([1000.0], np.asarray(freqs_hz, dtype=np.float64)))
    if name == "a":
        _, h = signal.freqs_zpk([0.0] * 4, [-2.0 * np.pi * f for f in IEC_POLES_HZ], 1.0, worN=2.0 * np.pi * w)
    else:  # BS.468-4 network as |k s / D(s)|, s = j f (see tests/test_weighting.py)
        from rtstage.weighting import _ITU468_H1, _ITU468_H2, _ITU468_K

        c6, c4, c2, c0 = _ITU468_H1
        c5, c3, c1 = _ITU468_H2
        _, h = signal.freqs([_ITU468_K, 0.0], [-c6, c5, c4, -c3, -c2, c1, c0], worN=w)
    return np.abs(h[1:]) ** 2 / np.abs(h[0]) ** 2


def _bank(samplerate, bits=16, coefs=(), dither="tpdf", channels=1):
    return MeterBank(channels, samplerate, bits, coefs, dither)


def test_full_scale_sine_reads_0_dbfs():
    # AES17: 0 dBFS is the RMS of a full-scale sine.  Feed the sine as the "added noise"
    # (input = sine, words = 0).  A-weighting at 997 Hz: IEC 61672-1 formula, about -0.0 dB.
    samplerate = 48000
    n = np.arange(1 << 17)
    x = np.sin(2 * np.pi * 997.0 / samplerate * n)[:, None]
    bank = _bank(samplerate)
    bank.update(x, np.zeros(x.shape, np.int16))
    added = bank.report()["channels"][0]["added_noise_dbfs"]
    assert abs(added["unweighted"]) < 0.01
    assert abs(added["a_weighted"] - float(10 * np.log10(_scipy_weighting_power("a", [997.0])[0]))) < 0.01


@pytest.mark.parametrize("samplerate", [44100, 48000, 96000])
def test_known_coloured_noise_against_scipy(samplerate):
    # Gaussian noise through a known filter (scipy.signal.butter): its PSD is σ²·|H|²·2/fs
    # (scipy.signal.freqz); weighted levels = ∫ PSD·|W|² df with W from the standards' analogue
    # forms evaluated by scipy, over 20 Hz-20 kHz unweighted and 0-fs/2 weighted.
    rng = np.random.default_rng(samplerate)
    sigma = 1e-3
    b, a = signal.butter(2, 0.3 * samplerate, btype="highpass", fs=samplerate)
    noise = signal.lfilter(b, a, rng.standard_normal(1 << 19)) * sigma
    bank = _bank(samplerate)
    bank.update(-noise[:, None], np.zeros((noise.size, 1), np.int16))  # added noise = 0 - input
    added = bank.report()["channels"][0]["added_noise_dbfs"]

    freqs = np.linspace(0.0, samplerate / 2.0, 200001)[1:]
    _, h = signal.freqz(b, a, worN=freqs, fs=samplerate)
    psd = sigma**2 * np.abs(h) ** 2 * 2.0 / samplerate
    in_band = (freqs >= 20.0) & (freqs <= 20000.0)
    expected = {
        "unweighted": np.trapezoid(psd[in_band], freqs[in_band]),
        "a_weighted": np.trapezoid(psd * _scipy_weighting_power("a", freqs), freqs),
        "itu468": np.trapezoid(psd * _scipy_weighting_power("itu468", freqs), freqs),
    }
    for key, power in expected.items():
        # 2^19 samples: the estimate's standard deviation is below 0.02 dB; allow 0.1 dB.
        assert abs(added[key] - 10 * math.log10(2 * power)) < 0.1, key


def test_16bit_flat_tpdf_reads_theory():
    # Lipshitz, Wannamaker & Vanderkooy 1992: with TPDF dither the total error has power
    # Q²/12 + Q²/6 = Q²/4, white.  16 bits: Q = 2^-15.  In dBFS (AES17, ×2 for the sine
    # reference): unweighted over 20 Hz-20 kHz at fs = 48 kHz, 10·log10(2·Q²/4·19980/24000)
    # = -94.11 dBFS; weighted: 10·log10(2·Q²/4·mean(|W|², 0..fs/2)).
    samplerate = 48000
    step = 2.0**-15
    engine = Engine(EngineSettings(bits=16, dither="tpdf", seed=2024), channels=2, samplerate=samplerate)
    n = np.arange(1 << 18)
    x = np.stack([0.25 * np.sin(2 * np.pi * 997.0 / samplerate * n), np.zeros(n.size)], axis=1)
    bank = MeterBank.for_engine(engine)
    bank.update(x, engine.process(x))
    report = bank.report()

    fine = np.linspace(0.0, samplerate / 2, 400001)[1:]
    expected = {
        "unweighted": 10 * math.log10(2 * step**2 / 4 * (20000 - 20) / (samplerate / 2)),
        "a_weighted": 10 * math.log10(2 * step**2 / 4 * np.trapezoid(_scipy_weighting_power("a", fine), fine) / (samplerate / 2)),
        "itu468": 10 * math.log10(2 * step**2 / 4 * np.trapezoid(_scipy_weighting_power("itu468", fine), fine) / (samplerate / 2)),
    }
    assert abs(expected["unweighted"] - (-94.11)) < 0.01
    for channel in report["channels"]:
        for key, level in expected.items():
            assert abs(channel["added_noise_dbfs"][key] - level) < 0.1, key
            assert abs(channel["predicted_noise_dbfs"][key] - level) < 0.02, key


@pytest.mark.parametrize("shaper", ["wannamaker-f9", "lvw-e5"])
def test_shaped_tpdf_reads_its_prediction(shaper):
    # Gerzon & Craven 1989 / Wannamaker 1992: the added noise of an error-feedback shaper with
    # white error of power σ² has PSD σ²·|NTF|²; the report's prediction integrates that in the
    # same bands and weightings.  Shaped dither sits near Nyquist, so this also checks the
    # weightings to fs/2.
    samplerate = 44100
    engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper=shaper, seed=99), channels=1, samplerate=samplerate)
    n = np.arange(1 << 18)
    x = (0.1 * np.sin(2 * np.pi * 441.0 / samplerate * n))[:, None]
    bank = MeterBank.for_engine(engine)
    bank.update(x, engine.process(x))
    channel = bank.report()["channels"][0]
    for key, diff in channel["noise_difference_db"].items():
        assert abs(diff) < 0.2, key


def test_prediction_total_power_is_sigma2_times_noise_gain():
    # Σ PSD·Δf over the full grid = σ²·Q²·(1 + Σ h²) (Parseval), σ² = 1/4 LSB² for TPDF.
    samplerate = 44100
    coefs = (1.623, -0.982, 0.109)
    spectrum = WelchSpectrum(1, samplerate)
    freqs = spectrum.freqs_hz
    psd = predicted_psd(freqs, samplerate, 16, coefs, "tpdf")
    total = psd.sum() * (freqs[1] - freqs[0])
    expected = 0.25 * 2.0**-30 * (1 + sum(h * h for h in coefs))
    assert abs(total / expected - 1) < 1e-9


def test_short_signal_still_reads():
    # Fewer frames than one Welch segment: one shorter segment is used (Parseval again:
    # total power of white noise within 0.5 dB for 4000 samples).
    rng = np.random.default_rng(1)
    x = rng.standard_normal((4000, 1)) * 1e-3
    bank = _bank(48000)
    bank.update(-x, np.zeros(x.shape, np.int16))
    spectrum = bank._spectrum
    assert spectrum.nsegments == 0
    total = reading_powers(spectrum.psd(), spectrum.freqs_hz, 48000)
    assert abs(power_to_dbfs(total["unweighted"][0] * 24000 / 19980) - power_to_dbfs(np.mean(x**2))) < 0.5
