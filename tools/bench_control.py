"""Command-to-effect latency of the control layer, over loopback TCP and over JACK MIDI.

Latency is measured from the moment a request (a ``set`` line, or a MIDI
control change) is handed to the socket or MIDI port, to the start of the
block that applied it (the ``EngineTarget`` records the monotonic time of each
applied change just before it processes that block).  The engine is paced in
real time by a :class:`~rtstage.control.target.BlockDriver` standing in for the
live callback.  Goal: p99 ≤ one block period + 1 ms.

Usage::

    python tools/bench_control.py [--trials 300] [--blocksize 256] [--samplerate 48000] [--no-midi] [--live]

``--live`` measures the real engine instead: a :class:`~rtstage.live.supervisor.LiveEngine`
on a private JACK dummy server (64-frame period, ``--realtime`` where SCHED_FIFO is
permitted), driven through :class:`~rtstage.control.live_target.LiveTarget`.  There the
time of effect is the start of the block that applied the change, from the
callback's own ``CLOCK_MONOTONIC`` stamp (:mod:`rtstage.live.handoff`).

Prints one JSON object per transport on stdout (p50, p99, max in ms, the goal,
and p99/goal as a ratio measured in this run); progress on stderr.
"""

import argparse
import json
import os
import subprocess
import sys
import threading
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from rtstage.control.testing import control_stack  # noqa: E402
from rtstage.engine import EngineSettings  # noqa: E402


def _summary(name, latencies_s, period_s, extra=None):
    lat_ms = np.asarray(latencies_s) * 1e3
    goal_ms = period_s * 1e3 + 1.0
    p99 = float(np.percentile(lat_ms, 99))
    out = {"transport": name, "trials": len(lat_ms), "p50_ms": round(float(np.percentile(lat_ms, 50)), 3),
           "p99_ms": round(p99, 3), "max_ms": round(float(lat_ms.max()), 3), "block_period_ms": round(period_s * 1e3, 3),
           "goal_ms": round(goal_ms, 3), "p99_over_goal": round(p99 / goal_ms, 3)}
    out.update(extra or {})
    return out


_TCP_CLIENT = r"""
import json, random, socket, sys, time
port, trials, period_s = int(sys.argv[1]), int(sys.argv[2]), float(sys.argv[3])
rng = random.Random(7)
sock = socket.create_connection(("127.0.0.1", port))
f = sock.makefile("rwb")
f.readline()
time.sleep(0.2)
for i in range(trials):
    time.sleep(rng.uniform(0.0, period_s))  # sample every phase of the block cycle
    line = (json.dumps({"op": "set", "id": i, "values": {"bits": 2 + i % 15}}) + "\n").encode()
    t_send = time.monotonic()
    f.write(line)
    f.flush()
    reply = json.loads(f.readline())
    print(t_send if reply["ok"] else "nan", flush=True)
"""

_MIDI_CLIENT = r"""
import random, sys, time
import rtmidi
trials, period_s = int(sys.argv[1]), float(sys.argv[2])
rng = random.Random(8)
probe = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, name="benchprobe")
probe.open_virtual_port("bench knobs")
print("ready", flush=True)
sys.stdin.readline()
for i in range(trials):
    time.sleep(rng.uniform(0.0, period_s) + 2 * period_s)
    t_send = time.monotonic()
    bits = 2 + i % 15
    probe.send_message([0xB0, 102, round((bits - 2) / 22 * 127)])  # CC 102, absolute, jump takeover
    print(t_send, flush=True)
sys.stdin.readline()
"""


def _latencies(send_times, applied):
    """Seconds from each send to the start of the block that applied it.

    Trial i sets ``bits = 2 + i % 15``, so consecutive trials differ; each
    applied change is paired with the first unpaired send of that value made
    before it, so a lost message cannot shift the pairing.
    """
    out = []
    j = 0
    for _, values, t_apply in applied:
        while j < len(send_times) and (2 + j % 15 != values.get("bits") or send_times[j] > t_apply):
            j += 1
        if j == len(send_times):
            break
        out.append(t_apply - send_times[j])
        j += 1
    return out


def bench_tcp(trials, blocksize, samplerate):
    """Latencies (s) of ``set`` requests over 127.0.0.1 TCP from a client in another process."""
    settings = EngineSettings(bits=16, dither="tpdf", seed=1)
    period_s = blocksize / samplerate
    with control_stack(settings=settings, samplerate=samplerate, blocksize=blocksize, driver=True,
                       logger=lambda m: None) as stack:
        result = subprocess.run([sys.executable, "-c", _TCP_CLIENT, str(stack.server.port), str(trials), str(period_s)],
                                stdout=subprocess.PIPE, check=True, timeout=600)
        send_times = [float(v) for v in result.stdout.split()]
        time.sleep(0.05)
        applied = list(stack.target.applied)
        xruns = stack.target.xruns
    return _latencies(send_times, applied), period_s, {"xruns": xruns, "sent": len(send_times), "applied": len(applied)}


def bench_midi(trials, blocksize, samplerate):
    """Latencies (s) of control changes over JACK MIDI (probe in another process, private dummy server)."""
    from rtstage.control.midi import MidiControl, map_from_dict
    from rtstage.live.jackserver import JackDummyServer

    settings = EngineSettings(bits=16, dither="tpdf", seed=1)
    period_s = blocksize / samplerate
    with JackDummyServer(samplerate=samplerate, period_frames=64) as server:
        env = server.client_env()
        os.environ.update({k: v for k, v in env.items() if k.startswith("JACK_")})
        probe = subprocess.Popen([sys.executable, "-c", _MIDI_CLIENT, str(trials), str(period_s)], env=env,
                                 stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        try:
            assert probe.stdout.readline().strip() == "ready"
            with control_stack(settings=settings, samplerate=samplerate, blocksize=blocksize, driver=True,
                               logger=lambda m: None) as stack:
                bench_map = map_from_dict({"control": [{"param": "bits", "channel": 1, "cc": 102, "takeover": "jump"}]})
                midi = MidiControl(stack.controller, bench_map, api="jack", in_port="bench knobs", poll_s=0.1)
                with midi:
                    deadline = time.monotonic() + 5.0
                    while midi.in_connected is None and time.monotonic() < deadline:
                        time.sleep(0.01)
                    time.sleep(0.2)
                    probe.stdin.write("go\n")
                    probe.stdin.flush()
                    send_times = [float(probe.stdout.readline()) for _ in range(trials)]
                    time.sleep(0.05)
                    applied = list(stack.target.applied)
                xruns = stack.target.xruns
            probe.stdin.write("done\n")
            probe.stdin.flush()
            probe.wait(timeout=10)
        finally:
            if probe.poll() is None:
                probe.kill()
                probe.wait()
    return _latencies(send_times, applied), period_s, {"xruns": xruns, "sent": len(send_times), "applied": len(applied),
                                                       "jack_period_frames": 64}


class _LiveStack:
    """LiveEngine + LiveTarget + Controller + ControlServer (port 0) on the JACK server named in the environment."""

    def __init__(self, blocksize, samplerate, trials):
        from rtstage.control.live_target import LiveTarget
        from rtstage.control.protocol import Controller
        from rtstage.control.server import ControlServer
        from rtstage.live.supervisor import LiveEngine

        settings = EngineSettings(bits=16, dither="tpdf", seed=1)
        self.engine = LiveEngine(settings, samplerate=samplerate, blocksize=blocksize, source="tone:level_dbfs=-30")
        self.engine.prepare()
        self.target = LiveTarget(self.engine, applied_kept=trials).start()  # every trial's change, for the latencies
        self.controller = Controller(self.target)
        self.server = ControlServer(self.controller, port=0, rate_hz=1e6, burst=1e6, logger=lambda m: None).start()
        self._thread = threading.Thread(target=self.engine.run, kwargs={"install_signals": False}, daemon=True)

    def __enter__(self):
        self._thread.start()
        deadline = time.monotonic() + 60
        while self.engine.state != "running" and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(0.5)
        return self

    def __exit__(self, *exc):
        self.engine.request_stop()
        self._thread.join(30)
        self.server.stop()
        self.target.stop()

    def xruns(self):
        return self.engine.status()["xruns_after_settle"]["output_underflow"]


def bench_live_tcp(trials, blocksize, samplerate):
    """Latencies (s) of ``set`` requests over 127.0.0.1 TCP to the live engine on a JACK dummy server."""
    from rtstage.live.jackserver import JackDummyServer

    period_s = blocksize / samplerate
    with JackDummyServer(samplerate=samplerate, period_frames=64) as server:
        env = server.client_env()
        os.environ.update({k: v for k, v in env.items() if k.startswith("JACK_")})
        with _LiveStack(blocksize, samplerate, trials) as stack:
            result = subprocess.run([sys.executable, "-c", _TCP_CLIENT, str(stack.server.port), str(trials),
                                     str(period_s)], stdout=subprocess.PIPE, check=True, timeout=600)
            send_times = [float(v) for v in result.stdout.split()]
            time.sleep(0.05)
            applied = list(stack.target.applied)
            xruns = stack.xruns()
    return _latencies(send_times, applied), period_s, {"engine": "live", "output_underflows": xruns,
                                                       "sent": len(send_times), "applied": len(applied),
                                                       "jack_period_frames": 64}


def bench_live_midi(trials, blocksize, samplerate):
    """Latencies (s) of control changes over JACK MIDI to the live engine (probe in another process)."""
    from rtstage.control.midi import MidiControl, map_from_dict
    from rtstage.live.jackserver import JackDummyServer

    period_s = blocksize / samplerate
    with JackDummyServer(samplerate=samplerate, period_frames=64) as server:
        env = server.client_env()
        os.environ.update({k: v for k, v in env.items() if k.startswith("JACK_")})
        with _LiveStack(blocksize, samplerate, trials) as stack:
            probe = subprocess.Popen([sys.executable, "-c", _MIDI_CLIENT, str(trials), str(period_s)], env=env,
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
            try:
                assert probe.stdout.readline().strip() == "ready"
                bench_map = map_from_dict({"control": [{"param": "bits", "channel": 1, "cc": 102, "takeover": "jump"}]})
                midi = MidiControl(stack.controller, bench_map, api="jack", in_port="bench knobs", poll_s=0.1)
                with midi:
                    deadline = time.monotonic() + 5.0
                    while midi.in_connected is None and time.monotonic() < deadline:
                        time.sleep(0.01)
                    time.sleep(0.2)
                    probe.stdin.write("go\n")
                    probe.stdin.flush()
                    send_times = [float(probe.stdout.readline()) for _ in range(trials)]
                    time.sleep(0.05)
                    applied = list(stack.target.applied)
                probe.stdin.write("done\n")
                probe.stdin.flush()
                probe.wait(timeout=10)
            finally:
                if probe.poll() is None:
                    probe.kill()
                    probe.wait()
            xruns = stack.xruns()
    return _latencies(send_times, applied), period_s, {"engine": "live", "output_underflows": xruns,
                                                       "sent": len(send_times), "applied": len(applied),
                                                       "jack_period_frames": 64}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--trials", type=int, default=300)
    parser.add_argument("--blocksize", type=int, default=256)
    parser.add_argument("--samplerate", type=int, default=48000)
    parser.add_argument("--no-midi", action="store_true")
    parser.add_argument("--live", action="store_true", help="measure the live engine on a JACK dummy server")
    args = parser.parse_args(argv)
    if args.live:
        print("bench_control: live tcp ...", file=sys.stderr, flush=True)
        lat, period_s, extra = bench_live_tcp(args.trials, args.blocksize, args.samplerate)
        print(json.dumps(_summary("live-tcp", lat, period_s, extra)), flush=True)
        if not args.no_midi:
            print("bench_control: live jack midi ...", file=sys.stderr, flush=True)
            lat, period_s, extra = bench_live_midi(args.trials, args.blocksize, args.samplerate)
            print(json.dumps(_summary("live-jack-midi", lat, period_s, extra)), flush=True)
        return 0
    print("bench_control: tcp ...", file=sys.stderr, flush=True)
    lat, period_s, extra = bench_tcp(args.trials, args.blocksize, args.samplerate)
    print(json.dumps(_summary("tcp", lat, period_s, extra)), flush=True)
    if not args.no_midi:
        print("bench_control: jack midi ...", file=sys.stderr, flush=True)
        lat, period_s, extra = bench_midi(args.trials, args.blocksize, args.samplerate)
        print(json.dumps(_summary("jack-midi", lat, period_s, extra)), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
