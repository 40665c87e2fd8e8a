"""Late cycles per minute: rtstage against a native C client, under one realtime JACK server, in one run.

One private JACK dummy server (``--realtime`` where SCHED_FIFO is permitted),
48 kHz, 64-frame period.  The native pass-through client
(``tools/jack_passthrough.c``, built here with gcc against libjack) runs for
the whole run, so every phase has the floor measured in the same window:

``native``
    The native client alone.
``rtstage``
    The live engine beside it: 64-frame blocks, stereo, TPDF with 9-tap
    F-weighted shaping (``wannamaker-f9``), meters and tap on, the control
    socket receiving 10 changes a second from a separate process.
``rtstage+load``
    The same with a busy pure-Python thread inside the stream worker, the
    process whose thread runs the callback.

Both clients count the same things the same way, from the server's exact
frame counter (``jack_last_frame_time``): a *late* cycle (the process call ran
in the following cycle and the next call caught up), and a *jump* (cycles the
server counted that nobody ran: a stall of the server, seen by every client).
rtstage also counts PortAudio's flagged callbacks (any xrun of the graph).
``rtstage-only late`` are rtstage's late cycles with no late cycle or jump of
the native client within two periods: the figure the goal is about.

Prints a table on stderr and one JSON object on stdout: per phase late cycles,
jumps and flags per minute, the ratios to the native client in the same
window, PortAudio's CPU load (max), and the callback's longest execution as a
fraction of the 64-frame period (measured inside the compiled callback with
``clock_gettime(CLOCK_MONOTONIC)``).  Goals: rtstage with and without the busy
thread <= 1.0x the native count; callback worst case <= 25 % of the period.

Usage: ``.venv/bin/python tools/bench_live.py [--seconds 40]``
"""

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from rtstage.engine import EngineSettings  # noqa: E402
from rtstage.live.jackserver import JackDummyServer  # noqa: E402

SAMPLERATE = 48000
PERIOD = 64
SETTINGS = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=20261202)

_SENDER = r"""
import json, socket, sys, time
port, rate_hz = int(sys.argv[1]), float(sys.argv[2])
sock = socket.create_connection(("127.0.0.1", port))
f = sock.makefile("rwb")
f.readline()
i = 0
next_t = time.monotonic()
while True:
    line = json.dumps({"op": "set", "id": i, "values": {"gain_db": -0.1 * (i % 10)}}) + "\n"
    try:
        f.write(line.encode()); f.flush(); f.readline()
    except OSError:
        break
    i += 1
    next_t += 1.0 / rate_hz
    time.sleep(max(0.0, next_t - time.monotonic()))
"""


def build_native(workdir):
    """Compile tools/jack_passthrough.c; returns the binary's path."""
    out = os.path.join(workdir, "jack_passthrough")
    subprocess.run(["gcc", "-O2", "-Wall", "-o", out, os.path.join(ROOT, "tools", "jack_passthrough.c"), "-ljack"],
                   check=True)
    return out


class Native:
    """The native client as a child process; :meth:`counts` asks it for its cumulative counts."""

    def __init__(self, binary, env):
        self.proc = subprocess.Popen([binary, "native-floor"], env=env, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                     text=True)
        self.ready = json.loads(self.proc.stdout.readline())

    def counts(self):
        self.proc.stdin.write("report\n")
        self.proc.stdin.flush()
        return json.loads(self.proc.stdout.readline())

    def close(self):
        try:
            self.proc.stdin.close()
            self.proc.wait(5)
        except Exception:
            self.proc.kill()
            self.proc.wait()


def _window(c0, c1):
    return {"late": c1["late"] - c0["late"], "jumps": c1["jumps"] - c0["jumps"], "xruns": c1["xruns"] - c0["xruns"],
            "late_at": c1["late_at"][c0["late"]:c1["late"]], "jump_at": c1["jump_at"][c0["jumps"]:c1["jumps"]]}


def _near(frame, frames, tol=2 * PERIOD):
    return any(abs(((frame - f + 2**31) % 2**32) - 2**31) <= tol for f in frames)


def run_rtstage(native, seconds, load, workdir):
    """One rtstage phase beside the native client; returns the figures of the measured window."""
    from rtstage.control.live_target import LiveTarget
    from rtstage.control.protocol import Controller
    from rtstage.control.server import ControlServer
    from rtstage.live.supervisor import LiveEngine

    engine = LiveEngine(SETTINGS, samplerate=SAMPLERATE, blocksize=PERIOD, source="noise:level_dbfs=-20,seed=5",
                        tap=os.path.join(workdir, f"tap-{int(load)}.wav"), settle_s=1.0, worker_load_thread=load)
    engine.prepare()
    target = LiveTarget(engine).start()
    server = ControlServer(Controller(target), port=0, rate_hz=1e6, burst=1e6, logger=lambda m: None).start()
    runner = threading.Thread(target=engine.run, kwargs={"install_signals": False}, daemon=True)
    runner.start()
    deadline = time.monotonic() + 60
    while engine.state != "running" and time.monotonic() < deadline:
        time.sleep(0.01)
    sender = subprocess.Popen([sys.executable, "-c", _SENDER, str(server.port), "10"])
    try:
        time.sleep(1.5)  # settle: the first callbacks set the references
        s0, c0 = engine.status(), native.counts()
        time.sleep(seconds)
        s1, c1 = engine.status(), native.counts()
    finally:
        sender.kill()
        sender.wait()
        engine.request_stop()
        runner.join(30)
        server.stop()
        target.stop()
    final = engine.status()
    nat = _window(c0, c1)
    p0, p1 = s0["port"], s1["port"]
    late_at = p1["late_at_server_frame"][len(p0["late_at_server_frame"]):]
    own = [f for f in late_at if not _near(f, nat["late_at"] + nat["jump_at"])]
    jump_at = [g["server_frame"] for g in s1["gaps"][len(s0["gaps"]):] if g["reason"].startswith("port:")]
    own_jumps = [f for f in jump_at if not _near(f, nat["jump_at"] + nat["late_at"])]
    return {
        "late": p1["late_cycles"] - p0["late_cycles"],
        "jumps": p1["slip_events"] - p0["slip_events"],
        "periods_lost": p1["periods_missing_or_repeated"] - p0["periods_missing_or_repeated"],
        "flagged": s1["xruns"]["flagged_callbacks"] - s0["xruns"]["flagged_callbacks"],
        "rtstage_only_late": len(own),
        "rtstage_only_jumps": len(own_jumps),
        "callback_p999_us_at_most": final["port"]["callback_p999_us_at_most"],
        "native": nat,
        "cpu_load_max": final["cpu_load_max"],
        "callback_max_us": final["port"]["callback_max_us"],
        "callback_max_fraction_of_period": final["port"]["callback_max_fraction_of_block"],
        "tap_dropped_frames": final["tap_dropped_frames"],
        "changes_applied": len(target.applied),
        "realtime": {"audio_thread": final["realtime"]["audio_thread"],
                     "memory_locked": final["realtime"]["stream_process"]["memory_locked"]},
    }


def per_minute(count, seconds):
    return round(60.0 * count / seconds, 2)


def ratio(a, b):
    return round(a / b, 3) if b else (0.0 if a == 0 else None)


def main(argv=None):
    p = argparse.ArgumentParser()
    p.add_argument("--seconds", type=float, default=40.0, help="measured seconds per phase")
    args = p.parse_args(argv)
    T = args.seconds
    workdir = tempfile.mkdtemp(prefix="rtstage-bench-live-")
    try:
        binary = build_native(workdir)
        with JackDummyServer(samplerate=SAMPLERATE, period_frames=PERIOD) as server:
            env = server.client_env()
            os.environ.update({k: v for k, v in env.items() if k.startswith("JACK_")})
            native = Native(binary, env)
            try:
                time.sleep(1.0)
                c0 = native.counts()
                time.sleep(T)
                alone = _window(c0, native.counts())
                phases = {"rtstage": run_rtstage(native, T, False, workdir),
                          "rtstage+load": run_rtstage(native, T, True, workdir)}
            finally:
                native.close()
            server_realtime = server.realtime
    finally:
        shutil.rmtree(workdir, ignore_errors=True)

    report = {"seconds_per_phase": T, "server_realtime": server_realtime, "period_frames": PERIOD,
              "native_alone": {"late_per_min": per_minute(alone["late"], T), "jumps_per_min": per_minute(alone["jumps"], T),
                               "xruns_per_min": per_minute(alone["xruns"], T)}}
    for name, r in phases.items():
        nat = r["native"]
        report[name] = {
            "late_per_min": per_minute(r["late"], T),
            "rtstage_only_late_per_min": per_minute(r["rtstage_only_late"], T),
            "jumps_per_min": per_minute(r["jumps"], T),
            "rtstage_only_jumps_per_min": per_minute(r["rtstage_only_jumps"], T),
            "flagged_per_min": per_minute(r["flagged"], T),
            "native_same_window": {"late_per_min": per_minute(nat["late"], T), "jumps_per_min": per_minute(nat["jumps"], T),
                                   "xruns_per_min": per_minute(nat["xruns"], T)},
            "late_over_native": ratio(r["late"], nat["late"]),
            "late_over_native_alone": ratio(r["late"], alone["late"]),
            "cpu_load_max": r["cpu_load_max"],
            "callback_max_us": r["callback_max_us"],
            "callback_max_fraction_of_period": r["callback_max_fraction_of_period"],
            "callback_p999_fraction_of_period_at_most": (None if r["callback_p999_us_at_most"] is None else
                                                         round(r["callback_p999_us_at_most"] * 1e-6 * SAMPLERATE / PERIOD, 4)),
            "tap_dropped_frames": r["tap_dropped_frames"],
            "changes_applied": r["changes_applied"],
            "realtime": r["realtime"],
        }
    print(json.dumps(report, indent=1))
    rows = [("native alone", report["native_alone"]["late_per_min"], report["native_alone"]["jumps_per_min"], "", "", "")]
    for name in phases:
        r = report[name]
        rows.append((name, r["late_per_min"], r["jumps_per_min"], r["native_same_window"]["late_per_min"],
                     r["rtstage_only_late_per_min"], f"{100 * r['callback_max_fraction_of_period']:.1f} %"))
    print(f"{'phase':14} {'late/min':>9} {'jumps/min':>10} {'native late/min':>16} {'own late/min':>13} {'cb worst':>9}",
          file=sys.stderr)
    for row in rows:
        print(f"{row[0]:14} {row[1]!s:>9} {row[2]!s:>10} {row[3]!s:>16} {row[4]!s:>13} {row[5]!s:>9}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
