"""Noise modulation: how much the added noise's power depends on the signal.

Definition
----------
Let v[n] be the quantizer input in LSB (``x·2^(B-1)``, after gain, before the
shaper's feedback and the dither) and e[n] = q[n] - v[n] the added noise in
LSB.  Every sample whose input is finite and whose word is not at either end
of the range is put in one of ``nbins`` equal bins of the input's position
within its step, ``a = v - floor(v)`` in [0, 1).  For every bin holding at
least ``min_samples`` samples the mean added-noise power
``P_j = mean(e²)`` is formed, and

    noise modulation = 10·log10(max_j P_j / min_j P_j)  dB.

The conditional moments of the error are periodic in v with period one
step, so binning v modulo one LSB loses nothing; for a signal far below one
LSB the bins are simply those of the input value itself.

Expected readings: TPDF dither makes E[e² | v] = Q²/4 for every v (Lipshitz,
Wannamaker & Vanderkooy 1992), so only estimation noise remains; RPDF gives
E[e² | a] = a(1 - a) Q², which vanishes at a = 0, and no dither gives
e² = min(a, 1 - a)² Q².  The statistical floor for TPDF: the per-sample
e² has a relative standard deviation of about 1.2, so a bin mean with n
samples has 1.2/√n, and the spread of the largest to the smallest of ~30
such means is about 4·1.2/√n, i.e. ``≈ 21/√n_min`` dB: 0.21 dB at the
default 10 000 samples per bin, below 0.1 dB for bins of 50 000 samples.

References
----------
.. [1] S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and
   dither: a theoretical survey", J. Audio Eng. Soc. 40(5), 1992.
"""

import math

import numpy as np
from numba import njit

DEFAULT_NBINS = 32
"""Bins across one step of the input."""
DEFAULT_MIN_SAMPLES = 10000
"""Samples a bin must hold to take part in the reading."""
MAX_READING_DB = 200.0
"""Ceiling of the reading (a bin with no noise at all beside bins with some)."""


@njit(nogil=True, cache=True)
def _bin_update(v_lsb, e_lsb, valid, nframes, counts, sums, sums4):
    nch = counts.shape[0]
    nbins = counts.shape[1]
    for n in range(nframes):
        for c in range(nch):
            if valid[n, c]:
                v = v_lsb[n, c]
                j = int((v - math.floor(v)) * nbins)
                if j >= nbins:
                    j = nbins - 1
                e = e_lsb[n, c]
                counts[c, j] += 1
                e2 = e * e
                sums[c, j] += e2
                sums4[c, j] += e2 * e2


class NoiseModulation:
    """Binned mean added-noise power for ``channels`` channels (see the module's definition).

    Parameters
    ----------
    channels : int
        Channel count.
    nbins : int
        Bins across one step of the input.
    min_samples : int
        Samples a bin must hold to count.
    """

    def __init__(self, channels, nbins=DEFAULT_NBINS, min_samples=DEFAULT_MIN_SAMPLES):
        self.channels = int(channels)
        self.nbins = int(nbins)
        self.min_samples = int(min_samples)
        self.counts = np.zeros((self.channels, self.nbins), dtype=np.int64)
        self.sums = np.zeros((self.channels, self.nbins), dtype=np.float64)
        self.sums4 = np.zeros((self.channels, self.nbins), dtype=np.float64)
        empty = np.zeros((0, self.channels))
        self.update(empty, empty, np.zeros((0, self.channels), dtype=np.bool_))

    def update(self, v_lsb, e_lsb, valid):
        """Add one block: input ``v_lsb`` and noise ``e_lsb`` in LSB, ``valid`` mask, all (frames, channels)."""
        _bin_update(
            np.ascontiguousarray(v_lsb, dtype=np.float64),
            np.ascontiguousarray(e_lsb, dtype=np.float64),
            np.ascontiguousarray(valid, dtype=np.bool_),
            v_lsb.shape[0],
            self.counts,
            self.sums,
            self.sums4,
        )

    def bin_means_lsb2(self):
        """Mean e² per bin in LSB², shape (channels, nbins); NaN for bins below ``min_samples``."""
        with np.errstate(invalid="ignore", divide="ignore"):
            means = self.sums / self.counts
        return np.where(self.counts >= self.min_samples, means, np.nan)

    def bin_stderr_lsb2(self):
        """Standard error of each bin's mean e², LSB² (sample variance of e² over n); NaN below ``min_samples``."""
        with np.errstate(invalid="ignore", divide="ignore"):
            n = self.counts.astype(np.float64)
            mean = self.sums / n
            var = np.maximum(self.sums4 / n - mean * mean, 0.0) * n / np.maximum(n - 1.0, 1.0)
            se = np.sqrt(var / n)
        return np.where(self.counts >= self.min_samples, se, np.nan)

    def bins_used(self):
        """Number of bins per channel holding at least ``min_samples`` samples."""
        return (self.counts >= self.min_samples).sum(axis=1)

    def reading_db(self):
        """Noise modulation per channel in dB (a list; None where fewer than two bins qualify)."""
        out = []
        for means in self.bin_means_lsb2():
            used = means[np.isfinite(means)]
            if used.size < 2:
                out.append(None)
                continue
            high, low = float(used.max()), float(used.min())
            if high <= 0.0:
                out.append(0.0)
            elif low <= 0.0:
                out.append(MAX_READING_DB)
            else:
                out.append(min(10.0 * math.log10(high / low), MAX_READING_DB))
        return out
