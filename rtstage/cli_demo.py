"""``rtstage demo``: requantize the generated overnight programme and print what each dither adds."""

import os

import numpy as np
import soundfile as sf

from . import demo
from .engine import EngineSettings, log
from .render import render_array, words_to_float

DEMO_SETTINGS = (
    ("none", "flat"),
    ("rpdf", "flat"),
    ("tpdf", "flat"),
    ("tpdf", "lvw-me9"),
)


def register(subparsers):
    """Add the ``demo`` subcommand."""
    p = subparsers.add_parser(
        "demo",
        help="requantize a generated programme to 16 bits and print the noise each dither adds",
        description="Generate a small station's overnight feed (quiet chord, long fade, a tone below 1 LSB), "
        "requantize it to 16 bits with several dithers and print what each adds.",
    )
    p.add_argument("--samplerate", type=int, default=48000, help="sample rate in Hz (default 48000)")
    p.add_argument("--seconds", type=float, default=20.0, help="programme length in seconds (default 20)")
    p.add_argument("--seed", type=int, default=2026, help="dither seed (default 2026)")
    p.add_argument("--out", help="folder to write the programme and each rendering to (WAV)")
    p.set_defaults(handler=run_demo)


def _level_dbfs(x):
    """RMS level in dBFS with 0 dBFS = the RMS of a full-scale sine (AES17)."""
    rms = float(np.sqrt(np.mean(np.square(x)))) if x.size else 0.0
    return 20.0 * np.log10(max(rms, 1e-300) * np.sqrt(2.0))


def _deep_tone_dbfs(y, samplerate, start):
    """Peak level of the deep tone in the output, from its in-phase and quadrature parts."""
    seg = y[start:]
    t = (np.arange(start, start + seg.shape[0])) / samplerate
    i = 2.0 * np.mean(seg * np.sin(2 * np.pi * demo.DEEP_TONE_HZ * t)[:, None], axis=0)
    q = 2.0 * np.mean(seg * np.cos(2 * np.pi * demo.DEEP_TONE_HZ * t)[:, None], axis=0)
    return 20.0 * np.log10(np.maximum(np.hypot(i, q), 1e-300))


def run_demo(args):
    """Handler of ``rtstage demo``: prints a table on stdout."""
    x = demo.overnight_programme(args.samplerate, args.seconds)
    deep_start = int(0.75 * x.shape[0])
    if args.out:
        os.makedirs(args.out, exist_ok=True)
        sf.write(os.path.join(args.out, "programme.wav"), x, args.samplerate, subtype="FLOAT")
    print(f"overnight feed, {args.seconds:g} s at {args.samplerate} Hz, requantized to 16 bits (seed {args.seed})")
    print(f"deep tone in the input: {demo.DEEP_TONE_DBFS:.1f} dBFS peak, 1 LSB = {20*np.log10(2.0**-15):.1f} dBFS")
    print(f"{'dither':<10}{'shaper':<10}{'added noise dBFS':>18}{'deep tone out dBFS':>20}")
    for dither, shaper in DEMO_SETTINGS:
        words, _ = render_array(x, args.samplerate, EngineSettings(16, dither, shaper, seed=args.seed))
        y = words_to_float(words)
        added = y - x
        tone = _deep_tone_dbfs(y, args.samplerate, deep_start)
        tone_text = "erased" if np.mean(tone) < -200 else f"{np.mean(tone):.1f}"
        print(f"{dither:<10}{shaper:<10}{_level_dbfs(added):>18.1f}{tone_text:>20}")
        if args.out:
            sf.write(os.path.join(args.out, f"out-{dither}-{shaper}.wav"), words, args.samplerate, subtype="PCM_16")
    if args.out:
        log(f"wrote the programme and renderings to {args.out}")
    return 0
