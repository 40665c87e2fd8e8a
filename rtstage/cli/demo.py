"""``rtstage demo``: the overnight feed through the live engine, with settings changed on air.

Live (the default): a generated programme — three passes of a small station's
overnight feed (quiet chord, long fade, a tone below 1 LSB) — is played through
``rtstage run`` as a file source, on the device the user names or, without one,
on a private JACK dummy server started for the demo.  Over the real control
socket the demo switches the dither at each pass: RPDF, then flat TPDF, then
TPDF with a shaper designed for the running rate.  It ends by writing a report
folder (the tapped words as WAV, the applied-change log, one meter report per
pass, and plots when matplotlib is installed) and prints the folder's path on
stdout.

``--offline`` instead renders the same programme with each dither and prints a
table, no audio device needed.
"""

import math
import os
import socket
import subprocess
import sys
import tempfile
import time

import numpy as np
import soundfile as sf

from .. import demo
from ..errors import RtstageError
from ..files.exits import add_overwrite_options
from ..log import log
from ..render import render_array, words_to_float
from ..settings import EngineSettings

OFFLINE_SETTINGS = (
    ("none", "flat"),
    ("rpdf", "flat"),
    ("tpdf", "flat"),
    ("tpdf", "gentle9"),
    ("tpdf", "thr9"),
)
"""Dither and shaper of each row of ``demo --offline``; the shaper families take the rate's own design."""

LIVE_PRESET = "encoder16"
"""The 16-bit preset the live demo starts from (flat TPDF; its dither is overridden per pass)."""


def register(subparsers):
    """Add the ``demo`` subcommand."""
    p = subparsers.add_parser(
        "demo",
        help="play a generated overnight feed through the live engine, switching dither on air, and write a report",
        description="Play a generated overnight programme (quiet chord, long fade, a tone below 1 LSB) through the "
        "live engine at 16 bits, switch RPDF -> TPDF -> shaped TPDF over the control socket, and write a report "
        "folder. Without --device a private JACK dummy server is started (no sound card needed). "
        "Caution: with a real device, start with the monitor level down.",
    )
    p.add_argument("--device", help="play on this device (index or name) instead of a private JACK dummy server")
    p.add_argument("--samplerate", type=int, default=48000, help="sample rate in Hz (default 48000)")
    p.add_argument("--seconds", type=float, default=21.0, help="programme length in seconds, three passes (default 21)")
    p.add_argument("--seed", type=int, default=2026, help="dither seed (default 2026)")
    p.add_argument("--blocksize", type=int, default=256, help="frames per callback (default 256)")
    p.add_argument("--out", help="report folder (default: a new folder under the system's temporary directory)")
    p.add_argument("--offline", action="store_true", help="render offline and print a table instead of running live")
    add_overwrite_options(p)
    p.set_defaults(handler=run_demo)


MAX_DEMO_SECONDS = 3600.0
"""Longest programme the demo generates (it is held in memory)."""


def check_numbers(args):
    """Refuse, before anything is printed or written, numbers the demo cannot use."""
    from ..settings import MAX_SAMPLERATE, MIN_SAMPLERATE, SEED_MAX

    if not (math.isfinite(args.seconds) and 0.0 < args.seconds <= MAX_DEMO_SECONDS):
        raise RtstageError(f"--seconds must be more than 0 and at most {MAX_DEMO_SECONDS:g}, got {args.seconds:g}")
    if not MIN_SAMPLERATE <= args.samplerate <= MAX_SAMPLERATE:
        raise RtstageError(f"--samplerate must be between {MIN_SAMPLERATE} and {MAX_SAMPLERATE} Hz, got {args.samplerate}")
    if args.seconds < 0.5:
        raise RtstageError(f"--seconds must be at least 0.5 (three passes of the programme), got {args.seconds:g}")
    if not 0 <= args.seed <= SEED_MAX:
        raise RtstageError(f"seed must be an integer from 0 to 2^64-1, got {args.seed}")
    if not 1 <= args.blocksize <= 8192:
        raise RtstageError(f"--blocksize must be between 1 and 8192 frames, got {args.blocksize}")


def _demo_plan(args, names, what):
    """The output plan of the --out folder (checked): refuses before any audio work."""
    from ..files.policy import OutputPlan

    plan = OutputPlan(what, overwrite=args.overwrite)
    folder = plan.add_folder(args.out, "--out folder", names)
    plan.check()
    return plan, folder


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
    """Handler of ``rtstage demo``."""
    check_numbers(args)
    if args.offline:
        return run_offline(args)
    return run_live(args)


def run_offline(args):
    """Render the programme with each dither and print a table on stdout."""
    from ..meters import MeterBank

    from ..engine import Engine

    plan = None
    if args.out:
        ids = [Engine(EngineSettings(16, dither, shaper, seed=args.seed), 1, args.samplerate).settings.shaper_id
               for dither, shaper in OFFLINE_SETTINGS]
        names = ["programme.wav"] + [f"out-{dither}-{sid}.wav" for (dither, _), sid in zip(OFFLINE_SETTINGS, ids)]
        plan, _ = _demo_plan(args, names, f"writing the demo into {args.out}")
    x = demo.overnight_programme(args.samplerate, args.seconds)
    deep_start = int(0.75 * x.shape[0])
    if plan is not None:
        with plan.atomic(os.path.join(args.out, "programme.wav")) as tmp:
            sf.write(tmp, x, args.samplerate, subtype="FLOAT", format="WAV")
    print(f"overnight feed, {args.seconds:g} s at {args.samplerate} Hz, requantized to 16 bits (seed {args.seed})")
    print(f"deep tone in the input: {demo.DEEP_TONE_DBFS:.1f} dBFS peak, 1 LSB = {20*np.log10(2.0**-15):.1f} dBFS")
    print("added noise: RMS in dBFS (AES17), channel 1; modulation: spread of its power over the input's position")
    print("within one step (docs/meters.md); a shaper family takes the design for this rate")
    head1 = f"{'dither':<8}{'shaper':<16}{'noise, unweighted':>18}{'noise, A':>10}{'noise, 468':>12}{'noise mod':>11}{'deep tone':>11}"
    head2 = f"{'':<8}{'':<16}{'20 Hz-20 kHz dBFS':>18}{'dBFS':>10}{'dBFS':>12}{'dB':>11}{'out dBFS':>11}"
    print(head1)
    print(head2)
    for dither, shaper in OFFLINE_SETTINGS:
        words, engine = render_array(x, args.samplerate, EngineSettings(16, dither, shaper, seed=args.seed))
        bank = MeterBank.for_engine(engine)
        bank.update(x, words)
        ch = bank.report()["channels"][0]
        noise = ch["added_noise_dbfs"]
        y = words_to_float(words)
        tone = _deep_tone_dbfs(y, args.samplerate, deep_start)
        tone_text = "erased" if np.mean(tone) < -200 else f"{np.mean(tone):.1f}"
        mod = ch["noise_modulation_db"]
        mod_text = "n/a" if mod is None else f"{mod:.1f}"
        shaper_id = engine.settings.shaper_id
        print(f"{dither:<8}{shaper_id:<16}{noise['unweighted']:>18.1f}{noise['a_weighted']:>10.1f}{noise['itu468']:>12.1f}"
              f"{mod_text:>11}{tone_text:>11}")
        if plan is not None:
            with plan.atomic(os.path.join(args.out, f"out-{dither}-{shaper_id}.wav")) as tmp:
                sf.write(tmp, words, args.samplerate, subtype="PCM_16", format="WAV")
    if plan is not None:
        plan.commit()
    return 0


def _passes(samplerate):
    """(label, settings changes) of the three passes; the shaped pass uses the design for this rate."""
    from ..design import preset_for_rate
    from ..shapers import get_shaper

    shaped = preset_for_rate(get_shaper("thr9-48k"), samplerate)
    shaper_id = shaped.id if shaped is not None else "wannamaker-f9"
    return (
        ("RPDF, flat", {"dither": "rpdf", "shaper": "flat"}),
        ("TPDF, flat", {"dither": "tpdf", "shaper": "flat"}),
        (f"TPDF, shaped ({shaper_id})", {"dither": "tpdf", "shaper": shaper_id}),
    )


def _free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _connect(port, proc, timeout_s):
    from ..control.client import ControlClient

    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RtstageError(f"the live engine stopped during start-up (exit status {proc.returncode})")
        try:
            client = ControlClient("127.0.0.1", port, timeout_s=5.0)
            client.connect()
            return client
        except (RtstageError, OSError):
            time.sleep(0.2)
    raise RtstageError(f"the live engine's control port {port} did not answer within {timeout_s:g} s")


def run_live(args):
    """Play the programme through ``rtstage run`` and switch dither over the control socket."""
    from ..control.automation import load_automation
    from ..live.jackserver import JackDummyServer
    from ..meters import MeterBank, write_report
    from ..shapers import get_shaper

    from ..meters.plots import PLOT_NAMES

    if args.out is None:
        args.out = tempfile.mkdtemp(prefix="rtstage-demo-")
    out = args.out
    names = ["programme.wav", "tap.wav", "tap.wav.gaps.json", "changes.jsonl", "status.json", "report.json"]
    names += [os.path.join(f"pass-{i}", n) for i in (1, 2, 3) for n in PLOT_NAMES]
    plan, folder = _demo_plan(args, names, f"running the demo into {out}")
    samplerate = args.samplerate
    one_pass = demo.overnight_programme(samplerate, args.seconds / 3.0)
    x = np.concatenate([one_pass] * 3)
    pass_frames = one_pass.shape[0]
    programme_path = os.path.join(out, "programme.wav")
    tap_path = os.path.join(out, "tap.wav")
    changes_path = os.path.join(out, "changes.jsonl")
    status_path = os.path.join(out, "status.json")
    with plan.atomic(programme_path) as tmp:
        sf.write(tmp, x, samplerate, subtype="DOUBLE", format="WAV")
    plan.commit()  # the live engine reads it; tap, changes and status are written by the engine's own policy
    passes = _passes(samplerate)

    server = None
    env = dict(os.environ)
    device = ["--device", args.device] if args.device else []
    if not args.device:
        server = JackDummyServer(samplerate=samplerate, period_frames=args.blocksize, channels=2)
        server.start()
        env = server.client_env(env)
        log(f"started a private JACK dummy server '{server.name}' (no sound card needed)")
    port = _free_port()
    cmd = [
        sys.executable, "-m", "rtstage", "run", "--source", programme_path, "--tap", tap_path,
        "--preset", LIVE_PRESET, "--dither", "rpdf", "--seed", str(args.seed), "--blocksize", str(args.blocksize),
        "--duration", str(args.seconds + 30.0), "--control-port", str(port), "--automation-log", changes_path,
        "--status-file", status_path, *device, *(["--overwrite"] if args.overwrite else []),
    ]
    log("starting the live engine: " + " ".join(cmd[2:]))
    proc = subprocess.Popen(cmd, env=env, stdin=subprocess.DEVNULL)
    try:
        client = _connect(port, proc, timeout_s=60.0)
        with client:
            log(f"pass 1 of 3 on air: {passes[0][0]}")
            for number, (label, values) in enumerate(passes[1:], start=2):
                target = (number - 1) * pass_frames
                while proc.poll() is None:
                    reply = client.request({"op": "status"})
                    frames = reply["status"].get("frame", 0) if reply.get("ok") else 0
                    if frames >= target - samplerate // 10:
                        break
                    time.sleep(0.02)
                reply = client.request({"op": "set", "values": values})
                if not reply.get("ok"):
                    raise RtstageError(f"the engine refused {values}: {reply.get('error')}")
                log(f"pass {number} of 3 on air: {label} (took effect at sample {reply.get('at_frame')})")
        proc.wait(timeout=args.seconds + 60.0)
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        if server is not None:
            server.stop()
    if proc.returncode != 0:
        raise RtstageError(f"the live engine exited with status {proc.returncode}")

    words = sf.read(tap_path, dtype="int16", always_2d=True)[0]
    changes = load_automation(changes_path, samplerate=samplerate)
    starts = [0] + [frame for frame, values in changes if {"dither", "shaper"} & set(values)]
    n = min(words.shape[0], x.shape[0])
    # The same run, rendered offline from the logged changes: must equal the tap word for word.
    from ..engine import AutomationPlayer, Engine, process_with_automation

    engine = Engine(EngineSettings(16, "rpdf", "flat", seed=args.seed), 2, samplerate)
    again = process_with_automation(engine, x[:n], AutomationPlayer(changes))
    identical = bool(np.array_equal(again, words[:n]))

    reports = []
    settings = dict(dither="rpdf", shaper="flat")
    for i, (label, values) in enumerate(passes):
        settings.update(values)
        a = starts[i] if i < len(starts) else n
        b = starts[i + 1] if i + 1 < len(starts) else n
        shaper = get_shaper(settings["shaper"])
        bank = MeterBank(2, samplerate, 16, shaper.coefs, settings["dither"], shaper_id=shaper.id)
        bank.update(x[a:b], words[a:b])
        report = bank.report()
        report["pass"] = label
        report["first_frame"] = a
        reports.append(report)
    write_report(os.path.join(out, "report.json"), {"passes": reports, "tap_equals_offline_render": identical}, plan=plan)
    _plots(out, reports, plan, folder)
    plan.commit()

    print(f"{'pass':<34}{'added noise dBFS':>17}{'A-wtd':>8}{'noise mod dB':>14}")
    for report in reports:
        ch = report["channels"][0]
        mod = ch["noise_modulation_db"]
        print(f"{report['pass']:<34}{ch['added_noise_dbfs']['unweighted']:>17.1f}{ch['added_noise_dbfs']['a_weighted']:>8.1f}"
              f"{('n/a' if mod is None else f'{mod:.1f}'):>14}")
    print(f"tap equals the offline re-render from changes.jsonl: {'yes' if identical else 'NO'}")
    print(out)
    return 0 if identical else 1


def _plots(out, reports, plan, folder):
    """The meter figures of each pass into ``out/pass-N/`` (needs matplotlib; skipped with a note without)."""
    try:
        from ..meters.plots import write_plots

        for i, report in enumerate(reports):
            write_plots(report, os.path.join(out, f"pass-{i + 1}"), plan=plan, folder=folder, prefix=f"pass-{i + 1}")
    except RtstageError as exc:
        log(f"no plots: {exc}")
