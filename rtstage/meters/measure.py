"""Analyse a sound file as it is, without requantizing it.

:func:`measure_file` reads any file libsndfile reads, block by block, and
reports per channel: which container bits toggled and the word length really
in use, whether the low bits look dithered, truncated or untouched, sample and
true peak, DC offset, the noise floor in quiet passages; and the programme's
loudness (ITU-R BS.1770-4, EBU Tech 3342).  Every key is described in
docs/meters.md ("Measuring a file").

How the low bits are judged
---------------------------
The file is cut into 100 ms windows.  *Quiet* windows are those that are not
digital silence (all words exactly zero) and whose RMS is below
:data:`QUIET_LSB` steps of the word length in use.  In them:

* a dithered requantizer leaves a noise floor of a fraction of a step to a
  few steps (TPDF: 0.5 step RMS, Lipshitz, Wannamaker & Vanderkooy 1992) and
  never holds one word for long: identical words follow each other with a
  probability well below one half;
* an undithered (truncating or rounding) stage turns a quiet passage into
  runs of identical words, because the signal's own noise lies below one step;
* an untouched high-resolution recording carries its own noise well above
  one step of its container.

The verdict ``low_bits`` is ``dithered``, ``truncated`` (any undithered
shortening: truncation or plain rounding), ``untouched``, or
``undetermined`` when the file has no quiet passage; ``low_bits_reason``
says what was seen.  These are rules of thumb (common practice), not a proof:
a loud, dense programme carries no evidence of its last requantizer.

References
----------
.. [1] S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and
   dither: a theoretical survey", JAES 40(5), 1992.
.. [2] AES17-2015 (dBFS), ITU-R BS.1770-4 (true peak, loudness), EBU Tech 3342.
"""

import math
import os

import numpy as np

from ..errors import RtstageError
from .bits import BitActivity
from .loudness import LoudnessMeter, loudness_report
from .truepeak import PeakMeter

MEASURE_VERSION = 1
"""Version of the measure report's layout."""

WINDOW_S = 0.1
"""Length of the windows the quiet-passage figures are formed on."""
QUIET_LSB = 8.0
"""A window is quiet below this RMS, in steps of the word length in use."""
REPEAT_FRACTION_TRUNCATED = 0.75
"""Share of quiet samples equal to the one before above which the low bits read as undithered.

TPDF dither repeats a word with probability at most 0.59 (input at a step's
centre: 0.75² + 2·0.125²); shaped dither less; an undithered quiet passage
holds each word for many samples."""
FLOOR_WINDOWS = 10
"""The noise floor is the power of the quietest ten windows (one second) that are not digital silence."""
DITHER_FLOOR_LSB = (0.2, 3.0)
"""Quiet-passage RMS (steps) a dithered word length leaves: TPDF 0.5, shaped a few steps."""

_CONTAINER_BITS = {"PCM_S8": 8, "PCM_U8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32, "FLOAT": 32, "DOUBLE": 64}


def _dbfs_power(power):
    """AES17 dBFS of a mean power in full-scale units² (0 dBFS = a full-scale sine)."""
    return 10.0 * math.log10(2.0 * power) if power > 0 else None


def _dbfs_amplitude(value):
    return 20.0 * math.log10(value) if value > 0 else None


class _WindowStats:
    """Per-window power, digital silence and held-word counts, in container steps."""

    def __init__(self, channels):
        self.channels = channels
        self.sumsq = []
        self.silent = []
        self.held = []
        self.frames = []

    def update(self, words):
        w = words.astype(np.float64)
        self.sumsq.append((w * w).sum(axis=0))
        self.silent.append(~np.any(words != 0, axis=0))
        self.frames.append(words.shape[0])
        self.held.append((words[1:] == words[:-1]).sum(axis=0))

    def arrays(self):
        if not self.frames:
            z = np.zeros((0, self.channels))
            return z, z.astype(bool), z.astype(np.int64), np.zeros(0)
        return np.array(self.sumsq), np.array(self.silent), np.array(self.held), np.array(self.frames, dtype=float)


def _read_blocks(path, window_frames, windows_per_block=64):
    import soundfile as sf

    try:
        info = sf.info(path)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot read {path}: {exc}") from None
    is_float = info.subtype in ("FLOAT", "DOUBLE", "VORBIS", "OPUS", "MPEG_LAYER_III") or info.subtype not in _CONTAINER_BITS
    dtype = "float64" if is_float else "int32"
    blocks = sf.blocks(path, blocksize=window_frames * windows_per_block, dtype=dtype, always_2d=True)
    return info, is_float, blocks


def _float_words(x, width=32):
    """Float samples as ``width``-bit words when every one is an exact multiple of 2^-(width-1), else None."""
    scaled = x * float(2 ** (width - 1))
    if not np.all(np.isfinite(scaled)) or np.any(np.abs(scaled) > 2.0 ** (width - 1)):
        return None
    if not np.array_equal(scaled, np.round(scaled)):
        return None
    return np.clip(scaled, -(2 ** (width - 1)), 2 ** (width - 1) - 1).astype(np.int64)


def low_bits_verdict(container_bits, effective_bits, quiet_rms_lsb, held_fraction, quiet_windows, floor_lsb=None):
    """The low-bit verdict and its reason (see the module notes).

    Parameters
    ----------
    container_bits, effective_bits : int
        Width of the container and of the words in use.
    quiet_rms_lsb : float or None
        RMS of the quiet windows, in steps of the word length in use.
    held_fraction : float
        Share of the quiet windows' samples equal to the sample before.
    quiet_windows : int
        Number of quiet windows.
    floor_lsb : float or None
        RMS of the quietest tenth of the windows that are not digital silence, in steps.
    """
    padded = ""
    if 0 < effective_bits < container_bits:
        padded = f"; the low {container_bits - effective_bits} bits of the {container_bits}-bit container are always 0"
    if effective_bits == 0:
        return "undetermined", "no bit ever toggled (constant or silent file)"
    if not quiet_windows and floor_lsb is not None and effective_bits == container_bits >= 24:
        return "untouched", (f"the quietest passages carry {floor_lsb:.0f} steps RMS of their own noise, far above the "
                             f"{effective_bits}-bit word's resolution: no sign of a requantizer")
    if not quiet_windows:
        return "undetermined", ("no quiet passage (100 ms with an RMS below "
                                f"{QUIET_LSB:g} steps that is not digital silence): loud material carries no trace of its dither" + padded)
    if held_fraction >= REPEAT_FRACTION_TRUNCATED:
        return "truncated", (f"{100 * held_fraction:.0f} % of the quiet samples repeat the {effective_bits}-bit word before "
                             "them (dither allows at most 59 %): the word was shortened without dither" + padded)
    if quiet_rms_lsb is not None and quiet_rms_lsb < DITHER_FLOOR_LSB[1] and quiet_rms_lsb >= DITHER_FLOOR_LSB[0]:
        return "dithered", (f"quiet passages hold a noise floor of {quiet_rms_lsb:.2f} steps RMS of the {effective_bits}-bit word "
                            f"and {100 * held_fraction:.0f} % repeated words, as dither leaves (TPDF: 0.50 steps)" + padded)
    if quiet_rms_lsb is not None and quiet_rms_lsb >= DITHER_FLOOR_LSB[1] and effective_bits == container_bits:
        return "untouched", (f"the quietest passages carry {quiet_rms_lsb:.1f} steps RMS of their own noise, well above the "
                             f"{effective_bits}-bit word's resolution: no sign of a requantizer")
    if quiet_rms_lsb is not None and quiet_rms_lsb >= DITHER_FLOOR_LSB[1]:
        return "dithered", (f"quiet passages carry {quiet_rms_lsb:.1f} steps RMS of noise and few repeated words: the word "
                            f"was shortened to {effective_bits} bits under enough noise (dither or the source's own)" + padded)
    return "truncated", (f"quiet passages carry only {quiet_rms_lsb:.2f} steps RMS: below what dither leaves" + padded)


def measure_file(path, loudness_target=None, keep_series=False):
    """Measure a sound file without changing it.

    Parameters
    ----------
    path : str
        Any file libsndfile reads (WAV, FLAC, AIFF, ...).
    loudness_target : LoudnessTarget or None
        Checked against the file's loudness and true peak.
    keep_series : bool
        Also return the per-window RMS and the loudness series for plots
        (key ``series``; not part of the JSON report).

    Returns
    -------
    dict
        The measure report (docs/meters.md, "Measuring a file").
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise RtstageError(f"cannot read {path}: no such file")
    import soundfile as sf

    try:
        samplerate = int(sf.info(path).samplerate)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot read {path}: {exc}") from None
    window = max(1, int(round(WINDOW_S * samplerate)))
    info, is_float, blocks = _read_blocks(path, window)
    nch = int(info.channels)
    format_bits = _CONTAINER_BITS.get(info.subtype, 32)
    shift = 32 - format_bits if not is_float else 0
    word_width = format_bits if not is_float else 32
    bits = BitActivity(nch, word_width)
    peaks = PeakMeter(nch)
    loud = LoudnessMeter(nch, samplerate) if samplerate > 2 * 1682 else None
    stats = _WindowStats(nch)
    frames = 0
    dc_sum = np.zeros(nch)
    at_rail = np.zeros(nch, dtype=np.int64)
    float_exact = True
    nonfinite = np.zeros(nch, dtype=np.int64)
    scale = 1.0 / float(2 ** (word_width - 1))
    try:
        for block in blocks:
            if is_float:
                x = np.asarray(block, dtype=np.float64)
                bad = ~np.isfinite(x)
                if bad.any():
                    nonfinite += bad.sum(axis=0)
                    x = np.where(bad, 0.0, x)
                words = _float_words(x) if float_exact else None
                if words is None:
                    float_exact = False
                    words = np.clip(np.round(x * 2.0**31), -2.0**31, 2.0**31 - 1).astype(np.int64)
            else:
                words = np.asarray(block).astype(np.int64) >> shift
                x = words * scale
            bits.update(words)
            peaks.update(x)
            if loud is not None:
                loud.update(x)
            dc_sum += x.sum(axis=0)
            at_rail += ((words >= 2 ** (word_width - 1) - 1) | (words <= -(2 ** (word_width - 1)))).sum(axis=0)
            for start in range(0, words.shape[0], window):
                stats.update(words[start:start + window])
            frames += x.shape[0]
    except (sf.LibsndfileError, RuntimeError) as exc:
        raise RtstageError(f"cannot read {path}: {exc}") from None

    sumsq, silent, held, wframes = stats.arrays()
    effective = bits.effective_bits()
    patterns = bits.pattern()
    channels = []
    series = {"window_s": window / samplerate, "rms_dbfs": []}
    for c in range(nch):
        eff = int(effective[c])
        step = 2.0 ** (word_width - eff) if eff else 1.0  # one step of the word in use, in container steps
        power_lsb = sumsq[:, c] / np.maximum(wframes, 1) / step**2 if wframes.size else np.zeros(0)
        rms_lsb = np.sqrt(power_lsb)
        quiet = (~silent[:, c]) & (rms_lsb < QUIET_LSB) & (wframes >= window) if wframes.size else np.zeros(0, bool)
        quiet_frames = float(wframes[quiet].sum()) if quiet.any() else 0.0
        quiet_rms = float(math.sqrt(power_lsb[quiet].mean())) if quiet.any() else None
        held_fraction = float(held[quiet, c].sum()) / quiet_frames if quiet_frames else 0.0
        live = ~silent[:, c] & (wframes >= window) if wframes.size else np.zeros(0, bool)
        floor_lsb = float(math.sqrt(np.percentile(power_lsb[live], 10))) if live.any() else None
        verdict, reason = low_bits_verdict(word_width if not is_float else (32 if float_exact else 0),
                                           eff, quiet_rms, held_fraction, int(quiet.sum()), floor_lsb)
        if is_float and not float_exact:
            verdict, reason = "untouched", "floating-point samples finer than 32-bit words: never requantized to a fixed word"
        # Noise floor: the quietest second that is not digital silence (its ten quietest windows).
        floor_dbfs = None
        if live.any():
            powers_fs = np.sort(sumsq[live, c] / wframes[live] * scale**2)
            floor_dbfs = _dbfs_power(float(powers_fs[:FLOOR_WINDOWS].mean()))
        with np.errstate(divide="ignore"):
            series["rms_dbfs"].append(10 * np.log10(2 * sumsq[:, c] / np.maximum(wframes, 1) * scale**2) if wframes.size else np.zeros(0))
        dc = dc_sum[c] / frames if frames else 0.0
        channels.append({
            "active_bits": int(bits.active_bits()[c]) if not (is_float and not float_exact) else None,
            "effective_bits": eff if not (is_float and not float_exact) else None,
            "bit_pattern": patterns[c] if not (is_float and not float_exact) else None,
            "low_bits": verdict,
            "low_bits_reason": reason,
            "quiet_windows": int(quiet.sum()),
            "quiet_rms_lsb": quiet_rms,
            "repeated_word_fraction": held_fraction,
            "digital_silence_s": float(wframes[silent[:, c]].sum()) / samplerate if wframes.size else 0.0,
            "noise_floor_dbfs": floor_dbfs,
            "sample_peak_dbfs": _dbfs_amplitude(float(peaks.sample_peak[c])),
            "true_peak_dbtp": _dbfs_amplitude(float(peaks.true_peak[c])),
            "dc_offset": float(dc),
            "dc_offset_dbfs": _dbfs_amplitude(abs(float(dc))),
            "samples_at_full_scale": int(at_rail[c]),
            "nonfinite_samples": int(nonfinite[c]),
        })
    report = {
        "measure_version": MEASURE_VERSION,
        "file": path,
        "format": info.format,
        "subtype": info.subtype,
        "samplerate": samplerate,
        "channels_count": nch,
        "frames": frames,
        "duration_s": frames / samplerate,
        "container_bits": format_bits if not is_float else None,
        "word_bits_read": word_width,
        "window_s": window / samplerate,
        "loudness": loudness_report(loud, peaks.true_peak, loudness_target) if loud is not None else None,
        "channels": channels,
    }
    if keep_series:
        series["momentary_lufs"] = loud.momentary_series() if loud is not None else np.zeros(0)
        series["short_term_lufs"] = loud.short_term_series() if loud is not None else np.zeros(0)
        report["series"] = series
    return report


def summary_lines(report):
    """Human-readable lines of a measure report (for stderr)."""
    lines = [f"{report['file']}: {report['subtype']} {report['format']}, {report['samplerate']} Hz, "
             f"{report['channels_count']} channel(s), {report['duration_s']:.2f} s"]
    fmt = lambda v, d=1: "-" if v is None else f"{v:.{d}f}"  # noqa: E731
    for c, ch in enumerate(report["channels"]):
        if ch["effective_bits"] is None:
            lines.append(f"  channel {c + 1}: floating-point samples, no fixed word length")
        else:
            lines.append(f"  channel {c + 1}: {ch['effective_bits']} bits in use ({ch['active_bits']} active) {ch['bit_pattern']}")
        lines.append(f"    low bits: {ch['low_bits']}: {ch['low_bits_reason']}")
        lines.append(
            f"    peak {fmt(ch['sample_peak_dbfs'])} dBFS, true peak {fmt(ch['true_peak_dbtp'])} dBTP, "
            f"DC {ch['dc_offset']:.2e} FS, noise floor {fmt(ch['noise_floor_dbfs'])} dBFS, "
            f"digital silence {ch['digital_silence_s']:.1f} s")
    loud = report.get("loudness")
    if loud:
        from .loudness import loudness_line

        lines.append("  " + loudness_line(loud))
    return lines
