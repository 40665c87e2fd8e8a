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

Usage: ``.venv/bin/python tools/bench_live.py [--seconds 40] [--cpu N]``

On a virtual machine the host takes a virtual CPU away for milliseconds at
a time, and only the clients running there are late; with ``--cpu N``
every process of the run shares one CPU, so such a stall reaches all of
them and the comparison with the native client is about the clients alone.
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
        "changes_applied": target.applied_count,
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
    p.add_argument("--cpu", type=int, default=None,
                   help="run everything (server, native client, rtstage and its load) on this one CPU, so that a "
                        "stall of that CPU (a virtual machine's host taking it away) reaches every client alike")
    args = p.parse_args(argv)
    T = args.seconds
    if args.cpu is not None:
        os.sched_setaffinity(0, {args.cpu})  # inherited by every process started below
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

    report = {"seconds_per_phase": T, "server_realtime": server_realtime, "period_frames": PERIOD, "cpu": args.cpu,
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


def many_channels(channels=64, samplerate=96000, blocksize=64, seconds=2.0, shaper="thr9-96k", realtime=True):
    """Callback time with many channels, as a fraction of the period (issue 17: worst case <= 10 %).

    The compiled PortAudio callback that the live engine hands to PortAudio
    (:func:`rtstage.live.cfunc.build_callback`) is called directly, once per
    period and paced in real time, on ``channels`` channels of float32
    input (a generated noise programme at -12 dBFS), 16 bits, TPDF dither and
    a 9-tap shaper, with the tap ring and the meter ring on (as ``rtstage run``
    with its display) and their consumers keeping up.  No device is needed,
    so the figure is the callback's own cost.  The calling thread runs
    SCHED_FIFO when the system grants it (as the audio thread would), so
    that other processes do not preempt a measured call.  Each call is timed
    with ``time.perf_counter_ns`` from Python, so the figures include a
    ctypes call; the same call with 0 frames is measured beside it.
    """
    import ctypes
    import os
    import time

    import numpy as np

    from rtstage.engine import EngineSettings, encode_params
    from rtstage.live import shared as S
    from rtstage.live.cfunc import build_callback
    from rtstage.live.sources import generate

    settings = EngineSettings(bits=16, dither="tpdf", shaper=shaper, seed=1).resolved()
    nblocks = max(1, int(seconds * samplerate / blocksize))
    period_ns = blocksize * 1e9 / samplerate
    blk = S.SharedBlock(channels, 16, blocksize, ring_frames=16 * blocksize, meter_frames=samplerate // 2)
    encode_params(settings, samplerate, 0, blk.kernel.iparams, blk.kernel.fparams)
    blk.kernel.reset(0)
    x = generate("noise:level_dbfs=-12,seed=3", samplerate, channels, 0, nblocks * blocksize).astype(np.float32)
    inp = np.empty(blocksize * channels, dtype=np.float32)
    out = np.zeros(blocksize * channels, dtype=np.int16)
    cb = build_callback()
    in_ptr = ctypes.c_void_p(inp.ctypes.data)
    out_ptr = ctypes.c_void_p(out.ctypes.data)
    table = ctypes.c_void_p(blk.address)
    ctl = blk.ctl
    for _ in range(8):  # warm: code, caches, the first chunks
        cb.ctypes(in_ptr, out_ptr, blocksize, None, 0, table)
    policy = None
    if realtime and hasattr(os, "sched_setscheduler"):
        try:
            policy = os.sched_getscheduler(0), os.sched_getparam(0)
            os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(50))
        except (OSError, PermissionError):
            policy = None
    times_ns = np.empty(nblocks, dtype=np.int64)
    cpu_ns = np.empty(nblocks, dtype=np.int64)
    empty_ns = np.empty(nblocks, dtype=np.int64)
    try:
        deadline = time.perf_counter_ns()
        for i in range(nblocks):
            inp[:] = x[i * blocksize : (i + 1) * blocksize].reshape(-1)
            deadline += period_ns
            while time.perf_counter_ns() < deadline - 200_000:
                time.sleep(0.0001)
            while time.perf_counter_ns() < deadline:
                pass
            c0 = time.thread_time_ns()
            t0 = time.perf_counter_ns()
            cb.ctypes(in_ptr, out_ptr, blocksize, None, 0, table)
            t1 = time.perf_counter_ns()
            c1 = time.thread_time_ns()
            cb.ctypes(in_ptr, out_ptr, 0, None, 0, table)
            t2 = time.perf_counter_ns()
            times_ns[i] = t1 - t0
            cpu_ns[i] = c1 - c0
            empty_ns[i] = t2 - t1
            ctl[S.C_RING_TAIL] = ctl[S.C_RING_HEAD]  # the consumers keep up
            ctl[S.C_MRING_TAIL] = ctl[S.C_MRING_HEAD]
    finally:
        if policy is not None:
            os.sched_setscheduler(0, policy[0], policy[1])

    def stats(t):
        return {"median_us": float(np.median(t)) / 1e3, "p99_us": float(np.percentile(t, 99)) / 1e3,
                "p999_us": float(np.percentile(t, 99.9)) / 1e3, "max_us": float(t.max()) / 1e3}

    r = {
        "channels": channels, "samplerate": samplerate, "blocksize": blocksize, "shaper": shaper,
        "callbacks": nblocks, "period_us": period_ns / 1e3, "sched_fifo": policy is not None,
        "callback": stats(times_ns), "callback_cpu": stats(cpu_ns), "callback_0_frames": stats(empty_ns),
        "dropped_meter_frames": int(ctl[S.C_MRING_DROPPED]),
        "loadavg": " ".join(f"{v:.2f}" for v in os.getloadavg()),
    }
    # Wall time includes any preemption of the measuring thread by the shared machine (other
    # processes at higher real-time priority, the hypervisor); the thread's CPU time does not.
    r["worst_wall_over_period"] = r["callback"]["max_us"] / r["period_us"]
    r["p999_wall_over_period"] = r["callback"]["p999_us"] / r["period_us"]
    r["worst_cpu_over_period"] = r["callback_cpu"]["max_us"] / r["period_us"]
    r["goal_worst_over_period"] = 0.10
    r["verdict_cpu"] = "PASS" if r["worst_cpu_over_period"] <= 0.10 else "MISS"
    r["verdict_wall"] = "PASS" if r["worst_wall_over_period"] <= 0.10 else "MISS"
    return r


if __name__ == "__main__":
    if "--many-channels" in sys.argv[1:]:
        # 64 channels at 96 kHz, 64-frame blocks, 9-tap shaper: the callback's cost against its period
        import argparse as _ap

        _p = _ap.ArgumentParser(description=many_channels.__doc__.splitlines()[0])
        _p.add_argument("--many-channels", action="store_true", required=True)
        _p.add_argument("--channels", type=int, default=64)
        _p.add_argument("--samplerate", type=int, default=96000)
        _p.add_argument("--blocksize", type=int, default=64)
        _p.add_argument("--seconds", type=float, default=2.0)
        _a = _p.parse_args()
        print(json.dumps(many_channels(_a.channels, _a.samplerate, _a.blocksize, _a.seconds), indent=1))
        sys.exit(0)
    sys.exit(main())
