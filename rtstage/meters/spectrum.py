"""Streaming Welch power spectral density and fractional-octave bands.

Samples arrive in blocks of any size; they are gathered into fixed segments
of ``segment_frames`` frames with 50 % overlap, each segment is Hann-windowed
and transformed, and the squared magnitudes are summed.  The segments (and
the order of the sums) depend only on the signal, not on the block split, so
the estimate is the same for any split.  Memory is one segment per channel.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of
   power spectra", IEEE Trans. Audio Electroacoustics 15(2), 1967.
.. [2] IEC 61260-1:2014, "Octave-band and fractional-octave-band filters",
   base-10 band centres and edges.
"""

import math

import numpy as np
from scipy.signal import get_window


def default_segment_frames(samplerate):
    """Power of two giving a frequency resolution of at most 6 Hz (8192 at 44.1/48 kHz)."""
    return 1 << max(8, math.ceil(math.log2(samplerate / 6.0)))


class WelchSpectrum:
    """One-sided PSD of ``channels`` channels, averaged over Hann segments.

    Parameters
    ----------
    channels : int
        Channel count.
    samplerate : float
        Sample rate in Hz.
    segment_frames : int or None
        Segment length (even); None picks :func:`default_segment_frames`.

    Notes
    -----
    The PSD follows :func:`scipy.signal.welch` with ``window='hann'``,
    ``noverlap=segment_frames//2``, ``detrend=False``, ``scaling='density'``:
    ``P[k] = c_k |X[k]|² / (fs Σ w²)`` with ``c_k = 2`` except at 0 Hz and
    Nyquist, so ``Σ P[k]·Δf`` is the mean power.  Frames after the last
    complete segment (fewer than a hop) are not counted.  When no segment is
    complete yet, :meth:`psd` uses the frames held so far as one shorter,
    zero-padded segment.
    """

    def __init__(self, channels, samplerate, segment_frames=None):
        self.channels = int(channels)
        self.samplerate = float(samplerate)
        self.segment_frames = int(segment_frames or default_segment_frames(samplerate))
        if self.segment_frames < 4 or self.segment_frames % 2:
            raise ValueError("segment_frames must be even and at least 4")
        self.hop_frames = self.segment_frames // 2
        self.window = get_window("hann", self.segment_frames)
        self.freqs_hz = np.fft.rfftfreq(self.segment_frames, 1.0 / self.samplerate)
        self._buf = np.zeros((self.segment_frames, self.channels), dtype=np.float64)
        self._fill = 0
        self._acc = np.zeros((self.freqs_hz.size, self.channels), dtype=np.float64)
        self.nsegments = 0

    def update(self, x):
        """Take one block ``x`` of shape (frames, channels)."""
        n = x.shape[0]
        pos = 0
        while pos < n:
            take = min(self.segment_frames - self._fill, n - pos)
            self._buf[self._fill : self._fill + take] = x[pos : pos + take]
            self._fill += take
            pos += take
            if self._fill == self.segment_frames:
                spectrum = np.fft.rfft(self._buf * self.window[:, None], axis=0)
                self._acc += spectrum.real**2 + spectrum.imag**2
                self.nsegments += 1
                self._buf[: self.hop_frames] = self._buf[self.hop_frames :]
                self._fill = self.hop_frames

    def _density_scale(self, window):
        scale = np.full(self.freqs_hz.size, 2.0 / (self.samplerate * float(np.sum(window**2))))
        scale[0] *= 0.5
        scale[-1] *= 0.5
        return scale

    def psd(self):
        """One-sided PSD, shape (channels, nfreqs), in (full-scale units)² per Hz."""
        if self.nsegments:
            return (self._acc * self._density_scale(self.window)[:, None]).T / self.nsegments
        if self._fill < 2:
            return np.zeros((self.channels, self.freqs_hz.size))
        window = get_window("hann", self._fill)
        padded = np.zeros((self.segment_frames, self.channels))
        padded[: self._fill] = self._buf[: self._fill] * window[:, None]
        spectrum = np.fft.rfft(padded, axis=0)
        return ((spectrum.real**2 + spectrum.imag**2) * self._density_scale(window)[:, None]).T


def fractional_octave_bands(samplerate, fraction=3, low_hz=20.0):
    """Base-10 fractional-octave bands from ``low_hz`` up to Nyquist.

    Parameters
    ----------
    samplerate : float
        Sample rate in Hz; bands whose upper edge exceeds fs/2 are left out.
    fraction : int
        Bands per octave (3 for third-octave bands).
    low_hz : float
        Lowest band centre kept (the band holding it is the first).

    Returns
    -------
    centres_hz, edges_hz : ndarray
        Exact mid-band frequencies ``1000·10^(3n/(10·fraction))`` (IEC 61260-1,
        base 10) and their edges, shape (nbands, 2).
    """
    step = 3.0 / (10.0 * fraction)
    half = 10.0 ** (step / 2.0)
    n_low = math.floor(math.log10(low_hz / 1000.0) / step + 0.5)
    centres = []
    n = n_low
    while True:
        centre = 1000.0 * 10.0 ** (n * step)
        if centre * half > samplerate / 2.0:
            break
        centres.append(centre)
        n += 1
    centres = np.array(centres)
    return centres, np.stack([centres / half, centres * half], axis=1)


def band_powers(psd, freqs_hz, edges_hz):
    """Power in each band: ``Σ P[k]·Δf`` over bins whose centre lies in [low, high)."""
    df = freqs_hz[1] - freqs_hz[0]
    out = np.empty(psd.shape[:-1] + (len(edges_hz),))
    for i, (low, high) in enumerate(edges_hz):
        mask = (freqs_hz >= low) & (freqs_hz < high)
        out[..., i] = psd[..., mask].sum(axis=-1) * df
    return out
