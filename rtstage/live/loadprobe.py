"""Flagged-callback measurements, with and without a busy Python thread in the same process.

Used by the live tests and by ``tools/bench_live.py`` (one implementation).
Each phase runs one stream for a given time and counts the callbacks that
PortAudio flagged (underflow, overflow) after a settle time:

``rtstage``
    The live engine (compiled callback) on a generated source.
``passthrough``
    A plain sounddevice Python callback copying input to output, the usual
    way a Python program runs audio.

``load`` adds a thread running pure-Python arithmetic for the whole phase,
in the process whose thread runs the callback: it holds the GIL except at
the interpreter's switch interval, which is what starves a Python callback.
``procload`` runs the same arithmetic as a separate process: the same CPU
contention without a shared GIL (the fair baseline on a 2-core machine).

``python -m rtstage.live.loadprobe PHASE[,PHASE...] --seconds S`` prints one
JSON object per phase on stdout; a phase is ``MODE`` or ``MODE+load``.  If
``--jack-log FILE`` is given, each result holds the byte span of that log
written during the phase, so a caller can attribute the server's xruns.
"""

import argparse
import json
import os
import sys
import threading
import time

from ..settings import EngineSettings

SETTINGS = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=20240601)
"""TPDF with 9-tap F-weighted shaping, the benchmark's settings."""


def _busy(stop, counter):
    x = 0
    while not stop.is_set():
        for i in range(2000):
            x = (x + i * i) % 1000003
        counter[0] += 1


class _Load:
    """Busy pure Python, started and stopped by ``with``: a thread in this process, or a separate process."""

    def __init__(self, enabled, separate_process=False):
        self.enabled = enabled
        self.separate_process = separate_process
        self.stop = threading.Event()
        self.loops = [0]
        self.thread = None
        self.process = None

    def __enter__(self):
        if self.enabled and self.separate_process:
            import subprocess

            code = "x=0\nwhile True:\n    x=(x+x*x+1)%1000003\n"
            self.process = subprocess.Popen([sys.executable, "-c", code])
        elif self.enabled:
            self.thread = threading.Thread(target=_busy, args=(self.stop, self.loops), daemon=True)
            self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        if self.thread is not None:
            self.thread.join()
        if self.process is not None:
            self.process.kill()
            self.process.wait()


def _log_size(path):
    return os.path.getsize(path) if path and os.path.exists(path) else None


def measure_rtstage(seconds, load, blocksize=64, settle_s=1.0, device=None, jack_log=None, separate=False):
    """One phase of the live engine; returns a dict of counts after the settle time.

    ``load`` puts the busy thread inside the stream worker, the process whose
    thread runs the callback; with ``separate`` the same load runs as a
    separate process instead (the same CPU contention without a shared GIL).
    """
    from .supervisor import LiveEngine

    engine = LiveEngine(SETTINGS, output_device=device, blocksize=blocksize, source="noise:level_dbfs=-20,seed=5",
                        settle_s=settle_s, worker_load_thread=load and not separate)
    engine.prepare()
    span0 = _log_size(jack_log)
    with _Load(load and separate, separate_process=True) as busy:
        engine.start()
        t_end = time.monotonic() + settle_s + seconds
        while time.monotonic() < t_end:
            engine.poll()
            time.sleep(0.02)
        status = engine.stop()
    after = status["xruns_after_settle"]
    return {
        "mode": "rtstage", "load": load, "seconds": seconds, "blocksize": blocksize,
        "callbacks": status["blocks"], "flagged_after_settle": after["flagged_callbacks"],
        "output_underflow_after_settle": after["output_underflow"], "cpu_load_max": status["cpu_load_max"],
        "restarts": status["restarts"], "busy_loops": busy.loops[0], "jack_log_span": [span0, _log_size(jack_log)],
    }


def measure_passthrough(seconds, load, blocksize=64, settle_s=1.0, device=None, jack_log=None, separate=False):
    """One phase of a plain sounddevice Python-callback pass-through."""
    import sounddevice as sd

    from .devices import find_device

    out_index = find_device(device, "output")
    in_index = find_device(device, "input")
    counts = {"callbacks": 0, "flagged": 0, "underflow": 0}
    settle_at = [None]

    def callback(indata, outdata, frames, time_info, status):
        counts["callbacks"] += 1
        outdata[:] = indata
        if status and settle_at[0] is not None and time.monotonic() >= settle_at[0]:
            counts["flagged"] += 1
            if status.output_underflow:
                counts["underflow"] += 1

    span0 = _log_size(jack_log)
    loads = []
    with _Load(load, separate_process=separate) as busy:
        with sd.RawStream(device=(in_index, out_index), samplerate=None, blocksize=blocksize, channels=2,
                          dtype="int16", callback=callback) as stream:
            settle_at[0] = time.monotonic() + settle_s
            t_end = settle_at[0] + seconds
            while time.monotonic() < t_end:
                time.sleep(0.02)
                if time.monotonic() > settle_at[0]:
                    loads.append(stream.cpu_load)
    return {
        "mode": "passthrough", "load": load, "seconds": seconds, "blocksize": blocksize,
        "callbacks": counts["callbacks"], "flagged_after_settle": counts["flagged"],
        "output_underflow_after_settle": counts["underflow"], "cpu_load_max": max(loads) if loads else 0.0,
        "restarts": 0, "busy_loops": busy.loops[0], "jack_log_span": [span0, _log_size(jack_log)],
    }


def run_phase(phase, seconds, blocksize=64, settle_s=1.0, device=None, jack_log=None):
    """Run ``MODE``, ``MODE+load`` (busy thread beside the callback) or ``MODE+procload`` (busy separate process)."""
    mode, _, extra = phase.partition("+")
    load = extra in ("load", "procload")
    fn = {"rtstage": measure_rtstage, "passthrough": measure_passthrough}[mode]
    result = fn(seconds, load, blocksize=blocksize, settle_s=settle_s, device=device, jack_log=jack_log,
                separate=extra == "procload")
    result["flags_per_minute"] = round(60.0 * result["flagged_after_settle"] / seconds, 3)
    return result


def main(argv=None):
    """Command line (see the module docstring)."""
    p = argparse.ArgumentParser(prog="python -m rtstage.live.loadprobe")
    p.add_argument("phases", help="comma-separated: rtstage, rtstage+load, passthrough, passthrough+load")
    p.add_argument("--seconds", type=float, default=10.0)
    p.add_argument("--blocksize", type=int, default=64)
    p.add_argument("--settle", type=float, default=1.0)
    p.add_argument("--device")
    p.add_argument("--jack-log")
    args = p.parse_args(argv)
    for phase in args.phases.split(","):
        result = run_phase(phase, args.seconds, args.blocksize, args.settle, args.device, args.jack_log)
        print(json.dumps({"phase": phase, **result}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
