"""Flagged callbacks per minute: rtstage vs a plain sounddevice Python pass-through, with and without load.

Runs a private JACK dummy server (48 kHz, 64-frame period) and, side by side
in one run, the four phases of :mod:`rtstage.live.loadprobe` at 64 frames,
stereo, TPDF with 9-tap F-weighted shaping; prints one JSON object with the
results and the goal ratios:

* rtstage under load vs the pass-through without load (goal: no worse, ratio <= 1);
* pass-through under load vs rtstage under load (goal: >= 50x fewer flags for rtstage);
* PortAudio CPU load of rtstage (goal: <= 2 %).

Usage: ``.venv/bin/python tools/bench_live.py [--seconds 20]``
"""

import argparse
import json
import subprocess
import sys

from rtstage.live.jackserver import JackDummyServer


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--seconds", type=float, default=20.0)
    args = p.parse_args()
    phases = "rtstage,rtstage+load,passthrough,passthrough+load"
    with JackDummyServer(samplerate=48000, period_frames=64) as server:
        out = subprocess.run([sys.executable, "-m", "rtstage.live.loadprobe", phases, "--seconds", str(args.seconds)],
                             env=server.client_env(), capture_output=True, text=True, check=True).stdout
    r = {json.loads(line)["phase"]: json.loads(line) for line in out.splitlines()}
    fpm = {k: v["flags_per_minute"] for k, v in r.items()}
    report = {
        "flags_per_minute": fpm,
        "cpu_load_max": {k: v["cpu_load_max"] for k, v in r.items()},
        "rtstage_loaded_over_passthrough_unloaded": fpm["rtstage+load"] / max(fpm["passthrough"], 1e-9),
        "passthrough_loaded_over_rtstage_loaded": fpm["passthrough+load"] / max(fpm["rtstage+load"], 1e-9),
    }
    print(json.dumps(report, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
