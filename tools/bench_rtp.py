"""Send-time accuracy of ``rtstage run --device none --rtp-out``: deviation from the ideal schedule, late packets, drift.

Runs the engine without a device (:class:`rtstage.net.netengine.NetEngine`)
on a generated source, 48 kHz stereo, 24-bit L24 in 1 ms packets, to a sink
socket on 127.0.0.1 (nothing leaves the host), under SCHED_FIFO where
granted, for ``--seconds`` (default 60).  Prints one JSON object:

* ``send_deviation_ms``: p50 / p99 / max of (time of ``send(2)`` - ideal
  time), the ideal time of packet k being the clock time of the sample after
  its last one; goal p99 <= 0.25 ms (AES67-style 1 ms packets with a quarter
  packet of margin, common practice);
* ``late_packets``: packets sent more than one packet time after their ideal
  time; goal 0;
* ``drift_samples``: samples sent minus samples the wall clock
  (``CLOCK_REALTIME``) says should have been sent between the first and the
  last packet's ideal times; goal 0.  The schedule is exact against
  ``CLOCK_MONOTONIC`` by construction; this measures it against the wall
  clock, i.e. how far NTP slewed the two apart during the run;
* ``schedule_error_samples``: samples sent minus samples due by the pacing
  clock at the end (checks the count follows the clock; 0 expected);
* ``received``: packets the sink got (loopback).

* ``baseline``: the same priority, clock and 1 ms deadlines in a plain C
  loop (``tools/rt_wake_baseline.c``, built with gcc into ``tools/build/``)
  that only wakes up and reads the clock, run for ``--baseline-seconds``
  (default 20, 0 to skip) before rtstage's run: the lateness the machine
  itself imposes on any realtime thread.  ``ratio_p99_to_baseline`` compares
  rtstage's p99 send deviation with the baseline's p99 wake-up lateness.

Usage: ``.venv/bin/python tools/bench_rtp.py [--seconds 60] [--ptime-ms 1] [--priority 70] [--clock local|tai]
[--baseline-seconds 20]``
"""

import argparse
import json
import os
import socket
import sys
import threading
import time

import numpy as np


def _clock_pair(clock_id):
    """(pacing clock, wall clock) read as close together as possible: the tightest bracket of 50 tries."""
    pacing = time.CLOCK_TAI if clock_id == 11 else time.CLOCK_MONOTONIC
    best = None
    for _ in range(50):
        a = time.clock_gettime_ns(time.CLOCK_REALTIME)
        m = time.clock_gettime_ns(pacing)
        b = time.clock_gettime_ns(time.CLOCK_REALTIME)
        if best is None or b - a < best[0]:
            best = (b - a, m, (a + b) // 2)
    return best[1], best[2]


def _cpu_ticks():
    """(busy, steal) clock ticks of all CPUs from /proc/stat (steal: time the hypervisor ran something else)."""
    fields = [int(v) for v in open("/proc/stat").readline().split()[1:]]
    user, nice, system, idle, iowait, irq, softirq, steal = fields[:8]
    return user + nice + system + irq + softirq, steal


def _baseline(seconds, priority):
    """Build and run tools/rt_wake_baseline.c; its JSON result, or the reason it could not run."""
    import subprocess
    from pathlib import Path

    here = Path(__file__).resolve().parent
    build = here / "build"
    build.mkdir(exist_ok=True)
    exe = build / "rt_wake_baseline"
    try:
        subprocess.run(["gcc", "-O2", "-o", str(exe), str(here / "rt_wake_baseline.c")], check=True,
                       capture_output=True, text=True)
        out = subprocess.run([str(exe), str(int(seconds * 1000)), str(priority)], check=True, capture_output=True,
                             text=True, timeout=seconds + 60).stdout
        return json.loads(out)
    except (OSError, subprocess.SubprocessError, ValueError) as exc:
        return {"error": str(exc)}


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seconds", type=float, default=60.0)
    p.add_argument("--ptime-ms", default="1")
    p.add_argument("--priority", type=int, default=70, help="SCHED_FIFO priority (0: normal scheduling)")
    p.add_argument("--clock", choices=("local", "tai"), default="local")
    p.add_argument("--channels", type=int, default=2)
    p.add_argument("--baseline-seconds", type=float, default=20.0)
    args = p.parse_args()
    baseline = _baseline(args.baseline_seconds, args.priority) if args.baseline_seconds > 0 else None

    from rtstage import EngineSettings
    from rtstage.live.sources import parse_source
    from rtstage.net import _native as N
    from rtstage.net.netengine import C_SENT, NetEngine

    sink = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sink.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 8 << 20)
    sink.bind(("127.0.0.1", 0))
    sink.settimeout(0.1)
    received = [0]
    stop = threading.Event()

    def drain():
        while not stop.is_set():
            try:
                sink.recv(65536)
                received[0] += 1
            except socket.timeout:
                pass

    t = threading.Thread(target=drain, daemon=True)
    t.start()
    engine = NetEngine(EngineSettings(bits=24, dither="tpdf", seed=1), parse_source("noise:level_dbfs=-20"),
                       samplerate=48000, channels=args.channels,
                       rtp_out={"host": "127.0.0.1", "port": sink.getsockname()[1], "ptime_ms": args.ptime_ms},
                       clock=args.clock, rt_priority=args.priority)
    engine.prepare()
    engine.start()
    clock_id = engine.clock_id
    rate = engine.samplerate
    fpp = engine.out.frames
    q0, r0 = engine._q0r0
    first_ideal = int(N.sample_time_ns(q0, r0, rate, fpp))
    pair_start = _clock_pair(clock_id)
    cpu_start = _cpu_ticks()
    time.sleep(args.seconds)
    cpu_end = _cpu_ticks()
    pair_end = _clock_pair(clock_id)
    sent_at_end = int(engine.ctl[C_SENT])
    status = engine.stop()
    stop.set()
    t.join()
    sink.close()

    sent = int(status["streams"]["rtp_out"]["packets_sent"])
    last_ideal = int(N.sample_time_ns(q0, r0, rate, sent * fpp))
    # Map both ideal times to the wall clock with the (pacing clock -> wall) offset measured near each.
    off_start = pair_start[1] - pair_start[0]
    off_end = pair_end[1] - pair_end[0]
    wall_span_ns = (last_ideal + off_end) - (first_ideal + off_start)
    expected_frames = wall_span_ns * rate / 1e9 + fpp
    # Packets due by the pacing clock at pair_end: those whose ideal time has passed.
    due = 0
    lo, hi = 0, sent_at_end + 10
    while lo < hi:  # largest k with ideal(k) <= pair_end
        mid = (lo + hi + 1) // 2
        if N.sample_time_ns(q0, r0, rate, mid * fpp) <= pair_end[0]:
            lo = mid
        else:
            hi = mid - 1
    due = lo
    devs = engine.send_deviations_ns() / 1e6
    late = devs > float(engine.out.ptime)
    episodes = int(np.count_nonzero(late[1:] & ~late[:-1]) + (1 if late.size and late[0] else 0))
    hz = os.sysconf("SC_CLK_TCK")
    ncpu = os.cpu_count()
    out = status["streams"]["rtp_out"]
    report = {
        "seconds": args.seconds,
        "ptime_ms": args.ptime_ms,
        "clock": engine.clock_name,
        "realtime_scheduling": status["realtime"],
        "packets_sent": sent,
        "received": received[0],
        "send_deviation_ms": {"p50": round(float(np.percentile(devs, 50)), 4),
                              "p99": round(float(np.percentile(devs, 99)), 4),
                              "p999": round(float(np.percentile(devs, 99.9)), 4),
                              "max": round(float(devs.max()), 4)},
        "late_packets": out["late_packets"],
        "late_episodes": episodes,
        "machine": {"cpus": ncpu, "busy_fraction": round((cpu_end[0] - cpu_start[0]) / hz / args.seconds / ncpu, 3),
                    "steal_s": round((cpu_end[1] - cpu_start[1]) / hz, 3)},
        "sender_waits": out["sender_waits"],
        "send_errors": out["send_errors"],
        "producer_wake_late_max_ms": status["wake_late_max_ms"],
        "drift_samples": round(sent * fpp - expected_frames, 3),
        "schedule_error_samples": (sent_at_end - due) * fpp,
        "baseline": baseline,
        "ratio_p99_to_baseline": (round(float(np.percentile(devs, 99)) / baseline["p99_ms"], 3)
                                  if baseline and baseline.get("p99_ms") else None),
        "goals": {"p99_le_0.25ms": float(np.percentile(devs, 99)) <= 0.25, "no_late": out["late_packets"] == 0},
    }
    print(json.dumps(report, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
