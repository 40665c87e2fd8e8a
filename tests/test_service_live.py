"""``rtstage run`` as a service on a JACK dummy server: metrics over HTTP, OSC over UDP, feed reload, rotation.

References outside the project: the Prometheus text format is parsed by
``prometheus_client.parser.text_string_to_metric_families``; OSC datagrams
are built and parsed by python-osc's own client; the words are checked
against the offline :class:`rtstage.Engine` on the same generated source
with the logged changes applied (what ``rtstage render --automation``
computes), read back with soundfile (libsndfile); the notification protocol
is that of sd_notify(3) (from memory), played by the test's own socket.
"""

import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal
from prometheus_client.parser import text_string_to_metric_families
from pythonosc.udp_client import SimpleUDPClient

from rtstage import Engine, EngineSettings, params
from rtstage.control.automation import AutomationPlayer, load_automation, process_with_automation
from rtstage.control.client import ControlClient
from rtstage.live.sources import generate
from rtstage.service.rotate import list_segments, segment_engine

from test_service_notify import Manager

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000


def free_port(kind=socket.SOCK_STREAM):
    with socket.socket(socket.AF_INET, kind) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Run:
    """``rtstage run`` as a subprocess; stderr to a file."""

    def __init__(self, server, argv, err_path, extra_env=None):
        env = server.client_env()
        env["PYTHONPATH"] = ROOT
        env.update(extra_env or {})
        self.err_path = err_path
        with open(err_path, "w") as err:
            self.proc = subprocess.Popen([sys.executable, "-m", "rtstage", "run", *argv], env=env, cwd=ROOT,
                                         stderr=err, stdout=subprocess.DEVNULL)

    def log(self):
        with open(self.err_path) as f:
            return f.read()

    def wait_for_log(self, text, timeout_s=300.0):
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if text in self.log():
                return
            assert self.proc.poll() is None, self.log()
            time.sleep(0.05)
        raise AssertionError(f"{text!r} not logged: {self.log()}")

    def terminate(self):
        self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(60)

    def kill(self):
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()


def scrape(url):
    with urllib.request.urlopen(url, timeout=10) as reply:
        text = reply.read().decode()
    out = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, tuple(sorted((k, v) for k, v in s.labels.items() if k != "feed")))] = s.value
    return out


def render_from(engine, source, nframes, events, chunk=4096):
    """Offline render of ``nframes`` of ``source`` from ``engine.frame`` with logged changes applied."""
    x = generate(source, SR, 2, engine.frame, nframes)
    player = AutomationPlayer(events)
    return np.concatenate([process_with_automation(engine, x[i:i + chunk], player) for i in range(0, nframes, chunk)])


def rerender(settings, source, start_frame, nframes, events):
    """Offline render of ``nframes`` of ``source`` from ``start_frame`` with logged changes applied."""
    return render_from(Engine(settings, 2, SR, start_frame=start_frame), source, nframes, events)


def test_metrics_and_osc_against_status_meters_and_rerender(jack_server, tmp_path):
    # A 997 Hz tone (AES17's test frequency) at full scale with +1 dB of gain: it clips, so the clip counters move.
    source = "tone:freq_hz=997,level_dbfs=0"
    settings = EngineSettings(bits=16, dither="tpdf", shaper="flat", seed=2024, gain_db=1.0)
    cport, mport, oport = free_port(), free_port(), free_port(socket.SOCK_DGRAM)
    tap, log_path, st = (str(tmp_path / n) for n in ("tap.wav", "auto.jsonl", "status.json"))
    run = Run(jack_server, ["--source", source, "--seed", "2024", "--gain-db", "1", "--blocksize", "256",
                            "--tap", tap, "--automation-log", log_path, "--status-file", st, "--quiet",
                            "--control-port", str(cport), "--metrics", f"127.0.0.1:{mport}",
                            "--osc", f"127.0.0.1:{oport}"], str(tmp_path / "err.txt"))
    url = f"http://127.0.0.1:{mport}/metrics"
    try:
        run.wait_for_log(f"metrics: serving {url}")
        run.wait_for_log(f"osc: listening on 127.0.0.1:{oport}")
        run.wait_for_log("rtstage: running:")
        deadline = time.monotonic() + 60
        # a second of metered audio, so that 400 ms loudness blocks exist (BS.1770-4 momentary loudness)
        while scrape(url).get(("rtstage_metered_frames", ()), 0) < SR:
            assert time.monotonic() < deadline, run.log()
            time.sleep(0.1)
        with ControlClient("127.0.0.1", cport, timeout_s=10) as client:
            # counters: a scrape lies between two status replies of the same run
            before = client.request({"op": "status"})["status"]["live"]
            m = scrape(url)
            after = client.request({"op": "status"})["status"]["live"]
            assert before["frames"] <= m[("rtstage_frames_total", ())] <= after["frames"]
            assert before["blocks"] <= m[("rtstage_callbacks_total", ())] <= after["blocks"]
            for c in range(2):
                ch = (("channel", str(c + 1)),)
                assert before["clipped"][c] <= m[("rtstage_clipped_samples_total", ch)] <= after["clipped"][c]
                assert m[("rtstage_replaced_samples_total", ch)] == before["nonfinite"][c] == 0
                assert m[("rtstage_auto_muted", ch)] == 0
            assert after["clipped"][0] > 0  # the path is exercised: clipping happened
            assert m[("rtstage_stream_restarts_total", ())] == 0 and m[("rtstage_tap_dropped_frames_total", ())] == 0
            assert 0 <= m[("rtstage_cpu_load_ratio", ())] < 1
            assert m[("rtstage_running", ())] == 1
            flagged = {dict(k[1])["kind"]: v for k, v in m.items() if k[0] == "rtstage_flagged_callbacks_total"}
            assert set(flagged) == set(before["xruns"])
            assert any(k[0] == "rtstage_thread_realtime_priority" for k in m)
            # levels: the scrape and the meters reply read the same meter report when their frame counts agree
            for _ in range(100):
                m = scrape(url)
                meters = client.request({"op": "meters"})["meters"]
                if meters["frames"] == m[("rtstage_metered_frames", ())]:
                    break
            else:
                raise AssertionError("no scrape matched a meter report")
            for c, rep in enumerate(meters["channels"]):
                ch = ("channel", str(c + 1))
                for key, label in (("unweighted", "unweighted"), ("a_weighted", "a"), ("itu468", "itu468")):
                    assert m[("rtstage_added_noise_dbfs", (ch, ("weighting", label)))] == rep["added_noise_dbfs"][key]
                assert m[("rtstage_sample_peak_dbfs", (ch,))] == rep["sample_peak_dbfs"]
                assert m[("rtstage_true_peak_dbtp", (ch,))] == rep["true_peak_dbtp"]
                if rep["noise_modulation_db"] is not None:
                    assert m[("rtstage_noise_modulation_db", (ch,))] == rep["noise_modulation_db"]
            loud = meters["loudness"]
            assert loud["momentary_lufs"] is not None  # 400 ms blocks exist after a second of audio
            assert m[("rtstage_loudness_lufs", (("kind", "momentary"),))] == loud["momentary_lufs"]

            # OSC: a control surface subscribes, sets the word length, asks it back
            surface = SimpleUDPClient("127.0.0.1", oport)
            surface.send_message("/rtstage/subscribe", [])
            surface.send_message("/rtstage/param/bits", 12)
            got = []
            deadline = time.monotonic() + 10
            while ("/rtstage/param/bits", [12]) not in got and time.monotonic() < deadline:
                got += [(msg.address, msg.params) for msg in surface.get_messages(0.2)]
            assert ("/rtstage/param/bits", [16]) in got and ("/rtstage/param/bits", [12]) in got
            surface.send_message("/rtstage/get/bits", [])
            deadline = time.monotonic() + 10
            while not any(a == "/rtstage/param/bits" for a, _ in got[-1:]) and time.monotonic() < deadline:
                got += [(msg.address, msg.params) for msg in surface.get_messages(0.2)]
            # a change on the JSON socket is fed back to the OSC subscriber
            assert client.request({"op": "set", "values": {"dither": "rpdf"}})["ok"]
            got = []
            deadline = time.monotonic() + 10
            while ("/rtstage/param/dither", ["rpdf"]) not in got and time.monotonic() < deadline:
                got += [(msg.address, msg.params) for msg in surface.get_messages(0.2)]
            assert ("/rtstage/param/dither", ["rpdf"]) in got
            time.sleep(0.5)
            m_end = scrape(url)
        assert m_end[("rtstage_control_changes_applied_total", ())] == 2
        assert run.terminate() == 0, run.log()
    finally:
        run.kill()
    status = json.load(open(st))
    events = load_automation(log_path, samplerate=SR)
    assert [v for _, v in events] == [{"bits": 12}, {"dither": "rpdf"}]
    assert status["control_changes_applied"] == 2 and status["osc"]["applied"] == 1
    words = sf.read(tap, dtype="int16", always_2d=True)[0]
    assert status["tap_dropped_frames"] == 0 and words.shape[0] == status["engine_frame"] > events[-1][0]
    assert_array_equal(rerender(settings, source, 0, words.shape[0], events), words)


def test_feed_reload_and_rotated_segments_rerender_alone(jack_server, tmp_path):
    source = "noise:level_dbfs=-18,seed=8"
    tap, log_path, st = (str(tmp_path / n) for n in ("tap.wav", "auto.jsonl", "status.json"))
    feed_path = tmp_path / "link.toml"
    text = (f'[feed]\nname = "link-test"\n[audio]\nsource = "{source}"\nsamplerate = {SR}\nblocksize = 256\n'
            f'[engine]\npreset = "link16"\nbits = 16\nseed = 555\n'
            f'[tap]\npath = "{tap}"\nrotate_s = 0.5\n[automation_log]\npath = "{log_path}"\n[control]\nport = 0\n')
    feed_path.write_text(text)
    manager = Manager()
    run = Run(jack_server, ["--feed", str(feed_path), "--status-file", st, "--quiet"], str(tmp_path / "err.txt"),
              {"NOTIFY_SOCKET": manager.env_value})
    try:
        manager.wait_for("READY=1", 300)  # a cold cache compiles the callback first
        time.sleep(0.8)
        feed_path.write_text(text.replace("bits = 16", "bits = 12").replace("blocksize = 256", "blocksize = 512"))
        run.proc.send_signal(signal.SIGHUP)
        _, reloading = manager.wait_for("RELOADING=1", 30)
        assert reloading.split("\n")[1].startswith("MONOTONIC_USEC=")
        _, ready = manager.wait_for("READY=1", 30)
        assert "reloads 1" in ready
        run.wait_for_log("feed reload: applied")
        time.sleep(1.2)
        assert run.terminate() == 0, run.log()
    finally:
        run.kill()
        manager.close()
    err = run.log()
    assert "feed reload: audio.blocksize changed (256 -> 512): needs a restart; not applied" in err
    status = json.load(open(st))
    assert status["reloads"] == 1 and status["feed"] == "link-test" and status["blocksize"] == 256
    # the reload reopened nothing; gaps recorded, if any, are periods the (non-realtime, shared) dummy server
    # itself lost or repeated (rtstage.live.timing's port check), and the words below are still the render
    assert status["restarts"] == 0
    assert all(g["reason"].startswith("port:") for g in status["gaps"]), status["gaps"]
    segments = list_segments(tap)
    logs = list_segments(log_path)
    assert len(segments) >= 4 and [k for k, _ in logs] == [k for k, _ in segments]
    parts = [sf.read(name, dtype="int16", always_2d=True)[0] for _, name in segments]
    whole = np.concatenate(parts)
    assert whole.shape[0] == status["engine_frame"] and status["tap_dropped_frames"] == 0
    # the reload's change is in the log at a block boundary, like any other change
    changes = [(f, v) for _, name in logs for f, v in load_automation(name, SR)[1:]]
    assert len(changes) == 1 and changes[0][1] == {"bits": 12} and changes[0][0] % 256 == 0
    # concatenated segments: the unrotated render, nothing lost or duplicated at a boundary
    # presets/link16.toml: TPDF with the gentle9 family, whose 48 kHz design has error feedback (history matters)
    base = EngineSettings(bits=16, dither="tpdf", shaper="gentle9-48k", seed=555)
    assert_array_equal(whole, rerender(base, source, 0, whole.shape[0], changes))
    # each segment alone, from the source, its sidecar's kernel state and its own log segment
    for ((_, start), name), part, (_, log_name) in zip(segments, parts, logs):
        events = load_automation(log_name, SR)
        first_frame, restated = events[0]
        assert first_frame == start
        state = json.load(open(name + ".json"))["state_at_start"]
        assert state is not None, name
        engine, preroll, skip = segment_engine(state, start, 2, SR)
        assert 0 <= skip < 24000 and params.values_from_settings(engine.settings) == {
            k: v for k, v in state["values"].items() if k in params.ENGINE_FIELDS}
        words = render_from(engine, source, skip + part.shape[0], preroll + events[1:])
        assert_array_equal(part, words[skip:])
        if start > 0:
            # without the carried state (a fresh engine at the boundary) the shaped noise differs
            fresh = rerender(params.settings_with(EngineSettings(seed=restated["seed"]), restated), source, start,
                             part.shape[0], events[1:])
            assert np.any(fresh != part)
