"""``rtstage render``: requantize a sound file (the driver is :mod:`rtstage.render`)."""

import os

from ..errors import RtstageError
from ..log import log
from ..render import DEFAULT_BLOCKSIZE, SUBTYPES, render_file, report_counts, shaper_warnings
from .options import add_engine_options, check_blocksize, settings_from_args


def _input_info(path):
    import soundfile as sf

    try:
        return sf.info(path)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot read {path}: {exc}") from None


def register(subparsers):
    """Add the ``render`` subcommand."""
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


def run_render(args):
    """Handler of ``rtstage render``."""
    check_blocksize(args.blocksize)
    if not os.path.exists(args.input):
        raise RtstageError(f"cannot read {args.input}: no such file")
    settings = settings_from_args(args)
    automation = None
    if args.automation:
        from ..control.automation import load_automation

        info = _input_info(args.input)
        automation = load_automation(args.automation, samplerate=info.samplerate)
        if (args.report or args.plot) and any(set(values) & {"bits", "dither", "shaper", "dither_scale"} for _, values in automation):
            raise RtstageError("--report and --plot cannot follow automation that changes bits, dither, dither_scale or shaper "
                               "(the predicted noise would change mid-file); render the sections separately")
    meters = None
    if args.report or args.plot:
        from ..meters import MeterBank

        meters = MeterBank.for_engine
    result = render_file(args.input, args.output, settings, blocksize=args.blocksize, subtype=args.subtype,
                         force=args.force, automation=automation, meters=meters)
    engine = result.engine
    for message in shaper_warnings(engine.settings, engine.samplerate, result.peak_dbfs):
        log(message)
    if args.report:
        from ..meters import write_report

        write_report(args.report, result.meter.report())
        log(f"wrote the meter report {args.report}")
    if args.plot:
        from ..meters.plots import write_plots

        log(f"wrote {', '.join(write_plots(result.meter.report(), args.plot))}")
    report_counts(engine, args.output)
    log(f"wrote {args.output}: {engine.frame} frames, {settings.bits} bits, dither {settings.dither}, "
        f"shaper {settings.shaper_id}, seed {settings.seed}" + ("" if args.seed is not None else " (drawn; pass --seed to reproduce)"))
    return 0
