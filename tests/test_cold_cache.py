"""With an empty numba cache, nothing is compiled once the stream runs.

Root cause of the MIDI test that failed with cold caches: the meter thread's
first step compiled the meter ring read while audio ran (only the meter bank
was warmed before the stream opened).  With a warm cache that is a quick load;
with an empty one it held the GIL for a second or more, so the control, MIDI
and hand-off threads stalled and the first meter snapshot came late (the test
read ``frame == 0``).  The fix runs one complete meter-thread step on a
scratch block before the stream starts
(:func:`rtstage.live.realtime.warm_meter_thread`).

The check uses numba's own compile events (``numba.core.event``, the
``numba:compile`` kind) in a fresh interpreter whose ``NUMBA_CACHE_DIR`` is an
empty directory: every compilation must happen on the main thread during
prepare and start, none on the meter, control, MIDI or hand-off threads while
the stream runs with meters, a tap, the control socket and a MIDI input
receiving changes.
"""

import json
import os
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

_SCRIPT = r"""
import json, sys, time
import rtmidi
from numba.core import event
from rtstage.control.client import ControlClient
from rtstage.control.live_target import LiveTarget
from rtstage.control.midi import MidiControl, load_map
from rtstage.control.protocol import Controller
from rtstage.control.server import ControlServer
from rtstage.engine import EngineSettings
from rtstage.live.supervisor import LiveEngine

import threading

compiled = []

class Listener(event.Listener):
    def on_start(self, ev):
        compiled.append((threading.current_thread().name, str(ev.data.get("dispatcher", ev.data))[:120]))
    def on_end(self, ev):
        pass

event.register("numba:compile", Listener())

desk = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, name="coldprobe")
desk.open_virtual_port("cold knobs")
engine = LiveEngine(EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=3), blocksize=128,
                    source="tone:level_dbfs=-20", tap=sys.argv[1])
engine.prepare()
target = LiveTarget(engine).start()
controller = Controller(target)
server = ControlServer(controller, port=0, logger=lambda m: None).start()
midi = MidiControl(controller, load_map("default"), api="jack", in_port="cold knobs").start()
engine.start()
frames = []
with ControlClient("127.0.0.1", server.port, timeout_s=30) as client:
    for i in range(20):
        engine.poll()
        desk.send_message([0xB0, 102, 40 + i])  # the default map's word-length control (MIDI 1.0 control change)
        client.request({"op": "set", "values": {"gain_db": -0.5 * (i % 4)}})
        frames.append(client.request({"op": "meters"})["meters"]["frame"])
        time.sleep(0.05)
status = engine.stop()
midi.stop(); server.stop(); target.stop()
print(json.dumps({"compiled": compiled, "frames": frames, "midi_received": midi.received,
                  "changes": len(target.applied)}))
"""


def test_nothing_compiles_while_the_stream_runs_with_an_empty_cache(jack_server, tmp_path):
    cache = tmp_path / "numba-cache"
    cache.mkdir()
    env = jack_server.client_env()
    env["NUMBA_CACHE_DIR"] = str(cache)
    env["PYTHONPATH"] = ROOT
    result = subprocess.run([sys.executable, "-c", _SCRIPT, str(tmp_path / "tap.wav")], env=env, cwd=ROOT,
                            capture_output=True, text=True, timeout=900)
    assert result.returncode == 0, result.stderr[-3000:]
    out = json.loads(result.stdout.strip().splitlines()[-1])
    # Compiling before the stream, on the main thread, is the prepare phase; any compile on another thread
    # (meter, control, MIDI, hand-off) ran while audio could be running and held the GIL doing it.
    assert out["compiled"], "nothing compiled: the cache was not empty"
    assert [c for c in out["compiled"] if c[0] != "MainThread"] == [], out["compiled"]
    assert out["midi_received"] > 0 and out["changes"] > 0
    assert out["frames"][-1] > 0  # snapshots were published while the stream ran
    assert any(os.scandir(cache))  # the run did start from an empty cache and filled it
