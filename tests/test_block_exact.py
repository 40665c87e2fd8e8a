"""Any split of the input into blocks gives the same words, bit for bit.

Promise (module docstring of rtstage.kernel): all state lives in
preallocated arrays and the dither is a pure function of (seed, channel,
sample index), so processing block by block gives the same words as one call,
for any split, blocks of zero frames included.  The reference for a split
run is the one-shot run of the same engine settings; the reference for the
one-shot run is the independent implementation in tests/reference.py.
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_array_equal

from rtstage import BUILTIN_SHAPERS, Engine, EngineSettings

try:
    from tests import reference as ref
except ImportError:  # tests/ itself on sys.path
    import reference as ref

DITHERS = ("none", "rpdf", "tpdf", "tpdf-hp", "gaussian")
SHAPERS = tuple(BUILTIN_SHAPERS)
NFRAMES = 700


def _signal(seed, nframes, channels, dtype=np.float64):
    """A hard test signal: sine plus noise, overload bursts, NaN/Inf, tiny and subnormal values."""
    rng = np.random.default_rng(seed)
    n = np.arange(nframes)[:, None]
    x = 0.6 * np.sin(2 * np.pi * (0.01 + 0.003 * np.arange(channels)) * n) + 1e-3 * rng.standard_normal((nframes, channels))
    burst = rng.integers(0, max(1, nframes - 40))
    x[burst : burst + 30] *= 3.0  # overload
    for value in (np.nan, np.inf, -np.inf, 1e-310, 1e-30):
        where = rng.random((nframes, channels)) < 0.004
        x[where] = value
    return x.astype(dtype)


def _settings(dither, shaper, seed, bits=16):
    return EngineSettings(bits=bits, dither=dither, shaper=shaper, seed=seed, gain_db=-0.5, accept_unsafe=True)


def _state_snapshot(engine):
    s = engine.state
    return s.hist.copy(), s.counts.copy(), s.clock[:3].copy()


def _run_split(engine, x, sizes, reuse_out=False):
    """Process x in blocks of the given sizes (the rest as a last block); return the words."""
    pieces = []
    start = 0
    for size in list(sizes) + [x.shape[0]]:
        size = min(size, x.shape[0] - start)
        block = x[start : start + size]
        if reuse_out:
            out = np.empty(block.shape, dtype=engine.dtype)
            engine.process(block, out=out)
            pieces.append(out)
        else:
            pieces.append(engine.process(block))
        start += size
    assert start == x.shape[0]
    return np.concatenate(pieces, axis=0)


def _assert_split_invariant(settings_, channels, x, sizes, reuse_out=False):
    whole = Engine(settings_, channels, 48000)
    expected = whole.process(x)
    split = Engine(settings_, channels, 48000)
    got = _run_split(split, x, sizes, reuse_out)
    assert_array_equal(got, expected)
    for a, b in zip(_state_snapshot(split), _state_snapshot(whole)):
        assert_array_equal(a, b)


block_sizes = st.lists(st.one_of(st.just(0), st.just(1), st.integers(0, 5), st.integers(0, 300)), min_size=0, max_size=40)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    dither=st.sampled_from(DITHERS),
    shaper=st.sampled_from(SHAPERS),
    channels=st.sampled_from((1, 2, 3, 6)),
    bits=st.sampled_from((2, 8, 16, 20, 24)),
    signal_seed=st.integers(0, 2**32 - 1),
    dither_seed=st.integers(0, 2**64 - 1),
    sizes=block_sizes,
    float32=st.booleans(),
)
def test_random_splits_are_bit_identical(dither, shaper, channels, bits, signal_seed, dither_seed, sizes, float32):
    x = _signal(signal_seed, NFRAMES, channels, np.float32 if float32 else np.float64)
    _assert_split_invariant(_settings(dither, shaper, dither_seed, bits), channels, x, sizes)


@pytest.mark.parametrize("dither", DITHERS)
@pytest.mark.parametrize("shaper", ("flat", "wannamaker-f9", "lvw-ie9"))
def test_blocks_of_one_frame(dither, shaper):
    x = _signal(1, 300, 2)
    _assert_split_invariant(_settings(dither, shaper, 12), 2, x, [1] * 300)


def test_zero_length_blocks_between_every_frame():
    x = _signal(2, 200, 3)
    sizes = [s for _ in range(200) for s in (0, 0, 1)]
    _assert_split_invariant(_settings("tpdf", "lvw-e5", 5), 3, x, sizes, reuse_out=True)


def test_zero_length_block_changes_nothing():
    engine = Engine(_settings("tpdf", "wannamaker-f9", 5), 2, 48000)
    engine.process(_signal(3, 100, 2))
    before = _state_snapshot(engine)
    y = engine.process(np.zeros((0, 2)))
    assert y.shape == (0, 2)
    for a, b in zip(_state_snapshot(engine), before):
        assert_array_equal(a, b)


class TestAgainstReference:
    """One-shot engine words against the sample-by-sample reference.

    The kernel docstring fixes the formulas; the reference evaluates them in
    the same order (feedback summed from k = 1 upwards, starting at 0.0,
    then ``floor((u + d) + 1/2)``), so the comparison is bit for bit.  A
    reference that summed the feedback with numpy.dot could differ in the
    last bit of u, and, rarely, in a word where u + d + 1/2 lands within an
    ulp of an integer.
    """

    @pytest.mark.parametrize(
        "dither,shaper,bits,channels,start_frame",
        (
            ("tpdf", "wannamaker-f9", 16, 2, 0),
            ("tpdf", "lvw-ie9", 12, 1, 123457),
            ("gaussian", "lvw-e5", 20, 2, 2**40 + 1),
            ("rpdf", "diff2", 8, 3, 7),
            ("tpdf-hp", "wannamaker-f3", 16, 2, 0),
            ("none", "lvw-me9", 16, 1, 0),
            ("tpdf", "flat", 24, 2, 99),
        ),
    )
    def test_words_counts_and_history(self, dither, shaper, bits, channels, start_frame):
        x = _signal(bits + channels, 400, channels)
        seed = 0xC0FFEE + bits
        engine = Engine(_settings(dither, shaper, seed, bits), channels, 48000, start_frame=start_frame)
        y = engine.process(x)
        r = ref.reference_requantize(
            x, bits, dither, BUILTIN_SHAPERS[shaper].coefs, seed=seed, gain_db=-0.5, start_frame=start_frame
        )
        assert_array_equal(y, ref.pack_words(r["q"], bits))
        assert_array_equal(engine.clipped, r["clipped"])
        assert_array_equal(engine.nonfinite, r["nonfinite"])
        # The kernel's circular history holds the last fed-back errors, newest at slot hpos - 1.
        hpos = int(engine.state.clock[1])
        ntaps = BUILTIN_SHAPERS[shaper].ntaps
        for k in range(1, ntaps + 1):
            assert_array_equal(engine.state.hist[:, (hpos - k) % engine.state.hist.shape[1]], r["history"][:, k - 1])


@settings(max_examples=30, deadline=None)
@given(
    dither=st.sampled_from(DITHERS),
    shaper=st.sampled_from(SHAPERS),
    channels=st.sampled_from((1, 2, 4)),
    bits=st.integers(2, 24),
    signal_seed=st.integers(0, 2**32 - 1),
    dither_seed=st.integers(0, 2**64 - 1),
    start_frame=st.integers(0, 2**62),
    dither_scale=st.sampled_from((0.5, 1.0, 2.0)),
)
def test_random_cases_equal_reference(dither, shaper, channels, bits, signal_seed, dither_seed, start_frame, dither_scale):
    # Same comparison as TestAgainstReference (same arithmetic order, bit for bit) over random
    # settings, start frames up to 2^62 and amplitude scales.
    x = _signal(signal_seed, 80, channels)
    s = EngineSettings(bits=bits, dither=dither, shaper=shaper, seed=dither_seed, gain_db=-0.5, dither_scale=dither_scale, accept_unsafe=True)
    engine = Engine(s, channels, 48000, start_frame=start_frame)
    y = engine.process(x)
    r = ref.reference_requantize(
        x, bits, dither, BUILTIN_SHAPERS[shaper].coefs, seed=dither_seed, gain_db=-0.5, dither_scale=dither_scale, start_frame=start_frame
    )
    assert_array_equal(y, ref.pack_words(r["q"], bits))
    assert_array_equal(engine.clipped, r["clipped"])
    assert_array_equal(engine.nonfinite, r["nonfinite"])


@settings(max_examples=25, deadline=None)
@given(
    change_at=st.integers(0, 400),
    gain_db=st.floats(-40.0, 6.0, allow_nan=False),
    sizes=block_sizes,
    samplerate=st.sampled_from((8000, 44100, 384000)),
)
def test_gain_ramp_is_split_invariant(change_at, gain_db, sizes, samplerate):
    # A gain change applied at frame `change_at` ramps from that block boundary on; the ramp's
    # state (current gain, step, frames left) is explicit, so the split after it does not matter.
    x = _signal(4, NFRAMES, 2)
    s = _settings("tpdf", "wannamaker-f9", 77)
    changed = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", gain_db=gain_db)
    whole = Engine(s, 2, samplerate)
    head = whole.process(x[:change_at])
    whole.apply(changed)
    expected = np.concatenate((head, whole.process(x[change_at:])))
    split = Engine(s, 2, samplerate)
    head = _run_split(split, x[:change_at], sizes[: len(sizes) // 2])
    split.apply(changed)
    got = np.concatenate((head, _run_split(split, x[change_at:], sizes[len(sizes) // 2 :])))
    assert_array_equal(got, expected)


def test_memory_layout_does_not_matter():
    # Fortran order, strided and reversed views hold the same samples: same words.
    x = _signal(6, 500, 3)
    s = _settings("gaussian", "lvw-ie9", 3)
    expected = Engine(s, 3, 48000).process(x)
    assert_array_equal(Engine(s, 3, 48000).process(np.asfortranarray(x)), expected)
    wide = np.zeros((500, 6))
    wide[:, ::2] = x
    assert_array_equal(Engine(s, 3, 48000).process(wide[:, ::2]), expected)
    assert_array_equal(Engine(s, 3, 48000).process(x[::-1].copy()[::-1]), expected)
