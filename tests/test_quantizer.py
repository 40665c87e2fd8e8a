"""The documented quantizer: word grid, rounding, clipping, packing, SNR.

Promises checked (module docstring of rtstage.kernel): with B bits the step
is Q = 2^-(B-1), ``v = x·gain·2^(B-1)``, ``q = floor(v - fb + d + 1/2)``
limited to [-2^(B-1), 2^(B-1) - 1], written as ``q << out_shift``
(left-justified: int16 for B <= 16, int32 otherwise, low bits zero).
References are numpy (``np.floor``, ``np.clip``) and the independent
sample-by-sample implementation in tests/reference.py.
"""

import math

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings

try:
    from tests import reference as ref
except ImportError:  # tests/ itself on sys.path
    import reference as ref

ALL_BITS = tuple(range(2, 25))


def _engine(bits, dither="none", seed=3, channels=2, format_bits=None, **settings):
    return Engine(EngineSettings(bits=bits, dither=dither, seed=seed, **settings), channels, 48000, format_bits=format_bits)


class TestGridAndPacking:
    @pytest.mark.parametrize("bits", ALL_BITS)
    def test_words_on_grid_left_justified(self, bits):
        rng = np.random.default_rng(bits)
        # Busy input with overloads up to 1.5 FS, TPDF dither.
        x = rng.uniform(-1.5, 1.5, size=(3000, 2))
        engine = _engine(bits, "tpdf")
        y = engine.process(x)
        assert y.dtype == (np.int16 if bits <= 16 else np.int32)
        width = 16 if bits <= 16 else 32
        shift = width - bits
        words = y.astype(np.int64)
        assert np.all(words & ((1 << shift) - 1) == 0)  # unused low bits zero
        q = words >> shift
        assert q.min() >= -(2 ** (bits - 1)) and q.max() <= 2 ** (bits - 1) - 1
        # Overloads in both directions reach both ends of the grid.
        assert q.min() == -(2 ** (bits - 1)) and q.max() == 2 ** (bits - 1) - 1

    def test_sixteen_bits_in_a_32_bit_container(self):
        x = np.linspace(-1.0, 1.0, 1001)[:, None]
        y16 = _engine(16, channels=1).process(x)
        y32 = _engine(16, channels=1, format_bits=32).process(x)
        assert y32.dtype == np.int32
        assert_array_equal(y32.astype(np.int64), y16.astype(np.int64) << 16)


class TestRounding:
    @pytest.mark.parametrize("bits", ALL_BITS)
    def test_undithered_equals_numpy_round_half_up_and_clip(self, bits):
        # numpy reference: q = clip(floor(v + 1/2), -2^(B-1), 2^(B-1) - 1).
        rng = np.random.default_rng(100 + bits)
        x = rng.uniform(-1.2, 1.2, size=(5000, 2))
        engine = _engine(bits)
        q = engine.process(x).astype(np.int64) >> engine.out_shift
        v = x * 2.0 ** (bits - 1)
        raw = np.floor(v + 0.5)
        expected = np.clip(raw, -(2.0 ** (bits - 1)), 2.0 ** (bits - 1) - 1)
        assert_array_equal(q, expected.astype(np.int64))
        assert_array_equal(engine.clipped, np.sum(raw != expected, axis=0))

    def test_ties_round_toward_plus_infinity(self):
        # Kernel docstring: "round to nearest, ties toward +inf".
        v = np.array([0.5, -0.5, 1.5, -1.5, 2.5, -2.5, 0.49999999999, -0.50000000001])
        expected = np.array([1, 0, 2, -1, 3, -2, 0, -1])
        engine = _engine(16, channels=1)
        q = engine.process((v / 2.0**15)[:, None]).astype(np.int64)[:, 0]
        assert_array_equal(q, expected)

    def test_float32_input_equals_float64_of_same_values(self):
        rng = np.random.default_rng(8)
        x32 = rng.uniform(-1, 1, size=(4000, 2)).astype(np.float32)
        y32 = _engine(20, "tpdf", seed=9).process(x32)
        y64 = _engine(20, "tpdf", seed=9).process(x32.astype(np.float64))
        assert_array_equal(y32, y64)

    def test_gain_is_applied_in_db(self):
        # gain_db = -6.02 dB: the linear gain is 10^(-6.02/20); numpy reference.
        x = np.linspace(-1.0, 1.0, 2001)[:, None]
        engine = _engine(16, channels=1, gain_db=-6.02)
        q = engine.process(x).astype(np.int64)[:, 0]
        expected = np.floor(x[:, 0] * 10.0 ** (-6.02 / 20.0) * 2.0**15 + 0.5)
        assert_array_equal(q, expected.astype(np.int64))


class TestNonFinite:
    @pytest.mark.parametrize("bits", (2, 8, 16, 24))
    def test_replacement_and_counts(self, bits):
        # Kernel docstring: NaN -> 0, +Inf -> +full scale, -Inf -> -full scale, counted.
        x = np.array([[np.nan, 0.0], [np.inf, 0.0], [-np.inf, np.nan], [0.25, 0.25]])
        engine = _engine(bits)
        q = engine.process(x).astype(np.int64) >> engine.out_shift
        top, bottom = 2 ** (bits - 1) - 1, -(2 ** (bits - 1))
        assert_array_equal(q[:, 0], [0, top, bottom, int(math.floor(0.25 * 2 ** (bits - 1) + 0.5))])
        assert_array_equal(engine.nonfinite, [3, 1])
        # +full scale is one step above the largest word: it clips; -full scale is on the grid.
        assert_array_equal(engine.clipped, [1, 0])


class TestAgainstReference:
    """Dithered words of the engine equal the reference sample by sample.

    Flat shaper: no feedback sum, so the arithmetic order is the same by
    construction and the comparison is bit for bit.
    """

    @pytest.mark.parametrize("bits", (2, 3, 8, 12, 16, 17, 20, 23, 24))
    @pytest.mark.parametrize("dither", ("none", "rpdf", "tpdf", "tpdf-hp", "gaussian"))
    def test_flat(self, bits, dither):
        rng = np.random.default_rng(bits * 10 + len(dither))
        x = rng.uniform(-1.1, 1.1, size=(300, 2))
        x[rng.random(x.shape) < 0.3] *= 1e-4  # low-level samples where dither decides
        seed = 0xFACE + bits
        engine = _engine(bits, dither, seed=seed, gain_db=-1.5, dither_scale=1.25)
        y = engine.process(x)
        r = ref.reference_requantize(x, bits, dither, seed=seed, gain_db=-1.5, dither_scale=1.25)
        assert_array_equal(y, ref.pack_words(r["q"], bits))
        assert_array_equal(engine.clipped, r["clipped"])

    @pytest.mark.parametrize("dither,peak_lsb", (("rpdf", 0.5), ("tpdf", 1.0), ("tpdf-hp", 1.0)))
    def test_error_bounded_by_half_step_plus_dither_peak(self, dither, peak_lsb):
        # Unclipped total error |q - v| <= Q/2 + dither peak (dither.py table; LWV 1992).
        rng = np.random.default_rng(17)
        x = rng.uniform(-0.9, 0.9, size=(20000, 2))
        engine = _engine(16, dither)
        q = engine.process(x).astype(np.int64)
        assert np.max(np.abs(q - x * 2.0**15)) <= 0.5 + peak_lsb


class TestSineSnr:
    def test_16_bit_tpdf_full_scale_sine(self):
        """SNR of a full-scale sine with TPDF at N = 16 bits: 6.02·N + 1.76 - 4.77 dB.

        Theory (LWV 1992): the sine's power A^2/2 with A = 2^(N-1) Q over the
        TPDF total error power Q^2/4 gives 10·log10(2^(2N-1)) = 93.32 dB; the
        rounded form is 6.02·N + 1.76 - 4.77 = 93.31 dB.  The sine sits 2 LSB
        below full scale so that sine plus dither never clips, and its level
        (20·log10 of the amplitude re full scale) is added back.  The noise is
        the residual of a least-squares fit of cos, sin and DC at the known
        frequency to the output words alone (the method of AES17's notch, done
        in the time domain; common practice).
        """
        nbits = 16
        nframes = 1 << 18
        cycles = 12345  # odd, so coprime with 2^18: every phase is distinct
        amplitude = (2.0 ** (nbits - 1) - 3.0) / 2.0 ** (nbits - 1)
        phase = 2.0 * np.pi * cycles * np.arange(nframes) / nframes
        x = (amplitude * np.sin(phase + 0.3))[:, None]
        engine = _engine(nbits, "tpdf", seed=1992, channels=1)
        q = engine.process(x).astype(np.float64)[:, 0]
        assert engine.clipped[0] == 0
        basis = np.column_stack((np.cos(phase), np.sin(phase), np.ones(nframes)))
        coef, *_ = np.linalg.lstsq(basis, q, rcond=None)
        residual = q - basis @ coef
        noise_lsb2 = np.sum(residual**2) / (nframes - 3)
        signal_lsb2 = (coef[0] ** 2 + coef[1] ** 2) / 2.0
        level_db = 20.0 * np.log10(amplitude)
        snr_fs_db = 10.0 * np.log10(signal_lsb2 / noise_lsb2) - level_db
        theory_db = 10.0 * np.log10(2.0 ** (2 * nbits - 1))
        assert abs(theory_db - (6.02 * nbits + 1.76 - 4.77)) < 0.02
        # Tolerance: 6 standard errors of the noise-power estimate, in dB.
        rel_se = np.sqrt((np.mean(residual**4) / np.mean(residual**2) ** 2 - 1.0) / nframes)
        tol_db = 10.0 * np.log10(1.0 + 6.0 * rel_se)
        assert abs(snr_fs_db - theory_db) < tol_db, (snr_fs_db, theory_db, tol_db)
