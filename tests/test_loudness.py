"""Loudness meter against ITU-R BS.1770-4, EBU Tech 3341/3342 and pyloudnorm."""

import numpy as np
import pytest
import scipy.signal

from rtstage.errors import RtstageError
from rtstage.meters.loudness import (
    LoudnessMeter,
    LoudnessTarget,
    NAMED_TARGETS,
    integrated_loudness,
    k_weighting_sos,
    parse_target,
)

RATES = (44100, 48000, 96000)


def sine_dbfs(level_dbfs, seconds, samplerate, channels=2, freq_hz=1000.0):
    """EBU Tech 3341's test tone: a sine whose *peak* is at ``level_dbfs`` (the Tech's convention)."""
    n = int(round(seconds * samplerate))
    tone = 10.0 ** (level_dbfs / 20.0) * np.sin(2 * np.pi * freq_hz / samplerate * np.arange(n))
    return np.repeat(tone[:, None], channels, axis=1)


def sequence(parts, samplerate, channels=2):
    return np.concatenate([sine_dbfs(level, seconds, samplerate, channels) for level, seconds in parts])


def meter_of(x, samplerate, blocksize=None):
    meter = LoudnessMeter(x.shape[1], samplerate)
    if blocksize is None:
        meter.update(x)
    else:
        for start in range(0, x.shape[0], blocksize):
            meter.update(x[start:start + blocksize])
    return meter


class TestKWeighting:
    def test_48k_reproduces_the_published_table(self):
        # ITU-R BS.1770-4 Annex 1, Table 1 (pre-filter) and Table 2 (RLB high-pass), 48 kHz
        # (values from memory; the same digits appear in many independent implementations).
        table = np.array([
            [1.53512485958697, -2.69169618940638, 1.19839281085285, 1.0, -1.69065929318241, 0.73248077421585],
            [1.0, -2.0, 1.0, 1.0, -1.99004745483398, 0.99007225036621],
        ])
        np.testing.assert_allclose(k_weighting_sos(48000), table, rtol=0, atol=1e-12)

    @pytest.mark.parametrize("samplerate", RATES + (88200, 192000))
    def test_gain_at_997_hz_matches_the_loudness_constant(self, samplerate):
        # BS.1770-4 eq. (2): the -0.691 dB constant cancels the K-weighting's gain near 1 kHz, so a
        # 997 Hz sine reads its own level; response evaluated with scipy.signal.sosfreqz.
        _, h = scipy.signal.sosfreqz(k_weighting_sos(samplerate), worN=[997.0], fs=samplerate)
        assert 20 * np.log10(abs(h[0])) == pytest.approx(0.691, abs=0.01)

    @pytest.mark.parametrize("samplerate", RATES)
    def test_response_matches_the_48k_filter_across_the_band(self, samplerate):
        # The analog prototype is the same at every rate: below 16 kHz the bilinear designs agree
        # within 0.05 dB of the 48 kHz one (scipy.signal.sosfreqz; tolerance is our design goal).
        f = np.geomspace(20, 16000, 200)
        _, h48 = scipy.signal.sosfreqz(k_weighting_sos(48000), worN=f, fs=48000)
        _, h = scipy.signal.sosfreqz(k_weighting_sos(samplerate), worN=f, fs=samplerate)
        np.testing.assert_allclose(20 * np.log10(abs(h)), 20 * np.log10(abs(h48)), atol=0.05)

    def test_streamed_filter_equals_scipy_sosfilt(self):
        # The compiled filter against scipy.signal.sosfilt on the same signal, via the hop sums.
        rng = np.random.default_rng(5)
        x = rng.normal(0, 0.1, (48000, 2))
        meter = meter_of(x, 48000)
        y = scipy.signal.sosfilt(k_weighting_sos(48000), x, axis=0)
        hops = (y**2).reshape(10, 4800, 2).sum(axis=1).sum(axis=1)
        np.testing.assert_allclose(meter._hops.values[:10], hops, rtol=1e-10)


class TestBlockExact:
    @pytest.mark.parametrize("blocksize", [1, 63, 4096, 100_000])
    def test_any_split_gives_the_same_report(self, blocksize):
        rng = np.random.default_rng(11)
        x = rng.normal(0, 0.05, (48000 * 5 + 123, 2)) * np.linspace(0.1, 1, 48000 * 5 + 123)[:, None]
        whole = meter_of(x, 48000).report()
        split = meter_of(x, 48000, blocksize)
        split.update(np.zeros((0, 2)))
        assert split.report() == whole


class TestTech3341:
    """EBU Tech 3341 v4 test cases 1-6, 9 and 12, generated from their descriptions (from memory).

    Levels are sine peaks in dBFS, stereo 1 kHz unless stated; expected -23.0 (or -33.0) LUFS
    within +-0.1 LU, the Tech's tolerance for these cases.
    """

    @pytest.mark.parametrize("samplerate", RATES)
    def test_case_1_and_2_steady_tone(self, samplerate):
        for level in (-23.0, -33.0):
            meter = meter_of(sine_dbfs(level, 20.0, samplerate), samplerate, 4800)
            report = meter.report()
            for key in ("momentary_lufs", "short_term_lufs", "integrated_lufs"):
                assert report[key] == pytest.approx(level, abs=0.1), key

    @pytest.mark.parametrize("samplerate", RATES)
    def test_case_3_relative_gate(self, samplerate):
        x = sequence([(-36, 10), (-23, 60), (-36, 10)], samplerate)
        assert integrated_loudness(x, samplerate) == pytest.approx(-23.0, abs=0.1)

    @pytest.mark.parametrize("samplerate", RATES)
    def test_case_4_absolute_and_relative_gate(self, samplerate):
        x = sequence([(-72, 10), (-36, 10), (-23, 60), (-36, 10), (-72, 10)], samplerate)
        assert integrated_loudness(x, samplerate) == pytest.approx(-23.0, abs=0.1)

    @pytest.mark.parametrize("samplerate", RATES)
    def test_case_5_nothing_gated(self, samplerate):
        x = sequence([(-26, 20), (-20, 20.1), (-26, 20)], samplerate)
        assert integrated_loudness(x, samplerate) == pytest.approx(-23.0, abs=0.1)

    @pytest.mark.parametrize("samplerate", RATES)
    def test_case_6_five_channels(self, samplerate):
        # L, R at -28, C at -24, Ls, Rs at -30 dBFS; surrounds weighted 1.41 (BS.1770-4 Table 3).
        levels = (-28, -28, -24, -30, -30)
        x = np.concatenate([sine_dbfs(level, 20.0, samplerate, 1) for level in levels], axis=1)
        assert integrated_loudness(x, samplerate) == pytest.approx(-23.0, abs=0.1)

    @pytest.mark.parametrize("samplerate", RATES)
    def test_case_9_short_term_constant(self, samplerate):
        # 1.34 s at -20 and 1.66 s at -30 dBFS, repeated: every 3 s window reads -23.0.
        x = sequence([(-20, 1.34), (-30, 1.66)] * 5, samplerate)
        meter = meter_of(x, samplerate)
        series = meter.short_term_series()
        assert series.size > 100
        np.testing.assert_allclose(series, -23.0, atol=0.1)

    @pytest.mark.parametrize("samplerate", RATES)
    def test_case_12_momentary_constant(self, samplerate):
        # 0.18 s at -20 and 0.22 s at -30 dBFS, repeated 25 times: each 400 ms window aligned to
        # the pattern reads -23.0 (momentary is read every 100 ms; the pattern repeats every 4 hops).
        x = sequence([(-20, 0.18), (-30, 0.22)] * 25, samplerate)
        series = meter_of(x, samplerate).momentary_series()
        np.testing.assert_allclose(series[::4], -23.0, atol=0.1)


class TestTech3342:
    """EBU Tech 3342 v4 loudness-range cases 1-4 (stereo 1 kHz sines, peak levels in dBFS;
    expected values and the +-1 LU tolerance from the Tech, from memory)."""

    @pytest.mark.parametrize("samplerate", RATES)
    @pytest.mark.parametrize(
        "parts, expected_lu",
        [
            ([(-20, 20), (-30, 20)], 10.0),
            ([(-20, 20), (-15, 20)], 5.0),
            ([(-40, 20), (-20, 20)], 20.0),
            ([(-50, 20), (-35, 20), (-20, 20), (-35, 20), (-50, 20)], 15.0),
        ],
    )
    def test_cases_1_to_4(self, samplerate, parts, expected_lu):
        meter = meter_of(sequence(parts, samplerate), samplerate, 9600)
        assert meter.loudness_range()["loudness_range_lu"] == pytest.approx(expected_lu, abs=1.0)


class TestAgainstPyloudnorm:
    @pytest.mark.parametrize("samplerate", RATES)
    @pytest.mark.parametrize("seed", [1, 2])
    def test_random_programme(self, samplerate, seed):
        # pyloudnorm (a general-purpose BS.1770-4 implementation) on random programmes: noise
        # shaped by a random low-pass, in sections of random level, some below the gates.
        import pyloudnorm

        rng = np.random.default_rng(seed)
        sections = []
        for _ in range(12):
            seconds = rng.integers(1, 6)
            level_db = rng.uniform(-60, -10)
            cutoff_hz = rng.uniform(300, 15000)
            b, a = scipy.signal.butter(2, cutoff_hz, fs=samplerate)
            noise = scipy.signal.lfilter(b, a, rng.normal(0, 1, (seconds * samplerate, 2)), axis=0)
            sections.append(noise / noise.std() * 10 ** (level_db / 20))
        x = np.concatenate(sections)
        ours = integrated_loudness(x, samplerate)
        theirs = pyloudnorm.Meter(samplerate).integrated_loudness(x)
        assert ours == pytest.approx(theirs, abs=0.1)


class TestReadings:
    def test_silence_and_short_signals_read_null(self):
        meter = LoudnessMeter(2, 48000)
        meter.update(np.zeros((48000 * 4, 2)))
        report = meter.report()
        assert report["integrated_lufs"] is None and report["momentary_lufs"] is None
        assert report["loudness_range_lu"] is None
        meter = LoudnessMeter(2, 48000)
        meter.update(sine_dbfs(-23, 0.3, 48000))
        assert meter.momentary_lufs() is None and meter.integrated()["integrated_lufs"] is None

    def test_reset_starts_a_new_programme(self):
        meter = LoudnessMeter(2, 48000)
        meter.update(sine_dbfs(-30, 5, 48000))
        meter.reset()
        meter.update(sine_dbfs(-23, 5, 48000))
        assert meter.integrated()["integrated_lufs"] == pytest.approx(-23.0, abs=0.1)

    def test_weights_must_match_channels(self):
        with pytest.raises(RtstageError):
            LoudnessMeter(2, 48000, channel_weights=[1.0])


class TestTarget:
    def test_ebu_r128_limits(self):
        # EBU R 128: -23 LUFS, maximum true peak -1 dBTP (tolerance +-0.5 LU, from memory).
        target = NAMED_TARGETS["ebu-r128"]
        assert target.check(-23.4, -1.5)["pass"] is True
        assert target.check(-22.4, -1.5)["pass"] is False
        assert target.check(-23.0, -0.5)["pass"] is False
        assert target.check(None, -3.0)["pass"] is None

    def test_parse_station_target(self):
        target = parse_target("-24:1:-2:15")
        assert target == LoudnessTarget(-24.0, 1.0, -2.0, 15.0, "-24:1:-2:15")
        result = target.check(-24.9, -2.5, 16.0)
        assert [c["pass"] for c in result["checks"]] == [True, True, False] and result["pass"] is False
        assert parse_target("-16").tolerance_lu == 0.5
        with pytest.raises(RtstageError):
            parse_target("loud")
