"""Raw-PCM driver: requantize little-endian PCM from one byte stream into another.

:func:`pipe_stream` moves buffers and nothing else: a reader thread takes
whole frames from a binary input stream as they arrive and decodes them
(:mod:`rtstage.pcm`), the calling thread runs them through an
:class:`~rtstage.engine.Engine`, and a writer thread encodes the words into
the output stream, all three at once.  A frame split across two reads is
carried over; bytes of an incomplete last frame are counted and ignored.
The ``rtstage pipe`` command (:mod:`rtstage.cli.pipe`) builds the engine and
reports what happened.
"""

import os
import queue
import threading
from dataclasses import dataclass

import numpy as np

from . import pcm


@dataclass(frozen=True)
class PipeResult:
    """What :func:`pipe_stream` hands back."""

    frames: int
    """Frames processed."""
    trailing_bytes: int
    """Bytes of an incomplete last frame, ignored (0 when the input ended on a frame boundary)."""
    reader_closed: bool
    """True when the output's reader went away (a broken pipe) before the input ended."""


DEFAULT_BLOCKSIZE = 8192
"""Most frames taken by one read: a read takes the whole frames that have arrived, up to this many."""

_EOF = object()


def _reader_of(stream):
    """A function reading into a buffer what has arrived on ``stream`` (at least a byte, 0 at its end).

    A stream with a file descriptor is read with ``os.readv`` on it, below
    Python's buffered reader: the reader thread then holds no lock of the
    stream, so the process can end while the thread still waits for input
    (a buffered reader's lock held by a daemon thread aborts the interpreter
    at exit).  The stream must not have been read from before.  Other
    streams are read with ``readinto1`` (or ``readinto``).
    """
    try:
        fd = stream.fileno()
    except (AttributeError, OSError, ValueError):
        fd = None
    if fd is not None:
        return lambda view: os.readv(fd, [view])
    read1 = getattr(stream, "readinto1", None) or stream.readinto
    return lambda view: read1(view) or 0


class _Reader:
    """Read and decode whole frames on a thread, a few blocks ahead of the kernel.

    Each read takes what the input has delivered, up to ``blocksize``
    frames, so a live feed is passed on as it arrives and a file goes
    through in large blocks.  A frame split across two reads is carried
    over.  The queue yields float64 blocks, then ``(_EOF, trailing_bytes)``,
    or an exception to raise.
    """

    def __init__(self, instream, in_format, channels, blocksize, depth):
        self._read = _reader_of(instream)
        self._format = in_format
        self._channels = channels
        self._frame_bytes = pcm.bytes_per_sample(in_format) * channels
        self._buf = bytearray(self._frame_bytes * blocksize)
        self.blocks = queue.Queue(maxsize=depth)
        self._thread = threading.Thread(target=self._run, name="rtstage-pipe-reader", daemon=True)
        self._thread.start()

    def _run(self):
        view = memoryview(self._buf)
        carry = 0
        try:
            while True:
                got = self._read(view[carry:])
                have = carry + got
                whole = have - have % self._frame_bytes
                if whole:
                    self.blocks.put(pcm.decode(view[:whole], self._format, self._channels))
                carry = have - whole
                if carry:
                    self._buf[:carry] = self._buf[whole:have]
                if got == 0:
                    self.blocks.put((_EOF, carry))
                    return
        except BaseException as exc:  # handed to the consumer, which raises it
            self.blocks.put(exc)


class _Writer:
    """Encode and write word blocks on a thread, from a pool of preallocated word buffers.

    A reader that goes away (a broken pipe) is remembered, not raised: the
    caller stops reading and reports it.  Any other write error is raised
    by the next :meth:`acquire` or by :meth:`finish`.
    """

    def __init__(self, outstream, out_format, shape, dtype, depth):
        self._out = outstream
        self._format = out_format
        self._free = queue.Queue()
        self._full = queue.Queue()
        for _ in range(depth):
            self._free.put(np.empty(shape, dtype=dtype))
        self.reader_closed = False
        self._error = None
        self._thread = threading.Thread(target=self._run, name="rtstage-pipe-writer", daemon=True)
        self._thread.start()

    def _run(self):
        while True:
            item = self._full.get()
            if item is None:
                return
            words, n = item
            if not self.reader_closed and self._error is None:
                try:
                    self._out.write(pcm.encode(words[:n], self._format))
                    if self._full.empty():  # caught up: pass the words on now (a live feed waits for nothing)
                        self._out.flush()
                except BrokenPipeError:
                    self.reader_closed = True
                except BaseException as exc:
                    self._error = exc
            self._free.put(words)

    def _check(self):
        if self._error is not None:
            raise self._error

    def acquire(self):
        """A free word buffer (raises a write error of an earlier block)."""
        self._check()
        return self._free.get()

    def submit(self, words, n):
        """Queue the first ``n`` frames of ``words`` for encoding and writing."""
        self._full.put((words, n))

    def finish(self):
        """Write what is queued, flush, and end the thread; raises a write error, notes a broken pipe."""
        self._full.put(None)
        self._thread.join()
        self._check()
        if not self.reader_closed:
            try:
                self._out.flush()
            except BrokenPipeError:
                self.reader_closed = True


def pipe_stream(engine, instream, outstream, in_format, out_format, blocksize=DEFAULT_BLOCKSIZE, depth=4):
    """Requantize raw PCM from ``instream`` to ``outstream`` until the input ends.

    Reading and decoding run on one thread, encoding and writing on
    another, so that both overlap the kernel (which runs without the GIL);
    the words do not depend on how the input arrives, since the engine's
    output is the same for any split into blocks.

    Parameters
    ----------
    engine : rtstage.engine.Engine
        Prepared engine; its channel count is the stream's, its container
        must be the output format's (:func:`rtstage.pcm.engine_format_bits`).
    instream, outstream : binary streams
        ``readinto1`` (or ``readinto``) / ``write`` / ``flush``, e.g.
        ``sys.stdin.buffer`` and ``sys.stdout.buffer``.
    in_format, out_format : str
        Sample formats (:data:`rtstage.pcm.INPUT_FORMATS`, :data:`rtstage.pcm.OUTPUT_FORMATS`).
    blocksize : int
        Most frames per read (a read takes what has arrived, up to this many).
    depth : int
        Blocks in flight between the threads.

    Returns
    -------
    PipeResult
    """
    reader = _Reader(instream, in_format, engine.channels, blocksize, depth)
    writer = _Writer(outstream, out_format, (blocksize, engine.channels), engine.dtype, depth)
    trailing = 0
    try:
        while True:
            item = reader.blocks.get()
            if isinstance(item, BaseException):
                raise item
            if isinstance(item, tuple):
                trailing = item[1]
                break
            words = writer.acquire()
            n = item.shape[0]
            engine.process(item, out=words[:n])
            writer.submit(words, n)
            if writer.reader_closed:
                break
    finally:
        writer.finish()
    if writer.reader_closed:
        return PipeResult(engine.frame, 0, True)
    return PipeResult(engine.frame, trailing, False)
