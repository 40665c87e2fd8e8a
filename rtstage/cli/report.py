"""``rtstage report``: plots and a summary of a meter report, a live status file or a demo folder's report."""

import json
import os

from ..errors import RtstageError
from ..files.exits import add_overwrite_options
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
    add_overwrite_options(p)
    p.set_defaults(handler=run_report)


def reports_in(obj):
    """(label, report) pairs found in a report, a status object or a demo report."""
    if "channels" in obj:
        return [("", obj)]
    if isinstance(obj.get("meters"), dict) and "channels" in obj["meters"]:
        return [("", obj["meters"])]
    if isinstance(obj.get("passes"), list):
        return [(f"pass-{i + 1}", r) for i, r in enumerate(obj["passes"])]
    raise RtstageError("no 'channels', 'meters' or 'passes' key")


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


def read_report(path):
    """The JSON object of a report file, or a one-line refusal saying what the file is instead."""
    if os.path.isdir(path):
        raise RtstageError(f"{path} is a folder, not a meter report")
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as exc:
        raise RtstageError(f"cannot read {path}: {exc.strerror}") from None
    if data[:4] in (b"RIFF", b"RF64", b"FORM", b"fLaC", b"OggS"):
        raise RtstageError(f"{path} is not a meter report: it is a sound file (reports are the JSON of 'rtstage render --report')")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RtstageError(f"{path} is not a meter report: not UTF-8 text (byte {exc.start})") from None
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as exc:
        raise RtstageError(f"{path} is not a meter report: not valid JSON ({exc.msg}, line {exc.lineno})") from None
    if not isinstance(obj, dict):
        raise RtstageError(f"{path} is not a meter report: a JSON {type(obj).__name__}, not an object")
    return obj


def _check_report(path, label, report):
    channels = report.get("channels")
    if not isinstance(channels, list) or not all(isinstance(ch, dict) for ch in channels):
        raise RtstageError(f"{path} is not a meter report: 'channels' is not a list of channel entries")
    for ch in channels:
        for key in ("added_noise_dbfs", "predicted_noise_dbfs"):
            if not isinstance(ch.get(key), dict):
                raise RtstageError(f"{path} is not a meter report: a channel has no '{key}' object")


def run_report(args):
    """Handler of ``rtstage report``: summary on stdout, figures into --plot DIR (through the output policy)."""
    obj = read_report(args.file)
    if "measure_version" in obj:
        # A report of 'rtstage measure': its summary (its plots need the file: rtstage measure FILE --plot DIR).
        from ..meters.measure import summary_lines as measure_lines

        if args.plot:
            raise RtstageError(f"{args.file} is a measure report: draw its plots with 'rtstage measure {obj.get('file')} --plot DIR'")
        print("\n".join(measure_lines(obj)))
        return 0
    try:
        found = reports_in(obj)
    except RtstageError as exc:
        raise RtstageError(f"{args.file} is not a meter report: {exc}") from None
    for label, report in found:
        _check_report(args.file, label, report)
    plan = None
    if args.plot:
        from ..files.policy import OutputPlan
        from ..meters.plots import PLOT_NAMES

        plan = OutputPlan(f"writing the figures of {args.file}", inputs=[args.file], overwrite=args.overwrite)
        names = [os.path.join(label, name) if label else name for label, _ in found for name in PLOT_NAMES]
        top = plan.add_folder(args.plot, "--plot folder", names)
        plan.check()
    for label, report in found:
        if not 1 <= args.channel <= len(report["channels"]):
            raise RtstageError(f"channel {args.channel} is not in the report (1..{len(report['channels'])})")
    lines = []
    for label, report in found:
        lines.extend(summary_lines(label, report))
    if plan is not None:
        from ..meters.plots import write_plots

        with plan:
            for label, report in found:
                write_plots(report, os.path.join(args.plot, label) if label else args.plot, channel=args.channel - 1,
                            plan=plan, folder=top, prefix=label)
        log(f"wrote the figures into {args.plot}")
    print("\n".join(lines))
    return 0
