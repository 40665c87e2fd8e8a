"""Generated sources: the same samples for any split, levels per AES17, checked against numpy."""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from rtstage.errors import RtstageError
from rtstage.live.sources import generate, parse_source


class TestTone:
    def test_matches_numpy_sine(self):
        # Reference: numpy's sin of 2*pi*f*n/fs, computed directly (phase small here, so exact to ~1e-12).
        x = generate("tone:freq_hz=997,level_dbfs=-6", 48000, 2, 0, 4800)
        n = np.arange(4800)
        ref = 10 ** (-6 / 20) * np.sin(2 * np.pi * 997 * n / 48000)
        assert_allclose(x[:, 0], ref, atol=1e-12)
        assert_array_equal(x[:, 0], x[:, 1])

    def test_far_start_frame_matches_high_precision_phase(self):
        # After ~6 hours the phase reduction must still agree with an exact rational phase (fractions).
        from fractions import Fraction

        start = 48000 * 3600 * 6 + 12345
        x = generate("tone:freq_hz=997,level_dbfs=0", 48000, 1, start, 16)
        ref = [math.sin(2 * math.pi * float(Fraction(997 * (start + k), 48000) % 1)) for k in range(16)]
        assert_allclose(x[:, 0], ref, atol=1e-9)

    def test_rms_level_aes17(self):
        # AES17-2015 sec. 3.12.1: 0 dBFS is the RMS of a full-scale sine, so a -20 dBFS sine has RMS 0.1/sqrt(2).
        x = generate("tone:freq_hz=1000,level_dbfs=-20", 48000, 1, 0, 48000)
        assert_allclose(np.sqrt(np.mean(x**2)), 0.1 / math.sqrt(2), rtol=1e-6)


class TestNoise:
    def test_split_invariance(self):
        whole = generate("noise:level_dbfs=-30,seed=7", 44100, 3, 100, 1000)
        parts = np.concatenate([generate("noise:level_dbfs=-30,seed=7", 44100, 3, 100, 333),
                                generate("noise:level_dbfs=-30,seed=7", 44100, 3, 433, 667)])
        assert_array_equal(whole, parts)

    def test_statistics(self):
        # AES17 level convention (as for the tone): sigma = 10^(L/20)/sqrt(2).  Sample std of 2e5 Gaussian
        # values has relative standard error 1/sqrt(2N) = 0.16 %; 1 % is > 6 standard errors.
        x = generate("noise:level_dbfs=-10,seed=3", 48000, 2, 0, 200000)
        sigma = 10 ** (-10 / 20) / math.sqrt(2)
        assert_allclose(x.std(axis=0), sigma, rtol=0.01)
        assert abs(x.mean()) < 5 * sigma / math.sqrt(x.size)
        assert abs(np.corrcoef(x[:, 0], x[:, 1])[0, 1]) < 5 / math.sqrt(x.shape[0])
        # Kurtosis of a Gaussian is 3 (scipy.stats reference).
        from scipy import stats

        assert abs(stats.kurtosis(x[:, 0], fisher=False) - 3.0) < 0.05

    def test_seed_changes_noise(self):
        a = generate("noise:seed=1", 48000, 1, 0, 64)
        b = generate("noise:seed=2", 48000, 1, 0, 64)
        assert not np.array_equal(a, b)


class TestSpecs:
    def test_silence(self):
        assert_array_equal(generate("silence", 48000, 2, 5, 10), np.zeros((10, 2)))

    def test_file_spec(self):
        assert parse_source("music.wav").kind == "file"

    def test_describe_round_trip(self):
        spec = parse_source("tone:freq_hz=440,level_dbfs=-12")
        assert parse_source(spec.describe()) == spec

    @pytest.mark.parametrize("text", ["tone:freq=1", "tone:freq_hz=abc", "noise:level_dbfs=3", "tone:level_dbfs"])
    def test_bad_specs(self, text):
        with pytest.raises(RtstageError):
            parse_source(text)

    def test_tone_above_nyquist(self):
        with pytest.raises(RtstageError):
            generate("tone:freq_hz=30000", 48000, 1, 0, 4)
