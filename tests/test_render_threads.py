"""Channel groups on threads give the same words for any thread count.

Promise (rtstage.engine.groups): the kernel's channels are independent and a
channel's dither is keyed by its channel number in the stream, so running
groups of channels on separate threads changes no word.  The words are
checked against the independent sample-by-sample reference of
tests/reference.py (numpy's own Philox, written from the kernel's docstring),
so a group that keyed its dither by its local channel index would fail.
"""

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import BUILTIN_SHAPERS, Engine, EngineSettings
from rtstage.engine.groups import ChannelGroups, group_bounds
from rtstage.render import render_file

try:
    from tests import reference as ref
except ImportError:  # tests/ itself on sys.path
    import reference as ref

NCH = 5
NFRAMES = 1500
SEED = 0xBEEF


def _signal(nframes, channels, seed=3):
    rng = np.random.default_rng(seed)
    n = np.arange(nframes)[:, None]
    x = 0.5 * np.sin(2 * np.pi * (0.01 + 0.004 * np.arange(channels)) * n) + 0.05 * rng.standard_normal((nframes, channels))
    x[700:730, 1] *= 3.0  # overload on one channel: clip counts per channel
    x[900, 3] = np.nan  # a replaced sample clears one channel's history
    return x


def _settings(dither="tpdf", shaper="wannamaker-f9"):
    return EngineSettings(bits=16, dither=dither, shaper=shaper, seed=SEED, gain_db=-0.5, accept_unsafe=True)


def _reference(x, dither="tpdf", shaper="wannamaker-f9"):
    r = ref.reference_requantize(x, 16, dither, BUILTIN_SHAPERS[shaper].coefs, seed=SEED, gain_db=-0.5)
    return ref.pack_words(r["q"], 16), r


def test_group_bounds_cover_every_channel_once():
    for nch in range(1, 12):
        for nthreads in range(1, 14):
            b = group_bounds(nch, nthreads)
            assert b[0] == 0 and b[-1] == nch
            assert all(lo < hi for lo, hi in zip(b, b[1:]))
            assert len(b) - 1 == min(nthreads, nch)


@pytest.mark.parametrize("nthreads", (1, 2, 3, 5))
@pytest.mark.parametrize("dither,shaper", (("tpdf", "wannamaker-f9"), ("tpdf-hp", "lvw-e5"), ("gaussian", "flat")))
def test_groups_equal_reference_for_any_thread_count(nthreads, dither, shaper):
    x = _signal(NFRAMES, NCH)
    expected, r = _reference(x, dither, shaper)
    engine = Engine(_settings(dither, shaper), NCH, 48000)
    out = np.empty((NFRAMES, NCH), dtype=np.int16)
    vq = np.empty((NFRAMES, NCH))
    with ChannelGroups(engine, nthreads) as groups:
        start = 0
        for size in (0, 1, 63, 64, 65, 300, 7):  # blocks across the kernel's chunk edges, the rest at the end
            groups.process(x[start : start + size], out[start : start + size], quantizer_in=vq[start : start + size])
            start += size
        groups.process(x[start:], out[start:], quantizer_in=vq[start:])
    assert_array_equal(out, expected)
    assert_array_equal(engine.clipped, r["clipped"])
    assert_array_equal(engine.nonfinite, r["nonfinite"])
    assert engine.frame == NFRAMES
    # the meter tap carries x·gain (non-finite samples as replaced), as Engine.process gives it
    assert_array_equal(vq * 2.0**15, r["v"])


@pytest.mark.parametrize("nthreads", (1, 2, 4))
def test_render_file_words_do_not_depend_on_threads(tmp_path, nthreads):
    x = _signal(NFRAMES, NCH)
    x[900, 3] = 0.25  # a WAV holds no NaN
    src = tmp_path / "in.wav"
    sf.write(src, x, 48000, subtype="DOUBLE")
    out = tmp_path / f"out{nthreads}.wav"
    result = render_file(str(src), str(out), _settings(), blocksize=512, threads=nthreads, quiet=True)
    words, _ = sf.read(out, dtype="int16")
    expected, r = _reference(x)
    assert_array_equal(words, expected)
    assert_array_equal(result.engine.clipped, r["clipped"])
