"""Live input sources: a sound file, or a generated test signal.

A source spec on the command line (``--source SPEC``) is one of

``FILE``
    A sound file (anything libsndfile reads), decoded once to float64 and
    preloaded before the stream opens; the callback reads it at the device's
    pace.  Its sample rate must equal the stream's (nothing is resampled).
``silence``
    Digital zero on every channel.
``tone[:freq_hz=F][,level_dbfs=L]``
    A sine of F Hz (default 997) at L dBFS (default -20), the same on every
    channel.
``noise[:level_dbfs=L][,seed=S]``
    White Gaussian noise at L dBFS (default -30), independent per channel,
    reproducible from the integer seed S (default 1).

Levels follow the AES17 convention: 0 dBFS is the RMS level of a full-scale
sine, so a tone of L dBFS has the peak amplitude 10^(L/20) and noise of
L dBFS has the standard deviation 10^(L/20)/sqrt(2).

A generated source is a pure function of (spec, sample rate, channel, sample
index): :func:`generate` gives the offline form and the live callback calls
the same compiled :func:`fill_generated`, so ``rtstage run --source tone:...
--tap t.wav`` equals a render of ``generate(spec, ...)`` word for word.

Public API
----------
SourceSpec
    A parsed spec: ``kind`` and its parameters.
parse_source(text)
    Parse ``--source`` text (a generator spec or a file path).
generate(spec, samplerate, channels, start_frame, nframes)
    The float64 samples of a generated source, shape (nframes, channels).
load_source_file(path)
    Decode a file source to float64 (frames, channels) and its sample rate.

References
----------
.. [1] AES17-2015, "AES standard method for digital audio engineering -
   Measurement of digital audio equipment", section 3 (dBFS).
.. [2] J. K. Salmon et al., "Parallel random numbers: as easy as 1, 2, 3",
   Proc. SC11, 2011 (Philox).
"""

import math
import os
from dataclasses import dataclass

import numpy as np
from numba import njit

from .._philox import philox4x64
from ..errors import RtstageError

GEN_SILENCE = 0
GEN_TONE = 1
GEN_NOISE = 2
GENERATORS = {"silence": GEN_SILENCE, "tone": GEN_TONE, "noise": GEN_NOISE}
"""Generator kinds and the codes the compiled callback switches on."""

_DEFAULTS = {
    "silence": {},
    "tone": {"freq_hz": 997.0, "level_dbfs": -20.0},
    "noise": {"level_dbfs": -30.0, "seed": 1},
}
NOISE_COUNTER_WORD = 1
"""Second Philox counter word for source noise (dither uses 0), so the two never share words."""

_U_SCALE = 2.0**-52
_TWO_PI = 2.0 * math.pi


@dataclass(frozen=True)
class SourceSpec:
    """A parsed ``--source`` spec.

    Attributes
    ----------
    kind : str
        ``file``, ``silence``, ``tone`` or ``noise``.
    path : str or None
        The file of a ``file`` source.
    freq_hz : float
        Tone frequency in Hz.
    level_dbfs : float
        Tone or noise level in dBFS (AES17: relative to a full-scale sine).
    seed : int
        Noise seed, 0..2^64-1.
    """

    kind: str
    path: str = None
    freq_hz: float = 997.0
    level_dbfs: float = -20.0
    seed: int = 1

    @property
    def generated(self):
        """True for a generator (not a file)."""
        return self.kind in GENERATORS

    @property
    def amplitude(self):
        """Peak (tone) or sqrt(2)·sigma (noise) amplitude in full-scale units."""
        return 10.0 ** (self.level_dbfs / 20.0)

    def describe(self):
        """Text form that :func:`parse_source` reads back."""
        if self.kind == "file":
            return self.path
        if self.kind == "silence":
            return "silence"
        if self.kind == "tone":
            return f"tone:freq_hz={self.freq_hz:g},level_dbfs={self.level_dbfs:g}"
        return f"noise:level_dbfs={self.level_dbfs:g},seed={self.seed}"


def parse_source(text):
    """Parse ``--source`` text.

    Parameters
    ----------
    text : str
        ``silence``, ``tone[:key=value,...]``, ``noise[:key=value,...]``, or a
        file path.  A path that happens to be called ``tone`` can be given as
        ``./tone``.

    Returns
    -------
    SourceSpec

    Raises
    ------
    RtstageError
        On an unknown key, a value that is not a number, or a level above 0 dBFS.
    """
    head, _, tail = text.partition(":")
    if head not in GENERATORS:
        return SourceSpec("file", path=text)
    allowed = _DEFAULTS[head]
    values = dict(allowed)
    if tail:
        for item in tail.split(","):
            key, eq, value = item.partition("=")
            key = key.strip()
            if not eq or key not in allowed:
                known = ", ".join(allowed) or "none"
                raise RtstageError(f"source '{text}': unknown or malformed item '{item}' (keys for {head}: {known})")
            try:
                values[key] = int(value, 0) if key == "seed" else float(value)
            except ValueError:
                raise RtstageError(f"source '{text}': {key} must be a number, got '{value}'") from None
    if not math.isfinite(values.get("level_dbfs", 0.0)) or values.get("level_dbfs", 0.0) > 0.0:
        raise RtstageError(f"source '{text}': level_dbfs must be at most 0 dBFS")
    if "freq_hz" in values and not (math.isfinite(values["freq_hz"]) and values["freq_hz"] >= 0.0):
        raise RtstageError(f"source '{text}': freq_hz must be a non-negative number")
    if "seed" in values and not 0 <= values["seed"] < 2**64:
        raise RtstageError(f"source '{text}': seed must be from 0 to 2^64-1")
    return SourceSpec(head, **values)


def check_source(spec, samplerate):
    """Raise :class:`RtstageError` if a generated ``spec`` cannot run at ``samplerate``."""
    if spec.kind == "tone" and not spec.freq_hz < samplerate / 2.0:
        raise RtstageError(f"tone of {spec.freq_hz:g} Hz is not below the Nyquist frequency of {samplerate} Hz")


def gen_params(spec, samplerate):
    """The (kind code, freq_hz, amplitude, seed as int64 bits) the compiled generator takes."""
    seed_bits = int(np.uint64(spec.seed).view(np.int64))
    return GENERATORS[spec.kind], float(spec.freq_hz), float(spec.amplitude), seed_bits


@njit(nogil=True, cache=True, inline="always")
def _uniform(word):
    return (np.float64(word >> np.uint64(12)) + 0.5) * _U_SCALE - 0.5


@njit(nogil=True, cache=True, error_model="numpy")
def fill_generated(kind, freq_hz, amplitude, seed_bits, samplerate, start_frame, out, nframes, words):
    """Write ``nframes`` frames of a generated source into ``out`` (float64, frames × channels).

    Parameters
    ----------
    kind : int
        ``GEN_SILENCE``, ``GEN_TONE`` or ``GEN_NOISE``.
    freq_hz, amplitude : float
        Tone frequency in Hz; peak amplitude (tone) or sqrt(2)·sigma (noise).
    seed_bits : int
        Noise seed as int64 bits.
    samplerate : int
        Sample rate in Hz.
    start_frame : int
        Sample index of ``out[0]``.
    out : ndarray, float64, shape (>= nframes, channels)
    nframes : int
    words : ndarray, uint64, shape (channels, 4)
        Scratch for the Philox block (preallocated by the caller).

    Notes
    -----
    The tone's phase is reduced per whole second, ``n = k·fs + r``:
    ``phase = frac(frac(f·k) + f·r/fs)`` cycles, so its precision does not
    decay over hours.  Noise sample n on channel c uses Philox4x64-10 with key
    ``(seed, c)`` and counter ``(n >> 1, 1, 0, 0)`` (the kernel's dither uses
    counter word 0) and the Box-Muller transform of two of its words.
    """
    nch = out.shape[1]
    if kind == GEN_TONE:
        for n in range(nframes):
            index = start_frame + n
            whole = index // samplerate
            rem = index - whole * samplerate
            cycles = freq_hz * whole
            cycles = cycles - math.floor(cycles) + freq_hz * rem / samplerate
            cycles = cycles - math.floor(cycles)
            v = amplitude * math.sin(_TWO_PI * cycles)
            for c in range(nch):
                out[n, c] = v
    elif kind == GEN_NOISE:
        sigma = amplitude * (1.0 / math.sqrt(2.0))
        seed = np.uint64(seed_bits)
        for n in range(nframes):
            index = start_frame + n
            j = (index & 1) * 2
            for c in range(nch):
                philox4x64(np.uint64(index >> 1), np.uint64(NOISE_COUNTER_WORD), np.uint64(0), np.uint64(0),
                           seed, np.uint64(c), words, c)
                a = _uniform(words[c, j]) + 0.5
                b = _uniform(words[c, j + 1]) + 0.5
                out[n, c] = sigma * math.sqrt(-2.0 * math.log(a)) * math.cos(_TWO_PI * b)
    else:
        for n in range(nframes):
            for c in range(nch):
                out[n, c] = 0.0


def generate(spec, samplerate, channels, start_frame, nframes):
    """The float64 samples of a generated source.

    Parameters
    ----------
    spec : SourceSpec or str
        A generator spec (``silence``, ``tone:...``, ``noise:...``).
    samplerate : int
        Sample rate in Hz.
    channels : int
        Channel count.
    start_frame : int
        Sample index of the first frame.
    nframes : int
        Frames to generate.

    Returns
    -------
    ndarray, float64, shape (nframes, channels)
        Exactly the samples the live callback feeds the kernel at those indices.
    """
    if isinstance(spec, str):
        spec = parse_source(spec)
    if not spec.generated:
        raise RtstageError(f"'{spec.describe()}' is a file, not a generator spec")
    check_source(spec, samplerate)
    out = np.zeros((int(nframes), int(channels)), dtype=np.float64)
    words = np.zeros((int(channels), 4), dtype=np.uint64)
    kind, freq_hz, amplitude, seed_bits = gen_params(spec, samplerate)
    fill_generated(kind, freq_hz, amplitude, seed_bits, int(samplerate), int(start_frame), out, int(nframes), words)
    return out


def load_source_file(path):
    """Decode a file source.

    Returns
    -------
    x : ndarray, float64, shape (frames, channels)
    samplerate : int
    """
    import soundfile as sf

    if not os.path.exists(path):
        raise RtstageError(f"source file {path} does not exist (generators: silence, tone:..., noise:...)")
    try:
        x, samplerate = sf.read(path, dtype="float64", always_2d=True)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot read source file {path}: {exc}") from None
    return np.ascontiguousarray(x), int(samplerate)
