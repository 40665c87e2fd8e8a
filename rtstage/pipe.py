"""Raw-PCM driver: requantize little-endian PCM from one byte stream into another.

:func:`pipe_stream` moves buffers and nothing else: it reads whole frames from
a binary input stream into one preallocated buffer, decodes them
(:mod:`rtstage.pcm`), runs them through an :class:`~rtstage.engine.Engine`
and writes the encoded words to the output stream.  A frame split across two
reads is carried over; bytes of an incomplete last frame are counted and
ignored.  The ``rtstage pipe`` command (:mod:`rtstage.cli.pipe`) builds the
engine and reports what happened.
"""

from dataclasses import dataclass

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


def _read_full(stream, view):
    """Fill ``view`` from ``stream``, retrying short reads; returns the bytes read (< len only at EOF)."""
    got = 0
    while got < len(view):
        n = stream.readinto(view[got:])
        if not n:
            break
        got += n
    return got


def pipe_stream(engine, instream, outstream, in_format, out_format, blocksize=1024):
    """Requantize raw PCM from ``instream`` to ``outstream`` until the input ends.

    Parameters
    ----------
    engine : rtstage.engine.Engine
        Prepared engine; its channel count is the stream's, its container
        must be the output format's (:func:`rtstage.pcm.engine_format_bits`).
    instream, outstream : binary streams
        ``readinto``/``write``/``flush``, e.g. ``sys.stdin.buffer`` and ``sys.stdout.buffer``.
    in_format, out_format : str
        Sample formats (:data:`rtstage.pcm.INPUT_FORMATS`, :data:`rtstage.pcm.OUTPUT_FORMATS`).
    blocksize : int
        Frames per read.

    Returns
    -------
    PipeResult
    """
    channels = engine.channels
    frame_bytes = pcm.bytes_per_sample(in_format) * channels
    buf = bytearray(frame_bytes * blocksize)
    view = memoryview(buf)
    carry = 0
    try:
        while True:
            got = _read_full(instream, view[carry:])
            have = carry + got
            whole = have - have % frame_bytes
            if whole:
                x = pcm.decode(view[:whole], in_format, channels)
                outstream.write(pcm.encode(engine.process(x), out_format))
            carry = have - whole
            if carry:
                buf[:carry] = buf[whole:have]
            if got == 0:
                break
        outstream.flush()
    except BrokenPipeError:
        return PipeResult(engine.frame, 0, True)
    return PipeResult(engine.frame, carry, False)
