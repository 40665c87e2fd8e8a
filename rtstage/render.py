"""Offline driver: requantize sound files and arrays with the shared kernel.

``render_file`` reads what libsndfile reads (WAV, FLAC, AIFF, … with 16/24/32-bit
integer or 32/64-bit float samples) block by block as float64, runs the same
:func:`rtstage.kernel.process_block` the live engine runs, and writes PCM in the
smallest container that holds the word length (≤ 16 bits → PCM_16, ≤ 24 →
PCM_24) unless a subtype is given.  Shorter words are left-justified, the
unused low bits zero.  The output is written to a temporary file beside the
target and renamed into place only when complete, so a failed render leaves
nothing half-written.
"""

import os
import sys
import tempfile
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from .engine import MAX_CHANNELS, MAX_SAMPLERATE, MIN_SAMPLERATE, Engine, log
from .errors import RtstageError

DEFAULT_BLOCKSIZE = 4096

FORMAT_BY_EXTENSION = {
    ".wav": "WAV",
    ".wave": "WAV",
    ".flac": "FLAC",
    ".aif": "AIFF",
    ".aiff": "AIFF",
    ".w64": "W64",
    ".rf64": "RF64",
    ".caf": "CAF",
}


@dataclass(frozen=True)
class SubtypeInfo:
    """How engine words become samples of one libsndfile subtype."""

    max_bits: int
    container: int
    float_out: object = None


SUBTYPES = {
    "PCM_S8": SubtypeInfo(8, 16),
    "PCM_U8": SubtypeInfo(8, 16),
    "PCM_16": SubtypeInfo(16, 16),
    "PCM_24": SubtypeInfo(24, 24),
    "PCM_32": SubtypeInfo(24, 32),
    "FLOAT": SubtypeInfo(24, 24, np.float32),
    "DOUBLE": SubtypeInfo(24, 24, np.float64),
}
"""Output subtypes: the largest word length each holds exactly and the engine container feeding it."""


def default_subtype(bits):
    """PCM_16 for words of up to 16 bits, PCM_24 above."""
    return "PCM_16" if bits <= 16 else "PCM_24"


def check_stream_shape(samplerate, nchannels, what):
    """Raise RtstageError when a sample rate or channel count is outside the engine's range."""
    if not MIN_SAMPLERATE <= samplerate <= MAX_SAMPLERATE:
        raise RtstageError(f"{what}: sample rate {samplerate} Hz is outside {MIN_SAMPLERATE}..{MAX_SAMPLERATE} Hz")
    if not 1 <= nchannels <= MAX_CHANNELS:
        raise RtstageError(f"{what}: {nchannels} channels; rtstage handles 1..{MAX_CHANNELS}")


def words_to_float(words):
    """Full-scale float values of engine words (exact for words of up to 24 bits)."""
    scale = 2.0**-15 if words.dtype == np.int16 else 2.0**-31
    return words * scale


def render_array(x, samplerate, settings, blocksize=DEFAULT_BLOCKSIZE, container=None, start_frame=0):
    """Requantize a float array of shape (frames, nchannels) in blocks.

    Returns ``(words, engine)``: the words (int16 or left-justified int32) and
    the engine, whose settings (with the seed actually used) and counters can
    be read.  The result is the same for every ``blocksize``.
    """
    x = np.asarray(x)
    if x.ndim == 1:
        x = x[:, None]
    engine = Engine(settings, x.shape[1], samplerate, container=container, start_frame=start_frame)
    words = np.empty(x.shape, dtype=engine.dtype)
    step = max(1, int(blocksize))
    for start in range(0, x.shape[0], step):
        engine.process(x[start : start + step], out=words[start : start + step])
    return words, engine


def _output_format(path):
    ext = os.path.splitext(path)[1].lower()
    if ext not in FORMAT_BY_EXTENSION:
        raise RtstageError(f"cannot tell the output format from '{path}' (use one of: {', '.join(FORMAT_BY_EXTENSION)})")
    return FORMAT_BY_EXTENSION[ext]


def _progress(total_frames, samplerate):
    """A rich progress bar on stderr for renders longer than 30 s on a terminal, else None."""
    if total_frames < 30 * samplerate or not sys.stderr.isatty():
        return None
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(
        TextColumn("rendering"), BarColumn(), TextColumn("{task.percentage:>5.1f} %"), TimeRemainingColumn(),
        console=Console(stderr=True), transient=True,
    )


def render_file(input_path, output_path, settings, blocksize=DEFAULT_BLOCKSIZE, subtype=None, force=False, observers=()):
    """Requantize ``input_path`` into ``output_path``.

    Parameters
    ----------
    input_path, output_path : str
        Sound files; the output format follows the output's extension.
    settings : EngineSettings
        Engine settings; without a seed a random one is drawn (read it back
        from the returned engine's ``settings.seed``).
    blocksize : int
        Frames per block; the output does not depend on it.
    subtype : str or None
        libsndfile subtype (``PCM_16``, ``PCM_24``, ``PCM_32``, ``PCM_S8``,
        ``PCM_U8``, ``FLOAT``, ``DOUBLE``); None picks PCM_16 or PCM_24.
    force : bool
        Replace an existing output file (never the input itself).
    observers : sequence of callables
        Each is called as ``observer(x_block, words_block, engine)`` after every
        block (meters, reports).

    Returns
    -------
    Engine
        The engine after the last block (settings, counters).
    """
    if os.path.exists(output_path):
        if os.path.exists(input_path) and os.path.samefile(input_path, output_path):
            raise RtstageError(f"refusing to overwrite the input file {input_path}")
        if not force:
            raise RtstageError(f"{output_path} exists (use --force to replace it)")
    try:
        infile = sf.SoundFile(input_path)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot read {input_path}: {exc}") from None
    with infile:
        check_stream_shape(infile.samplerate, infile.channels, input_path)
        settings = settings.resolved()
        subtype = (subtype or default_subtype(settings.bits)).upper()
        if subtype not in SUBTYPES:
            raise RtstageError(f"unsupported output subtype '{subtype}' (supported: {', '.join(SUBTYPES)})")
        info = SUBTYPES[subtype]
        if settings.bits > info.max_bits:
            raise RtstageError(f"a {settings.bits}-bit word does not fit subtype {subtype} (at most {info.max_bits} bits)")
        fmt = _output_format(output_path)
        if not sf.check_format(fmt, subtype):
            raise RtstageError(f"format {fmt} cannot hold subtype {subtype}")
        engine = Engine(settings, infile.channels, infile.samplerate, container=info.container)
        out_dir = os.path.dirname(os.path.abspath(output_path))
        fd, tmp_path = tempfile.mkstemp(prefix=".rtstage-", suffix=os.path.splitext(output_path)[1], dir=out_dir)
        os.close(fd)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp_path, 0o666 & ~umask)
        progress = _progress(infile.frames, infile.samplerate)
        try:
            with sf.SoundFile(tmp_path, "w", infile.samplerate, infile.channels, subtype, format=fmt) as outfile:
                words = np.empty((blocksize, infile.channels), dtype=engine.dtype)
                task = progress.add_task("render", total=infile.frames) if progress else None
                if progress:
                    progress.start()
                while True:
                    x = infile.read(blocksize, dtype="float64", always_2d=True)
                    n = x.shape[0]
                    if n == 0:
                        break
                    block = engine.process(x, out=words[:n])
                    for observer in observers:
                        observer(x, block, engine)
                    outfile.write(words_to_float(block).astype(info.float_out) if info.float_out else block)
                    if progress:
                        progress.advance(task, n)
            os.replace(tmp_path, output_path)
        except BaseException:
            if os.path.exists(tmp_path):
                os.unlink(tmp_path)
            raise
        finally:
            if progress:
                progress.stop()
    return engine


def report_counts(engine, what):
    """Log clipped and replaced samples, if any."""
    clipped = int(engine.clipped.sum())
    nonfinite = int(engine.nonfinite.sum())
    if clipped:
        log(f"{what}: {clipped} samples clipped at the {engine.settings.bits}-bit limits")
    if nonfinite:
        log(f"{what}: {nonfinite} NaN/Inf input samples replaced")
