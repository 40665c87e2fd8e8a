"""Sample peak and true peak (ITU-R BS.1770-4 Annex 2), streamed block by block.

The true-peak meter oversamples by 4 with the 48-tap polyphase interpolator
printed in Annex 2 of the Recommendation and takes the largest magnitude.
Each interpolated value is a fixed-order sum over the last 12 input samples,
so the reading does not depend on how the signal is split into blocks.

References
----------
.. [1] ITU-R BS.1770-4, "Algorithms to measure audio programme loudness and
   true-peak audio level", 2015, Annex 2.
.. [2] EBU Tech 3341, "Loudness metering: 'EBU mode' metering to supplement
   EBU R 128 loudness normalization", v4, 2016 (true-peak test signals).
"""

import numpy as np
from numba import njit

OVERSAMPLING = 4
"""Oversampling factor of the interpolator (Annex 2: 4, i.e. 192 kHz from 48 kHz)."""

TAPS_PER_PHASE = 12

# BS.1770-4 Annex 2: coefficients of the 4-phase, 48-tap interpolating FIR.
# Row p is phase p; column k multiplies the input sample k periods before the newest.
ANNEX2_PHASES = np.array(
    [
        [0.0017089843750, 0.0109863281250, -0.0196533203125, 0.0332031250000, -0.0594482421875, 0.1373291015625,
         0.9721679687500, -0.1022949218750, 0.0476074218750, -0.0266113281250, 0.0148925781250, -0.0083007812500],
        [-0.0291748046875, 0.0292968750000, -0.0517578125000, 0.0891113281250, -0.1665039062500, 0.4650878906250,
         0.7797851562500, -0.2003173828125, 0.1015625000000, -0.0582275390625, 0.0330810546875, -0.0189208984375],
        [-0.0189208984375, 0.0330810546875, -0.0582275390625, 0.1015625000000, -0.2003173828125, 0.7797851562500,
         0.4650878906250, -0.1665039062500, 0.0891113281250, -0.0517578125000, 0.0292968750000, -0.0291748046875],
        [-0.0083007812500, 0.0148925781250, -0.0266113281250, 0.0476074218750, -0.1022949218750, 0.9721679687500,
         0.1373291015625, -0.0594482421875, 0.0332031250000, -0.0196533203125, 0.0109863281250, 0.0017089843750],
    ],
    dtype=np.float64,
)


@njit(nogil=True, cache=True)
def _peak_update(x, nframes, phases, ring, pos, true_peak, sample_peak):
    """Advance the interpolator over ``x[:nframes]`` and raise the peaks in place.

    ``ring`` (channels, 24) holds the last 12 inputs per channel twice
    (slots j and j + 12), so that the window newest-to-oldest is the
    contiguous run ``ring[c, p + 12 - k]``, k = 0..11, with ``p = pos[0]`` the
    slot of the newest one; ``pos[1]`` counts the frames seen so far: a value
    is interpolated only once the window holds 12 real samples.
    """
    nch = ring.shape[0]
    ntaps = phases.shape[1]
    nphases = phases.shape[0]
    p0 = pos[0]
    seen0 = pos[1]
    for c in range(nch):
        p = p0
        seen = seen0
        tp = true_peak[c]
        sp = sample_peak[c]
        for n in range(nframes):
            p += 1
            if p == ntaps:
                p = 0
            seen += 1
            v = x[n, c]
            ring[c, p] = v
            ring[c, p + ntaps] = v
            a = abs(v)
            if a > sp:
                sp = a
            if seen < ntaps:
                continue
            top = p + ntaps
            for ph in range(nphases):
                acc = 0.0
                for k in range(ntaps):
                    acc += phases[ph, k] * ring[c, top - k]
                acc = abs(acc)
                if acc > tp:
                    tp = acc
        true_peak[c] = tp
        sample_peak[c] = sp
        if c == nch - 1:
            pos[0] = p
            pos[1] = seen


class PeakMeter:
    """Sample peak and 4× oversampled true peak of ``channels`` channels.

    Parameters
    ----------
    channels : int
        Channel count.

    Notes
    -----
    The input is in full-scale units (1.0 = 0 dBFS), finite.  The true peak
    is the largest magnitude of the interpolated signal (BS.1770-4 Annex 2,
    steps: 4× oversampling with the Annex's filter, absolute value, maximum).
    The Annex's filter interpolates at 1/8, 3/8, 5/8 and 7/8 of a sample
    period, never at the samples themselves, so the reading is reported as the
    larger of the interpolated peak and the sample peak: a reconstructed
    signal passes through its samples, and a true-peak reading below the
    sample peak would be meaningless.  Values are interpolated only where the
    filter's 12-sample window lies wholly inside the signal: the signal is not
    padded with silence at either end, whose step would add a reconstruction
    overshoot that belongs to the padding, not to the signal.
    """

    def __init__(self, channels):
        self.channels = int(channels)
        self._ring = np.zeros((self.channels, 2 * TAPS_PER_PHASE), dtype=np.float64)
        self._pos = np.zeros(2, dtype=np.int64)
        self._true_peak = np.zeros(self.channels, dtype=np.float64)
        self._sample_peak = np.zeros(self.channels, dtype=np.float64)
        self.update(np.zeros((0, self.channels)))

    def update(self, x):
        """Take one block ``x`` of shape (frames, channels), float64, finite."""
        x = np.ascontiguousarray(x, dtype=np.float64)
        _peak_update(x, x.shape[0], ANNEX2_PHASES, self._ring, self._pos, self._true_peak, self._sample_peak)

    @property
    def sample_peak(self):
        """Largest sample magnitude per channel (linear, full scale = 1)."""
        return self._sample_peak.copy()

    @property
    def true_peak(self):
        """True peak per channel (linear, full scale = 1), never below the sample peak."""
        return np.maximum(self._true_peak, self._sample_peak)
