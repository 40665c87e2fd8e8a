"""``rtstage render``: requantize a sound file (the driver is :mod:`rtstage.render`)."""

import functools
import json
import os
import sys

from ..errors import RtstageError
from ..log import log
from ..render import DEFAULT_BLOCKSIZE, SUBTYPES, render_file, report_counts, shaper_warnings
from ..files.exits import add_overwrite_options
from .options import add_engine_options, check_blocksize, input_files_of, settings_from_args


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
    p.add_argument("--loudness-target", metavar="TARGET",
                   help="check the output's loudness: ebu-r128, or LUFS[:TOLERANCE_LU[:TRUE_PEAK_DBTP[:LRA_MAX_LU]]], e.g. -24:1:-2")
    p.add_argument("--quiet", action="store_true", help="no log lines or progress bar on stderr (errors still appear)")
    p.add_argument("--json", action="store_true",
                   help="print one JSON summary on stdout: frames, settings, seed, clipped, replaced, warnings")
    p.add_argument("--accept-truncated", action="store_true",
                   help="render a WAV/AIFF whose data is shorter than its header declares (warns); refused by default")
    p.add_argument("--new-bext", action="store_true",
                   help="give a WAV output a bext chunk (EBU Tech 3285) when the input has none; an input's bext is "
                   "always carried, with one CodingHistory line added (EBU R 98)")
    add_overwrite_options(p)
    p.set_defaults(handler=run_render)


def run_render(args):
    """Handler of ``rtstage render``."""
    from ..files.policy import OutputPlan
    from ..render import _output_format, default_subtype, estimated_bytes, open_input

    check_blocksize(args.blocksize)
    say = (lambda message: None) if args.quiet else log
    early = []
    settings = settings_from_args(args, warn=early.append)
    infile, _layout = open_input(args.input, accept_truncated=args.accept_truncated, warn=early.append)
    with infile:
        frames, channels, samplerate = infile.frames, infile.channels, infile.samplerate
    automation = None
    if args.automation:
        from ..control.automation import load_automation, review_automation

        automation = load_automation(args.automation, samplerate=samplerate)
        if (args.report or args.plot) and any(set(values) & {"bits", "dither", "shaper", "dither_scale"} for _, values in automation):
            raise RtstageError("--report and --plot cannot follow automation that changes bits, dither, dither_scale or shaper "
                               "(the predicted noise would change mid-file); render the sections separately")
        review_automation(automation, settings, frames, args.automation, early.append)
    target = None
    if args.loudness_target:
        from ..meters.loudness import parse_target

        target = parse_target(args.loudness_target)
    # Every output declared and checked before any audio work; all renamed into place together at the end.
    plan = OutputPlan(f"rendering {args.input} to {args.output}", overwrite=args.overwrite,
                      inputs=[args.input, args.automation, *input_files_of(args)])
    fmt = _output_format(args.output)
    subtype = (args.subtype or default_subtype(settings.bits)).upper()
    plan.add_file(args.output, "output", size_bytes=estimated_bytes(frames, channels, subtype, fmt))
    if args.report:
        plan.add_file(args.report, "--report")
    plot_folder = None
    if args.plot:
        from ..meters.plots import PLOT_NAMES

        plot_folder = plan.add_folder(args.plot, "--plot folder", PLOT_NAMES)
    meters = None
    if args.report or args.plot or target is not None:
        from ..meters import MeterBank

        meters = functools.partial(MeterBank.for_engine, loudness_target=target)
    with plan.check():
        for message in early:
            log(message)  # warnings are printed even with --quiet
        result = render_file(args.input, args.output, settings, blocksize=args.blocksize, subtype=args.subtype,
                             automation=automation, meters=meters, quiet=args.quiet, plan=plan,
                             accept_truncated=True, new_bext=args.new_bext, warn=None)
        report = result.meter.report() if result.meter is not None else None
        if args.report:
            from ..meters import write_report

            write_report(args.report, report, plan=plan)
        if args.plot:
            from ..meters.plots import write_plots

            write_plots(report, args.plot, plan=plan, folder=plot_folder)
    engine = result.engine
    warnings = shaper_warnings(engine.settings, engine.samplerate, result.peak_dbfs)
    for message in warnings:
        say(message)
    if args.report:
        say(f"wrote the meter report {args.report}")
    if args.plot:
        say(f"wrote the figures into {args.plot}")
    loudness = report["loudness"] if report is not None else None
    if loudness is not None and target is not None:
        from ..meters.loudness import loudness_line

        say(loudness_line(loudness))
        if loudness["target"]["pass"] is False:
            warnings.append(f"loudness target {target.name} not met: {loudness_line(loudness)}")
    if not args.quiet:
        report_counts(engine, args.output)
    s = engine.settings
    say(f"wrote {args.output}: {engine.frame} frames, {s.bits} bits, dither {s.dither}, "
        f"shaper {s.shaper_id}, seed {s.seed}" + ("" if args.seed is not None else " (drawn; pass --seed to reproduce)"))
    if args.json:
        summary = {
            "input": args.input,
            "output": args.output,
            "frames": int(engine.frame),
            "samplerate": int(engine.samplerate),
            "channels": int(engine.channels),
            "settings": {"bits": s.bits, "dither": s.dither, "shaper": s.shaper_id, "gain_db": s.gain_db,
                         "dither_scale": s.dither_scale},
            "seed": int(s.seed),
            "seed_drawn": args.seed is None,
            "clipped": int(engine.clipped.sum()),
            "replaced": int(engine.nonfinite.sum()),
            "warnings": warnings,
            "report": args.report,
            "loudness": None if loudness is None else {
                k: loudness[k] for k in ("integrated_lufs", "loudness_range_lu", "true_peak_dbtp", "target")},
        }
        from ..meters.report import json_ready

        sys.stdout.write(json.dumps(json_ready(summary), allow_nan=False) + "\n")
        sys.stdout.flush()
    return 0
