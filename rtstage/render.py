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
import queue
import sys
import tempfile
import threading
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from .engine import Engine, container_bits
from .engine.automation import AutomationPlayer, process_with_automation
from .errors import RtstageError
from .log import log
from .settings import MAX_CHANNELS, MAX_SAMPLERATE, MIN_SAMPLERATE

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
    """PCM_16 for words of up to 16 bits, PCM_24 above: the smallest container's subtype."""
    return {16: "PCM_16", 24: "PCM_24"}[container_bits(bits)]


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


def render_file(
    input_path, output_path, settings, blocksize=DEFAULT_BLOCKSIZE, subtype=None, force=False, observers=(),
    automation=None, meters=None,
):
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
        block; the arrays are reused afterwards, so copy what you keep.
    automation : list of (int, dict) or None
        Timed parameter changes ``(frame, values)`` as read by
        :func:`rtstage.control.automation.load_automation`; blocks are split at
        those frames, so the words equal a live run that applied them there.
    meters : callable or None
        ``meters(engine)`` returns a meter (for instance
        :meth:`rtstage.meters.MeterBank.for_engine`) whose ``update(vq, words)``
        receives every block with the quantizer input from the kernel's meter
        tap; read its report after the render.

    Returns
    -------
    RenderResult
        The engine after the last block (settings, counters), the meter (or
        None) and the programme's peak at the quantizer input.
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
        meter = meters(engine) if meters else None
        player = AutomationPlayer(automation) if automation else None
        out_dir = os.path.dirname(os.path.abspath(output_path))
        fd, tmp_path = tempfile.mkstemp(prefix=".rtstage-", suffix=os.path.splitext(output_path)[1], dir=out_dir)
        os.close(fd)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp_path, 0o666 & ~umask)
        progress = _progress(infile.frames, infile.samplerate)
        peak = 0.0
        try:
            with sf.SoundFile(tmp_path, "w", infile.samplerate, infile.channels, subtype, format=fmt) as outfile, \
                    _Reader(infile, blocksize) as reader, \
                    _Writer(outfile, (blocksize, infile.channels), engine.dtype, info.float_out) as writer:
                vq = np.empty((blocksize, infile.channels), dtype=np.float64)
                task = progress.add_task("render", total=infile.frames) if progress else None
                if progress:
                    progress.start()
                for inbuf, x in reader:
                    n = x.shape[0]
                    words = writer.acquire()
                    if player is not None:
                        process_with_automation(engine, x, player, out=words, quantizer_in=vq)
                    else:
                        engine.process(x, out=words[:n], quantizer_in=vq[:n])
                    block = words[:n]
                    peak = max(peak, float(np.max(np.abs(vq[:n]), initial=0.0)))
                    if meter is not None:
                        meter.update(vq[:n], block)
                    for observer in observers:
                        observer(x, block, engine)
                    reader.release(inbuf)
                    writer.submit(words, n)
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
    if meter is not None and hasattr(meter, "set_engine_counts"):
        meter.set_engine_counts(engine.clipped, engine.nonfinite)
    return RenderResult(engine, meter, peak)


class _Reader:
    """Read a sound file on a thread, a few blocks ahead, into a pool of preallocated buffers.

    libsndfile runs without the GIL (cffi releases it), and so does the
    kernel, so reading, processing and writing overlap on separate cores.
    Iterating yields ``(buffer, block)``; hand the buffer back with
    :meth:`release` when done with the block.
    """

    def __init__(self, infile, blocksize, depth=4):
        self._infile = infile
        self._free = queue.Queue()
        self._full = queue.Queue()
        for _ in range(depth):
            self._free.put(np.empty((blocksize, infile.channels), dtype=np.float64))
        self._thread = threading.Thread(target=self._run, name="rtstage-render-reader", daemon=True)

    def _run(self):
        try:
            while True:
                buf = self._free.get()
                if buf is None:
                    return
                block = self._infile.read(out=buf)  # a view of buf, shorter at the end of the file
                self._full.put((buf, block))
                if block.shape[0] == 0:
                    return
        except BaseException as exc:  # handed to the consumer, which raises it
            self._full.put((None, exc))

    def __enter__(self):
        self._thread.start()
        return self

    def __iter__(self):
        while True:
            buf, block = self._full.get()
            if buf is None:
                raise block
            if block.shape[0] == 0:
                return
            yield buf, block

    def release(self, buf):
        """Give a buffer back for another block."""
        self._free.put(buf)

    def __exit__(self, *exc):
        self._free.put(None)
        self._thread.join()


class _Writer:
    """Write word blocks to a sound file on a thread, from a pool of preallocated buffers."""

    def __init__(self, outfile, shape, dtype, float_out=None, depth=4):
        self._outfile = outfile
        self._float_out = float_out
        self._free = queue.Queue()
        self._full = queue.Queue()
        for _ in range(depth):
            self._free.put(np.empty(shape, dtype=dtype))
        self._error = None
        self._thread = threading.Thread(target=self._run, name="rtstage-render-writer", daemon=True)

    def _run(self):
        while True:
            item = self._full.get()
            if item is None:
                return
            buf, n = item
            try:
                if self._error is None:
                    block = buf[:n]
                    self._outfile.write(words_to_float(block).astype(self._float_out) if self._float_out else block)
            except BaseException as exc:
                self._error = exc
            self._free.put(buf)

    def _check(self):
        if self._error is not None:
            raise self._error

    def __enter__(self):
        self._thread.start()
        return self

    def acquire(self):
        """A free buffer for the next block's words."""
        self._check()
        return self._free.get()

    def submit(self, buf, n):
        """Queue the first ``n`` frames of ``buf`` for writing; the buffer comes back to the pool after."""
        self._full.put((buf, n))

    def __exit__(self, exc_type, *exc):
        self._full.put(None)
        self._thread.join()
        if exc_type is None:
            self._check()


@dataclass
class RenderResult:
    """What :func:`render_file` hands back."""

    engine: Engine
    meter: object
    peak: float
    """Largest magnitude at the quantizer input (after gain), full-scale units."""

    @property
    def peak_dbfs(self):
        """``peak`` in dBFS (sample peak; -inf for silence)."""
        return 20.0 * np.log10(self.peak) if self.peak > 0 else float("-inf")


def shaper_warnings(settings, samplerate, peak_dbfs=None):
    """Warnings for a shaper used off its design rate, or a programme peak that leaves it too little headroom."""
    messages = []
    shaper = settings.shaper
    design_rate = shaper.design_samplerate_hz
    if design_rate is not None and abs(design_rate - samplerate) > 0.5:
        from .design import rate_warning

        msg = rate_warning(shaper, samplerate)
        if msg:
            messages.append(msg)
    if shaper.ntaps and peak_dbfs is not None:
        from .design import headroom_warning

        msg = headroom_warning(shaper, settings.dither, settings.bits, peak_dbfs, settings.dither_scale)
        if msg:
            messages.append(msg)
    return messages


def report_counts(engine, what):
    """Log clipped and replaced samples, if any."""
    clipped = int(engine.clipped.sum())
    nonfinite = int(engine.nonfinite.sum())
    if clipped:
        log(f"{what}: {clipped} samples clipped at the {engine.settings.bits}-bit limits")
    if nonfinite:
        log(f"{what}: {nonfinite} NaN/Inf input samples replaced")
