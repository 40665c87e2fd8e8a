"""``rtstage render`` (files) and ``rtstage pipe`` (raw PCM on stdin/stdout)."""

import os
import sys

import numpy as np

from . import pcm
from .cli_common import add_engine_options, settings_from_args
from .engine import Engine, log
from .errors import RtstageError
from .render import DEFAULT_BLOCKSIZE, SUBTYPES, check_stream_shape, render_file, report_counts, shaper_warnings


def _input_info(path):
    import soundfile as sf

    try:
        return sf.info(path)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot read {path}: {exc}") from None


def register(subparsers):
    """Add the ``render`` and ``pipe`` subcommands."""
    p = subparsers.add_parser(
        "render",
        help="requantize a sound file",
        description="Requantize a sound file (WAV, FLAC, AIFF, ...) to a shorter word length, block-exact with the live engine.",
    )
    p.add_argument("input", help="input sound file")
    p.add_argument("output", help="output sound file (format from its extension)")
    add_engine_options(p)
    p.add_argument("--blocksize", type=int, default=DEFAULT_BLOCKSIZE, help="frames per block (the output does not depend on it)")
    p.add_argument("--subtype", help=f"output subtype: {', '.join(SUBTYPES)} (default PCM_16 up to 16 bits, else PCM_24)")
    p.add_argument("--report", metavar="FILE.json", help="write the meter report (added noise, peaks, noise modulation, bit activity; docs/meters.md)")
    p.add_argument("--plot", metavar="DIR", help="write the meter figures (PNG, needs matplotlib) into DIR; see 'rtstage report'")
    p.add_argument("--automation", metavar="FILE", help="apply timed parameter changes (JSON lines; docs/protocol.md), e.g. a live --automation-log")
    p.set_defaults(handler=run_render)

    p = subparsers.add_parser(
        "pipe",
        help="requantize raw PCM from stdin to stdout",
        description="Requantize raw little-endian PCM from stdin to stdout; logs go to stderr only.",
    )
    p.add_argument("--samplerate", type=int, required=True, help="sample rate in Hz")
    p.add_argument("--channels", type=int, required=True, help="interleaved channel count")
    p.add_argument("--in-format", choices=sorted(pcm.INPUT_FORMATS), required=True, help="input sample format")
    p.add_argument("--out-format", choices=sorted(pcm.OUTPUT_FORMATS), required=True, help="output sample format")
    p.add_argument("--blocksize", type=int, default=1024, help="frames per read (default 1024)")
    add_engine_options(p)
    p.set_defaults(handler=run_pipe)


def _check_blocksize(blocksize):
    if blocksize < 1 or blocksize > 1 << 20:
        raise RtstageError(f"blocksize must be between 1 and 1048576 frames, got {blocksize}")


def run_render(args):
    """Handler of ``rtstage render``."""
    _check_blocksize(args.blocksize)
    if not os.path.exists(args.input):
        raise RtstageError(f"cannot read {args.input}: no such file")
    settings = settings_from_args(args)
    automation = None
    if args.automation:
        from .control.automation import load_automation

        info = _input_info(args.input)
        automation = load_automation(args.automation, samplerate=info.samplerate)
        if (args.report or args.plot) and any(set(values) & {"bits", "dither", "shaper", "dither_scale"} for _, values in automation):
            raise RtstageError("--report and --plot cannot follow automation that changes bits, dither, dither_scale or shaper "
                               "(the predicted noise would change mid-file); render the sections separately")
    meters = None
    if args.report or args.plot:
        from .meters import MeterBank

        meters = MeterBank.for_engine
    result = render_file(args.input, args.output, settings, blocksize=args.blocksize, subtype=args.subtype,
                         force=args.force, automation=automation, meters=meters)
    engine = result.engine
    for message in shaper_warnings(engine.settings, engine.samplerate, result.peak_dbfs):
        log(message)
    if args.report:
        from .meters import write_report

        write_report(args.report, result.meter.report())
        log(f"wrote the meter report {args.report}")
    if args.plot:
        from .meters.plots import write_plots

        log(f"wrote {', '.join(write_plots(result.meter.report(), args.plot))}")
    report_counts(engine, args.output)
    log(f"wrote {args.output}: {engine.frame} frames, {settings.bits} bits, dither {settings.dither}, "
        f"shaper {settings.shaper_id}, seed {settings.seed}" + ("" if args.seed is not None else " (drawn; pass --seed to reproduce)"))
    return 0


def _read_full(stream, view):
    """Fill ``view`` from ``stream``, retrying short reads; returns the bytes read (< len only at EOF)."""
    got = 0
    while got < len(view):
        n = stream.readinto(view[got:])
        if not n:
            break
        got += n
    return got


def run_pipe(args):
    """Handler of ``rtstage pipe``: stdin raw PCM in, stdout raw PCM out, nothing else on stdout."""
    _check_blocksize(args.blocksize)
    check_stream_shape(args.samplerate, args.channels, "pipe")
    settings = settings_from_args(args)
    container = pcm.engine_container(args.out_format)
    if settings.bits > min(container, 24):
        raise RtstageError(f"a {settings.bits}-bit word does not fit output format {args.out_format}")
    engine = Engine(settings, args.channels, args.samplerate, container=container)
    if args.seed is None:
        log(f"seed {settings.seed} (pass --seed {settings.seed} to reproduce)")
    frame_bytes = pcm.bytes_per_sample(args.in_format) * args.channels
    buf = bytearray(frame_bytes * args.blocksize)
    view = memoryview(buf)
    stdin = sys.stdin.buffer
    stdout = sys.stdout.buffer
    carry = 0
    try:
        while True:
            got = _read_full(stdin, view[carry:])
            have = carry + got
            whole = have - have % frame_bytes
            if whole:
                x = pcm.decode(view[:whole], args.in_format, args.channels)
                stdout.write(pcm.encode(engine.process(x), args.out_format))
            carry = have - whole
            if carry:
                buf[:carry] = buf[whole:have]
            if got == 0:
                break
        stdout.flush()
    except BrokenPipeError:
        # The reader went away: stop quietly, and keep Python from complaining at exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        log(f"output closed by the reader after {engine.frame} frames")
        return 0
    if carry:
        log(f"input ended inside a frame: {carry} trailing bytes (less than one {frame_bytes}-byte frame) ignored")
    report_counts(engine, "pipe")
    log(f"pipe: {engine.frame} frames")
    return 0
