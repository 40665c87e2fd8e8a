"""MeterBank: every output-stage meter, fed block by block, read as a report.

The bank takes, for each block, the quantizer's input (after gain, before
the shaper's feedback and the dither) and the engine's output words for the
same frames, and keeps only running sums, a Welch segment and filter states:
a ten-minute file needs no more memory than a one-second one.  Every figure
depends on the signal alone, never on how it was split into blocks (zero-frame
blocks included), so the offline report and a meter thread fed by the live
engine agree.

Examples
--------
>>> import numpy as np
>>> from rtstage import Engine, EngineSettings
>>> from rtstage.meters import MeterBank
>>> engine = Engine(EngineSettings(bits=16, dither="tpdf", seed=1), channels=1, samplerate=48000)
>>> bank = MeterBank.for_engine(engine)
>>> x = 0.5 * np.sin(2 * np.pi * 997 / 48000 * np.arange(48000))[:, None]
>>> bank.update(x, engine.process(x))
>>> round(bank.report()["channels"][0]["sample_peak_dbfs"], 1)
-6.0
"""

import math

import numpy as np

from ..dither import DITHER_KINDS
from ..errors import RtstageError
from .bits import BitActivity
from .loudness import LoudnessMeter, loudness_report
from .modulation import DEFAULT_MIN_SAMPLES, DEFAULT_NBINS, NoiseModulation
from .noise import UNWEIGHTED_BAND_HZ, amplitude_to_dbfs, power_to_dbfs, predicted_psd, reading_powers
from .report import REPORT_VERSION
from .spectrum import WelchSpectrum, band_powers, fractional_octave_bands
from .truepeak import OVERSAMPLING, PeakMeter


HISTOGRAM_BINS = 128
"""Bins of the added-error histogram."""


def _exceeds(frames, peak_dbfs, limit_dbfs):
    """True when the programme's peak is above the level the shaped error leaves room for (None: no room at all)."""
    if not frames:
        return False
    if limit_dbfs is None:
        return True
    return peak_dbfs is not None and peak_dbfs > limit_dbfs


def _db_difference(a, b):
    return None if a is None or b is None else a - b


class MeterBank:
    """All meters of one output stage.

    Parameters
    ----------
    channels : int
        Channel count.
    samplerate : float
        Sample rate in Hz.
    bits : int
        Word length B of the output (step Q = 2^-(B-1) full scale).
    shaper_coefs : sequence of float
        Error-filter taps h_1..h_N of the shaper in use (empty for flat).
    dither_id : str
        Dither kind id (``none``, ``rpdf``, ``tpdf``, ``tpdf-hp``, ``gaussian``).
    dither_scale : float
        Dither amplitude scale.
    out_shift : int
        Left shift from the word to its container (words = q << out_shift);
        the container is ``bits + out_shift`` bits wide.
    shaper_id : str or None
        Shaper name, copied into the report.
    segment_frames : int or None
        Welch segment length; None picks one giving at most 6 Hz resolution.
    modulation_bins, modulation_min_samples : int
        Noise-modulation estimator settings (see :mod:`rtstage.meters.modulation`).
    loudness_target : rtstage.meters.loudness.LoudnessTarget or None
        Delivery target the report's ``loudness`` section is checked against.
    loudness_meter : rtstage.meters.loudness.LoudnessMeter or None
        A meter to continue (its programme carries on); None starts one.
    """

    def __init__(
        self,
        channels,
        samplerate,
        bits,
        shaper_coefs,
        dither_id,
        dither_scale=1.0,
        out_shift=0,
        shaper_id=None,
        segment_frames=None,
        modulation_bins=DEFAULT_NBINS,
        modulation_min_samples=DEFAULT_MIN_SAMPLES,
        loudness_target=None,
        loudness_meter=None,
    ):
        if dither_id not in DITHER_KINDS:
            raise RtstageError(f"unknown dither '{dither_id}' (known: {', '.join(DITHER_KINDS)})")
        if not 2 <= int(bits) <= 24:
            raise RtstageError(f"bits must be between 2 and 24, got {bits}")
        self.channels = int(channels)
        self.samplerate = float(samplerate)
        self.bits = int(bits)
        self.shaper_coefs = tuple(float(h) for h in shaper_coefs)
        self.shaper_id = shaper_id
        self.dither_id = dither_id
        self.dither_scale = float(dither_scale)
        self.out_shift = int(out_shift)
        self.container_bits = self.bits + self.out_shift
        self._lsb_per_fs = math.ldexp(1.0, self.bits - 1)
        self._step = 1.0 / self._lsb_per_fs
        self._q_hi = self._lsb_per_fs - 1.0
        self._q_lo = -self._lsb_per_fs

        self._spectrum = WelchSpectrum(self.channels, self.samplerate, segment_frames)
        self._modulation = NoiseModulation(self.channels, modulation_bins, modulation_min_samples)
        self._in_peaks = PeakMeter(self.channels)
        self._out_peaks = PeakMeter(self.channels)
        self._bits = BitActivity(self.channels, self.container_bits)
        self._clipped = np.zeros(self.channels, dtype=np.int64)
        self._nonfinite = np.zeros(self.channels, dtype=np.int64)
        self._engine_counts = None
        self.frames = 0
        # Programme loudness of the output; a meter handed over continues its programme.
        self.loudness_meter = loudness_meter or LoudnessMeter(self.channels, self.samplerate)
        self.loudness_target = loudness_target

        # Headroom the shaped error needs (the same authority the engine's warnings use), and
        # a histogram of the added error over the range that bound allows.
        from ..design import headroom_dbfs, headroom_lsb
        from ..shapers import Shaper

        shaper = Shaper(shaper_id or "custom", self.shaper_coefs)
        self.headroom_lsb = headroom_lsb(shaper, self.dither_id, self.dither_scale)
        self.peak_limit_dbfs = headroom_dbfs(shaper, self.dither_id, self.bits, self.dither_scale)
        span = max(4.0, math.ceil(min(self.headroom_lsb, 1e6)))
        self.histogram_edges_lsb = np.linspace(-span, span, HISTOGRAM_BINS + 1)
        self._histogram = np.zeros((self.channels, HISTOGRAM_BINS + 2), dtype=np.int64)

        # Theory is fixed by the settings: evaluate it once, on the measurement grid.
        freqs_hz = self._spectrum.freqs_hz
        self._predicted_psd = predicted_psd(
            freqs_hz, self.samplerate, self.bits, self.shaper_coefs, self.dither_id, self.dither_scale
        )
        self._predicted = {k: power_to_dbfs(p) for k, p in reading_powers(self._predicted_psd, freqs_hz, self.samplerate).items()}
        self.band_centres_hz, self._band_edges_hz = fractional_octave_bands(self.samplerate)
        self._band_bins = band_powers(np.ones(freqs_hz.size), freqs_hz, self._band_edges_hz) / (freqs_hz[1] - freqs_hz[0])
        self._predicted_bands = band_powers(self._predicted_psd, freqs_hz, self._band_edges_hz)

    @classmethod
    def for_engine(cls, engine, **kwargs):
        """A bank configured from an :class:`rtstage.Engine`'s settings and layout."""
        s = engine.settings
        return cls(
            engine.channels,
            engine.samplerate,
            s.bits,
            s.shaper.coefs,
            s.dither,
            s.dither_scale,
            engine.out_shift,
            shaper_id=s.shaper.id,
            **kwargs,
        )

    def update(self, x_quantizer_in, words):
        """Measure one block.

        Parameters
        ----------
        x_quantizer_in : ndarray, shape (frames, channels), float
            Input as it enters the quantizer, in full-scale units (after
            gain; before the shaper's feedback and the dither).
        words : ndarray, shape (frames, channels), int16 or int32
            The engine's output words for the same frames, ``q << out_shift``.

        Notes
        -----
        A non-finite input sample is counted and, as the kernel does, read as
        0 (NaN) or ±1.0 (±Inf) for the input peaks; its added noise is taken
        as 0 and it is left out of the noise-modulation bins.  Samples whose
        word sits at either end of the range are left out of those bins too.
        A sample counts as clipped when its word is at either end of the range
        and its input lies more than half a step beyond it (±Inf included).
        """
        x = np.asarray(x_quantizer_in, dtype=np.float64)
        words = np.asarray(words)
        if x.ndim != 2 or x.shape[1] != self.channels or words.shape != x.shape:
            raise RtstageError(
                f"meter block: expected input and words of shape (frames, {self.channels}), got {x.shape} and {words.shape}"
            )
        if not np.issubdtype(words.dtype, np.integer):
            raise RtstageError(f"meter block: words must be integers, got {words.dtype}")
        q = words.astype(np.int64) >> self.out_shift
        at_rail = (q >= self._q_hi) | (q <= self._q_lo)
        with np.errstate(invalid="ignore"):
            # ±Inf lies beyond the range (the kernel clips it unless the gain is below 1); NaN does not.
            v = x * self._lsb_per_fs
            beyond = (v >= self._q_hi + 0.5) | (v < self._q_lo - 0.5)
        self._clipped += (at_rail & beyond).sum(axis=0)
        finite = np.isfinite(x)
        if not finite.all():
            self._nonfinite += (~finite).sum(axis=0)
            x = np.where(finite, x, np.where(np.isnan(x), 0.0, np.copysign(1.0, x)))
            v = x * self._lsb_per_fs
        e = q - v
        e[~finite] = 0.0

        self._spectrum.update(e * self._step)
        if e.shape[0]:
            # Bin 0 and the last bin count errors outside the range (there should be none).
            idx = np.searchsorted(self.histogram_edges_lsb, e, side="right")
            for c in range(self.channels):
                self._histogram[c] += np.bincount(idx[:, c], minlength=HISTOGRAM_BINS + 2)
        self._modulation.update(v, e, finite & ~at_rail)
        self._in_peaks.update(x)
        y = q * self._step
        self._out_peaks.update(y)
        self.loudness_meter.update(y)
        self._bits.update(words)
        self.frames += x.shape[0]

    def observe(self, x, words, engine):
        """Render observer: meter a block of the raw input ``x`` as the engine's quantizer sees it.

        Matches ``rtstage.render.render_file``'s ``observers`` signature.  The
        input is multiplied by the engine's gain (``10^(gain_db/20)``, the
        factor the kernel applies, in the same order, so the product is the
        kernel's bit for bit), and the engine's exact clipped and non-finite
        counters replace the bank's own.  Valid while the gain is not ramping
        (an offline render never ramps).
        """
        gain = 10.0 ** (engine.settings.gain_db / 20.0)
        with np.errstate(invalid="ignore"):
            self.update(np.asarray(x, dtype=np.float64) * gain, words)
        self.set_engine_counts(engine.clipped, engine.nonfinite)

    def set_engine_counts(self, clipped, nonfinite):
        """Report the engine's own clipped and non-finite counts (cumulative, per channel) instead of the bank's.

        The bank counts a sample as clipped when its word is at either end of
        the range and its input lies more than half a step beyond it; that is
        the kernel's rule without dither and shaping.  The engine's counters
        (``engine.clipped``, ``engine.nonfinite``) are exact in every case.
        """
        self._engine_counts = (np.asarray(clipped, dtype=np.int64).copy(), np.asarray(nonfinite, dtype=np.int64).copy())

    def report(self):
        """The report as plain data (see docs/meters.md for every key)."""
        freqs_hz = self._spectrum.freqs_hz
        psd = self._spectrum.psd()
        measured = reading_powers(psd, freqs_hz, self.samplerate)
        bands = band_powers(psd, freqs_hz, self._band_edges_hz)
        modulation = self._modulation.reading_db()
        bins_used = self._modulation.bins_used()
        in_sample, in_true = self._in_peaks.sample_peak, self._in_peaks.true_peak
        out_sample, out_true = self._out_peaks.sample_peak, self._out_peaks.true_peak
        active = self._bits.active_bits()
        effective = self._bits.effective_bits()
        pattern = self._bits.pattern()
        clipped, nonfinite = self._engine_counts if self._engine_counts is not None else (self._clipped, self._nonfinite)
        bin_means = self._modulation.bin_means_lsb2()
        bin_stderr = self._modulation.bin_stderr_lsb2()
        limit = self.peak_limit_dbfs if math.isfinite(self.peak_limit_dbfs) else None

        channels = []
        for c in range(self.channels):
            added = {k: (power_to_dbfs(p[c]) if self.frames else None) for k, p in measured.items()}
            channels.append(
                {
                    "added_noise_dbfs": added,
                    "predicted_noise_dbfs": dict(self._predicted),
                    "noise_difference_db": {k: _db_difference(added[k], self._predicted[k]) for k in added},
                    "noise_modulation_db": modulation[c],
                    "noise_modulation_bins_used": int(bins_used[c]),
                    "sample_peak_dbfs": amplitude_to_dbfs(out_sample[c]),
                    "true_peak_dbtp": amplitude_to_dbfs(out_true[c]),
                    "input_sample_peak_dbfs": amplitude_to_dbfs(in_sample[c]),
                    "input_true_peak_dbtp": amplitude_to_dbfs(in_true[c]),
                    "clipped_samples": int(clipped[c]),
                    "nonfinite_samples": int(nonfinite[c]),
                    "active_bits": int(active[c]),
                    "effective_bits": int(effective[c]),
                    "bit_pattern": pattern[c],
                    "headroom_exceeded": _exceeds(self.frames, amplitude_to_dbfs(in_sample[c]), limit),
                    "noise_modulation_bins_lsb2": [None if not np.isfinite(v) else float(v) for v in bin_means[c]],
                    "noise_modulation_bin_stderr_lsb2": [None if not np.isfinite(v) else float(v) for v in bin_stderr[c]],
                    "noise_modulation_bin_counts": [int(v) for v in self._modulation.counts[c]],
                    "error_histogram": {
                        "edges_lsb": [float(v) for v in self.histogram_edges_lsb],
                        "counts": [int(v) for v in self._histogram[c, 1:-1]],
                        "outside": int(self._histogram[c, 0] + self._histogram[c, -1]),
                    },
                    "error_spectrum_dbfs": [
                        power_to_dbfs(p) if n >= 1 and self.frames else None for p, n in zip(bands[c], self._band_bins)
                    ],
                }
            )
        return {
            "report_version": REPORT_VERSION,
            "samplerate": self.samplerate,
            "bits": self.bits,
            "container_bits": self.container_bits,
            "out_shift": self.out_shift,
            "dither": self.dither_id,
            "dither_scale": self.dither_scale,
            "shaper": self.shaper_id,
            "shaper_coefs": list(self.shaper_coefs),
            "frames": self.frames,
            "duration_s": self.frames / self.samplerate,
            "noise_detector": "rms",
            "unweighted_band_hz": [UNWEIGHTED_BAND_HZ[0], min(UNWEIGHTED_BAND_HZ[1], self.samplerate / 2.0)],
            "weighted_band_hz": [0.0, self.samplerate / 2.0],
            "true_peak_oversampling": OVERSAMPLING,
            "spectrum": {
                "window": "hann",
                "segment_frames": self._spectrum.segment_frames,
                "overlap": 0.5,
                "segments": self._spectrum.nsegments,
            },
            "noise_modulation": {"bins": self._modulation.nbins, "min_samples_per_bin": self._modulation.min_samples},
            "shaped_error_headroom_lsb": self.headroom_lsb,
            "peak_limit_dbfs": limit,
            "error_spectrum_bands_hz": [float(f) for f in self.band_centres_hz],
            "predicted_spectrum_dbfs": [power_to_dbfs(p) if n >= 1 else None for p, n in zip(self._predicted_bands, self._band_bins)],
            "loudness": loudness_report(self.loudness_meter, out_true, self.loudness_target),
            "channels": channels,
        }
