"""Command-line options shared by every subcommand that drives the engine."""

import argparse

from .dither import DITHER_KINDS
from .presets import settings_from


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
    """Add --preset, --bits, --dither, --shaper, --seed, --gain-db, --dither-scale, --force."""
    group = parser.add_argument_group("engine")
    group.add_argument("--preset", help="preset id from presets/ or a path to a preset .toml")
    group.add_argument("--bits", type=int, help="target word length, 2..24 (default 16)")
    group.add_argument("--dither", help=f"dither kind: {', '.join(DITHER_KINDS)} (default tpdf)")
    group.add_argument("--shaper", help="noise shaper id or shaper .toml (default flat; see 'rtstage shaper list')")
    group.add_argument("--seed", type=seed_value, help="dither seed (default: random, and logged)")
    group.add_argument("--gain-db", type=float, help="gain before the quantizer in dB (default 0)")
    group.add_argument("--dither-scale", type=float, help="expert: dither amplitude relative to the textbook amplitude")
    group.add_argument("--force", action="store_true", help="accept settings theory marks unsafe, and replace existing outputs")
    return group


def settings_from_args(args):
    """Resolved EngineSettings from parsed options (a missing seed is drawn here)."""
    return settings_from(
        args.preset,
        bits=args.bits,
        dither=args.dither,
        shaper=args.shaper,
        seed=args.seed,
        gain_db=args.gain_db,
        dither_scale=args.dither_scale,
        force=args.force or None,
    ).resolved()
