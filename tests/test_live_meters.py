"""Live meters: the meter ring, the meter thread against the offline MeterBank, the display, ``rtstage watch``.

References: the offline :class:`rtstage.meters.MeterBank` fed the words of
:class:`rtstage.Engine` (what ``rtstage render --report`` computes), numpy for
the ring's contents, and AES17 for the dBFS of a sine (0 dBFS = the RMS of a
full-scale sine, so a sine's peak reads its AES17 level).
"""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.live import shared as S
from rtstage.live.display import level_bar, render_text, status_line
from rtstage.live.sources import generate
from rtstage.meters import MeterBank
from rtstage.meters.report import json_ready

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000

LIVE_ONLY_KEYS = {"frame", "metered_from_frame", "peak_dbfs", "rms_dbfs", "clipped", "nonfinite", "meter_dropped_frames",
                  "meter_backlog_frames", "meter_thread_busy_s", "state", "xruns", "xruns_after_settle", "cpu_load",
                  "cpu_load_max", "restarts", "auto_muted"}
"""Snapshot fields beyond MeterBank.report(): position, levels since the last snapshot, engine health."""


class TestMeterRing:
    def test_whole_blocks_in_order_or_counted_dropped(self):
        nch, cap = 2, 100
        blk = S.SharedBlock(nch, 16, 64, 0, 0, cap)
        rng = np.random.default_rng(5)
        written_x, written_w, dropped = [], [], 0
        out_x = np.zeros((cap, nch))
        out_w = np.zeros((cap, nch), dtype=np.int16)
        got_x, got_w = [], []
        for size in (30, 30, 30, 30, 0, 64, 10, 7):
            vq = rng.standard_normal((64, nch))
            words = rng.integers(-32768, 32767, (64, nch)).astype(np.int16)
            free = cap - (int(blk.ctl[S.C_MRING_HEAD]) - int(blk.ctl[S.C_MRING_TAIL]))
            S.meter_ring_write(blk.ctl, blk.meter_x, blk.meter_words, vq, words, size)
            if size <= free:
                written_x.append(vq[:size])
                written_w.append(words[:size])
            else:
                dropped += size
            if size == 64:  # the consumer catches up once, in two reads (the ring wraps)
                for want in (50, cap):
                    n = S.meter_ring_read(blk.ctl, blk.meter_x, blk.meter_words, out_x[:want], out_w[:want], 0)
                    got_x.append(out_x[:n].copy())
                    got_w.append(out_w[:n].copy())
        n = S.meter_ring_read(blk.ctl, blk.meter_x, blk.meter_words, out_x, out_w, 0)
        got_x.append(out_x[:n].copy())
        got_w.append(out_w[:n].copy())
        assert dropped > 0 and int(blk.ctl[S.C_MRING_DROPPED]) == dropped
        assert_array_equal(np.concatenate(got_x), np.concatenate(written_x))
        assert_array_equal(np.concatenate(got_w), np.concatenate(written_w))

    def test_no_meter_ring_means_tap_off(self):
        blk = S.SharedBlock(1, 16, 64)
        assert int(blk.ctl[S.C_METER_ON]) == 0
        vq = np.ones((8, 1))
        S.meter_ring_write(blk.ctl, blk.meter_x, blk.meter_words, vq, np.ones((8, 1), dtype=np.int16), 8)
        assert int(blk.ctl[S.C_MRING_HEAD]) == 0 and int(blk.ctl[S.C_MRING_DROPPED]) == 0


def _offline_report(settings, x):
    """What ``rtstage render --report`` measures: MeterBank on the engine's words, with its exact counters."""
    engine = Engine(settings, x.shape[1], SR)
    words = engine.process(x)
    bank = MeterBank.for_engine(engine)
    bank.update(x * (10.0 ** (settings.gain_db / 20.0)), words)
    bank.set_engine_counts(engine.clipped, engine.nonfinite)
    return json.loads(json.dumps(json_ready(bank.report()))), engine


def _run_live(server, tmp_path, x, settings, blocksize):
    path = str(tmp_path / "src.wav")
    sf.write(path, x, SR, subtype="DOUBLE")
    status_path = str(tmp_path / "status.json")
    cmd = [sys.executable, "-m", "rtstage", "run", "--source", path, "--bits", str(settings.bits), "--dither",
           settings.dither, "--shaper", settings.shaper, "--seed", str(settings.seed), "--blocksize", str(blocksize),
           "--status-file", status_path, "--control-port", "0"]
    result = subprocess.run(cmd, env=server.client_env(), cwd=ROOT, capture_output=True, text=True, timeout=240)
    assert result.returncode == 0, result.stderr
    return json.load(open(status_path))


@pytest.mark.parametrize("period_frames,bits,shaper", [(64, 16, "lvw-e5"), (256, 12, "wannamaker-f9")])
def test_live_report_equals_offline_report(jack_server_factory, tmp_path, period_frames, bits, shaper):
    # A noise source offset by +0.3 so that some samples clip: the counts are compared too.
    x = generate("noise:level_dbfs=-3,seed=8", SR, 2, 0, 70000) + 0.3
    settings = EngineSettings(bits=bits, dither="tpdf", shaper=shaper, seed=11)
    server = jack_server_factory(samplerate=SR, period_frames=period_frames)
    status = _run_live(server, tmp_path, x, settings, period_frames)
    live = status["meters"]
    offline, engine = _offline_report(settings, x)
    # Exact: the kernel's meter tap is x·gain bit for bit, the words are the render's, and every MeterBank
    # figure is independent of how the signal is split (4096-frame chunks here, one block offline).
    assert {k: v for k, v in live.items() if k not in LIVE_ONLY_KEYS} == offline
    assert live["meter_dropped_frames"] == 0 and live["frame"] == x.shape[0]
    assert live["clipped"] == engine.clipped.tolist() and sum(live["clipped"]) > 0
    for key in ("xruns", "cpu_load", "cpu_load_max"):
        assert key in live


class TestDisplay:
    def test_bar_cells_follow_the_level(self):
        # -20 dBFS on a 0..-80 dBFS bar of 40 cells: 30 cells; peak -10 dBFS: 35 cells.
        bar = level_bar(-20.0, -10.0, width=40, floor_dbfs=-80.0)
        assert bar == "[" + "=" * 30 + "+" * 5 + "." * 5 + "]"
        assert level_bar(None, None, clipped=True, width=10) == "[" + "." * 9 + "!]"

    def test_offline_snapshot_renders_without_colour(self):
        x = 0.1 * np.sin(2 * np.pi * 997 / SR * np.arange(20000))[:, None].repeat(2, axis=1)
        report, _ = _offline_report(EngineSettings(bits=16, dither="tpdf", seed=1), x)
        snap = dict(report, frame=20000, peak_dbfs=[-20.0, -20.0], rms_dbfs=[-23.0, -23.0], clipped=[0, 0],
                    nonfinite=[0, 0], cpu_load=0.05, xruns=0)
        text = render_text(snap)
        assert "\x1b" not in text
        assert text.count("[") >= 2 and "shaper" in text
        line = status_line(snap)
        assert "\n" not in line and "clip 0" in line


def test_watch_prints_the_socket_meter_frames():
    from rtstage.control.target import sine_block  # noqa: F401  (the stack's driver plays this sine)
    from rtstage.control.testing import control_stack

    with control_stack(driver=True) as stack:
        result = subprocess.run([sys.executable, "-m", "rtstage", "watch", "--port", str(stack.server.port), "--json",
                                 "--duration", "2.5", "--rate-hz", "20"], cwd=ROOT, capture_output=True, text=True,
                                timeout=60)
    assert result.returncode == 0, result.stderr
    frames = [json.loads(line) for line in result.stdout.splitlines()]
    assert len(frames) >= 10
    assert all(b["frame"] >= a["frame"] for a, b in zip(frames, frames[1:]))
    # The driver plays a -20 dBFS (AES17) sine: its peak reads -20 dBFS, give or take the 16-bit dither (< 0.01 dB)
    # and the block's sampling of the crest (997 Hz at 48 kHz over 256 frames: within 0.05 dB).
    peaks = [p for f in frames for p in f["peak_dbfs"] if p is not None]
    assert peaks and all(abs(p + 20.0) < 0.1 for p in peaks)
    # Without a terminal the display prints status lines on stderr, about one a second.
    assert sum(line.startswith("rtstage: meters") for line in result.stderr.splitlines()) >= 1
