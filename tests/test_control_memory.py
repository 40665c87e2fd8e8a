"""Memory of the control process per applied change: the live engine's control path must not grow with its changes.

The criterion is the soak's goal (``tools/soak.py``, docs/live.md "Running
live"): resident memory growth of at most 1 MB after warm-up over 30 minutes
of control fuzz at 10 lines a second, that is 18 000 changes, about 55 bytes a
change (10**6 / 18 000).  Every record the control path keeps per change (the
target's applied changes, the waiters' tickets, the engine's ``applied_log``)
is bounded, so once warm-up has filled them, applying more changes adds
nothing; the check allows the whole 55-byte budget per change.

The changes travel the real path: a :class:`~rtstage.live.supervisor.LiveEngine`
on a private JACK dummy server (its stream worker, the seqlock, the callback's
applied sample index), a :class:`~rtstage.control.live_target.LiveTarget`
writing an automation log, the :class:`~rtstage.control.protocol.Controller`
and the socket server on 127.0.0.1, driven by a client over TCP.  Python
memory is measured with :mod:`tracemalloc` (the standard library's allocation
tracer), keeping the allocations made in the control layer and in the live
engine's control surface (the records named above); the meter thread's
loudness history and the port's gap records grow with time and load, not with
changes, and are left out.  No timing is asserted.
"""

import gc
import os
import threading
import time
import tracemalloc

from rtstage import EngineSettings
from rtstage.control.automation import AutomationWriter
from rtstage.control.client import ControlClient
from rtstage.control import live_target
from rtstage.control.live_target import LiveTarget
from rtstage.control.protocol import Controller
from rtstage.control.server import ControlServer
from rtstage.live import surface

BUDGET_BYTES_PER_CHANGE = 1e6 / (30 * 60 * 10)
"""The soak's goal (<= 1 MB over 30 minutes at 10 changes a second) per change: about 55 bytes."""
WARMUP_CHANGES = 700
"""More than every bounded per-change record holds (the largest: 512 tickets), so that all are full."""
MEASURED_CHANGES = 1500

CONTROL_DIR = os.path.dirname(os.path.abspath(live_target.__file__))
SURFACE_FILE = os.path.abspath(surface.__file__)


def _change(i):
    """The soak's kinds of change, in turn: gain, word length, dither."""
    kind = i % 3
    if kind == 0:
        return {"gain_db": -0.25 * (i % 24)}
    if kind == 1:
        return {"bits": 8 + i % 9}
    return {"dither": ("tpdf", "rpdf")[i % 2]}


def _in_control_path(filename):
    return filename == SURFACE_FILE or filename.startswith(CONTROL_DIR + os.sep)


def _control_bytes():
    """Traced bytes allocated through the control layer or the control surface and still alive (after a collection)."""
    gc.collect()
    snapshot = tracemalloc.take_snapshot()
    return sum(trace.size for trace in snapshot.traces
               if any(_in_control_path(frame.filename) for frame in trace.traceback))


def _apply(client, start, count):
    for i in range(start, start + count):
        reply = client.request({"op": "set", "values": _change(i)})
        assert reply["ok"], reply


def test_applied_changes_do_not_grow_the_control_process(jack_server, tmp_path, monkeypatch):
    from rtstage.live.supervisor import LiveEngine

    for key, value in jack_server.client_env().items():
        if key.startswith("JACK_"):
            monkeypatch.setenv(key, value)
    settings = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=4242)  # as tools/soak.py
    engine = LiveEngine(settings, samplerate=48000, blocksize=256, source="noise:level_dbfs=-20,seed=7")
    runner = None
    target = server = None
    writer = AutomationWriter(str(tmp_path / "automation.jsonl"), 48000)
    try:
        engine.prepare()
        target = LiveTarget(engine, automation_log=writer).start()
        server = ControlServer(Controller(target), port=0, rate_hz=1e6, burst=1e6, logger=lambda m: None).start()
        runner = threading.Thread(target=engine.run, kwargs={"install_signals": False}, name="test-live-engine")
        runner.start()
        deadline = time.monotonic() + 120
        while engine.state != "running":
            assert runner.is_alive() and time.monotonic() < deadline, "the live engine did not start"
            time.sleep(0.05)
        # Traced from before the first change: the entries a bounded record drops later were traced when made.
        tracemalloc.start(32)
        with ControlClient("127.0.0.1", server.port, timeout_s=30) as client:
            _apply(client, 0, WARMUP_CHANGES)
            time.sleep(0.2)  # the supervisor's poll (20 ms) logs the last publication
            applied0, before = target.applied_count, _control_bytes()
            _apply(client, WARMUP_CHANGES, MEASURED_CHANGES)
            time.sleep(0.2)
            applied1, after = target.applied_count, _control_bytes()
    finally:
        tracemalloc.stop()
        engine.request_stop()
        if runner is not None:
            runner.join(60)
        if server is not None:
            server.stop()
        if target is not None:
            target.stop()
        writer.close()
        if engine.state != "stopped" and engine.block is not None:
            engine.stop()
    assert runner is not None and not runner.is_alive()
    changes = applied1 - applied0
    assert changes >= MEASURED_CHANGES // 2, (applied0, applied1)  # each set waits for its block: few merge
    growth = after - before
    print(f"control-layer growth {growth} B over {changes} applied changes ({growth / changes:.1f} B/change)")
    assert growth <= BUDGET_BYTES_PER_CHANGE * changes, (growth, changes)
