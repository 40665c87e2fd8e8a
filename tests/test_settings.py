"""Validation of EngineSettings and Engine limits, and the limits actually working.

Limits from the project's promise: B = 2..24 bits, dither kinds none, rpdf,
tpdf, tpdf-hp, gaussian, seeds 0..2^64-1, 1..64 channels, 8 kHz..384 kHz.
Refusals unless ``accept_unsafe`` (EngineSettings.validate, with its sources):
noise shaping without dither (undithered error feedback gives signal-
dependent error, Lipshitz, Wannamaker & Vanderkooy, JAES 40(5), 1992) and a
non-i.i.d. dither (tpdf-hp) inside a feedback shaper (Lipshitz, Wannamaker &
Vanderkooy, JAES 52(11), 2004).
"""

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import BUILTIN_SHAPERS, Engine, EngineSettings, RtstageError

try:
    from tests import reference as ref
except ImportError:  # tests/ itself on sys.path
    import reference as ref


def _refused(settings=None, channels=1, samplerate=48000, **engine_kw):
    settings = EngineSettings() if settings is None else settings
    with pytest.raises(RtstageError) as info:
        Engine(settings, channels, samplerate, **engine_kw)
    message = str(info.value)
    assert message and "\n" not in message  # one-line reason
    return message


class TestWordLength:
    @pytest.mark.parametrize("bits", (1, 0, -3, 25, 32, 16.0, "16", True, None))
    def test_out_of_range_or_not_integer_refused(self, bits):
        assert "bits" in _refused(EngineSettings(bits=bits))

    @pytest.mark.parametrize("bits", (2, 24, np.int64(16)))
    def test_limits_accepted(self, bits):
        Engine(EngineSettings(bits=bits, seed=1), 1, 48000)

    def test_word_must_fit_container(self):
        _refused(EngineSettings(bits=20, seed=1), format_bits=16)
        _refused(EngineSettings(bits=16, seed=1), format_bits=20)
        engine = Engine(EngineSettings(bits=16, seed=1), 1, 48000)
        with pytest.raises(RtstageError):
            engine.apply(EngineSettings(bits=20))


class TestDither:
    @pytest.mark.parametrize("dither", ("triangular", "TPDF", "", "tpdf ", None, 2))
    def test_unknown_refused(self, dither):
        assert "dither" in _refused(EngineSettings(dither=dither, seed=1))

    @pytest.mark.parametrize("dither", ("none", "rpdf", "tpdf", "tpdf-hp", "gaussian"))
    def test_known_accepted_flat(self, dither):
        Engine(EngineSettings(dither=dither, seed=1), 1, 48000)

    @pytest.mark.parametrize("dither_scale", (-0.1, 4.5, float("nan"), float("inf")))
    def test_dither_scale_range(self, dither_scale):
        assert "dither_scale" in _refused(EngineSettings(dither_scale=dither_scale, seed=1))


class TestSeed:
    @pytest.mark.parametrize("seed", (-1, 2**64, 1.5, "7", True, [1]))
    def test_bad_seed_refused(self, seed):
        assert "seed" in _refused(EngineSettings(seed=seed))

    @pytest.mark.parametrize("seed", (0, 2**64 - 1, np.uint64(2**63)))
    def test_limits_accepted(self, seed):
        Engine(EngineSettings(seed=seed), 1, 48000)

    def test_missing_seed_is_drawn_and_reported(self):
        engine = Engine(EngineSettings(seed=None), 1, 48000)
        assert 0 <= engine.settings.seed < 2**64
        # The drawn seed reproduces the run.
        x = np.zeros((256, 1))
        again = Engine(EngineSettings(seed=engine.settings.seed), 1, 48000)
        assert_array_equal(engine.process(x), again.process(x))


class TestShaperSafety:
    @pytest.mark.parametrize("shaper", [s for s in BUILTIN_SHAPERS if BUILTIN_SHAPERS[s].ntaps])
    def test_shaping_without_dither_refused_unless_forced(self, shaper):
        _refused(EngineSettings(dither="none", shaper=shaper, seed=1))
        _refused(EngineSettings(dither="tpdf", dither_scale=0.0, shaper=shaper, seed=1))
        Engine(EngineSettings(dither="none", shaper=shaper, seed=1, accept_unsafe=True), 1, 48000)

    @pytest.mark.parametrize("shaper", ("diff1", "wannamaker-f9", "lvw-e5"))
    def test_tpdf_hp_inside_shaper_refused_unless_forced(self, shaper):
        _refused(EngineSettings(dither="tpdf-hp", shaper=shaper, seed=1))
        Engine(EngineSettings(dither="tpdf-hp", shaper=shaper, seed=1, accept_unsafe=True), 1, 48000)

    def test_iid_dither_inside_shaper_accepted(self):
        for dither in ("rpdf", "tpdf", "gaussian"):
            Engine(EngineSettings(dither=dither, shaper="wannamaker-f9", seed=1), 1, 48000)

    def test_unknown_shaper_refused(self):
        assert "shaper" in _refused(EngineSettings(shaper="no-such-shaper", seed=1))

    @pytest.mark.parametrize("gain_db", (-121.0, 40.5, float("nan")))
    def test_gain_range(self, gain_db):
        assert "gain_db" in _refused(EngineSettings(gain_db=gain_db, seed=1))


class TestChannelsAndRates:
    @pytest.mark.parametrize("channels", (0, -1, 65, 2.0, True))
    def test_channel_count_refused(self, channels):
        assert "channel" in _refused(EngineSettings(seed=1), channels=channels)

    @pytest.mark.parametrize("samplerate", (7999, 384001, 0))
    def test_sample_rate_refused(self, samplerate):
        assert "sample rate" in _refused(EngineSettings(seed=1), samplerate=samplerate)

    def test_64_channels_work(self):
        # Every one of 64 channels gives the reference's words for its own key (seed, c).
        rng = np.random.default_rng(64)
        x = rng.uniform(-1.0, 1.0, size=(120, 64)) * 1e-3
        engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper="lvw-e5", seed=6400), 64, 48000)
        y = engine.process(x)
        r = ref.reference_requantize(x, 16, "tpdf", BUILTIN_SHAPERS["lvw-e5"].coefs, seed=6400)
        assert_array_equal(y, ref.pack_words(r["q"], 16))

    @pytest.mark.parametrize("samplerate", (8000, 384000))
    def test_extreme_rates_work(self, samplerate):
        # Words equal the reference (the rate does not enter the quantizer) ...
        rng = np.random.default_rng(samplerate)
        x = rng.uniform(-1.0, 1.0, size=(500, 2))
        engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=8), 2, samplerate)
        r = ref.reference_requantize(x, 16, "tpdf", BUILTIN_SHAPERS["wannamaker-f9"].coefs, seed=8)
        assert_array_equal(engine.process(x), ref.pack_words(r["q"], 16))

    @pytest.mark.parametrize("samplerate", (8000, 44100, 384000))
    def test_gain_ramp_lasts_10_ms_at_any_rate(self, samplerate):
        # rtstage.engine: a gain change ramps linearly over GAIN_RAMP_SECONDS = 10 ms, i.e.
        # round(0.010·fs) frames; undithered, a constant 0.5 FS input shows the ramp exactly.
        ramp_frames = round(0.010 * samplerate)
        engine = Engine(EngineSettings(bits=16, dither="none", seed=1), 1, samplerate)
        x = np.full((ramp_frames + 200, 1), 0.5)
        engine.process(x[:10])
        engine.apply(EngineSettings(bits=16, dither="none", gain_db=20 * np.log10(0.5)))
        q = engine.process(x).astype(np.int64)[:, 0]
        target = int(np.floor(0.5 * 10 ** (20 * np.log10(0.5) / 20) * 2**15 + 0.5))
        assert target == 8192
        assert np.all(q[ramp_frames - 1 :] == target)
        assert q[ramp_frames - 2] > target
        # Linear: frame k carries gain 1 + (k + 1)·(0.5 - 1)/R (within one word of rounding).
        k = np.arange(ramp_frames)
        linear = 0.5 * (1.0 + (k + 1) * (0.5 - 1.0) / ramp_frames) * 2**15
        assert np.max(np.abs(q[:ramp_frames] - linear)) <= 1.0


class TestBlockShape:
    @pytest.mark.parametrize("shape", ((16,), (16, 3), (16, 2, 1)))
    def test_wrong_block_shape_refused(self, shape):
        # Engine.process takes (frames, channels); anything else is a user error with a reason.
        engine = Engine(EngineSettings(seed=1), 2, 48000)
        with pytest.raises(RtstageError) as info:
            engine.process(np.zeros(shape))
        assert "\n" not in str(info.value)

    def test_integer_input_is_converted(self):
        # Integer arrays are taken as full-scale values (converted to float64): 0 and ±1.
        engine = Engine(EngineSettings(dither="none", seed=1), 1, 48000)
        q = engine.process(np.array([[0], [1], [-1]])).astype(np.int64)[:, 0]
        assert_array_equal(q, [0, 2**15 - 1, -(2**15)])
