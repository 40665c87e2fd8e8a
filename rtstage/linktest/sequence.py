"""The link test sequence: a pure function of (seed, bits, samplerate, channels, frames).

Every word is drawn from Philox4x64-10 (the generator numpy ships as
:class:`numpy.random.Philox`, compiled here as :func:`rtstage._philox.philox4x64`)
with key ``(seed, TAG | channel << 8 | section)`` and counter ``(i, 0, 0, 0)``,
where ``i`` is the frame index inside the section; the first of the four
64-bit words is used.  No state is carried from one frame to the next, so the
sequence comes out the same for any block split, and the analyser can
regenerate any part of it from the five numbers alone.  ``TAG`` sets bits of
the key's second word that the engine's dither keys (channel numbers) never
set, so a path dithered by rtstage with the same seed draws different numbers.

Layout (every channel has the same timing and its own words)
------------------------------------------------------------
=============  ==========================  ==================================================
section        frames                      words (N-bit integers, A = 2^(N-2))
=============  ==========================  ==================================================
``head``       8192                        start marker: +A or -A (a binary pseudo-random
                                           sequence, -6 dBFS); its sharp autocorrelation
                                           survives gain, polarity, delay and requantization
``silence``    samplerate / 4              digital zero (shows dither and DC offset)
``low``        samplerate / 4              -8..7: only the lowest 4 bits are used
``full``       a multiple of 4096          uniform over -(2^(N-1) - 1) .. 2^(N-1) - 1: every
                                           bit toggles, the marker of word length
``near``       samplerate / 4              magnitude within 1/32 of full scale (-0.28 dBFS
                                           .. one LSB below full scale), random sign
``tail``       8192                        end marker, like ``head`` with its own words
=============  ==========================  ==================================================

The most negative word -2^(N-1) is never used, so a polarity inversion is
exact.  Each channel has its own key, hence its own words: a swapped or
duplicated channel is recognised by which channel's marker it carries.

Caution: the sequence is full-scale noise.  Played on loudspeakers or
headphones it is loud enough to harm hearing and equipment; keep monitoring
down or off while it runs, and follow local codes and licensed practice for
listening levels.

References
----------
.. [1] J. K. Salmon, M. A. Moraes, R. O. Dror, D. E. Shaw, "Parallel random
   numbers: as easy as 1, 2, 3", Proc. SC11, 2011.
"""

from collections import namedtuple

import numpy as np
from numba import njit

from .._philox import philox4x64
from ..errors import RtstageError

MARKER_FRAMES = 8192
"""Frames of the head and of the tail marker."""

FULL_STEP_FRAMES = 4096
"""The ``full`` section is a whole number of these, so that its length can be read back from a capture."""

LOW_BITS = 4
"""Bits used by the ``low`` section."""

NEAR_FRACTION_LOG2 = 5
"""``near`` words lie within 2^-5 of full scale."""

MIN_BITS = 8
MAX_BITS = 24

KEY_TAG = np.uint64(0x4C4B << 48)
"""Bits of the key's second word that mark link-test words (the dither keys are small channel numbers)."""

SECTION_NAMES = ("head", "silence", "low", "full", "near", "tail")
SECTION_CODES = {name: code for code, name in enumerate(SECTION_NAMES, start=1)}

CAUTION = ("caution: the link test sequence is full-scale noise; keep monitoring down or off while it plays, "
           "protect hearing and equipment, and follow local codes and licensed practice for listening levels")

Section = namedtuple("Section", "name start stop")


def _fixed_frames(samplerate):
    quarter = int(samplerate) // 4
    return 2 * MARKER_FRAMES + 3 * quarter


def sequence_frames(samplerate, seconds):
    """The valid sequence length nearest to ``seconds`` (at least one 4096-frame ``full`` block).

    Parameters
    ----------
    samplerate : int
        Sample rate in Hz.
    seconds : float
        Wanted duration in seconds.

    Returns
    -------
    int
        Frames of the sequence.
    """
    fixed = _fixed_frames(samplerate)
    steps = max(1, int(round((float(seconds) * samplerate - fixed) / FULL_STEP_FRAMES)))
    return fixed + steps * FULL_STEP_FRAMES


def snap_frames(samplerate, frames_estimate):
    """The valid sequence length nearest to a measured one (within half a ``full`` step)."""
    fixed = _fixed_frames(samplerate)
    steps = max(1, int(round((frames_estimate - fixed) / FULL_STEP_FRAMES)))
    return fixed + steps * FULL_STEP_FRAMES


def check_shape(bits, samplerate, channels, frames):
    """Raise :class:`RtstageError` unless the five numbers describe a valid sequence."""
    if not MIN_BITS <= int(bits) <= MAX_BITS:
        raise RtstageError(f"link test words must be {MIN_BITS}..{MAX_BITS} bits, got {bits}")
    if not 8000 <= int(samplerate) <= 384000:
        raise RtstageError(f"sample rate {samplerate} Hz is outside 8000..384000 Hz")
    if not 1 <= int(channels) <= 64:
        raise RtstageError(f"{channels} channels; the link test handles 1..64")
    fixed = _fixed_frames(samplerate)
    extra = int(frames) - fixed
    if extra < FULL_STEP_FRAMES or extra % FULL_STEP_FRAMES:
        raise RtstageError(f"{frames} frames is not a link test length at {samplerate} Hz "
                           f"(use sequence_frames(); lengths are {fixed} + k * {FULL_STEP_FRAMES}, k >= 1)")


def sections(samplerate, frames):
    """The sections of a sequence as :class:`Section` tuples ``(name, start, stop)`` in frame order."""
    quarter = int(samplerate) // 4
    full = int(frames) - _fixed_frames(samplerate)
    lengths = (MARKER_FRAMES, quarter, quarter, full, quarter, MARKER_FRAMES)
    out = []
    start = 0
    for name, length in zip(SECTION_NAMES, lengths):
        out.append(Section(name, start, start + length))
        start += length
    return out


def section_key(channel, section):
    """Second key word of a channel's section (the first is the seed)."""
    return KEY_TAG | np.uint64(int(channel) << 8) | np.uint64(SECTION_CODES[section])


@njit(nogil=True, cache=True)
def _word(code, w, bits):
    """The N-bit word of section ``code`` from Philox word ``w`` (see the module table)."""
    if code == 1 or code == 6:  # markers
        amp = np.int64(1) << (bits - 2)
        return amp if (w >> np.uint64(63)) == np.uint64(0) else -amp
    if code == 2:  # silence
        return np.int64(0)
    if code == 3:  # low: the lowest LOW_BITS bits
        return np.int64(w >> np.uint64(64 - 4)) - np.int64(8)
    top = (np.int64(1) << (bits - 1)) - np.int64(1)
    if code == 4:  # full range, 2^N - 1 values
        count = np.uint64(2 * top + 1)
        return np.int64(((w >> np.uint64(32)) * count) >> np.uint64(32)) - top
    # near full scale
    span = np.uint64(max(1, 1 << (bits - 1 - 5)))
    mag = top - np.int64(((w >> np.uint64(32)) * span) >> np.uint64(32))
    return mag if (w & np.uint64(1)) == np.uint64(0) else -mag


@njit(nogil=True, cache=True)
def _fill(seed, bits, starts, codes, key_tag, first, first_channel, out):
    """Words of frames ``first ..`` of channels ``first_channel ..`` into ``out`` (int32, frames x channels)."""
    nframes, nch = out.shape
    buf = np.zeros((1, 4), dtype=np.uint64)
    zero = np.uint64(0)
    for ch in range(nch):
        sec = 0
        for i in range(nframes):
            frame = first + i
            while sec + 1 < starts.shape[0] - 1 and frame >= starts[sec + 1]:
                sec += 1
            code = codes[sec]
            if code == 2:
                out[i, ch] = 0
                continue
            k1 = key_tag | (np.uint64(first_channel + ch) << np.uint64(8)) | np.uint64(code)
            philox4x64(np.uint64(frame - starts[sec]), zero, zero, zero, np.uint64(seed), k1, buf, 0)
            out[i, ch] = _word(code, buf[0, 0], bits)


def sequence_block(seed, bits, samplerate, channels, frames, start, count):
    """Frames ``start .. start + count`` of the sequence (clipped to its end) as N-bit integers.

    Parameters
    ----------
    seed : int
        0..2^64-1.
    bits : int
        Word length N, 8..24.
    samplerate : int
        Sample rate in Hz (sets the section lengths).
    channels : int
        Channel count.
    frames : int
        Total frames of the sequence (see :func:`sequence_frames`).
    start, count : int
        The block.

    Returns
    -------
    numpy.ndarray
        ``int32`` array of shape ``(n, channels)``, the words as signed N-bit
        integers (not left-justified).
    """
    check_shape(bits, samplerate, channels, frames)
    start = max(0, int(start))
    stop = min(int(frames), start + max(0, int(count)))
    out = np.zeros((max(0, stop - start), int(channels)), dtype=np.int32)
    if out.shape[0]:
        secs = sections(samplerate, frames)
        starts = np.array([s.start for s in secs] + [secs[-1].stop], dtype=np.int64)
        codes = np.array([SECTION_CODES[s.name] for s in secs], dtype=np.int64)
        _fill(np.uint64(seed), int(bits), starts, codes, KEY_TAG, start, 0, out)
    return out


def sequence_words(seed, bits, samplerate, channels, frames):
    """The whole sequence; see :func:`sequence_block`."""
    return sequence_block(seed, bits, samplerate, channels, frames, 0, frames)


def marker(seed, bits, channel, which="head"):
    """The ``head`` or ``tail`` marker of one channel as +1/-1 (float64, 8192 values)."""
    out = np.zeros((MARKER_FRAMES, 1), dtype=np.int32)
    starts = np.array([0, MARKER_FRAMES], dtype=np.int64)
    codes = np.array([SECTION_CODES[which]], dtype=np.int64)
    _fill(np.uint64(seed), int(bits), starts, codes, KEY_TAG, 0, int(channel), out)
    return out[:, 0] / float(1 << (int(bits) - 2))
