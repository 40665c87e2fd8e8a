"""``rtstage linktest``: prove that a link is bit-transparent.

``rtstage linktest generate OUT --seed S``
    Write the test sequence (a pure function of seed, bits, rate, channels, length).
``rtstage linktest analyse CAPTURE --seed S``
    Find the sequence in a capture and name what the path did; exit 0 when
    every channel passed transparently, 1 when not, 2 for bad usage or when
    the sequence is not found.
``rtstage linktest run --output-device D --input-device D2``
    Play and record at once through one duplex stream, then analyse.

The summary goes to stdout, the JSON report to ``--report``; log lines and
errors go to stderr, errors as one line beginning ``rtstage:``.
"""

import argparse
import json
import os
import sys

from ..errors import RtstageError
from ..files.exits import add_overwrite_options
from ..log import log
from ..settings import new_seed
from .options import positive_float, seed_value

EXAMPLE = """\
worked example (a scenario of our own): a studio sends its 24-bit stereo programme to a
transmitter site through a network audio bridge; before air, check that the bridge carries
every word unchanged.

  rtstage linktest generate bridge-check.wav --seed 2718 --bits 24 --seconds 10
      (play bridge-check.wav into the bridge at the studio, record what the far end
       delivers as far-end.wav, at the same rate and word length or longer)
  rtstage linktest analyse far-end.wav --seed 2718 --bits 24 --report far-end.json
      exit 0 and 'TRANSPARENT' when every word arrived; otherwise one line per channel,
      e.g. 'channel 2: NOT transparent: truncated to 16 bits (error biased by half a step)'

  when both ends are on this machine, play and record in one go (same host API):
  rtstage linktest run --output-device "bridge out" --input-device "bridge in" --seed 2718

caution: the sequence is full-scale noise; keep monitoring down or off while it plays,
protect hearing and equipment, and follow local codes and licensed practice for levels.
exit status: 0 transparent, 1 not transparent, 2 bad usage or sequence not found."""


def _non_negative_float(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"must not be negative, got {text}")
    return value


def _sequence_options(p, seed_required=True):
    p.add_argument("--seed", type=seed_value, required=seed_required,
                   help="sequence seed, 0..2^64-1 (decimal or 0x hex)" + ("" if seed_required else " (default: random, logged)"))
    p.add_argument("--bits", type=int, default=24, help="word length of the sequence, 8..24 (default 24)")


def register(subparsers):
    """Add ``linktest`` with its ``generate``, ``analyse`` and ``run`` subcommands."""
    fmt = argparse.RawDescriptionHelpFormatter
    parser = subparsers.add_parser(
        "linktest", help="prove that a link is bit-transparent (test sequence, analyser, live loop)",
        description="Prove that a link passes words unchanged: write a test sequence, find it in a capture and "
                    "name what the path did (latency, channel order, polarity, gain, DC, slips, drift, clipping, "
                    "truncation, rounding or dither), or play and record it live.",
        epilog=EXAMPLE, formatter_class=fmt)
    parser.set_defaults(handler=lambda args: _usage(parser))
    sub = parser.add_subparsers(dest="linktest_command", metavar="ACTION")

    p = sub.add_parser("generate", help="write the test sequence", formatter_class=fmt, epilog=EXAMPLE,
                       description="Write the link test sequence: start marker, digital silence, low-level words, "
                                   "full-range words, near-full-scale words, end marker; every channel its own words.")
    p.add_argument("output", help="sound file to write (.wav, .flac, .aiff, .w64, .caf)")
    _sequence_options(p)
    p.add_argument("--samplerate", type=int, default=48000, help="sample rate in Hz (default 48000)")
    p.add_argument("--channels", type=int, default=2, help="channels (default 2)")
    p.add_argument("--seconds", type=positive_float, default=10.0,
                   help="length, rounded to the sequence's grid (default 10)")
    add_overwrite_options(p)
    p.set_defaults(handler=run_generate)

    p = sub.add_parser("analyse", help="find the sequence in a capture and name what the path did", formatter_class=fmt,
                       epilog=EXAMPLE, description="Find the link test sequence in a capture of any length and compare "
                                                   "it word for word. Exit 0 transparent, 1 not, 2 bad usage or not found.")
    p.add_argument("capture", help="the recorded sound file")
    _sequence_options(p)
    p.add_argument("--channels", type=int, help="channels of the sequence (default: the capture's)")
    p.add_argument("--seconds", type=positive_float,
                   help="length given to generate (default: read from the end marker)")
    p.add_argument("--report", metavar="R.json", help="write the JSON report here")
    p.add_argument("--json", action="store_true", help="print the JSON report on stdout instead of the summary")
    add_overwrite_options(p)
    p.set_defaults(handler=run_analyse)

    p = sub.add_parser("run", help="play and record the sequence at once, then analyse", formatter_class=fmt,
                       epilog=EXAMPLE, description="Play the sequence on the output device and record the input device "
                                                   "in one duplex stream (a compiled callback, as the live engine), then "
                                                   "analyse; the latency is the round trip. Exit codes as analyse.")
    dev = p.add_argument_group("devices")
    dev.add_argument("--output-device", help="device the sequence is played on (index or name)")
    dev.add_argument("--input-device", help="device the return is recorded from (index or name)")
    dev.add_argument("--hostapi", help="host API to choose both devices from (index or name)")
    dev.add_argument("--blocksize", type=int, default=256, help="frames per callback (default 256)")
    dev.add_argument("--latency", type=positive_float, help="suggested device latency in seconds")
    dev.add_argument("--input-channels", type=int, help="channels to record (default: as many as played)")
    _sequence_options(p, seed_required=False)
    p.add_argument("--samplerate", type=int, default=48000, help="sample rate in Hz (default 48000)")
    p.add_argument("--channels", type=int, default=2, help="channels played (default 2)")
    p.add_argument("--seconds", type=positive_float, default=5.0, help="sequence length (default 5)")
    p.add_argument("--preroll", type=_non_negative_float, default=0.5,
                   help="seconds of digital silence before the sequence (default 0.5)")
    p.add_argument("--tail", type=_non_negative_float, default=0.5,
                   help="seconds of silence recorded after it; must exceed the path's latency (default 0.5)")
    p.add_argument("--capture", metavar="FILE.wav", help="also write the recording here (WAV, 32-bit float: exact)")
    p.add_argument("--report", metavar="R.json", help="write the JSON report here")
    p.add_argument("--json", action="store_true", help="print the JSON report on stdout instead of the summary")
    add_overwrite_options(p)
    p.set_defaults(handler=run_live)


def _usage(parser):
    from ..files.exits import UsageError

    raise UsageError(f"{parser.prog.removeprefix('rtstage ')}: give an action ('{parser.prog} --help' describes them)")


def run_generate(args):
    """Handler of ``rtstage linktest generate``."""
    from ..linktest import sequence as seq
    from ..linktest.writer import write_sequence

    seq.check_shape(args.bits, args.samplerate, args.channels, seq.sequence_frames(args.samplerate, 1.0))
    frames = seq.sequence_frames(args.samplerate, args.seconds)
    write_sequence(args.output, args.seed, args.bits, args.samplerate, args.channels, frames, overwrite=args.overwrite)
    log(seq.CAUTION)
    log(f"wrote {args.output}: {frames} frames ({frames / args.samplerate:.3f} s), {args.channels} ch, "
        f"{args.bits}-bit words, {args.samplerate} Hz, seed {args.seed}")
    return 0


def _frames_for(args, samplerate):
    from ..linktest import sequence as seq

    return seq.sequence_frames(samplerate, args.seconds) if args.seconds else None


def _plan(args, activity, inputs=(), capture=None):
    """The checked output plan of ``--report`` (and run's ``--capture``), before any work (rtstage.files.policy)."""
    from ..files.policy import OutputPlan

    plan = OutputPlan(activity, inputs=list(inputs), overwrite=args.overwrite)
    if capture:
        plan.add_file(capture, "--capture")
    if args.report:
        plan.add_file(args.report, "--report")
    return plan.check()


def _finish(report, args, plan, extra=None):
    from ..linktest.analyse import report_json

    if extra:
        report = {**report, **extra}
    if args.report:
        plan.write_text(args.report, report_json(report) + "\n")
    plan.commit()
    if args.report:
        log(f"wrote the report {args.report}")
    if args.json:
        print(report_json(report))
    else:
        print("\n".join(report["summary"]))
    if not report["found"]:
        raise RtstageError("the link test sequence is not in the capture (check --seed, --bits and the routing)")
    return 0 if report["transparent"] else 1


def run_analyse(args):
    """Handler of ``rtstage linktest analyse``."""
    from ..linktest.analyse import analyse, read_capture

    if not os.path.exists(args.capture):
        raise RtstageError(f"cannot read {args.capture}: no such file")
    plan = _plan(args, f"analysing {args.capture}", inputs=[args.capture])
    data, samplerate = read_capture(args.capture)
    report = analyse(data, samplerate, args.seed, bits=args.bits, channels=args.channels,
                     frames=_frames_for(args, samplerate))
    return _finish(report, args, plan)


def run_live(args):
    """Handler of ``rtstage linktest run``."""
    from ..linktest import sequence as seq
    from ..linktest.analyse import analyse, summary_lines
    from ..linktest.loop import run_linktest

    seed = args.seed if args.seed is not None else new_seed()
    if args.seed is None:
        log(f"seed {seed} (pass --seed {seed} to analyse the capture again)")
    frames = seq.sequence_frames(args.samplerate, args.seconds)
    seq.check_shape(args.bits, args.samplerate, args.channels, frames)
    if args.blocksize < 1 or args.blocksize > 1 << 16:
        raise RtstageError(f"blocksize must be 1..65536 frames, got {args.blocksize}")
    plan = _plan(args, "running the link test", capture=args.capture)
    log(seq.CAUTION)
    capture, figures = run_linktest(seed, args.bits, args.samplerate, args.channels, frames,
                                    output_device=args.output_device, input_device=args.input_device,
                                    hostapi=args.hostapi, in_channels=args.input_channels, blocksize=args.blocksize,
                                    latency=args.latency, preroll_s=args.preroll, tail_s=args.tail, log=log)
    if figures["flagged_callbacks"]:
        log(f"warning: {figures['flagged_callbacks']} callbacks reported over/underflows; "
            "words lost there show as slips or errors")
    if args.capture:
        import soundfile as sf

        with plan.atomic(args.capture) as tmp:
            sf.write(tmp, capture, args.samplerate, subtype="FLOAT", format="WAV")
        log(f"writing the recording {args.capture}")
    report = analyse(capture, args.samplerate, seed, bits=args.bits, channels=args.channels, frames=frames)
    preroll = int(round(args.preroll * args.samplerate))
    if report["found"]:
        # The stream starts playing and recording at the same frame: the marker's position minus the
        # preroll is the round trip of the path.
        report["latency_frames"] -= preroll
        for ch in report["channels"]:
            if ch["latency_frames"] is not None:
                ch["latency_frames"] -= preroll
        report["summary"] = summary_lines(report)
    return _finish(report, args, plan, {"stream": figures})
