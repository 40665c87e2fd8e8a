"""The control layer driving the real live engine: ``rtstage run`` on a JACK dummy server, over loopback TCP and JACK MIDI.

Every check runs ``python -m rtstage run`` as a subprocess with ``--tap`` and
``--automation-log``, drives it from this process, stops it with SIGTERM
(the engine's clean stop), and compares the tap with the offline reference:
:class:`rtstage.Engine` on the same generated source
(:func:`rtstage.live.sources.generate`), with the logged changes applied by
:func:`rtstage.control.automation.process_with_automation`, which is what
``rtstage render --automation LOG`` computes.

The fuzz line generator and its client are those of ``test_control_fuzz``
(run there against the offline stand-in), the probe MIDI controller that of
``test_midi_jack``; JSON replies are decoded with Python's ``json`` as the
RFC 8259 reference parser; status bytes and controller numbers follow the
MIDI 1.0 Detailed Specification (MMA, 1996).
"""

import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.control.automation import AutomationPlayer, load_automation, process_with_automation
from rtstage.control.client import ControlClient
from rtstage.control.midi import Control
from rtstage.live.sources import generate

from test_control_fuzz import MAX_LINE_BYTES, N_CLIENTS, N_LINES, fuzz_client
from test_control_fuzz import SETTINGS as FUZZ_SETTINGS
from test_midi_jack import Desk, wait_until

from procs import free_port

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000



class RunProcess:
    """``rtstage run`` as a subprocess on a JACK server; stderr goes to a file."""

    def __init__(self, server, args, err_path):
        self.err_path = err_path
        with open(err_path, "w") as err:
            self.proc = subprocess.Popen([sys.executable, "-m", "rtstage", "run", *args], env=server.client_env(),
                                         cwd=ROOT, stderr=err, stdout=subprocess.DEVNULL)

    def log(self):
        with open(self.err_path) as f:
            return f.read()

    def wait_for_log(self, text, timeout_s=90.0):
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if text in self.log():
                return
            assert self.proc.poll() is None, self.log()
            time.sleep(0.05)
        raise AssertionError(f"{text!r} not logged: {self.log()}")

    def terminate(self, timeout_s=30.0):
        """SIGTERM (clean stop: tap flushed, status written); returns the exit status."""
        self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout_s)

    def kill(self):
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()


def _recording_so_far(path):
    """Text of the automation log a run is still writing: its ``.rtstage-*.part`` file in the same folder."""
    folder = os.path.dirname(path)
    texts = []
    for name in os.listdir(folder):
        if name.startswith(".rtstage-") and name.endswith(".part"):
            with open(os.path.join(folder, name), errors="ignore") as f:
                text = f.read()
            if "rtstage_automation" in text:
                texts.append(text)
    return "".join(texts)


def _rerender(settings, source, nframes, log_path, chunk=4096):
    """Offline render of ``source`` with the automation log applied (Engine + AutomationPlayer)."""
    x = generate(source, SR, 2, 0, nframes)
    engine = Engine(settings, 2, SR)
    player = AutomationPlayer(load_automation(log_path, samplerate=SR))
    return np.concatenate([process_with_automation(engine, x[i:i + chunk], player) for i in range(0, nframes, chunk)])


def test_fuzz_against_live_engine_keeps_server_up_and_tap_identical(jack_server, tmp_path):
    source = "noise:level_dbfs=-20,seed=3"
    s = FUZZ_SETTINGS
    port = free_port()
    tap, log_path, st, err = (str(tmp_path / n) for n in ("tap.wav", "auto.jsonl", "status.json", "err.txt"))
    run = RunProcess(jack_server, [
        "--source", source, "--bits", str(s.bits), "--dither", s.dither, "--shaper", s.shaper, "--seed", str(s.seed),
        "--blocksize", "256", "--tap", tap, "--status-file", st, "--automation-log", log_path,
        "--control-port", str(port), "--control-rate-hz", "1e6", "--control-burst", "1e6"], err)
    try:
        run.wait_for_log("rtstage: running:")
        run.wait_for_log(f"control: listening on 127.0.0.1:{port}")
        results = [{} for _ in range(N_CLIENTS)]
        threads = [threading.Thread(target=fuzz_client, args=(port, 3000 + i, N_LINES // N_CLIENTS, results[i]))
                   for i in range(N_CLIENTS)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        with socket.create_connection(("127.0.0.1", port), timeout=10) as sock, sock.makefile("rwb") as f:
            assert json.loads(f.readline())["event"] == "greeting"  # still up
            f.write(b'{"op": "status", "id": "end"}\n')
            f.flush()
            status_reply = json.loads(f.readline())
        assert run.terminate() == 0, run.log()
    finally:
        run.kill()
    for r in results:
        assert r, "a fuzz client thread failed (see the captured exception)"
        assert r["sent"] == N_LINES // N_CLIENTS and r["bad"] == []
        assert r["answered"] + r["dropped"] == r["sent"]  # every line answered, or behind the line that dropped it
        assert all(reason.startswith(f"oversized line (more than {MAX_LINE_BYTES} bytes)") for reason in r["reasons"])
    assert sum(r["sent"] for r in results) >= 10_000
    assert sum(len(r["reasons"]) for r in results) > 0  # the drop path was taken
    live = status_reply["status"]
    assert status_reply["ok"] and live["state"] == "running" and live["seed"] == s.seed
    assert live["live"]["restarts"] == 0

    status = json.load(open(st))
    events = load_automation(log_path, samplerate=SR)
    assert status["control_changes_applied"] == len(events) > 0  # accepted no-op changes reached the engine
    frames = [f for f, _ in events]
    assert frames == sorted(frames) and all(f % 256 == 0 for f in frames)  # block boundaries of 256-frame blocks
    words = sf.read(tap, dtype="int16", always_2d=True)[0]
    assert status["tap_dropped_frames"] == 0 and words.shape[0] == status["engine_frame"] > SR // 2
    # bit-identical to a run without the fuzz: the render of the source with the start settings only
    assert_array_equal(words, Engine(s, 2, SR).process(generate(source, SR, 2, 0, words.shape[0])))


def test_midi_and_socket_changes_in_tap_at_logged_frames_and_rerender(jack_server, tmp_path, monkeypatch):
    for key, value in jack_server.client_env().items():
        if key.startswith("JACK_"):
            monkeypatch.setenv(key, value)
    source = "tone:freq_hz=997,level_dbfs=-20"  # AES17 test frequency
    settings = EngineSettings(bits=16, dither="tpdf", shaper="flat", seed=4242)
    port = free_port()
    tap, log_path, st, err = (str(tmp_path / n) for n in ("tap.wav", "auto.jsonl", "status.json", "err.txt"))
    bits_cc = Control("bits", 1, 102)  # the default map's word-length control
    desk = Desk()
    run = None
    try:
        run = RunProcess(jack_server, [
            "--source", source, "--bits", "16", "--dither", "tpdf", "--shaper", "flat", "--seed", "4242",
            "--blocksize", "128", "--tap", tap, "--status-file", st, "--automation-log", log_path,
            "--control-port", str(port), "--midi-api", "jack", "--midi-in", "desk knobs", "--midi-out", "desk lights"],
            err)
        run.wait_for_log("rtstage: running:")
        run.wait_for_log("midi: input connected")
        # feedback on connect: the current word length, 16 bits
        desk.wait_for([0xB0, 102, bits_cc.to_position(16)])
        time.sleep(0.3)
        # soft takeover: meet the shown value, then move to 8 bits
        desk.send([0xB0, 102, bits_cc.to_position(16)], [0xB0, 102, bits_cc.to_position(8)])
        # While the run lasts the log is a hidden temporary file beside its name (the output policy's streams).
        assert wait_until(lambda: not os.path.exists(log_path) and '"bits":8' in _recording_so_far(log_path))
        with ControlClient("127.0.0.1", port, timeout_s=10) as client:
            request = client.request  # one request, its reply (events in between are kept aside)

            refused = request({"op": "set", "values": {"bits": 20}})
            assert not refused["ok"] and "does not fit" in refused["error"]  # 16-bit container
            reply = request({"op": "set", "values": {"dither": "rpdf"}, "id": 2})
            assert reply["ok"] and isinstance(reply["at_frame"], int)
            status = request({"op": "status"})["status"]
            assert status["settings"]["bits"] == 8 and status["midi"]["api"] == "jack"
            meters = request({"op": "meters"})["meters"]
            assert len(meters["clipped"]) == 2 and meters["frame"] > 0
            assert request({"op": "learn", "name": "gain_db"})["ok"]
            assert wait_until(lambda: request({"op": "status"})["status"]["midi"]["learning"] == "gain_db")
            assert request({"op": "learn_cancel"})["cancelled"] is True
        time.sleep(0.3)
        assert run.terminate() == 0, run.log()
    finally:
        if run is not None:
            run.kill()
        desk.close()
    events = load_automation(log_path, samplerate=SR)
    assert [v for _, v in events] == [{"bits": 8}, {"dither": "rpdf"}]
    f8, frpdf = events[0][0], events[1][0]
    assert frpdf == reply["at_frame"]  # the socket reply names the logged sample index
    words = sf.read(tap, dtype="int16", always_2d=True)[0]
    status = json.load(open(st))
    assert status["tap_dropped_frames"] == 0 and words.shape[0] == status["engine_frame"] > frpdf
    # kernel rule (rtstage/kernel.py): an 8-bit word in a 16-bit container is q << 8
    assert np.all(words[f8:] & 0xFF == 0)
    assert np.count_nonzero(words[f8 - 128:f8] & 0xFF) > 128
    assert_array_equal(_rerender(settings, source, words.shape[0], log_path), words)
