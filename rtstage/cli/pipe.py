"""``rtstage pipe``: raw PCM on stdin to raw PCM on stdout (the driver is :mod:`rtstage.pipe`)."""

import os
import sys

from .. import pcm
from ..engine import Engine, check_word_fits
from ..errors import RtstageError
from ..log import log
from ..pipe import DEFAULT_BLOCKSIZE, pipe_stream
from ..render import check_stream_shape, report_counts
from .options import add_engine_options, check_blocksize, settings_from_args


def register(subparsers):
    """Add the ``pipe`` subcommand."""
    p = subparsers.add_parser(
        "pipe",
        help="requantize raw PCM from stdin to stdout",
        description="Requantize raw little-endian PCM from stdin to stdout; logs go to stderr only.",
    )
    p.add_argument("--samplerate", type=int, required=True, help="sample rate in Hz")
    p.add_argument("--channels", type=int, required=True, help="interleaved channel count")
    p.add_argument("--in-format", choices=sorted(pcm.INPUT_FORMATS), required=True, help="input sample format")
    p.add_argument("--out-format", choices=sorted(pcm.OUTPUT_FORMATS), required=True, help="output sample format")
    p.add_argument("--blocksize", type=int, default=DEFAULT_BLOCKSIZE,
                   help=f"most frames per read; a read takes what has arrived, so a live feed is not held back "
                        f"(default {DEFAULT_BLOCKSIZE})")
    add_engine_options(p)
    p.set_defaults(handler=run_pipe)


def run_pipe(args):
    """Handler of ``rtstage pipe``: stdin raw PCM in, stdout raw PCM out, nothing else on stdout."""
    check_blocksize(args.blocksize)
    check_stream_shape(args.samplerate, args.channels, "pipe")
    settings = settings_from_args(args)
    format_bits = pcm.engine_format_bits(args.out_format)
    try:
        check_word_fits(settings.bits, format_bits)
    except RtstageError:
        raise RtstageError(f"a {settings.bits}-bit word does not fit output format {args.out_format}") from None
    engine = Engine(settings, args.channels, args.samplerate, format_bits=format_bits)
    if args.seed is None:
        log(f"seed {settings.seed} (pass --seed {settings.seed} to reproduce)")
    result = pipe_stream(engine, sys.stdin.buffer, sys.stdout.buffer, args.in_format, args.out_format, args.blocksize)
    if result.reader_closed:
        # The reader went away (``| head``): stop quietly, and keep Python from complaining at exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    if result.trailing_bytes:
        frame_bytes = pcm.bytes_per_sample(args.in_format) * args.channels
        log(f"input ended inside a frame: {result.trailing_bytes} trailing bytes (less than one {frame_bytes}-byte "
            "frame) ignored")
    report_counts(engine, "pipe")
    log(f"pipe: {result.frames} frames")
    return 0
