"""Statistics of the total quantization error and of the dither, against theory.

Theory: S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and
dither: a theoretical survey", J. Audio Eng. Soc. 40(5), 355-375, 1992
(below "LWV 1992").  With a constant input at offset a (0 <= a < Q) above a
quantizer level and non-subtractive dither:

* RPDF (1 LSB peak to peak): E[e] = 0, E[e^2] = a(Q - a) -- the first moment
  is independent of the input, the second is not;
* TPDF (2 LSB peak to peak): E[e] = 0, E[e^2] = Q^2/4 for every a;
* no dither: e = round(a) - a, a deterministic function of the input.

For a busy signal (one whose rounding error is uniform) the total error power
is Q^2/12 undithered, Q^2/12 + Q^2/12 = Q^2/6 with RPDF and Q^2/12 + Q^2/6 =
Q^2/4 with TPDF (the dither variance adds to the rounding error's).

Every tolerance is six standard errors of the estimate, computed from the
sample's own moments; the seeds are fixed, so the tests are deterministic.
"""

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings

BITS = 16
LSB_PER_FS = 2.0 ** (BITS - 1)
N_SIGMA = 6.0
OFFSETS = (0.0, 0.125, 0.25, 0.375, 0.5, 0.7, 0.9)


def _total_error(dither, x, seed=1234, bits=BITS, dither_scale=1.0):
    """Total error e = q - v in LSB for input x (frames, channels), flat shaper."""
    engine = Engine(EngineSettings(bits=bits, dither=dither, seed=seed, dither_scale=dither_scale), x.shape[1], 48000)
    q = engine.process(x).astype(np.int64) >> engine.out_shift
    v = x * 2.0 ** (bits - 1)
    return q - v, v


def _mean_and_se(e):
    """Sample mean and its standard error, per column."""
    return e.mean(axis=0), np.sqrt(e.var(axis=0) / e.shape[0])


def _second_moment_and_se(e):
    """Sample mean square and its standard error sqrt((m4 - m2^2)/N), per column."""
    m2 = np.mean(e**2, axis=0)
    m4 = np.mean(e**4, axis=0)
    return m2, np.sqrt(np.maximum(m4 - m2**2, 0.0) / e.shape[0])


def _constant_offsets(nframes):
    # Input 100 + a LSB; the offset actually held by the float input is v - floor(v).
    v = 100.0 + np.asarray(OFFSETS)
    x = np.tile(v / LSB_PER_FS, (nframes, 1))
    v_exact = x[0] * LSB_PER_FS
    return x, v_exact - np.floor(v_exact)


class TestConditionalMoments:
    NFRAMES = 1 << 17

    def test_rpdf_mean_zero_variance_a_times_q_minus_a(self):
        # LWV 1992: RPDF makes E[e | a] = 0 but E[e^2 | a] = a(Q - a), Q = 1 LSB.
        x, a = _constant_offsets(self.NFRAMES)
        e, _ = _total_error("rpdf", x)
        mean, mean_se = _mean_and_se(e)
        assert np.all(np.abs(mean) <= N_SIGMA * mean_se + 1e-12)
        m2, m2_se = _second_moment_and_se(e)
        assert np.all(np.abs(m2 - a * (1.0 - a)) <= N_SIGMA * m2_se + 1e-12)
        # The second moment really depends on the input: 0 at a = 0, 1/4 at a = 1/2.
        assert m2[0] == 0.0 and abs(m2[OFFSETS.index(0.5)] - 0.25) < 0.01

    def test_tpdf_mean_zero_variance_quarter_for_every_offset(self):
        # LWV 1992: TPDF of 2 LSB p-p makes E[e | a] = 0 and E[e^2 | a] = Q^2/4 for all a.
        x, _ = _constant_offsets(self.NFRAMES)
        e, _ = _total_error("tpdf", x)
        mean, mean_se = _mean_and_se(e)
        assert np.all(np.abs(mean) <= N_SIGMA * mean_se)
        m2, m2_se = _second_moment_and_se(e)
        assert np.all(np.abs(m2 - 0.25) <= N_SIGMA * m2_se)

    def test_undithered_error_is_a_function_of_the_signal(self):
        # LWV 1992: without dither e = Q·round(v/Q) - v exactly; the kernel rounds ties
        # toward +inf (kernel docstring), numpy reference floor(v + 1/2) - v.
        x, a = _constant_offsets(64)
        e, v = _total_error("none", x)
        assert_array_equal(e, np.floor(v + 0.5) - v)
        # Same error on every sample (zero variance) and a mean that follows the input.
        assert np.all(e.var(axis=0) == 0.0)
        assert_array_equal(e[0], np.where(a >= 0.5, 1.0 - a, -a))


class TestBusySignalPower:
    NFRAMES = 1 << 18

    @pytest.mark.parametrize(
        "dither,expected_lsb2",
        (
            ("none", 1.0 / 12.0),  # Q^2/12 (LWV 1992, busy signal)
            ("rpdf", 1.0 / 6.0),  # Q^2/12 + Q^2/12
            ("tpdf", 1.0 / 4.0),  # Q^2/12 + Q^2/6
            ("tpdf-hp", 1.0 / 4.0),  # same amplitude distribution as TPDF: Q^2/12 + Q^2/6
            ("gaussian", 1.0 / 12.0 + 0.25),  # Q^2/12 + sigma^2, sigma = Q/2 (busy signal)
        ),
    )
    def test_total_error_power(self, dither, expected_lsb2):
        rng = np.random.default_rng(5)
        x = rng.uniform(-0.5, 0.5, size=(self.NFRAMES, 2))
        e, _ = _total_error(dither, x, seed=77)
        m2, m2_se = _second_moment_and_se(e)
        assert np.all(np.abs(m2 - expected_lsb2) <= N_SIGMA * m2_se), (m2, m2_se)
        mean, mean_se = _mean_and_se(e)
        assert np.all(np.abs(mean) <= N_SIGMA * mean_se)


class TestChannelIndependence:
    """Dither of different channels must behave as independent sequences.

    Statistic: the normalised sample cross-correlation r_ij(l) of two
    independent white sequences of length N has mean 0 and standard deviation
    1/sqrt(N) (Bartlett's formula for white series, see e.g. Box & Jenkins,
    "Time Series Analysis", from memory); the bound is 6/sqrt(N).  The
    sequences are the words q = floor(4d + 1/2) of a zero input at
    dither_scale 4, a many-valued function of the dither alone.
    """

    NFRAMES = 1 << 16
    NCHANNELS = 4
    MAX_LAG = 32

    def _words(self, dither, channels, seed=4242, nframes=None):
        nframes = self.NFRAMES if nframes is None else nframes
        engine = Engine(EngineSettings(bits=16, dither=dither, seed=seed, dither_scale=4.0), channels, 48000)
        return engine.process(np.zeros((nframes, channels))).astype(np.float64)

    @staticmethod
    def _xcorr(a, b, max_lag):
        """Normalised cross-correlation sum_n a[n] b[n + l] / (N sa sb) for l = -L..L."""
        a = (a - a.mean()) / a.std()
        b = (b - b.mean()) / b.std()
        n = a.size
        return np.array([np.dot(a[max(0, -l) : n - max(0, l)], b[max(0, l) : n - max(0, -l)]) / n for l in range(-max_lag, max_lag + 1)])

    @pytest.mark.parametrize("dither", ("rpdf", "tpdf", "gaussian"))
    def test_cross_correlation_within_bound(self, dither):
        y = self._words(dither, self.NCHANNELS)
        bound = N_SIGMA / np.sqrt(self.NFRAMES)
        for i in range(self.NCHANNELS):
            for j in range(i + 1, self.NCHANNELS):
                r = self._xcorr(y[:, i], y[:, j], self.MAX_LAG)
                assert np.max(np.abs(r)) < bound, (dither, i, j, np.max(np.abs(r)))
            # Each i.i.d. kind is white too: autocorrelation at lags 1..L.
            r = self._xcorr(y[:, i], y[:, i], self.MAX_LAG)[self.MAX_LAG + 1 :]
            assert np.max(np.abs(r)) < bound

    def test_statistic_detects_correlation(self):
        # Power check of the same statistic: tpdf-hp is r[n] - r[n-1], whose lag-1
        # autocorrelation is -1/2 (dither.py docstring); it must stand far outside the bound.
        y = self._words("tpdf-hp", 1)
        r1 = self._xcorr(y[:, 0], y[:, 0], 1)[2]
        assert r1 < -0.4

    def test_channel_dither_does_not_depend_on_channel_count(self):
        # Kernel docstring: the key is (seed, c); the channel count is not an input.
        y1 = self._words("tpdf", 1, nframes=4096)
        y2 = self._words("tpdf", 2, nframes=4096)
        y8 = self._words("tpdf", 8, nframes=4096)
        assert_array_equal(y2[:, 0], y1[:, 0])
        assert_array_equal(y8[:, :2], y2)
        assert not np.array_equal(y8[:, 0], y8[:, 1])
