"""The link test sequence: words against numpy's Philox, block-split invariance, what ``generate`` writes.

The reference generator is :class:`numpy.random.Philox` (Philox4x64-10, Salmon
et al., SC11, 2011); numpy increments its counter before it generates, so
numpy started at counter i - 1 yields block i.  The word mapping below is
written from the module docstring of :mod:`rtstage.linktest.sequence`, not
from its code.
"""

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage.cli import main
from rtstage.linktest import sequence as seq

SR = 48000
SEED = 0x5EED_0F_11
BITS = 24


@pytest.fixture(scope="module")
def frames():
    return seq.sequence_frames(SR, 2.0)


@pytest.fixture(scope="module")
def words(frames):
    return seq.sequence_words(SEED, BITS, SR, 3, frames)


def _numpy_word(seed, bits, channel, section, index):
    """The word of one frame from numpy's Philox and the documented mapping."""
    key = np.array([seed, (0x4C4B << 48) | (channel << 8) | seq.SECTION_CODES[section]], dtype=np.uint64)
    counter = np.array([(index - 1) % 2**64, 0 if index else 2**64 - 1, 0 if index else 2**64 - 1,
                        0 if index else 2**64 - 1], dtype=np.uint64)
    w = int(np.random.Philox(key=key, counter=counter).random_raw(4)[0])
    top = 2 ** (bits - 1) - 1
    if section in ("head", "tail"):
        return 2 ** (bits - 2) * (1 if w >> 63 == 0 else -1)
    if section == "silence":
        return 0
    if section == "low":
        return (w >> 60) - 8
    if section == "full":
        return (((w >> 32) * (2 * top + 1)) >> 32) - top
    mag = top - (((w >> 32) * 2 ** (bits - 6)) >> 32)
    return mag if w & 1 == 0 else -mag


def test_words_equal_numpy_philox(words, frames):
    # Reference: numpy.random.Philox with the documented key and counter, a few frames of every section.
    for sec in seq.sections(SR, frames):
        for offset in (0, 1, 5, sec.stop - sec.start - 1):
            for channel in (0, 2):
                want = _numpy_word(SEED, BITS, channel, sec.name, offset)
                assert words[sec.start + offset, channel] == want, (sec.name, offset, channel)


@pytest.mark.parametrize("blocksize", [1, 7, 1000, 4096, 65536])
def test_any_block_split_gives_the_same_words(words, frames, blocksize):
    # Exactness: concatenated blocks equal the one-shot sequence (numpy.testing.assert_array_equal).
    if blocksize == 1:
        starts = list(range(0, 3000)) + [frames - 5]
        for start in starts:
            assert_array_equal(seq.sequence_block(SEED, BITS, SR, 3, frames, start, 1), words[start : start + 1])
        return
    parts = [seq.sequence_block(SEED, BITS, SR, 3, frames, s, blocksize) for s in range(0, frames, blocksize)]
    assert_array_equal(np.concatenate(parts), words)


def test_generate_writes_the_sequence(tmp_path, frames):
    # The file holds exactly the words, left-justified in PCM_24 (read back by libsndfile as int32).
    path = str(tmp_path / "seq.wav")
    assert main(["linktest", "generate", path, "--seed", str(SEED), "--channels", "3", "--seconds", "2"]) == 0
    info = sf.info(path)
    assert (info.samplerate, info.channels, info.frames, info.subtype) == (SR, 3, frames, "PCM_24")
    got = sf.read(path, dtype="int32", always_2d=True)[0] >> 8
    assert_array_equal(got, seq.sequence_words(SEED, BITS, SR, 3, frames))


def test_generate_16_bit_file(tmp_path):
    path = str(tmp_path / "seq16.flac")
    assert main(["linktest", "generate", path, "--seed", "9", "--bits", "16", "--seconds", "1", "--samplerate", "44100"]) == 0
    frames = seq.sequence_frames(44100, 1.0)
    assert sf.info(path).subtype == "PCM_16"
    assert_array_equal(sf.read(path, dtype="int16", always_2d=True)[0], seq.sequence_words(9, 16, 44100, 2, frames))


def test_generate_refuses_to_overwrite(tmp_path, capsys):
    path = str(tmp_path / "seq.wav")
    assert main(["linktest", "generate", path, "--seed", "1", "--seconds", "1"]) == 0
    capsys.readouterr()
    assert main(["linktest", "generate", path, "--seed", "1", "--seconds", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("rtstage:") and "exists" in err[-1]


def test_sections_do_what_the_issue_asks(words, frames):
    secs = {s.name: s for s in seq.sections(SR, frames)}
    full = words[secs["full"].start : secs["full"].stop]
    # Every bit of the N-bit two's complement word toggles in the full-range section.
    for channel in range(3):
        u = full[:, channel].astype(np.int64) & (2**BITS - 1)
        for bit in range(BITS):
            ones = np.count_nonzero((u >> bit) & 1)
            assert 0 < ones < u.size, bit
    assert words.min() > -(2 ** (BITS - 1))  # never -2^(N-1): an inversion stays exact
    assert not words[secs["silence"].start : secs["silence"].stop].any()
    low = words[secs["low"].start : secs["low"].stop]
    assert low.min() == -8 and low.max() == 7
    near = np.abs(words[secs["near"].start : secs["near"].stop])
    assert near.min() >= 2 ** (BITS - 1) - 2 ** (BITS - 6) and near.max() <= 2 ** (BITS - 1) - 1
    # Per-channel identity: no two channels share their words.
    for a in range(3):
        for b in range(a + 1, 3):
            assert np.count_nonzero(full[:, a] == full[:, b]) < 10


def test_marker_autocorrelation_and_cross_correlation():
    # A binary pseudo-random sequence of length L has sidelobes of order 1/sqrt(L) (common practice:
    # below 5/sqrt(L) over all lags); computed with numpy.correlate.
    m0 = seq.marker(SEED, BITS, 0)
    m1 = seq.marker(SEED, BITS, 1)
    n = m0.size
    auto = np.correlate(m0, m0, mode="full") / n
    assert auto[n - 1] == 1.0
    assert np.max(np.abs(np.delete(auto, n - 1))) < 5 / np.sqrt(n)
    assert np.max(np.abs(np.correlate(m0, m1, mode="full") / n)) < 5 / np.sqrt(n)


def test_lengths_are_on_the_grid():
    frames = seq.sequence_frames(SR, 10.0)
    assert abs(frames - 10.0 * SR) <= seq.FULL_STEP_FRAMES / 2
    assert seq.snap_frames(SR, frames + 1000) == frames and seq.snap_frames(SR, frames - 1000) == frames
    with pytest.raises(Exception):
        seq.sequence_words(1, 24, SR, 2, frames + 1)
