"""``rtstage report``: plots and a summary of a meter report, a live status file or a demo folder's report."""

import json
import os

from ..errors import RtstageError
from ..log import log


def register(subparsers):
    """Add the ``report`` subcommand."""
    p = subparsers.add_parser(
        "report",
        help="summarise a meter report and plot it",
        description="Summarise a meter report (rtstage render --report), the 'meters' of a live status file "
        "(rtstage run --status-file) or a demo report with passes, and with --plot write PNG figures: error "
        "spectrum against the predicted NTF, histogram of the added error, noise modulation against the input's "
        "position within one LSB, and the shaper's NTF (needs matplotlib).",
    )
    p.add_argument("file", help="report JSON")
    p.add_argument("--plot", metavar="DIR", help="write the figures into DIR")
    p.add_argument("--channel", type=int, default=1, help="channel to plot, from 1 (default 1)")
    p.set_defaults(handler=run_report)


def reports_in(obj):
    """(label, report) pairs found in a report, a status object or a demo report."""
    if "channels" in obj:
        return [("", obj)]
    if isinstance(obj.get("meters"), dict) and "channels" in obj["meters"]:
        return [("", obj["meters"])]
    if isinstance(obj.get("passes"), list):
        return [(f"pass-{i + 1}", r) for i, r in enumerate(obj["passes"])]
    raise RtstageError("no meter report found (expected 'channels', 'meters' or 'passes')")


def summary_lines(label, report):
    """One line per channel: added noise (unweighted / A / 468) against prediction, modulation, peaks."""
    head = f"{label + ': ' if label else ''}{report.get('bits')}-bit {report.get('dither')}, shaper {report.get('shaper')}, {report.get('duration_s', 0):.1f} s"
    lines = [head]
    for c, ch in enumerate(report["channels"]):
        added, predicted = ch["added_noise_dbfs"], ch["predicted_noise_dbfs"]

        def pair(key):
            a, p = added.get(key), predicted.get(key)
            return f"{'--' if a is None else f'{a:.1f}'}/{'--' if p is None else f'{p:.1f}'}"

        mod = ch.get("noise_modulation_db")
        tp = ch.get("true_peak_dbtp")
        lines.append(
            f"  ch{c + 1}: added/predicted dBFS unweighted {pair('unweighted')}, A {pair('a_weighted')}, 468 {pair('itu468')}; "
            f"noise modulation {'--' if mod is None else f'{mod:.2f}'} dB; true peak {'--' if tp is None else f'{tp:.2f}'} dBTP; "
            f"clipped {ch.get('clipped_samples')}; active bits {ch.get('active_bits')}"
        )
    if report.get("loudness"):
        from ..meters.loudness import loudness_line

        lines.append("  " + loudness_line(report["loudness"]))
    return lines


def run_report(args):
    """Handler of ``rtstage report``: summary on stdout, figures into --plot DIR."""
    try:
        with open(args.file) as f:
            obj = json.load(f)
    except OSError as exc:
        raise RtstageError(f"cannot read {args.file}: {exc.strerror}") from None
    except json.JSONDecodeError as exc:
        raise RtstageError(f"{args.file}: not valid JSON ({exc.msg})") from None
    found = reports_in(obj)
    if isinstance(obj, dict) and "measure_version" in obj:
        # A report of 'rtstage measure': its summary (its plots need the file: rtstage measure FILE --plot DIR).
        from ..meters.measure import summary_lines as measure_lines

        print("\n".join(measure_lines(obj)))
        if args.plot:
            raise RtstageError(f"{args.file} is a measure report: draw its plots with 'rtstage measure {obj.get('file')} --plot DIR'")
        return 0
    for label, report in found:
        if not 1 <= args.channel <= len(report["channels"]):
            raise RtstageError(f"channel {args.channel} is not in the report (1..{len(report['channels'])})")
        print("\n".join(summary_lines(label, report)))
    if args.plot:
        from ..meters.plots import write_plots

        for label, report in found:
            paths = write_plots(report, os.path.join(args.plot, label) if label else args.plot, channel=args.channel - 1)
            log(f"wrote {', '.join(paths)}")
    return 0
