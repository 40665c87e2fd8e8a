"""Offline driver: requantize sound files and arrays with the shared kernel.

``render_file`` reads what libsndfile reads (WAV, FLAC, AIFF, … with 16/24/32-bit
integer or 32/64-bit float samples) block by block as float64, runs the same
:func:`rtstage.kernel.process_block` the live engine runs, and writes PCM in the
smallest container that holds the word length (≤ 16 bits → PCM_16, ≤ 24 →
PCM_24) unless a subtype is given.  Shorter words are left-justified, the
unused low bits zero.  Every output goes through the output policy
(:mod:`rtstage.files.policy`): checked before any audio work, written to a
temporary file beside the target and renamed into place only when complete,
so a failed or interrupted render leaves nothing half-written.
"""

import os
import queue
import sys
import threading
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from .engine import Engine, smallest_format_bits
from .engine.automation import AutomationPlayer, process_with_automation
from .errors import RtstageError
from .log import log
from .settings import MAX_CHANNELS, MAX_SAMPLERATE, MIN_SAMPLERATE

DEFAULT_BLOCKSIZE = 32768
"""Frames per block of a file render: large enough that the per-block work in Python
(queues, dispatch, meters) is small beside the kernel's, small enough to stay in cache."""

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
    format_bits: int
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
    return {16: "PCM_16", 24: "PCM_24"}[smallest_format_bits(bits)]


def check_stream_shape(samplerate, channels, what):
    """Raise RtstageError when a sample rate or channel count is outside the engine's range."""
    if not MIN_SAMPLERATE <= samplerate <= MAX_SAMPLERATE:
        raise RtstageError(f"{what}: sample rate {samplerate} Hz is outside {MIN_SAMPLERATE}..{MAX_SAMPLERATE} Hz")
    if not 1 <= channels <= MAX_CHANNELS:
        raise RtstageError(f"{what}: {channels} channels; rtstage handles 1..{MAX_CHANNELS}")


def words_to_float(words):
    """Full-scale float values of engine words (exact for words of up to 24 bits)."""
    scale = 2.0**-15 if words.dtype == np.int16 else 2.0**-31
    return words * scale


def render_array(x, samplerate, settings, blocksize=DEFAULT_BLOCKSIZE, format_bits=None, start_frame=0):
    """Requantize a float array of shape (frames, channels) in blocks.

    Returns ``(words, engine)``: the words (int16 or left-justified int32) and
    the engine, whose settings (with the seed actually used) and counters can
    be read.  The result is the same for every ``blocksize``.
    """
    x = np.asarray(x)
    if x.ndim == 1:
        x = x[:, None]
    engine = Engine(settings, x.shape[1], samplerate, format_bits=format_bits, start_frame=start_frame)
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


def estimated_bytes(frames, channels, subtype, fmt):
    """Size of an uncompressed output in bytes (plus a header allowance), or None for compressed formats."""
    width = {"PCM_S8": 1, "PCM_U8": 1, "PCM_16": 2, "PCM_24": 3, "PCM_32": 4, "FLOAT": 4, "DOUBLE": 8}.get(subtype)
    if width is None or fmt == "FLAC":
        return None
    return int(frames) * int(channels) * width + 4096


def open_input(input_path, accept_truncated=False, warn=log):
    """Open a sound file for reading after the chunk-level checks of :func:`rtstage.files.riff.check_input`.

    Returns ``(soundfile, layout)``; refuses (one line, exit status 2) a
    missing, unreadable, truncated (unless ``accept_truncated``, which warns
    through ``warn``; None: silently) or empty file.
    """
    from .files.riff import InputRefused, check_input

    path = os.fspath(input_path)
    if not os.path.exists(path):
        raise InputRefused(f"cannot read {path}: no such file")
    if os.path.isdir(path):
        raise InputRefused(f"cannot read {path}: it is a folder")
    try:
        layout = check_input(path, accept_truncated=accept_truncated, warn=warn)
    except OSError as exc:
        raise InputRefused(f"cannot read {path}: {exc.strerror}") from None
    try:
        infile = sf.SoundFile(path)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise InputRefused(f"cannot read {path}: {_sf_reason(exc)}") from None
    if infile.frames <= 0:
        infile.close()
        raise InputRefused(f"{path} holds no audio frames")
    return infile, layout


def _sf_reason(exc):
    text = str(exc).strip()
    if text.startswith("Error opening"):
        text = text.split(":", 1)[-1].strip()
    return text or type(exc).__name__


def coding_history_text(settings):
    """The free text (T=) of rtstage's CodingHistory line: version, dither, shaper, seed, and gain when not 0."""
    from . import __version__

    text = f"rtstage {__version__} {settings.dither.upper()} {settings.shaper_id} seed {settings.seed}"
    if settings.gain_db:
        text += f" gain {settings.gain_db:g} dB"
    return text


def render_file(
    input_path, output_path, settings, blocksize=DEFAULT_BLOCKSIZE, subtype=None, overwrite=False, observers=(),
    automation=None, meters=None, plan=None, accept_truncated=False, new_bext=False, warn=log, quiet=False,
    threads=None,
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
    overwrite : bool
        Replace an existing output file (never an input; see
        :mod:`rtstage.files.policy`).  Ignored when ``plan`` is given.
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
    plan : OutputPlan or None
        An output plan, already checked, in which ``output_path`` is declared
        (the command line declares the report and plots in the same plan);
        the output is written into it and left for the caller to commit.
        None: a plan of this render alone, committed on success.
    accept_truncated : bool
        Render a WAV/AIFF whose data is shorter than its header declares
        (with a warning) instead of refusing it.
    new_bext : bool
        Give a WAV output a new ``bext`` chunk when the input has none (by
        default a ``bext`` is only carried, never invented).
    warn : callable or None
        Where the warning about an accepted truncated input goes (None: nowhere).
    quiet : bool
        No progress bar.
    threads : int or None
        Threads running the kernel's channel groups (the words are the same
        for any number); None: one per channel pair, at most one per
        available core.  Automation runs on one thread.

    Returns
    -------
    RenderResult
        The engine after the last block (settings, counters), the meter (or
        None) and the programme's peak at the quantizer input.

    Notes
    -----
    Metadata: a WAV input's ``bext`` (EBU Tech 3285) is carried into a WAV
    output with one CodingHistory line appended (EBU R 98); ``iXML`` and
    ``LIST/INFO`` are carried unchanged; other formats carry the text tags
    libsndfile exposes.  See :mod:`rtstage.files.riff`.
    """
    from .files import riff
    from .files.policy import OutputPlan, check_interrupted, deferred_signals, write_failure

    infile, layout = open_input(input_path, accept_truncated=accept_truncated, warn=warn)
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
        own_plan = plan is None
        if own_plan:
            plan = OutputPlan(f"rendering {input_path} to {output_path}", inputs=[input_path], overwrite=overwrite)
            plan.add_file(output_path, "output", size_bytes=estimated_bytes(infile.frames, infile.channels, subtype, fmt))
            plan.check()
        engine = Engine(settings, infile.channels, infile.samplerate, format_bits=info.format_bits)
        meter = meters(engine) if meters else None
        player = AutomationPlayer(automation) if automation else None
        carried = riff.carried_chunks(input_path, layout) if layout is not None else []
        raw_carry = layout is not None and layout.container in ("WAV", "RF64", "BW64") and fmt in ("WAV", "RF64")
        tags = {} if raw_carry else riff.text_tags(infile)
        if fmt not in ("WAV", "RF64"):
            if any(cid == "bext" for cid, _ in carried):
                log(f"note: the input's bext chunk is not carried into a {fmt} output (only WAV and RF64 hold one)")
            carried = []
        progress = None if quiet else _progress(infile.frames, infile.samplerate)
        peak = 0.0
        frames_read = 0
        groups = None
        if player is None:
            ncores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
            # By default one thread per channel pair, at most one per core: the kernel runs a pair's two
            # recurrences side by side on one core, so splitting a pair over two cores gains nothing and
            # takes a core from the reader and the writer (a stereo render ran 1.7x slower split).
            pairs = (infile.channels + 1) // 2
            nthreads = min(ncores, pairs) if threads is None else max(1, int(threads))
            if min(nthreads, infile.channels) > 1:
                from .engine.groups import ChannelGroups

                groups = ChannelGroups(engine, nthreads)
        try:
            with plan.atomic(output_path) as tmp_path:
                try:
                    with deferred_signals(), \
                            sf.SoundFile(tmp_path, "w", infile.samplerate, infile.channels, subtype, format=fmt) as outfile, \
                            _Reader(infile, blocksize) as reader, \
                            _Writer(outfile, (blocksize, infile.channels), engine.dtype, info.float_out) as writer:
                        for name, value in tags.items():
                            try:
                                setattr(outfile, name, value)
                            except Exception:  # a format that cannot hold this tag: leave it out
                                pass
                        vq = np.empty((blocksize, infile.channels), dtype=np.float64)
                        vq_abs = np.empty_like(vq)
                        task = progress.add_task("render", total=infile.frames) if progress else None
                        if progress:
                            progress.start()
                        for inbuf, x in reader:
                            check_interrupted()
                            n = x.shape[0]
                            frames_read += n
                            words = writer.acquire()
                            if player is not None:
                                process_with_automation(engine, x, player, out=words, quantizer_in=vq)
                            elif groups is not None:
                                groups.process(x, words[:n], quantizer_in=vq[:n])
                            else:
                                engine.process(x, out=words[:n], quantizer_in=vq[:n])
                            block = words[:n]
                            peak = max(peak, float(np.max(np.abs(vq[:n], out=vq_abs[:n]), initial=0.0)))
                            if meter is not None:
                                meter.update(vq[:n], block)
                            for observer in observers:
                                observer(x, block, engine)
                            reader.release(inbuf)
                            writer.submit(words, n)
                            if progress:
                                progress.advance(task, n)
                except _ReadError as exc:
                    raise RtstageError(f"cannot read {input_path} after {frames_read} frames: {exc.reason}; "
                                       "nothing was written") from None
                except _WriteError as exc:
                    raise write_failure(output_path, tmp_path, exc.error) from None
                except (sf.LibsndfileError, OSError) as exc:
                    raise write_failure(output_path, tmp_path, exc) from None
                if frames_read < infile.frames:
                    raise RtstageError(f"cannot read {input_path}: it ended after {frames_read} of {infile.frames} frames; "
                                       "nothing was written")
                chunks = []
                for cid, payload in carried:
                    if cid == "bext":
                        line = riff.coding_history_line(infile.samplerate, settings.bits, infile.channels,
                                                        coding_history_text(engine.settings))
                        payload = riff.append_coding_history(payload, line)
                    chunks.append((cid, payload))
                if new_bext and fmt in ("WAV", "RF64") and not any(cid == "bext" for cid, _ in chunks):
                    line = riff.coding_history_line(infile.samplerate, settings.bits, infile.channels,
                                                    coding_history_text(engine.settings))
                    chunks.insert(0, ("bext", riff.new_bext(line)))
                try:
                    riff.append_chunks(tmp_path, chunks)
                except OSError as exc:
                    raise write_failure(output_path, tmp_path, exc) from None
            if own_plan:
                plan.commit()
        except BaseException:
            if own_plan:
                plan.discard()
            raise
        finally:
            if groups is not None:
                groups.close()
            if progress:
                progress.stop()
    if meter is not None and hasattr(meter, "set_engine_counts"):
        meter.set_engine_counts(engine.clipped, engine.nonfinite)
    return RenderResult(engine, meter, peak)


class _WriteError(Exception):
    """A write error from the writer thread (full disk, file-size limit, I/O)."""

    def __init__(self, error):
        super().__init__(str(error))
        self.error = error


class _ReadError(Exception):
    """A read error in the middle of the input, raised from the reader thread."""

    def __init__(self, reason):
        super().__init__(reason)
        self.reason = reason


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
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:  # handed to the consumer, which raises it
            self._full.put((None, _ReadError(_sf_reason(exc))))
        except BaseException as exc:
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
            raise _WriteError(self._error)

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
            from .shapers import family_members, family_of

            family = family_of(shaper.id)
            if family and float(samplerate) in family_members(family):
                msg += f", or name the family (--shaper {family}) to follow the stream's rate"
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
