"""Tests of rtstage.design: optimal noise-shaper design, figures, headroom and rate checks.

Every check names its outside reference: the Gerzon–Craven theorem (a
minimum-phase NTF with a leading 1 has a 0 dB log-mean, Jensen's formula),
Wannamaker's published F-weighted 9-tap set (JAES 1992), the ISO 226:2003
and Terhardt (1979) thresholds, numpy/scipy as reference implementations.
"""

import math

import numpy as np
import pytest
import scipy.signal as ss
from numpy.testing import assert_allclose

from rtstage import Engine, EngineSettings, RtstageError
from rtstage import design as D
from rtstage.shapers import BUILTIN_SHAPERS, get_shaper, preset_shapers, shaper_from_toml

F9 = BUILTIN_SHAPERS["wannamaker-f9"]


def log_mean_db_reference(coefs, nfft=1 << 17):
    """Mean of 20·log10|NTF| over the unit circle, by a plain numpy FFT (independent of rtstage.shapers)."""
    b = np.concatenate(([1.0], -np.asarray(coefs)))
    return float(np.mean(20.0 * np.log10(np.abs(np.fft.fft(b, nfft)))))


def weighted_power_reference(coefs, samplerate, weighting_db, npoints=1 << 14):
    """∫ W |NTF|² df / ∫ W df with |NTF| from scipy.signal.freqz and a trapezoid integral (scipy/numpy)."""
    b = np.concatenate(([1.0], -np.asarray(coefs)))
    freqs, h = ss.freqz(b, worN=np.linspace(0.0, samplerate / 2, npoints + 1), fs=samplerate)
    w = 10.0 ** (weighting_db(freqs) / 10.0)
    return float(np.trapezoid(w * np.abs(h) ** 2, freqs) / np.trapezoid(w, freqs))


def threshold_weighting(samplerate, range_db=D.DEFAULT_RANGE_DB):
    return lambda f: D.design_weighting_db("threshold", f, range_db)


class TestMinimumPhase:
    """Gerzon & Craven (AES 1989): the optimal error filter is a linear predictor, so its NTF is minimum
    phase, and by Jensen's formula a minimum-phase NTF with a leading 1 has a log-mean of exactly 0 dB."""

    @pytest.mark.parametrize("samplerate", D.SHIPPED_RATES_HZ)
    @pytest.mark.parametrize("ntaps", [3, 9, 24])
    def test_designs_are_minimum_phase_with_zero_log_mean(self, samplerate, ntaps):
        d = D.design_shaper(samplerate, ntaps, "threshold", range_db=60.0)
        roots = np.roots(d.shaper.ntf_b)
        assert np.max(np.abs(roots)) < 1.0  # numpy.roots as the reference
        assert abs(log_mean_db_reference(d.shaper.coefs)) < 1e-6

    @pytest.mark.parametrize("weighting", ["terhardt", "table"])
    def test_other_weightings_are_minimum_phase(self, weighting):
        table = ([20.0, 1000.0, 4000.0, 12000.0], [-40.0, 0.0, 8.0, -30.0])
        d = D.design_shaper(48000, 12, weighting, table=table)
        assert np.max(np.abs(np.roots(d.shaper.ntf_b))) < 1.0
        assert abs(log_mean_db_reference(d.shaper.coefs)) < 1e-6

    def test_shipped_presets_are_minimum_phase_with_zero_log_mean(self):
        presets = preset_shapers()
        rates = {p.design_samplerate_hz for p in presets.values()}
        assert rates >= {float(r) for r in D.SHIPPED_RATES_HZ}  # the issue: presets for each of these rates
        for p in presets.values():
            assert np.max(np.abs(np.roots(p.ntf_b))) < 1.0, p.id
            assert abs(log_mean_db_reference(p.coefs)) < 1e-6, p.id


class TestOptimality:
    """The design minimises the weighted added-noise power among all N-tap NTFs with a leading 1."""

    def test_nine_taps_beat_published_f_weighted_set_under_the_same_weighting(self):
        # Wannamaker, JAES 40(7/8), 1992: the F-weighted 9-tap set (coefficients from memory, in
        # rtstage.shapers).  Its F-weighting is threshold based; the "same weighting" for both sets
        # here is our threshold weighting (ISO 226:2003, 50 dB range), integrated the same way.
        d = D.design_shaper(44100, 9, "threshold")
        weighting = threshold_weighting(44100)
        ours = weighted_power_reference(d.shaper.coefs, 44100, weighting)
        published = weighted_power_reference(F9.coefs, 44100, weighting)
        assert ours <= published
        # Both shape: far below the unshaped (flat) noise under this weighting.
        assert 10 * math.log10(published) < -10.0

    @pytest.mark.parametrize("samplerate,ntaps", [(44100, 9), (96000, 16)])
    def test_matches_weighted_least_squares_reference(self, samplerate, ntaps):
        # The criterion Σ_j W_j |1 - Σ_k h_k e^{-jkω_j}|² is a linear least-squares problem in h;
        # numpy.linalg.lstsq solves it without Toeplitz structure or Levinson recursion.
        npoints = 1 << 13
        freqs = np.linspace(0.0, samplerate / 2, npoints + 1)
        w = 10.0 ** (D.design_weighting_db("threshold", freqs, D.DEFAULT_RANGE_DB) / 10.0)
        trap = np.ones_like(w)
        trap[[0, -1]] = 0.5
        omega = 2 * np.pi * freqs / samplerate
        k = np.arange(1, ntaps + 1)
        basis = np.exp(-1j * np.outer(omega, k)) * np.sqrt(w * trap)[:, None]
        target = np.sqrt(w * trap).astype(complex)
        a = np.vstack([basis.real, basis.imag])
        y = np.concatenate([target.real, target.imag])
        h_ref = np.linalg.lstsq(a, y, rcond=None)[0]
        d = D.design_shaper(samplerate, ntaps, "threshold", npoints=npoints)
        assert_allclose(d.shaper.coefs, h_ref, rtol=1e-6, atol=1e-6)

    def test_flat_weighting_gives_no_shaping(self):
        # Gerzon & Craven: with a flat weighting the optimal NTF is 1 (white noise is already optimal).
        d = D.design_shaper(48000, 9, "table", table=([10.0, 30000.0], [0.0, 0.0]), audible_limit_hz=30000.0)
        assert_allclose(d.shaper.coefs, 0.0, atol=1e-9)

    def test_noise_follows_inverse_of_weighting(self):
        # Gerzon & Craven: as N grows, |NTF|² -> c / W.  With 32 taps at 44.1 kHz, the NTF in dB and the
        # weighting in dB are strongly anti-correlated over 100 Hz..15 kHz (threshold of hearing).
        d = D.design_shaper(44100, 32, "threshold")
        freqs, gain = D.ntf_curve(d.shaper, 44100, 4096)
        band = (freqs >= 100) & (freqs <= 15000)
        w_db = D.design_weighting_db("threshold", freqs[band], D.DEFAULT_RANGE_DB)
        assert np.corrcoef(gain[band], w_db)[0, 1] < -0.95


class TestNotchPlacement:
    """ISO 226:2003 / Terhardt 1979: the ear is most sensitive around 3-4 kHz; a threshold-weighted
    shaper puts its deepest notch there, as Wannamaker's F-weighted set does (JAES 1992)."""

    @pytest.mark.parametrize("weighting", ["threshold", "terhardt"])
    def test_deepest_notch_at_44k1_between_2k5_and_5k(self, weighting):
        d = D.design_shaper(44100, 9, weighting)
        freqs, h = ss.freqz(d.shaper.ntf_b, worN=8192, fs=44100)
        assert 2500.0 <= freqs[np.argmin(np.abs(h))] <= 5000.0

    def test_published_set_notch_in_same_region(self):
        freqs, h = ss.freqz(F9.ntf_b, worN=8192, fs=44100)
        assert 2500.0 <= freqs[np.argmin(np.abs(h))] <= 5000.0

    @pytest.mark.parametrize("samplerate", [96000, 192000])
    def test_notch_stays_put_at_high_rates(self, samplerate):
        # The point of designing per rate: the notch stays where the ear is, not at a scaled frequency.
        p = get_shaper(D.default_design_id("threshold", 9, samplerate))
        freqs, h = ss.freqz(p.ntf_b, worN=16384, fs=samplerate)
        assert 2500.0 <= freqs[np.argmin(np.abs(h))] <= 5000.0


class TestThresholdCurves:
    def test_iso226_and_terhardt_agree(self):
        # ISO 226:2003 (T_f, from memory) and Terhardt 1979 (from memory) are independent fits of the same
        # threshold of hearing; over 100 Hz..10 kHz they agree within 10 dB (common practice: the fits
        # differ most near 8 kHz).  A mistyped table value or sign would break this.
        f = np.geomspace(100.0, 10000.0, 400)
        assert np.max(np.abs(D.iso226_threshold_db(f) - D.terhardt_threshold_db(f))) < 10.0

    def test_threshold_minimum_near_3k5(self):
        # ISO 226:2003 / Terhardt 1979: the threshold is lowest (below 0 dB SPL) between 3 and 4 kHz.
        f = np.geomspace(20.0, 16000.0, 2000)
        for curve in (D.iso226_threshold_db, D.terhardt_threshold_db):
            t = curve(f)
            assert 3000.0 <= f[np.argmin(t)] <= 4000.0
            assert t.min() < 0.0


class TestRenderedSpectrum:
    """The measured error spectrum of a render matches the design's NTF: added noise = NTF·e with e white
    of variance Q²/12 (rounding) + Q²/6 (TPDF) = Q²/4 (Lipshitz, Wannamaker & Vanderkooy, JAES 1992)."""

    @staticmethod
    def _error_lsb(shaper, samplerate, nframes, bits=16, seed=11):
        rng = np.random.default_rng(3)
        t = np.arange(nframes) / samplerate
        x = 10 ** (-60 / 20) * np.sin(2 * np.pi * 997.0 * t) + 1e-4 * rng.standard_normal(nframes)
        engine = Engine(EngineSettings(bits=bits, dither="tpdf", shaper=shaper, seed=seed), 1, samplerate)
        words = engine.process(x[:, None])[:, 0].astype(np.float64)
        assert engine.clipped[0] == 0
        return words - x * 2 ** (bits - 1)

    def test_psd_matches_freqz(self):
        # Welch estimate (scipy.signal.welch, Hann, 1024) against (Q²/4)|NTF|² from scipy.signal.freqz,
        # one-sided density 2σ²|NTF|²/fs.  For this 9-tap design the NTF is smooth on the scale of a
        # window's resolution, so window smoothing is negligible; tolerance 1 dB per bin (about four
        # standard errors of 511 averaged segments).
        d = D.design_shaper(48000, 9, "threshold")
        err = self._error_lsb(d.shaper, 48000, 1 << 18)
        freqs, psd = ss.welch(err, fs=48000, nperseg=1024)
        _, h = ss.freqz(d.shaper.ntf_b, worN=freqs, fs=48000)
        expected = 2.0 * 0.25 / 48000 * np.abs(h) ** 2
        dev_db = 10 * np.log10(psd[1:-1] / expected[1:-1])
        assert np.max(np.abs(dev_db)) < 1.0
        assert abs(np.mean(dev_db)) < 0.1

    def test_psd_matches_windowed_expectation_for_deep_notch(self):
        # For a 24-tap 192 kHz design (notch about -54 dB next to +7 dB) the Welch estimate's expected
        # value is the NTF's power convolved with the window's spectrum.  It is computed exactly here:
        # a segment's windowed DFT is Σ_m e[m] Σ_l g[l] w[m+l] e^{-jω(m+l)}, so
        # E|X(ω)|² = σ² Σ_m |Σ_n w[n] g[n-m] e^{-jωn}|², scaled as scipy.signal.welch's 'density'.
        shaper = get_shaper("thr24-192k")
        samplerate, nperseg = 192000, 2048
        err = self._error_lsb(shaper, samplerate, 1 << 19)
        freqs, psd = ss.welch(err, fs=samplerate, nperseg=nperseg, detrend=False)
        g = shaper.ntf_b
        window = ss.get_window("hann", nperseg)
        lags = len(g) - 1
        rows = np.zeros((nperseg + lags, nperseg))
        m = np.arange(-lags, nperseg)
        for lag, g_l in enumerate(g):
            n = m + lag
            ok = (n >= 0) & (n < nperseg)
            rows[np.nonzero(ok)[0], n[ok]] += g_l * window[n[ok]]
        expected = 0.25 * np.sum(np.abs(np.fft.rfft(rows, axis=1)) ** 2, axis=0) / (samplerate * np.sum(window**2))
        expected[1:-1] *= 2.0
        dev_db = 10 * np.log10(psd / expected)
        assert np.max(np.abs(dev_db)) < 1.5  # about five standard errors; the Nyquist bin has half the averages
        assert abs(np.mean(dev_db)) < 0.1


class TestGainCaps:
    @pytest.mark.parametrize("samplerate,ntaps", [(44100, 9), (48000, 24), (96000, 24)])
    def test_max_gain_cap_holds(self, samplerate, ntaps):
        cap = 12.0
        uncapped = D.design_shaper(samplerate, ntaps, "threshold", range_db=60.0)
        _, h = ss.freqz(uncapped.shaper.ntf_b, worN=1 << 16, fs=samplerate)
        assert 20 * np.log10(np.abs(h).max()) > cap  # the cap binds
        d = D.design_shaper(samplerate, ntaps, "threshold", range_db=60.0, max_gain_db=cap)
        _, h = ss.freqz(d.shaper.ntf_b, worN=1 << 16, fs=samplerate)  # scipy.signal.freqz as reference
        assert 20 * np.log10(np.abs(h).max()) <= cap + 0.01
        assert 20 * np.log10(np.abs(h).max()) > cap - 0.5  # and is not met by giving up shaping
        assert np.max(np.abs(np.roots(d.shaper.ntf_b))) < 1.0

    def test_noise_gain_cap_holds(self):
        cap = 6.0
        d = D.design_shaper(44100, 16, "threshold", max_noise_gain_db=cap)
        # Parseval (numpy): Σ n_k² equals the mean of |NTF|² over the unit circle.
        b = d.shaper.ntf_b
        power_gain = np.mean(np.abs(np.fft.fft(b, 1 << 12)) ** 2)
        assert 10 * np.log10(power_gain) <= cap + 1e-6
        assert 10 * np.log10(power_gain) > cap - 0.5

    def test_zero_db_cap_gives_flat(self):
        # A 0 dB cap is the limit of what is possible (log-mean 0 dB, Gerzon & Craven): only NTF = 1 meets it.
        d = D.design_shaper(48000, 9, "threshold", max_gain_db=0.0)
        _, h = ss.freqz(d.shaper.ntf_b, worN=4096)
        assert 20 * np.log10(np.abs(h).max()) <= 0.01


class TestImpossibleRequests:
    @pytest.mark.parametrize(
        "kwargs,words",
        [
            (dict(max_gain_db=-1.0), "impossible"),
            (dict(max_noise_gain_db=-0.5), "impossible"),
            (dict(ntaps=0), "taps"),
            (dict(ntaps=33), "taps"),
            (dict(samplerate=1000), "sample rate"),
            (dict(weighting="loudest"), "unknown weighting"),
            (dict(range_db=-3.0), "range"),
            (dict(weighting="table", table=([1000.0], [0.0])), "two"),
            (dict(weighting="table", table=([1000.0, 500.0], [0.0, 1.0])), "increasing"),
        ],
    )
    def test_clear_error(self, kwargs, words):
        args = dict(samplerate=48000, ntaps=9, weighting="threshold")
        args.update(kwargs)
        with pytest.raises(RtstageError) as exc:
            D.design_shaper(args.pop("samplerate"), args.pop("ntaps"), args.pop("weighting"), **args)
        message = str(exc.value)
        assert words in message and "\n" not in message


class TestHeadroom:
    """Worst-case excursion of the shaped error: |e| <= 1/2 + dither peak (TPDF peak 1 LSB, Lipshitz,
    Wannamaker & Vanderkooy, JAES 1992), and the output adds e[n] - Σ h_k e[n-k]."""

    @pytest.mark.parametrize("shaper_id", ["flat", "wannamaker-f9", "thr9-48k", "thr24-96k"])
    def test_measured_excursion_within_bound(self, shaper_id):
        shaper = get_shaper(shaper_id)
        bound = D.headroom_lsb(shaper, "tpdf")
        rng = np.random.default_rng(7)
        x = 0.5 * rng.uniform(-1.0, 1.0, 1 << 16)  # a loud programme far from clipping
        engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper=shaper, seed=1), 1, 48000)
        excursion = np.abs(engine.process(x[:, None])[:, 0] - x * 2**15)
        assert excursion.max() <= bound
        # The bound is the L1 norm of the NTF's impulse response times the error bound (1.5 LSB for TPDF).
        assert_allclose(bound, 1.5 * np.sum(np.abs(shaper.ntf_b)), rtol=1e-12)

    def test_peak_at_headroom_does_not_clip_and_full_scale_does(self):
        shaper = get_shaper("wannamaker-f9")
        bits = 12
        peak_dbfs = D.headroom_dbfs(shaper, "tpdf", bits)
        assert peak_dbfs < 0.0
        t = np.arange(1 << 15) / 44100
        tone = np.sin(2 * np.pi * 1000.0 * t)
        safe = Engine(EngineSettings(bits=bits, dither="tpdf", shaper=shaper, seed=2), 1, 44100)
        safe.process((10 ** (peak_dbfs / 20) * tone)[:, None])
        assert safe.clipped[0] == 0
        loud = Engine(EngineSettings(bits=bits, dither="tpdf", shaper=shaper, seed=2), 1, 44100)
        loud.process((0.99999 * tone)[:, None])
        assert loud.clipped[0] > 0  # the room is really needed

    def test_short_word_has_no_safe_level(self):
        assert D.headroom_dbfs(F9, "tpdf", 2) == float("-inf")

    def test_scale_and_kinds(self):
        flat = BUILTIN_SHAPERS["flat"]
        assert D.headroom_lsb(flat, "none") == 0.5  # plain rounding: half a step
        assert D.headroom_lsb(flat, "rpdf") == 1.0
        assert D.headroom_lsb(flat, "tpdf", 2.0) == 2.5
        assert D.headroom_lsb(flat, "gaussian") == 0.5 + 4 * 0.5  # four sigma, sigma = Q/2
        with pytest.raises(RtstageError):
            D.headroom_lsb(flat, "pink")


class TestRateWarning:
    def test_silent_when_rate_fits(self):
        assert D.rate_warning(BUILTIN_SHAPERS["flat"], 96000) is None
        assert D.rate_warning(BUILTIN_SHAPERS["diff2"], 44100) is None
        assert D.rate_warning(F9, 44100) is None
        assert D.rate_warning(get_shaper("thr9-48k"), 48000) is None

    @pytest.mark.parametrize("samplerate", [r for r in D.SHIPPED_RATES_HZ if r != 44100])
    def test_names_preset_designed_for_the_rate(self, samplerate):
        message = D.rate_warning(F9, samplerate)
        best = D.preset_for_rate(F9, samplerate)
        assert best is not None and best.id in message
        assert abs(best.design_samplerate_hz - samplerate) < 1.0
        assert best.ntaps == F9.ntaps

    def test_unshipped_rate_suggests_design(self):
        message = D.rate_warning(F9, 32000)
        assert "rtstage shaper design --samplerate 32000" in message


class TestFiles:
    def test_saved_design_round_trips(self, tmp_path):
        d = D.design_shaper(88200, 12, "threshold", max_gain_db=10.0, shaper_id="trial12")
        path = tmp_path / "trial12.toml"
        D.save_design(d, str(path))
        s = shaper_from_toml(str(path))
        assert s.id == "trial12"
        assert s.coefs == d.shaper.coefs  # repr() floats read back exactly (TOML 1.0 floats are IEEE doubles)
        assert s.design_samplerate_hz == 88200.0

    def test_weighting_table_file(self, tmp_path):
        path = tmp_path / "w.txt"
        path.write_text("# Hz dB\n100, -20\n1000 0\n4000 6  # most audible\n15000 -40\n")
        freqs, gain = D.read_weighting_table(str(path))
        assert_allclose(freqs, [100, 1000, 4000, 15000])
        assert_allclose(gain, [-20, 0, 6, -40])
        bad = tmp_path / "bad.txt"
        bad.write_text("100 -20\n1000\n")
        with pytest.raises(RtstageError, match="line 2"):
            D.read_weighting_table(str(bad))


class TestStandardWeightings:
    """Designs from the IEC 61672-1 A-weighting and ITU-R BS.468-4 curves (rtstage.weighting)."""

    def test_inverse_468_notch_at_the_curve_peak(self):
        # ITU-R BS.468-4 Table 1: the weighting peaks at +12.2 dB near 6.3 kHz, so the noise is lowest there.
        d = D.design_shaper(48000, 32, "inv-468")
        freqs, h = ss.freqz(d.shaper.ntf_b, worN=8192, fs=48000)
        assert 5000.0 <= freqs[np.argmin(np.abs(h))] <= 8000.0
        band = (freqs >= 100) & (freqs <= 15000)
        w_db = D.design_weighting_db("inv-468", freqs[band], D.DEFAULT_RANGE_DB)
        assert np.corrcoef(20 * np.log10(np.abs(h[band])), w_db)[0, 1] < -0.95  # |NTF|² ~ 1/W (Gerzon & Craven)

    def test_inverse_a_notch_at_the_curve_peak(self):
        # IEC 61672-1: A-weighting is highest (about +1.3 dB, from memory) between 2 and 3 kHz.
        d = D.design_shaper(48000, 32, "inv-a")
        freqs, h = ss.freqz(d.shaper.ntf_b, worN=8192, fs=48000)
        assert 1500.0 <= freqs[np.argmin(np.abs(h))] <= 3500.0
        assert np.max(np.abs(np.roots(d.shaper.ntf_b))) < 1.0

    @pytest.mark.parametrize("weighting", ["inv-a", "inv-468", "threshold"])
    def test_weighted_noise_gain_matches_reference_integral(self, weighting):
        d = D.design_shaper(44100, 9, weighting)
        ref = weighted_power_reference(d.shaper.coefs, 44100, lambda f: D.design_weighting_db(weighting, f, D.DEFAULT_RANGE_DB))
        assert_allclose(d.figures["weighted_noise_gain_db"], 10 * np.log10(ref), atol=0.01)


class TestHeadroomWarning:
    def test_warns_only_above_the_limit(self):
        # The limit comes from the TPDF error bound (Lipshitz, Wannamaker & Vanderkooy, JAES 1992).
        limit = D.headroom_dbfs(F9, "tpdf", 16)
        assert D.headroom_warning(F9, "tpdf", 16, limit - 0.001) is None
        message = D.headroom_warning(F9, "tpdf", 16, -0.001)
        assert message is not None and f"{limit:.2f}" in message
        assert "any programme may clip" in D.headroom_warning(F9, "tpdf", 2, -40.0)

    def test_table_must_be_a_pair_of_sequences(self):
        with pytest.raises(RtstageError, match="pair"):
            D.design_shaper(48000, 9, "table", table=([100.0, 1000.0, 4000.0], [0.0, 1.0]))
