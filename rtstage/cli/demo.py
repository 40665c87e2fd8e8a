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
from ..log import log
from ..render import render_array, words_to_float
from ..settings import EngineSettings

OFFLINE_SETTINGS = (
    ("none", "flat"),
    ("rpdf", "flat"),
    ("tpdf", "flat"),
    ("tpdf", "lvw-me9"),
)

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
    """Handler of ``rtstage demo``."""
    if args.offline:
        return run_offline(args)
    return run_live(args)


def run_offline(args):
    """Render the programme with each dither and print a table on stdout."""
    x = demo.overnight_programme(args.samplerate, args.seconds)
    deep_start = int(0.75 * x.shape[0])
    if args.out:
        os.makedirs(args.out, exist_ok=True)
        sf.write(os.path.join(args.out, "programme.wav"), x, args.samplerate, subtype="FLOAT")
    print(f"overnight feed, {args.seconds:g} s at {args.samplerate} Hz, requantized to 16 bits (seed {args.seed})")
    print(f"deep tone in the input: {demo.DEEP_TONE_DBFS:.1f} dBFS peak, 1 LSB = {20*np.log10(2.0**-15):.1f} dBFS")
    print(f"{'dither':<10}{'shaper':<10}{'added noise dBFS':>18}{'deep tone out dBFS':>20}")
    for dither, shaper in OFFLINE_SETTINGS:
        words, _ = render_array(x, args.samplerate, EngineSettings(16, dither, shaper, seed=args.seed))
        y = words_to_float(words)
        tone = _deep_tone_dbfs(y, args.samplerate, deep_start)
        tone_text = "erased" if np.mean(tone) < -200 else f"{np.mean(tone):.1f}"
        print(f"{dither:<10}{shaper:<10}{_level_dbfs(y - x):>18.1f}{tone_text:>20}")
        if args.out:
            sf.write(os.path.join(args.out, f"out-{dither}-{shaper}.wav"), words, args.samplerate, subtype="PCM_16")
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

    out = args.out or tempfile.mkdtemp(prefix="rtstage-demo-")
    os.makedirs(out, exist_ok=True)
    samplerate = args.samplerate
    one_pass = demo.overnight_programme(samplerate, args.seconds / 3.0)
    x = np.concatenate([one_pass] * 3)
    pass_frames = one_pass.shape[0]
    programme_path = os.path.join(out, "programme.wav")
    tap_path = os.path.join(out, "tap.wav")
    changes_path = os.path.join(out, "changes.jsonl")
    status_path = os.path.join(out, "status.json")
    for path in (tap_path, changes_path, status_path):
        if os.path.exists(path):
            os.unlink(path)
    sf.write(programme_path, x, samplerate, subtype="DOUBLE")
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
        "--status-file", status_path, *device,
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
    write_report(os.path.join(out, "report.json"), {"passes": reports, "tap_equals_offline_render": identical})
    _plots(out, reports)

    print(f"{'pass':<34}{'added noise dBFS':>17}{'A-wtd':>8}{'noise mod dB':>14}")
    for report in reports:
        ch = report["channels"][0]
        mod = ch["noise_modulation_db"]
        print(f"{report['pass']:<34}{ch['added_noise_dbfs']['unweighted']:>17.1f}{ch['added_noise_dbfs']['a_weighted']:>8.1f}"
              f"{('n/a' if mod is None else f'{mod:.1f}'):>14}")
    print(f"tap equals the offline re-render from changes.jsonl: {'yes' if identical else 'NO'}")
    print(out)
    return 0 if identical else 1


def _plots(out, reports):
    """The meter figures of each pass into ``out/pass-N/`` (needs matplotlib; skipped with a note without)."""
    try:
        from ..meters.plots import write_plots

        for i, report in enumerate(reports):
            write_plots(report, os.path.join(out, f"pass-{i + 1}"))
    except RtstageError as exc:
        log(f"no plots: {exc}")
