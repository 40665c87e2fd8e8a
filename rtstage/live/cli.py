"""``rtstage run`` and ``rtstage devices``."""

import json
import os
import sys

from ..cli_common import add_engine_options, settings_from_args
from ..engine import log
from ..errors import RtstageError


def _positive_float(text):
    import argparse

    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"must be positive, got {text}")
    return value


def register(subparsers):
    """Add the ``run`` and ``devices`` subcommands."""
    from .supervisor import DEFAULT_BLOCKSIZE

    run = subparsers.add_parser(
        "run",
        help="run the engine live on an audio device",
        description="Requantize live: input device (or --source) in, integer words out to the output device. "
        "Caution: test tones and noise can be loud; start with the monitor level down, protect your hearing, "
        "and follow local codes and licensed practice for listening levels.",
    )
    dev = run.add_argument_group("device")
    dev.add_argument("--device", help="device for input and output: index or name substring (exact name first)")
    dev.add_argument("--input-device", help="input device (index or name)")
    dev.add_argument("--output-device", help="output device (index or name)")
    dev.add_argument("--hostapi", help="host API to choose devices from (index or name substring)")
    dev.add_argument("--samplerate", type=int, help="sample rate in Hz (default: the source file's, else the device's)")
    dev.add_argument("--blocksize", type=int, default=DEFAULT_BLOCKSIZE,
                     help=f"frames per callback, fixed (default {DEFAULT_BLOCKSIZE})")
    dev.add_argument("--latency", type=_positive_float, help="suggested device latency in seconds")
    dev.add_argument("--channels", type=int, help="channel count (default: the source file's, else 2)")
    dev.add_argument("--callback", choices=("compiled", "python"), default="compiled",
                     help="callback mode; 'python' is a diagnostic fallback, never real-time safe (default compiled)")
    add_engine_options(run)
    io = run.add_argument_group("source, tap and status")
    io.add_argument("--source", help="input instead of the input device: a sound file, 'silence', "
                    "'tone[:freq_hz=F][,level_dbfs=L]' or 'noise[:level_dbfs=L][,seed=S]'")
    io.add_argument("--loop", action="store_true", help="loop a file source instead of stopping at its end")
    io.add_argument("--tap", help="write exactly the words sent to the device into this file (gaps in TAP.gaps.json)")
    io.add_argument("--duration", type=_positive_float, help="stop after this many seconds")
    io.add_argument("--status-file", help="write the final status JSON here instead of stderr")
    io.add_argument("--settle", type=float, default=1.0,
                    help="start-up seconds whose xruns are reported apart (default 1.0)")
    run.set_defaults(handler=run_command)

    devices = subparsers.add_parser("devices", help="list audio devices and host APIs")
    devices.add_argument("--json", action="store_true", help="print the listing as JSON")
    devices.set_defaults(handler=devices_command)


def run_command(args):
    """Handler of ``rtstage run``."""
    from .supervisor import LiveEngine

    settings = settings_from_args(args)
    if args.tap and os.path.exists(args.tap) and not args.force:
        raise RtstageError(f"tap file {args.tap} exists; use --force to replace it")
    if args.source is None and args.loop:
        raise RtstageError("--loop needs a --source file")
    engine = LiveEngine(
        settings, device=args.device, input_device=args.input_device, output_device=args.output_device,
        hostapi=args.hostapi, samplerate=args.samplerate, blocksize=args.blocksize, channels=args.channels,
        latency=args.latency, source=args.source, loop=args.loop, tap=args.tap, callback=args.callback,
        settle_s=args.settle,
    )
    if args.callback == "python":
        log("warning: --callback python runs Python in the audio thread (diagnosis only); expect dropouts")
    engine.prepare()
    status = engine.run(duration_s=args.duration)
    text = json.dumps(status)
    if args.status_file:
        with open(args.status_file, "w") as f:
            f.write(text + "\n")
    else:
        print(text, file=sys.stderr, flush=True)
    return 0


def devices_command(args):
    """Handler of ``rtstage devices``."""
    from .devices import list_devices

    listing = list_devices()
    if args.json:
        print(json.dumps(listing, indent=1))
        return 0
    for api in listing["hostapis"]:
        print(f"host API {api['index']}: {api['name']}")
        for d in listing["devices"]:
            if d["hostapi"] != api["name"]:
                continue
            mark = "  (!) " + d["warning"] if d["warning"] else ""
            print(f"  {d['index']:3d}  {d['name']}  in {d['max_input_channels']}, out {d['max_output_channels']}, "
                  f"{d['default_samplerate']:g} Hz{mark}")
    return 0
