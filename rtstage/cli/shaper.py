"""The ``rtstage shaper`` subcommand: list, design and plot noise shapers.

``rtstage shaper list``
    Every built-in and preset shaper with its figures (text table or JSON).
``rtstage shaper design --samplerate R --taps N --weighting W [...]``
    Design the optimal error filter for a rate and weighting; ``--save FILE``
    writes it as a shaper preset usable by ``render`` and ``run``.
``rtstage shaper plot ID``
    The NTF curve: a PNG with matplotlib (``--png FILE``), else text or JSON.

Figures and curves go to stdout (data); log lines go to stderr.
"""

import json
import math
import os
import sys

from .. import design as D
from ..errors import RtstageError
from ..files.exits import UsageError, add_overwrite_options
from ..shapers import all_shapers, get_shaper


def register(subparsers):
    """Add the ``shaper`` parser and its ``list``, ``design`` and ``plot`` subcommands."""
    parser = subparsers.add_parser(
        "shaper",
        help="list, design and plot noise shapers",
        description="List the noise shapers with their figures, design new ones for any sample rate, plot their NTF.",
    )
    parser.set_defaults(handler=lambda args: _usage(parser))
    sub = parser.add_subparsers(dest="shaper_command", metavar="ACTION")

    p = sub.add_parser("list", help="every built-in and preset shaper with its figures")
    p.add_argument("--samplerate", type=float, help="rate for the frequency figures (default: each shaper's design rate, else 44100)")
    p.add_argument("--json", action="store_true", help="JSON instead of a text table")
    p.set_defaults(handler=run_list)

    p = sub.add_parser(
        "design",
        help="design an error-feedback filter for a sample rate and weighting",
        description=(
            "Design the error filter that minimises the weighted added-noise power: the linear predictor of the "
            "weighting's power spectrum (Gerzon & Craven, AES 1989). Caps on the NTF's maximum gain and on the total "
            "noise gain are met by narrowing the weighting's range."
        ),
    )
    p.add_argument("--samplerate", type=float, required=True, help="design sample rate in Hz")
    p.add_argument("--taps", type=int, required=True, help="error-filter taps, 1..32")
    p.add_argument("--weighting", default="threshold", choices=sorted(D.WEIGHTINGS) + sorted(D.WEIGHTING_ALIASES), help="what the design minimises (default threshold)")
    p.add_argument("--table", help="weighting table file of 'Hz dB' rows (higher dB = more audible); implies --weighting table")
    p.add_argument("--max-gain-db", type=float, help="cap on the NTF's maximum gain in dB (>= 0)")
    p.add_argument("--max-noise-gain-db", type=float, help="cap on the total noise-power gain in dB (>= 0)")
    p.add_argument("--range-db", type=float, default=D.DEFAULT_RANGE_DB, help=f"weighting range below its peak, dB (default {D.DEFAULT_RANGE_DB:g})")
    p.add_argument("--audible-limit-hz", type=float, default=D.AUDIBLE_LIMIT_HZ, help="above this the weighting sits at its floor (default 20000)")
    p.add_argument("--id", dest="shaper_id", help="id of the designed shaper (default e.g. thr9-48k)")
    p.add_argument("--save", metavar="FILE", help="write the design as a shaper preset (.toml)")
    p.add_argument("--json", action="store_true", help="print the design as JSON")
    add_overwrite_options(p)
    p.set_defaults(handler=run_design)

    p = sub.add_parser("plot", help="the NTF curve of a shaper")
    p.add_argument("shaper", help="shaper id or shaper .toml")
    p.add_argument("--samplerate", type=float, help="sample rate in Hz (default: the design rate, else 44100)")
    p.add_argument("--points", type=int, default=512, help="frequency intervals from 0 to fs/2 (default 512)")
    p.add_argument("--json", action="store_true", help="JSON instead of 'Hz dB' text rows")
    p.add_argument("--png", metavar="FILE", help="draw the curve into an image (needs matplotlib)")
    add_overwrite_options(p)
    p.set_defaults(handler=run_plot)


def _usage(parser):
    raise UsageError("shaper: give an action: list, design or plot ('rtstage shaper --help' describes them)")


def _log(message):
    print(f"rtstage: {message}", file=sys.stderr, flush=True)


def _json_safe(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _check_rate(samplerate):
    if samplerate is not None and not D.MIN_SAMPLERATE_HZ <= samplerate <= D.MAX_SAMPLERATE_HZ:
        raise RtstageError(f"sample rate must be between {D.MIN_SAMPLERATE_HZ} and {D.MAX_SAMPLERATE_HZ} Hz, got {samplerate:g}")


def run_list(args):
    """Print every shaper's figures."""
    _check_rate(args.samplerate)
    rows = []
    for sid, shaper in all_shapers().items():
        fig = D.shaper_figures(shaper, args.samplerate, npoints=1 << 13)
        fig = {"id": sid, "design_samplerate_hz": shaper.design_samplerate_hz, **fig, "description": shaper.description}
        rows.append(fig)
    if args.json:
        print(json.dumps([{k: _json_safe(v) for k, v in r.items()} for r in rows], indent=2))
        return 0
    header = (
        f"{'id':<16} {'taps':>4} {'design':>7} {'DC dB':>7} {'Nyq dB':>7} {'min dB':>7} {'at Hz':>7} "
        f"{'noise dB':>8} {'logmean':>7} {'minph':>5} {'TPDF LSB':>8}"
    )
    print(header)
    for r in rows:
        rate = f"{r['design_samplerate_hz'] / 1000:g}k" if r["design_samplerate_hz"] else "any"
        print(
            f"{r['id']:<16} {r['taps']:>4} {rate:>7} {r['dc_gain_db']:>7.1f} {r['nyquist_gain_db']:>7.1f} "
            f"{r['min_gain_db']:>7.1f} {r['min_gain_hz']:>7.0f} {r['noise_gain_db']:>8.2f} {r['log_mean_db']:>7.3f} "
            f"{'yes' if r['minimum_phase'] else 'no':>5} {r['headroom_tpdf_lsb']:>8.2f}"
        )
    return 0


def run_design(args):
    """Design a shaper; print its figures and optionally save it."""
    plan = None
    if args.save:
        from ..files.policy import OutputPlan

        plan = OutputPlan(f"saving the shaper design {args.save}", inputs=[args.table], overwrite=args.overwrite)
        plan.add_file(args.save, "--save")
        plan.check()
    weighting = args.weighting
    table = None
    if args.table:
        weighting = "table"
        table = D.read_weighting_table(args.table)
    elif weighting == "table":
        raise RtstageError("--weighting table needs --table FILE")
    design = D.design_shaper(
        args.samplerate,
        args.taps,
        weighting,
        table=table,
        range_db=args.range_db,
        max_gain_db=args.max_gain_db,
        max_noise_gain_db=args.max_noise_gain_db,
        audible_limit_hz=args.audible_limit_hz,
        shaper_id=args.shaper_id,
    )
    if design.range_db < design.requested_range_db:
        _log(f"caps met by narrowing the weighting range from {design.requested_range_db:g} to {design.range_db:.2f} dB")
    if args.save:
        with plan:
            D.save_design(design, args.save, plan=plan)
        _log(f"saved shaper '{design.shaper.id}' to {args.save}")
    out = {
        "id": design.shaper.id,
        "samplerate_hz": design.samplerate,
        "weighting": design.weighting,
        "range_db": design.range_db,
        "coefs": list(design.shaper.coefs),
        **{k: _json_safe(v) for k, v in design.figures.items()},
    }
    if args.json:
        print(json.dumps(out, indent=2))
        return 0
    f = design.figures
    print(f"id                     {design.shaper.id}")
    print(f"samplerate_hz          {design.samplerate:g}")
    print(f"weighting              {design.weighting} (range {design.range_db:.2f} dB)")
    print(f"coefs                  {' '.join(f'{c:.8g}' for c in design.shaper.coefs)}")
    print(f"max_gain_db            {f['max_gain_db']:.2f} at {f['max_gain_hz']:.0f} Hz")
    print(f"min_gain_db            {f['min_gain_db']:.2f} at {f['min_gain_hz']:.0f} Hz")
    print(f"dc/nyquist_gain_db     {f['dc_gain_db']:.2f} / {f['nyquist_gain_db']:.2f}")
    print(f"noise_gain_db          {f['noise_gain_db']:.2f}")
    print(f"weighted_noise_gain_db {f['weighted_noise_gain_db']:.2f}")
    print(f"log_mean_db            {f['log_mean_db']:.4f}")
    print(f"minimum_phase          {'yes' if f['minimum_phase'] else 'no'}")
    print(f"headroom_tpdf_lsb      {f['headroom_tpdf_lsb']:.2f}")
    return 0


def run_plot(args):
    """Print or draw a shaper's NTF curve."""
    _check_rate(args.samplerate)
    if not 8 <= args.points <= 1 << 16:
        raise RtstageError(f"--points must be between 8 and 65536, got {args.points}")
    plan = None
    if args.png:
        from ..files.policy import OutputPlan

        plan = OutputPlan(f"drawing {args.png}", inputs=[args.shaper] if os.path.exists(args.shaper) else [],
                          overwrite=args.overwrite)
        plan.add_file(args.png, "--png")
        plan.check()
    shaper = get_shaper(args.shaper)
    freqs_hz, gain = D.ntf_curve(shaper, args.samplerate, args.points)
    rate = float(freqs_hz[-1] * 2.0)
    gain = [max(float(g), -300.0) for g in gain]
    if args.png:
        with plan:
            _draw_png(shaper, freqs_hz, gain, rate, args.png, plan)
        _log(f"wrote {args.png}")
        return 0
    if args.json:
        print(json.dumps({"id": shaper.id, "samplerate_hz": rate, "freqs_hz": [float(f) for f in freqs_hz], "gain_db": gain}))
        return 0
    print(f"# NTF of {shaper.id} at {rate:g} Hz: frequency_hz gain_db")
    for f, g in zip(freqs_hz, gain):
        print(f"{f:.3f} {g:.4f}")
    return 0


def _draw_png(shaper, freqs_hz, gain, rate, path, plan):
    """The NTF figure, in the style of the report's ``shaper-ntf.png`` (:func:`rtstage.meters.plots.write_ntf_png`)."""
    from ..meters.plots import write_ntf_png

    write_ntf_png(shaper.id, shaper.coefs, rate, path, design_samplerate_hz=shaper.design_samplerate_hz, plan=plan)
