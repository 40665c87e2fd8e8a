"""``rtstage run --device none`` under the control socket: a change mid-stream, the per-stream figures,
and the words on the wire equal to the offline re-render with the automation log.

Every packet goes to 127.0.0.1.
"""

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.control.automation import AutomationPlayer, load_automation, process_with_automation
from rtstage.control.client import ControlClient
from rtstage.live.sources import generate

from test_net_rtp import LOOPBACK, PacketCollector, read_rfc_packets

from procs import free_port, wait_for

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000




def test_control_socket_drives_the_deviceless_engine(tmp_path):
    source = "noise:level_dbfs=-20,seed=9"
    settings = EngineSettings(bits=16, dither="tpdf", shaper="flat", seed=33)
    tap, log_path, st, err = (str(tmp_path / n) for n in ("tap.wav", "auto.jsonl", "status.json", "err.txt"))
    sink = PacketCollector()
    sap_sink = PacketCollector()
    with open(err, "w") as f:
        proc = subprocess.Popen(
            [sys.executable, "-m", "rtstage", "run", "--device", "none", "--source", source, "--samplerate", str(SR),
             "--channels", "2", "--bits", "16", "--dither", "tpdf", "--seed", "33", "--rtp-out",
             f"{LOOPBACK}:{sink.port}", "--rtp-ptime-ms", "4", "--tap", tap, "--status-file", st,
             "--automation-log", log_path, "--control-port", str(free_port()), "--quiet",
             "--rtp-sap", f"{LOOPBACK}:{sap_sink.port}"],
            cwd=ROOT, env={**os.environ, "PYTHONPATH": ROOT}, stderr=f, stdout=subprocess.DEVNULL)
    try:
        port = int(wait_for(err, r"control: listening on 127\.0\.0\.1:(\d+)", proc).group(1))
        time.sleep(0.3)
        with ControlClient(LOOPBACK, port, timeout_s=10) as client:
            reply = client.request({"op": "set", "values": {"gain_db": -6.0}})
            assert reply["ok"] and isinstance(reply["at_frame"], int)
            status = client.request({"op": "status"})["status"]
            meters = client.request({"op": "meters"})["meters"]
        time.sleep(0.3)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0, open(err).read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    packets = sink.stop()
    announcements = sap_sink.stop()
    out = status["live"]["streams"]["rtp_out"]
    assert out["packets_sent"] > 0 and out["frames_per_packet"] == 192  # 4 ms at 48 kHz (AES67 §7.2)
    assert meters["streams"]["rtp_out"]["ssrc"] == out["ssrc"]
    assert status["settings"]["gain_db"] == -6.0

    words = sf.read(tap, dtype="int16", always_2d=True)[0]
    events = load_automation(log_path, samplerate=SR)
    assert [v for _, v in events] == [{"gain_db": -6.0}] and events[0][0] == reply["at_frame"]
    x = generate(source, SR, 2, 0, words.shape[0])
    engine = Engine(settings, 2, SR)
    expected = process_with_automation(engine, x, AutomationPlayer(events))
    assert_array_equal(words, expected)
    got = read_rfc_packets(packets, 96, 192, 2, 2)
    assert_array_equal(got[:words.shape[0]], words.astype(np.int64))
    final = json.load(open(st))
    assert final["streams"]["rtp_out"]["packets_sent"] == len(packets)
    assert final["control_changes_applied"] == 1
    # The live meters run on this engine too: the final snapshot measured the stream's words.
    levels = final["meters"]
    assert levels["frame"] > 0 and all(isinstance(v, float) and v < 0 for v in levels["peak_dbfs"])
    # RFC 2974 §3: an announcement at the start and a deletion (T bit) at the stop, both carrying the SDP.
    assert [(p[0] >> 2) & 1 for p in announcements] == [0, 1]
    assert f"m=audio {sink.port} RTP/AVP 96".encode() in announcements[0]


def test_programme_op_closes_the_loudness_programme_and_starts_the_next(tmp_path):
    # A 997 Hz sine at -20 dBFS in both channels of a stereo programme reads -20.0 LUFS: EBU Tech 3341 test 1
    # (1 kHz at -23 dBFS reads -23.0 LUFS +/- 0.1 LU; BS.1770's -0.691 offset cancels K-weighting's gain near
    # 1 kHz).  The closed programme must read that, and the new one must carry the label sent.
    source = "tone:freq_hz=997,level_dbfs=-20"
    err = str(tmp_path / "err.txt")
    with open(err, "w") as f:
        proc = subprocess.Popen(
            [sys.executable, "-m", "rtstage", "run", "--device", "none", "--source", source, "--samplerate", str(SR),
             "--channels", "2", "--bits", "16", "--seed", "5", "--tap", str(tmp_path / "tap.wav"),
             "--control-port", str(free_port()), "--quiet"],
            cwd=ROOT, env={**os.environ, "PYTHONPATH": ROOT}, stderr=f, stdout=subprocess.DEVNULL)
    try:
        port = int(wait_for(err, r"control: listening on 127\.0\.0\.1:(\d+)", proc).group(1))
        with ControlClient(LOOPBACK, port, timeout_s=10) as client:
            assert client.request({"op": "programme", "label": 7})["ok"] is False  # a label is text
            deadline = time.monotonic() + 60
            while True:  # at least 3 s of the first programme, so that gated blocks exist
                loud = client.request({"op": "meters"})["meters"].get("loudness") or {}
                if (loud.get("duration_s") or 0) >= 3.0:
                    break
                assert time.monotonic() < deadline, loud
                time.sleep(0.2)
            reply = client.request({"op": "programme", "label": "bulletin 13:00"})
            assert reply["ok"] and reply["label"] == "bulletin 13:00"
            while True:
                loud = client.request({"op": "meters"})["meters"]["loudness"]
                if loud["programme"] == 2:
                    break
                assert time.monotonic() < deadline, loud
                time.sleep(0.1)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0, open(err).read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert loud["programme_label"] == "bulletin 13:00"
    first = loud["programmes"][0]
    assert first["duration_s"] >= 3.0 and first["programme"] == 1
    assert abs(first["integrated_lufs"] - (-20.0)) <= 0.1
    assert loud["duration_s"] < first["duration_s"] + 1.0  # the new programme started from nothing
