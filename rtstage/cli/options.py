"""Command-line options shared by several subcommands.

Engine options (``--preset``, ``--bits``, ...), the ``--control-*`` and
``--midi-*`` options of a command that runs a control server, and the small
argument types they use.
"""

import argparse

from ..control import DEFAULT_CONTROL_PORT
from ..dither import DITHER_KINDS
from ..errors import RtstageError
from ..files.exits import refuse_force
from ..presets import settings_from


def seed_value(text):
    """Parse a seed: decimal or 0x-prefixed hexadecimal, 0..2^64-1."""
    try:
        value = int(text, 0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not an integer: {text!r}") from None
    if not 0 <= value < 2**64:
        raise argparse.ArgumentTypeError(f"seed must be from 0 to 2^64-1, got {text}")
    return value


def add_engine_options(parser):
    """Add --preset, --bits, --dither, --shaper, --seed, --gain-db, --dither-scale, --accept-unsafe-shaping."""
    group = parser.add_argument_group("engine")
    group.add_argument("--preset", help="preset id from presets/ or a path to a preset .toml")
    group.add_argument("--bits", type=int, help="target word length, 2..24 (default 16)")
    group.add_argument("--dither", help=f"dither kind: {', '.join(DITHER_KINDS)} (default tpdf)")
    group.add_argument("--shaper", help="noise shaper id or shaper .toml (default flat; see 'rtstage shaper list')")
    group.add_argument("--seed", type=seed_value, help="dither seed (default: random, and logged)")
    group.add_argument("--gain-db", type=float, help="gain before the quantizer in dB (default 0)")
    group.add_argument("--dither-scale", type=float, help="expert: dither amplitude relative to the textbook amplitude")
    group.add_argument("--accept-unsafe-shaping", action="store_true",
                       help="accept what theory marks unsafe: shaping without dither, or a non-i.i.d. dither inside a "
                       "feedback shaper (Lipshitz, Wannamaker & Vanderkooy, JAES 2004); every use warns")
    refuse_force(parser)
    return group


def settings_from_args(args, warn=None):
    """Resolved EngineSettings from parsed options (a missing seed is drawn here).

    When ``--accept-unsafe-shaping`` lets an unsafe combination through,
    ``warn`` (default: the log) gets one line naming the risk, its source
    (the preset or the command line) and the reference.
    """
    from ..log import log
    from ..settings import unsafe_warning

    settings = settings_from(
        args.preset,
        bits=args.bits,
        dither=args.dither,
        shaper=args.shaper,
        seed=args.seed,
        gain_db=args.gain_db,
        dither_scale=args.dither_scale,
        accept_unsafe=args.accept_unsafe_shaping or None,
    ).resolved()
    from_preset = args.preset and (args.dither is None or args.shaper is None)
    message = unsafe_warning(settings, f"preset {args.preset}" if from_preset else "the command line")
    if message:
        (warn or log)(message)
    return settings


def input_files_of(args):
    """The files the engine options read (preset and shaper files), for the output policy."""
    from ..presets import preset_path

    files = []
    if getattr(args, "preset", None):
        files.append(preset_path(args.preset))
    shaper = getattr(args, "shaper", None)
    if shaper and (shaper.endswith(".toml") or "/" in shaper):
        files.append(shaper)
    return files


def positive_float(text):
    """Parse a number greater than 0 (an argparse type)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"must be positive, got {text}")
    return value


def check_blocksize(blocksize):
    """Raise RtstageError unless ``blocksize`` is 1..2^20 frames."""
    if blocksize < 1 or blocksize > 1 << 20:
        raise RtstageError(f"blocksize must be between 1 and 1048576 frames, got {blocksize}")


def add_control_arguments(parser):
    """Add ``--control-port``, ``--control-host``, ``--control-token-file`` and ``--control-preset-dir``."""
    parser.add_argument("--control-port", type=int, default=DEFAULT_CONTROL_PORT,
                        help=f"TCP port of the control socket (default {DEFAULT_CONTROL_PORT}; 0 = off)")
    parser.add_argument("--control-host", default="127.0.0.1",
                        help="address the control socket listens on (default 127.0.0.1; others need a token)")
    parser.add_argument("--control-token-file", metavar="F",
                        help="file holding the control token (readable by its owner only)")
    parser.add_argument("--control-preset-dir", metavar="DIR", default=None,
                        help="directory of parameter presets for preset_load/preset_save and program changes")


def server_from_args(args, controller):
    """The control server the ``--control-*`` options ask for, not started; None when the port is 0."""
    if args.control_port == 0:
        return None
    if not 0 < args.control_port < 65536:
        raise RtstageError(f"--control-port must be 0 (off) or 1..65535, got {args.control_port}")
    from ..control.server import ControlServer, read_token_file

    token = read_token_file(args.control_token_file) if args.control_token_file else None
    return ControlServer(controller, host=args.control_host, port=args.control_port, token=token)


def add_midi_arguments(parser):
    """Add ``--midi-api``, ``--midi-in``, ``--midi-out``, ``--midi-map`` and ``--midi-virtual``."""
    parser.add_argument("--midi-api", default="auto", choices=("auto", "jack", "alsa", "coremidi", "winmm"),
                        help="MIDI API (default auto: the first that works, in this order)")
    parser.add_argument("--midi-in", metavar="NAME", help="MIDI input port: a name substring (client numbers ignored)")
    parser.add_argument("--midi-out", metavar="NAME", help="MIDI output port for value feedback: a name substring")
    parser.add_argument("--midi-map", metavar="MAP", default="default",
                        help="controller map: a name in presets/midi/ or a path to a .toml (default: default)")
    parser.add_argument("--midi-virtual", action="store_true",
                        help="open virtual ports control-in/control-out instead of connecting by name")


def midi_from_args(args, controller):
    """The :class:`~rtstage.control.midi.MidiControl` the ``--midi-*`` options ask for, not started; None without MIDI."""
    if not (args.midi_in or args.midi_out or args.midi_virtual):
        return None
    from ..control.midi import MidiControl, load_map

    return MidiControl(controller, load_map(args.midi_map), api=args.midi_api, in_port=args.midi_in,
                       out_port=args.midi_out, virtual=args.midi_virtual)
