"""Bit activity of output words: which bits toggled, and the word length in use.

Every word is read as the bit pattern of its container (two's complement,
``width`` bits).  A bit is *active* when it took both values during the
measurement; a bit that kept one value is *stuck* at it.  The effective word
length is ``width - lowest active bit``: a 16-bit signal left in a 24-bit
container reads 16, and a capture that passed through a stage truncating to
14 bits reads 14 however loud the signal.
"""

import numpy as np
from numba import njit


@njit(nogil=True, cache=True)
def _bits_update(words, nframes, mask, ones, zeros):
    nch = words.shape[1]
    for n in range(nframes):
        for c in range(nch):
            w = np.int64(words[n, c]) & mask
            ones[c] |= w
            zeros[c] |= ~w & mask


class BitActivity:
    """Toggle record of the container bits of ``channels`` channels of words.

    Parameters
    ----------
    channels : int
        Channel count.
    width : int
        Container width in bits (16 or 32 for rtstage's words).
    """

    def __init__(self, channels, container_bits):
        self.channels = int(channels)
        self.container_bits = int(container_bits)
        self.mask = np.int64((1 << self.container_bits) - 1)
        self._ones = np.zeros(self.channels, dtype=np.int64)
        self._zeros = np.zeros(self.channels, dtype=np.int64)
        for dtype in (np.int16, np.int32, np.int64):
            _bits_update(np.zeros((0, self.channels), dtype), 0, self.mask, self._ones.copy(), self._zeros.copy())

    def update(self, words):
        """Take one block of integer words, shape (frames, channels)."""
        _bits_update(np.ascontiguousarray(words), words.shape[0], self.mask, self._ones, self._zeros)

    def toggled_mask(self):
        """Per channel, the container bits that were seen both set and clear."""
        return [int(o & z) for o, z in zip(self._ones, self._zeros)]

    def active_bits(self):
        """Number of active (toggled) bits per channel."""
        return [bin(m).count("1") for m in self.toggled_mask()]

    def effective_bits(self):
        """Word length in use per channel: width minus the lowest active bit (0 when none toggled)."""
        out = []
        for m in self.toggled_mask():
            out.append(0 if m == 0 else self.container_bits - ((m & -m).bit_length() - 1))
        return out

    def pattern(self):
        """Per channel, one character per bit, most significant first: ``*`` active, ``0``/``1`` stuck, ``-`` no words yet."""
        out = []
        for ones, zeros in zip(self._ones, self._zeros):
            chars = []
            for bit in range(self.container_bits - 1, -1, -1):
                seen1 = (int(ones) >> bit) & 1
                seen0 = (int(zeros) >> bit) & 1
                chars.append("*" if seen1 and seen0 else "1" if seen1 else "0" if seen0 else "-")
            out.append("".join(chars))
        return out
