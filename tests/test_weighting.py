"""rtstage.weighting against IEC 61672-1, ITU-R BS.468-4 and scipy.signal."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import signal

from rtstage.errors import RtstageError
from rtstage.weighting import a_weighting_db, band_power, itu468_weighting_db, weighting_db, weighting_power

# IEC 61672-1:2013 Table 3 (from memory): nominal frequency, exact base-10
# frequency index n (f = 1000·10^(n/10)), A-weighting in dB (0.1 dB resolution),
# class-1 acceptance limits (+upper, -lower; None = -infinity).
IEC61672_A_TABLE = [
    (10, -20, -70.4, 3.5, None),
    (12.5, -19, -63.4, 3.0, None),
    (16, -18, -56.7, 2.5, 4.5),
    (20, -17, -50.5, 2.5, 2.5),
    (25, -16, -44.7, 2.5, 2.0),
    (31.5, -15, -39.4, 2.0, 2.0),
    (40, -14, -34.6, 1.5, 1.5),
    (50, -13, -30.2, 1.5, 1.5),
    (63, -12, -26.2, 1.5, 1.5),
    (80, -11, -22.5, 1.5, 1.5),
    (100, -10, -19.1, 1.0, 1.0),
    (125, -9, -16.1, 1.0, 1.0),
    (160, -8, -13.4, 1.0, 1.0),
    (200, -7, -10.9, 1.0, 1.0),
    (250, -6, -8.6, 1.0, 1.0),
    (315, -5, -6.6, 1.0, 1.0),
    (400, -4, -4.8, 1.0, 1.0),
    (500, -3, -3.2, 1.0, 1.0),
    (630, -2, -1.9, 1.0, 1.0),
    (800, -1, -0.8, 1.0, 1.0),
    (1000, 0, 0.0, 0.7, 0.7),
    (1250, 1, 0.6, 1.0, 1.0),
    (1600, 2, 1.0, 1.0, 1.0),
    (2000, 3, 1.2, 1.0, 1.0),
    (2500, 4, 1.3, 1.0, 1.0),
    (3150, 5, 1.2, 1.0, 1.0),
    (4000, 6, 1.0, 1.0, 1.0),
    (5000, 7, 0.5, 1.5, 1.5),
    (6300, 8, -0.1, 1.5, 2.0),
    (8000, 9, -1.1, 1.5, 2.5),
    (10000, 10, -2.5, 2.0, 3.0),
    (12500, 11, -4.3, 2.0, 5.0),
    (16000, 12, -6.6, 2.5, 16.0),
    (20000, 13, -9.3, 3.0, None),
]

# ITU-R BS.468-4 Table 1 (from memory): frequency, response in dB, tolerance
# (+upper, -lower; None = -infinity).
BS468_TABLE = [
    (31.5, -29.9, 2.0, 2.0),
    (63, -23.9, 1.4, 1.4),
    (100, -19.8, 1.0, 1.0),
    (200, -13.8, 0.85, 0.85),
    (400, -7.8, 0.7, 0.7),
    (800, -1.9, 0.55, 0.55),
    (1000, 0.0, 0.5, 0.5),
    (2000, 5.6, 0.5, 0.5),
    (3150, 9.0, 0.5, 0.5),
    (4000, 10.5, 0.5, 0.5),
    (5000, 11.7, 0.5, 0.5),
    (6300, 12.2, 0.0, 0.0),
    (7100, 12.0, 0.2, 0.2),
    (8000, 11.4, 0.4, 0.4),
    (9000, 10.1, 0.6, 0.6),
    (10000, 8.1, 0.8, 0.8),
    (12500, 0.0, 1.2, 1.2),
    (14000, -5.3, 1.4, 1.4),
    (16000, -11.7, 1.6, 1.6),
    (20000, -22.2, 2.0, 2.0),
    (31500, -42.7, 2.8, None),
]

TABLE_ROUNDING_DB = 0.05 + 1e-9
"""The tables print 0.1 dB steps: half a step."""
A_TABLE_AGREEMENT_DB = 0.06
"""IEC 61672-1's table is the Annex E formula rounded to 0.1 dB; at 160 Hz the formula gives
-13.347 dB against the printed -13.4, so half a step plus 0.01 dB."""
BS468_TABLE_AGREEMENT_DB = 0.1
"""One printed step: the polynomial form of the network (from memory) and the table agree to
within it (0.05 dB at 100 Hz is the largest difference)."""

IEC_POLES_HZ = (20.598997, 20.598997, 107.65265, 737.86223, 12194.217, 12194.217)
"""IEC 61672-1 Annex E pole frequencies of the A network (from memory)."""


def _scipy_a_weighting_db(freqs_hz):
    """A-weighting from the analogue pole-zero form (4 zeros at 0 Hz), evaluated by scipy, 0 dB at 1 kHz."""
    zeros = [0.0] * 4
    poles = [-2.0 * np.pi * f for f in IEC_POLES_HZ]
    _, h_ref = signal.freqs_zpk(zeros, poles, 1.0, worN=[2.0 * np.pi * 1000.0])
    _, h = signal.freqs_zpk(zeros, poles, 1.0 / abs(h_ref[0]), worN=2.0 * np.pi * np.asarray(freqs_hz))
    return 20.0 * np.log10(np.abs(h))


class TestAWeighting:
    @pytest.mark.parametrize("nominal, index, table_db, upper, lower", IEC61672_A_TABLE)
    def test_iec61672_table_class1(self, nominal, index, table_db, upper, lower):
        # IEC 61672-1 Table 3: design goal and class-1 acceptance limits.
        exact_hz = 1000.0 * 10.0 ** (index / 10.0)
        value = float(a_weighting_db(exact_hz))
        assert value <= table_db + upper
        if lower is not None:
            assert value >= table_db - lower
        # The table is the analytic formula rounded to 0.1 dB.
        assert abs(value - table_db) <= A_TABLE_AGREEMENT_DB

    def test_analytic_formula_matches_scipy_pole_zero_form(self):
        # IEC 61672-1 Annex E (E.6) written as poles and zeros, evaluated by scipy.signal.freqs_zpk.
        freqs = np.geomspace(5.0, 96000.0, 400)
        # A1000 = -2.000 dB is the formula's value at 1 kHz rounded to 1 mdB, hence the tolerance.
        assert_allclose(a_weighting_db(freqs), _scipy_a_weighting_db(freqs), atol=1e-3)

    def test_zero_db_at_1khz(self):
        # IEC 61672-1 Annex E: A1000 normalises the response to 0 dB at 1 kHz (to 0.001 dB).
        assert abs(float(a_weighting_db(1000.0))) < 1e-3

    def test_dc_is_minus_infinity(self):
        # Four zeros at 0 Hz (IEC 61672-1 Annex E).
        assert a_weighting_db(np.array([0.0]))[0] == -np.inf
        assert weighting_power("a", np.array([0.0]))[0] == 0.0


class TestItu468Weighting:
    @pytest.mark.parametrize("freq_hz, table_db, upper, lower", BS468_TABLE)
    def test_bs468_table_within_tolerance(self, freq_hz, table_db, upper, lower):
        # ITU-R BS.468-4 Table 1 and its tolerances; 6.3 kHz carries no tolerance, so the
        # rounding of the table (0.05 dB) is the only slack there.
        value = float(itu468_weighting_db(freq_hz))
        assert value <= table_db + max(upper, TABLE_ROUNDING_DB)
        if lower is not None:
            assert value >= table_db - max(lower, TABLE_ROUNDING_DB)
        assert abs(value - table_db) <= BS468_TABLE_AGREEMENT_DB

    def test_peak_near_6300_hz(self):
        # ITU-R BS.468-4 Table 1: the curve peaks at +12.2 dB near 6.3 kHz.
        freqs = np.linspace(5000.0, 8000.0, 3001)
        values = itu468_weighting_db(freqs)
        assert 6000.0 < freqs[np.argmax(values)] < 6600.0
        assert abs(values.max() - 12.2) < 0.1

    def test_rational_form_matches_scipy(self):
        # The network's response |k s / D(s)| evaluated independently by scipy.signal.freqs:
        # D(s) = -c6 s^6 + c5 s^5 + c4 s^4 - c3 s^3 - c2 s^2 + c1 s + c0 with s = j f.
        from rtstage.weighting import _ITU468_H1, _ITU468_H2, _ITU468_K

        c6, c4, c2, c0 = _ITU468_H1
        c5, c3, c1 = _ITU468_H2
        freqs = np.geomspace(10.0, 96000.0, 300)
        _, h = signal.freqs([_ITU468_K, 0.0], [-c6, c5, c4, -c3, -c2, c1, c0], worN=np.concatenate(([1000.0], freqs)))
        expected = 20.0 * np.log10(np.abs(h[1:]) / np.abs(h[0]))
        assert_allclose(itu468_weighting_db(freqs), expected, atol=1e-9)


class TestFrequencyDomainWeighting:
    def test_white_noise_reading_follows_curve_to_nyquist(self):
        # Weighted power of white noise = mean of |W|² over 0..fs/2, the integral evaluated on
        # scipy's pole-zero A network.  A bilinear-transform version of the same network reads
        # about 0.9 dB low at 48 kHz (frequency warping near Nyquist): the reason rtstage
        # weights spectra instead.
        samplerate = 48000
        freqs = np.fft.rfftfreq(1 << 16, 1.0 / samplerate)
        psd = np.full(freqs.size, 2.0 / samplerate)  # one-sided PSD of unit-variance white noise
        psd[[0, -1]] /= 2.0
        ours = band_power(psd, freqs, "a")
        fine = np.linspace(0.0, samplerate / 2.0, 400001)
        reference = np.trapezoid(10.0 ** (_scipy_a_weighting_db(fine[1:]) / 10.0), fine[1:]) / (samplerate / 2.0)
        assert abs(10 * np.log10(ours / reference)) < 0.01

        zeros, poles = [0.0] * 4, [-2.0 * np.pi * f for f in IEC_POLES_HZ]
        _, h_ref = signal.freqs_zpk(zeros, poles, 1.0, worN=[2.0 * np.pi * 1000.0])
        zd, pd, kd = signal.bilinear_zpk(zeros, poles, 1.0 / abs(h_ref[0]), samplerate)
        _, hd = signal.freqz_zpk(zd, pd, kd, worN=fine, fs=samplerate)
        bilinear = np.trapezoid(np.abs(hd) ** 2, fine) / (samplerate / 2.0)
        assert 10 * np.log10(bilinear / reference) < -0.5

    def test_unweighted_band_limits(self):
        # Σ P·Δf over bins inside the band: white noise in 20 Hz-20 kHz at 48 kHz keeps 19980/24000 of its power.
        samplerate = 48000
        freqs = np.fft.rfftfreq(48000, 1.0 / samplerate)  # 1 Hz bins
        psd = np.full(freqs.size, 2.0 / samplerate)
        assert_allclose(band_power(psd, freqs, "unweighted", (20.0, 20000.0)), 19981.0 / 24000.0, rtol=1e-12)

    def test_unknown_weighting_is_a_user_error(self):
        with pytest.raises(RtstageError):
            weighting_db("c", np.array([1000.0]))
