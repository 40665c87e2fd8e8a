"""The kernel's array layout: parameter slots, state arrays and word containers.

Everything a driver needs to prepare, read or size the kernel's arrays, and
nothing compiled: the numba kernel (:mod:`rtstage.kernel`) and its
ahead-of-time build (:mod:`rtstage.kernel_aot`) both follow this layout, and
a driver can set up an engine without importing numba.

numba's cache keys a compiled function on its own source file only: after
changing a value here, touch ``rtstage/kernel.py`` (or clear its
``__pycache__``) so the numba cache is rebuilt; the ahead-of-time build
fingerprints this file itself.
"""

import numpy as np

MAX_TAPS = 32
"""Most error-filter taps a shaper may have (the kernel's parameter block holds this many)."""

# --- integer parameters (int64) -----------------------------------------------------
IP_BITS = 0
"""Target word length B, 2..24."""
IP_DITHER = 1
"""Dither code (see :mod:`rtstage.dither`)."""
IP_NTAPS = 2
"""Number of error-filter taps in use."""
IP_SEED = 3
"""Dither seed: the uint64 seed's bit pattern."""
IP_OUT_SHIFT = 4
"""Left shift that places a B-bit word in its container."""
IP_RAMP_FRAMES = 5
"""Length of a gain ramp, in frames (at least 1); also the length of crossfades and mute ramps."""
IP_MONITOR = 6
"""Monitor code: MON_REQUANTIZED, MON_ERROR or MON_INPUT (what ``y`` carries)."""
IP_MUTE = 7
"""1: ramp the output to exactly 0 and hold it there."""
IP_AUTO_MUTE = 8
"""1: mute a channel whose input has been exact digital zero for IP_HOLD_FRAMES frames."""
IP_HOLD_FRAMES = 9
"""Auto-mute hold time in frames (at least 1)."""
IP_CHANNEL0 = 10
"""Channel number of the first channel in the arrays (0 unless a driver runs a group of a
stream's channels on its own; the dither key uses ``IP_CHANNEL0 + c``)."""
IP_LEN = 12

# --- float parameters (float64) -----------------------------------------------------
FP_GAIN = 0
"""Linear gain before the quantizer (the target of the ramp)."""
FP_DITHER_SCALE = 1
"""Dither amplitude scale (1 = the textbook amplitude)."""
FP_FEEDBACK_PEAK = 2
"""Bound on the fed-back error after a clip, in LSB."""
FP_ERROR_GAIN = 3
"""Linear make-up gain of the error monitor (the target of its ramp)."""
FP_ERROR_CEIL = 4
"""Peak ceiling of the error monitor's safety limiter, linear full scale (0.1 = -20 dBFS)."""
FP_COEF0 = 8
"""First error-filter tap h_1; taps follow contiguously."""
FP_LEN = FP_COEF0 + MAX_TAPS

# --- clock and ramp state -----------------------------------------------------------
CLK_FRAME = 0
"""Sample index of the next frame to process."""
CLK_HPOS = 1
"""Slot of the error history that the next frame writes."""
CLK_RAMP_LEFT = 2
"""Frames left in the current gain ramp."""
CLK_ERAMP_LEFT = 3
"""Frames left in the current error-gain ramp."""
CLK_MUTE_POS = 4
"""Mute ramp position, 0 (audible) .. ramp frames (silent)."""
CLK_MON_W0 = 5
"""Crossfade weight of monitor mode 0, 0 .. ramp frames; modes 1 and 2 follow."""
CLK_LEN = 8

RAMP_GAIN = 0
"""Gain applied to the last frame."""
RAMP_STEP = 1
"""Gain increment per frame while ramping."""
RAMP_TARGET = 2
"""Gain the current ramp ends at."""
RAMP_EGAIN = 3
"""Error-monitor gain applied to the last frame."""
RAMP_ESTEP = 4
"""Error-monitor gain increment per frame while ramping."""
RAMP_ETARGET = 5
"""Error-monitor gain the current ramp ends at."""
RAMP_LEN = 8
assert (RAMP_STEP, RAMP_TARGET, RAMP_ESTEP, RAMP_ETARGET) == (RAMP_GAIN + 1, RAMP_GAIN + 2, RAMP_EGAIN + 1, RAMP_EGAIN + 2)

# --- per-channel counters -----------------------------------------------------------
CNT_CLIPPED = 0
"""Samples limited to the word's range."""
CNT_NONFINITE = 1
"""NaN and ±Inf input samples replaced."""
CNT_ZERO_RUN = 2
"""Consecutive exact-zero input samples (saturates at the hold time)."""
CNT_AM_MUTED = 3
"""1 while auto-mute holds the channel muted."""
CNT_AM_POS = 4
"""Auto-mute ramp position, 0 (audible) .. ramp frames (silent)."""
CNT_AM_FRAMES = 5
"""Frames during which auto-mute held the channel muted, since the start."""
CNT_LEN = 8

MON_REQUANTIZED = 0
MON_ERROR = 1
MON_INPUT = 2
N_MONITOR = 3

HIST_LEN = 64
"""Error-history length per channel (a power of two, at least MAX_TAPS)."""
HIST_MASK = HIST_LEN - 1

FRAMES_PER_BLOCK_SHIFT = 2
"""A Philox block serves 2**FRAMES_PER_BLOCK_SHIFT = 4 frames of a channel."""
CHUNK_FRAMES = 64
"""Frames per chunk: the kernel computes a chunk's Philox blocks, then runs its frames."""
RNG_RING_BLOCKS = 82
"""Rows of 4 words per channel in ``rng_words``, a scratch area of the kernel: the chunk's
dither values (as float64, 4 to a row), the lean loop's error window, and, in row
RNG_SCRATCH_ROW, the Philox block being used.  Nothing is carried in it from one call to
the next."""
RNG_SCRATCH_ROW = RNG_RING_BLOCKS - 1
DITHER_STRIDE = 4 * RNG_RING_BLOCKS
"""Distance between two channels' areas in the flat float64 view of ``rng_words``."""
WINDOW_OFFSET = 2 * CHUNK_FRAMES
"""Start of a pair's error window (MAX_TAPS errors before the chunk, then the chunk's; two lanes)."""
assert WINDOW_OFFSET + 2 * (MAX_TAPS + CHUNK_FRAMES) <= 4 * RNG_SCRATCH_ROW
RNG_TAG_FRAME = 0
"""Tag: the frame from which the ring is valid (-1: invalid)."""
RNG_TAG_SEED = 1
"""Tag: the seed the ring was computed for."""
RNG_TAG_LEN = 2

DITHER_NONE = 0
DITHER_RPDF = 1
DITHER_TPDF = 2
DITHER_TPDF_HP = 3
DITHER_GAUSSIAN = 4


def container_bits_of(format_bits):
    """``container_bits``: bits of the integer the words of a ``format_bits``-bit sample format travel in: 16 for 16, else 32.

    Words of a 24-bit format (and of a 32-bit one) sit left-justified in
    int32, so ``out_shift = container_bits_of(format_bits) - bits``.
    """
    return 16 if format_bits == 16 else 32


def word_dtype(format_bits):
    """numpy dtype of the output words ``y`` for ``format_bits`` (``container_bits``, 16 or 32, gives the same)."""
    return np.int16 if container_bits_of(format_bits) == 16 else np.int32


class KernelState:
    """Preallocated parameter and state arrays for ``channels`` channels.

    Attributes
    ----------
    iparams, fparams : ndarray
        Parameters read by the kernel at the start of every block.
    hist : ndarray, shape (channels, HIST_LEN)
        Circular error history of each channel's shaper.
    counts : ndarray, shape (channels, CNT_LEN)
        Clipped and non-finite sample counts.
    clock : ndarray
        Next sample index, history slot, frames left in the gain ramp.
    ramp : ndarray
        Current gain, step and target of the gain ramp.
    rng_words : ndarray, shape (channels * RNG_RING_BLOCKS, 4)
        Ring of Philox blocks computed ahead of use (values never depend on it).
    rng_tag : ndarray, shape (RNG_TAG_LEN,)
        Frame and seed the ring is valid for, so that a block continuing the
        previous one reuses it.
    """

    def __init__(self, channels):
        self.channels = int(channels)
        self.iparams = np.zeros(IP_LEN, dtype=np.int64)
        self.fparams = np.zeros(FP_LEN, dtype=np.float64)
        self.hist = np.zeros((self.channels, HIST_LEN), dtype=np.float64)
        self.counts = np.zeros((self.channels, CNT_LEN), dtype=np.int64)
        self.clock = np.zeros(CLK_LEN, dtype=np.int64)
        self.ramp = np.zeros(RAMP_LEN, dtype=np.float64)
        self.rng_words = np.zeros((self.channels * RNG_RING_BLOCKS, 4), dtype=np.uint64)
        self.rng_tag = np.full(RNG_TAG_LEN, -1, dtype=np.int64)

    def arrays(self):
        """The arrays in the order :func:`process_block` takes them after ``x, y, nframes``."""
        return (self.iparams, self.fparams, self.hist, self.counts, self.clock, self.ramp, self.rng_words, self.rng_tag)

    def reset(self, start_frame=0):
        """Clear history, counters and caches; the next frame gets sample index ``start_frame``.

        Gain, error gain, monitor mode and mute start at rest at the values
        in ``iparams``/``fparams`` (no ramp, no crossfade).
        """
        self.hist[:] = 0.0
        self.counts[:] = 0
        self.clock[:] = 0
        self.clock[CLK_FRAME] = start_frame
        self.rng_tag[:] = -1
        self.ramp[:] = 0.0
        self.settle()

    def settle(self):
        """Bring gain, error gain, monitor crossfade and mute to their targets at once (no ramp)."""
        gain = self.fparams[FP_GAIN]
        self.ramp[RAMP_GAIN] = gain
        self.ramp[RAMP_TARGET] = gain
        self.ramp[RAMP_STEP] = 0.0
        egain = self.fparams[FP_ERROR_GAIN]
        self.ramp[RAMP_EGAIN] = egain
        self.ramp[RAMP_ETARGET] = egain
        self.ramp[RAMP_ESTEP] = 0.0
        self.clock[CLK_RAMP_LEFT] = 0
        self.clock[CLK_ERAMP_LEFT] = 0
        frames = max(int(self.iparams[IP_RAMP_FRAMES]), 1)
        mode = int(self.iparams[IP_MONITOR])
        for m in range(N_MONITOR):
            self.clock[CLK_MON_W0 + m] = frames if m == mode else 0
        self.clock[CLK_MUTE_POS] = frames if self.iparams[IP_MUTE] != 0 else 0
