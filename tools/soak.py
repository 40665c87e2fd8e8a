"""Soak: ``rtstage run`` for MINUTES under a realtime JACK server, with control fuzz, MIDI, a meter subscription and a tap.

Usage: ``.venv/bin/python tools/soak.py [MINUTES]`` (default 30).

One private JACK dummy server (48 kHz, 64-frame period, ``--realtime`` where
SCHED_FIFO is permitted) runs the native floor client
(``tools/jack_passthrough.c``) and ``rtstage run`` (generated noise, 16-bit
TPDF with 9-tap shaping, 256-frame blocks, tap, automation log, control
socket, JACK MIDI input).  While it runs:

* control fuzz: 10 lines a second over TCP, mostly valid ``set`` changes of
  ``gain_db``, ``bits`` and ``dither``, the rest malformed or refused lines;
* MIDI: the default map's word-length control (CC 102) swept once a second
  from a virtual JACK MIDI port;
* a meter subscription at 10 Hz on its own connection.

Report (one JSON object on stdout): late cycles and lost periods per minute
for rtstage and for the native client in the same window; resident memory of
the control process and of the stream worker after warm-up and at the end,
open files and threads at both times; tap and meter frames dropped; and
whether the tap equals the offline re-render of the source with the
automation log (:func:`rtstage.engine.automation.process_with_automation`).
Goals over 30 minutes: memory growth <= 1 MB after warm-up, nothing dropped,
bit-exact.
"""

import argparse
import json
import os
import random
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)
sys.path.insert(0, os.path.join(ROOT, "tools"))

from bench_live import Native, build_native  # noqa: E402

from rtstage.live.jackserver import JackDummyServer  # noqa: E402

SR = 48000
SOURCE = "noise:level_dbfs=-20,seed=7"
ARGS = ["--bits", "16", "--dither", "tpdf", "--shaper", "wannamaker-f9", "--seed", "4242", "--blocksize", "256"]


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _proc_figures(pid):
    """Resident bytes, open files and threads of a process (from /proc), or None when it is gone."""
    try:
        with open(f"/proc/{pid}/status") as f:
            rss = next(int(line.split()[1]) * 1024 for line in f if line.startswith("VmRSS:"))
        return {"rss_bytes": rss, "open_files": len(os.listdir(f"/proc/{pid}/fd")),
                "threads": len(os.listdir(f"/proc/{pid}/task"))}
    except (OSError, StopIteration):
        return None


def _children(pid):
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as f:
            return [int(v) for v in f.read().split()]
    except OSError:
        return []


def _fuzz(port, stop, counts, seed=11):
    rng = random.Random(seed)
    with socket.create_connection(("127.0.0.1", port), timeout=10) as sock, sock.makefile("rwb") as f:
        f.readline()  # greeting
        i = 0
        next_t = time.monotonic()
        while not stop.is_set():
            r = rng.random()
            if r < 0.4:
                line = json.dumps({"op": "set", "id": i, "values": {"gain_db": round(rng.uniform(-6.0, 0.0), 2)}})
            elif r < 0.6:
                line = json.dumps({"op": "set", "id": i, "values": {"bits": rng.randint(8, 16)}})
            elif r < 0.75:
                line = json.dumps({"op": "set", "id": i, "values": {"dither": rng.choice(["tpdf", "rpdf", "tpdf-hp"])}})
            elif r < 0.85:
                line = json.dumps({"op": "set", "id": i, "values": {"bits": 40}})  # refused: out of range
            elif r < 0.95:
                line = '{"op": "set", "values": '  # malformed
            else:
                line = json.dumps({"op": "no-such-op", "id": i})
            f.write((line + "\n").encode())
            f.flush()
            reply = json.loads(f.readline())
            counts["ok" if reply.get("ok") else "refused"] += 1
            i += 1
            next_t += 0.1
            stop.wait(max(0.0, next_t - time.monotonic()))


def _subscribe(port, stop, state):
    with socket.create_connection(("127.0.0.1", port), timeout=10) as sock, sock.makefile("rwb") as f:
        f.readline()
        f.write(b'{"op": "subscribe", "rate_hz": 10, "id": 1}\n')
        f.flush()
        sock.settimeout(1.0)
        while not stop.is_set():
            try:
                line = f.readline()
            except (socket.timeout, OSError):
                continue
            if not line:
                return
            msg = json.loads(line)
            if msg.get("event") == "meters":
                state["events"] += 1
                state["last"] = msg["meters"]


def _midi(stop, state):
    import rtmidi

    out = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, name="soakdesk")
    out.open_virtual_port("soak knobs")
    state["ready"].set()
    value = 0
    while not stop.wait(1.0):
        out.send_message([0xB0, 102, value])  # MIDI 1.0 control change, channel 1, the default map's bits control
        state["sent"] += 1
        value = (value + 9) % 128
    out.close_port()
    del out


def rerender(nframes, automation_log):
    """Offline render of the soak's source with the automation log applied."""
    from rtstage.engine import Engine, EngineSettings
    from rtstage.engine.automation import AutomationPlayer, process_with_automation
    from rtstage.control.automation import load_automation
    from rtstage.live.sources import generate

    settings = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=4242)
    engine = Engine(settings, 2, SR)
    player = AutomationPlayer(load_automation(automation_log, samplerate=SR))
    chunk = 1 << 16
    out = []
    for start in range(0, nframes, chunk):
        x = generate(SOURCE, SR, 2, start, min(chunk, nframes - start))
        out.append(process_with_automation(engine, x, player))
    return np.concatenate(out) if out else np.zeros((0, 2), dtype=np.int16)


def soak(minutes, workdir, warmup_s=None):
    """Run the soak for ``minutes``; returns the report dict (see the module docstring)."""
    import soundfile as sf

    total_s = 60.0 * minutes
    warmup_s = min(60.0, 0.25 * total_s) if warmup_s is None else warmup_s
    binary = build_native(workdir)
    tap, status_path, log_path, err_path = (os.path.join(workdir, n) for n in
                                            ("tap.wav", "status.json", "automation.jsonl", "run.err"))
    port = _free_port()
    with JackDummyServer(samplerate=SR, period_frames=64) as server:
        env = server.client_env()
        os.environ.update({k: v for k, v in env.items() if k.startswith("JACK_")})
        native = Native(binary, env)
        stop = threading.Event()
        midi_state = {"sent": 0, "ready": threading.Event()}
        midi_thread = threading.Thread(target=_midi, args=(stop, midi_state), daemon=True)
        midi_thread.start()
        midi_state["ready"].wait(30)
        with open(err_path, "w") as err:
            run = subprocess.Popen([sys.executable, "-m", "rtstage", "run", "--source", SOURCE, *ARGS, "--tap", tap,
                                    "--status-file", status_path, "--automation-log", log_path, "--control-port",
                                    str(port), "--control-rate-hz", "1e6", "--control-burst", "1e6", "--midi-api", "jack",
                                    "--midi-in", "soak knobs", "--quiet"], env=env, cwd=ROOT, stderr=err,
                                   stdout=subprocess.DEVNULL)
        try:
            deadline = time.monotonic() + 300
            while "control: listening" not in open(err_path).read() or "rtstage: running:" not in open(err_path).read():
                if run.poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError("rtstage run did not start: " + open(err_path).read()[-2000:])
                time.sleep(0.1)
            counts = {"ok": 0, "refused": 0}
            sub = {"events": 0, "last": None}
            threads = [threading.Thread(target=_fuzz, args=(port, stop, counts), daemon=True),
                       threading.Thread(target=_subscribe, args=(port, stop, sub), daemon=True)]
            for t in threads:
                t.start()
            time.sleep(warmup_s)
            worker = (_children(run.pid) or [None])[0]
            at_warm = {"control": _proc_figures(run.pid), "worker": _proc_figures(worker) if worker else None}
            c0 = native.counts()
            time.sleep(max(0.0, total_s - warmup_s))
            at_end = {"control": _proc_figures(run.pid), "worker": _proc_figures(worker) if worker else None}
            c1 = native.counts()
            stop.set()
            for t in threads:
                t.join(10)
            run.terminate()
            run.wait(60)
        finally:
            stop.set()
            if run.poll() is None:
                run.kill()
                run.wait()
            native.close()
            midi_thread.join(10)
    status = json.load(open(status_path))
    words = sf.read(tap, dtype="int16", always_2d=True)[0]
    reference = rerender(words.shape[0], log_path)
    measured_min = (total_s - warmup_s) / 60.0
    port_status = status["port"]

    def growth(key):
        a, b = at_warm.get(key), at_end.get(key)
        return None if not a or not b else b["rss_bytes"] - a["rss_bytes"]

    lost = [g for g in status["gaps"] if g["reason"].startswith("port:")]
    return {
        "minutes": minutes, "warmup_s": warmup_s, "measured_minutes": round(measured_min, 3),
        "server_realtime": server.realtime,
        "rtstage": {"late_cycles": port_status["late_cycles"], "lost_events": len(lost),
                    "flagged_callbacks": status["xruns"]["flagged_callbacks"], "restarts": status["restarts"],
                    "callback_max_us": port_status["callback_max_us"],
                    "callback_p999_us_at_most": port_status["callback_p999_us_at_most"]},
        "native_window": {"late_per_min": round((c1["late"] - c0["late"]) / measured_min, 3),
                          "jumps_per_min": round((c1["jumps"] - c0["jumps"]) / measured_min, 3)},
        "memory": {"after_warmup": at_warm, "at_end": at_end, "control_growth_bytes": growth("control"),
                   "worker_growth_bytes": growth("worker")},
        "tap_frames": int(words.shape[0]), "tap_dropped_frames": status["tap_dropped_frames"],
        "meter_dropped_frames": (sub["last"] or {}).get("meter_dropped_frames"),
        "meter_events": sub["events"], "control_lines": counts, "midi_sent": midi_state["sent"],
        "changes_applied": status.get("control_changes_applied"),
        "bit_exact_with_rerender": bool(np.array_equal(words, reference)),
    }


def main(argv=None):
    p = argparse.ArgumentParser(prog="soak.py")
    p.add_argument("minutes", nargs="?", type=float, default=30.0)
    args = p.parse_args(argv)
    workdir = tempfile.mkdtemp(prefix="rtstage-soak-")
    try:
        report = soak(args.minutes, workdir)
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    print(json.dumps(report, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
