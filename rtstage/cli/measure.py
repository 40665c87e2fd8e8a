"""``rtstage measure``: analyse a sound file as it is, without requantizing it."""

import json
import sys

from ..files.exits import add_overwrite_options
from ..log import log


def register(subparsers):
    """Add the ``measure`` subcommand."""
    p = subparsers.add_parser(
        "measure",
        help="analyse a sound file without changing it (bits, dither, peaks, DC, noise floor, loudness)",
        description="Analyse a sound file as it is: active and effective bits, bit pattern, whether the low bits look "
                    "dithered, truncated or untouched, sample and true peak, DC, the noise floor in quiet passages, "
                    "and loudness (ITU-R BS.1770-4, EBU Tech 3342). Nothing is requantized. See docs/meters.md.",
    )
    p.add_argument("input", help="sound file (WAV, FLAC, AIFF, ...)")
    p.add_argument("--report", metavar="FILE.json", help="write the figures as JSON")
    p.add_argument("--plot", metavar="DIR", help="write loudness and level plots (PNG, needs matplotlib) into DIR")
    p.add_argument("--loudness-target", metavar="TARGET",
                   help="check the loudness: ebu-r128, or LUFS[:TOLERANCE_LU[:TRUE_PEAK_DBTP[:LRA_MAX_LU]]], e.g. -24:1:-2")
    p.add_argument("--json", action="store_true", help="print the figures as one JSON object on stdout")
    p.add_argument("--quiet", action="store_true", help="no summary on stderr")
    p.add_argument("--accept-truncated", action="store_true",
                   help="measure a WAV/AIFF whose data is shorter than its header declares (warns); refused by default")
    add_overwrite_options(p)
    p.set_defaults(handler=run_measure)


def run_measure(args):
    """Handler of ``rtstage measure``; exit status 1 when a loudness target fails."""
    from ..meters.loudness import parse_target
    from ..meters.measure import measure_file, summary_lines
    from ..meters.report import json_ready, write_report

    from ..files.policy import OutputPlan
    from ..render import open_input

    target = parse_target(args.loudness_target) if args.loudness_target else None
    early = []
    open_input(args.input, accept_truncated=args.accept_truncated, warn=early.append)[0].close()
    # The outputs are checked by the output policy before the file is measured.
    plan = OutputPlan(f"measuring {args.input}", inputs=[args.input], overwrite=args.overwrite)
    if args.report:
        plan.add_file(args.report, "--report")
    folder = None
    if args.plot:
        from ..meters.plots import MEASURE_PLOT_NAMES

        folder = plan.add_folder(args.plot, "--plot folder", MEASURE_PLOT_NAMES)
    with plan.check():
        for message in early:
            log(message)
        report = measure_file(args.input, loudness_target=target, keep_series=bool(args.plot))
        series = report.pop("series", None)
        if args.report:
            write_report(args.report, report, plan=plan)
        if args.plot:
            from ..meters.plots import write_measure_plots

            paths = write_measure_plots(report, series, args.plot, plan=plan, folder=folder)
    if args.plot and not args.quiet:
        log(f"wrote {', '.join(paths)}")
    if args.json:
        sys.stdout.write(json.dumps(json_ready(report), allow_nan=False) + "\n")
    if not args.quiet:
        for line in summary_lines(report):
            print(line, file=sys.stderr)
    verdict = (report.get("loudness") or {}).get("target")
    return 1 if verdict and verdict["pass"] is False else 0
