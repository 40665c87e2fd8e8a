"""Automation files: format, timing, and re-rendering a live session bit for bit from its log.

The reference for timing is the kernel's documented quantizer: with ``bits`` =
B in a 16-bit container the word is ``q << (16 - B)``, so from the frame a
change to 8 bits takes effect every word has its 8 low bits zero, and before
it (16 bits, TPDF dither on a -20 dBFS tone) almost none do.
"""

import json
import time

import numpy as np
import pytest

from rtstage import params
from rtstage.control.automation import AutomationPlayer, AutomationWriter, load_automation, process_with_automation
from rtstage.control.target import sine_block
from rtstage.control.testing import control_stack
from rtstage.engine import Engine, EngineSettings
from rtstage.errors import RtstageError

SETTINGS = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=77)


def write_lines(path, lines):
    path.write_text("".join((line if isinstance(line, str) else json.dumps(line)) + "\n" for line in lines))
    return str(path)


class TestFormat:
    def test_writer_round_trip(self, tmp_path):
        path = str(tmp_path / "log.jsonl")
        with AutomationWriter(path, 48000) as w:
            w.write(512, {"bits": 12})
            w.write(1024, {"dither": "rpdf", "gain_db": -3.0})
        assert load_automation(path) == [(512, {"bits": 12}), (1024, {"dither": "rpdf", "gain_db": -3.0})]
        assert load_automation(path, samplerate=48000)[0] == (512, {"bits": 12})

    def test_at_s_uses_render_rate(self, tmp_path):
        path = write_lines(tmp_path / "a.jsonl", ["# comment", "", {"at_s": 0.5, "values": {"bits": 10}},
                                                  {"at_frame": 3, "values": {"mute": True}}])
        assert load_automation(path, samplerate=44100) == [(3, {"mute": True}), (22050, {"bits": 10})]

    def test_sorted_stable(self, tmp_path):
        path = write_lines(tmp_path / "a.jsonl", [{"at_frame": 10, "values": {"bits": 9}},
                                                  {"at_frame": 5, "values": {"bits": 8}},
                                                  {"at_frame": 10, "values": {"bits": 7}}])
        assert [e[1]["bits"] for e in load_automation(path)] == [8, 9, 7]

    @pytest.mark.parametrize(
        "lines, reason",
        [
            (["{not json"], "line 1: not valid JSON"),
            (["[1]"], "expected a JSON object"),
            ([{"at_frame": 1}], "values must be a non-empty object"),
            ([{"values": {"bits": 8}}], "exactly one of at_frame and at_s"),
            ([{"at_frame": 1, "at_s": 0, "values": {"bits": 8}}], "exactly one"),
            ([{"at_frame": -1, "values": {"bits": 8}}], "non-negative integer"),
            ([{"at_frame": 1.5, "values": {"bits": 8}}], "non-negative integer"),
            ([{"at_s": -1, "values": {"bits": 8}}], "non-negative number"),
            ([{"at_s": 1, "values": {"bits": 8}}], "needs a sample rate"),
            (["# c", {"at_frame": 1, "values": {"bits": 99}}], "line 2: bits must be between"),
            ([{"at_frame": 1, "values": {"nope": 1}}], "unknown parameter"),
            ([{"at_frame": 1, "when": 2, "values": {"bits": 8}}], "unknown key"),
            ([{"rtstage_automation": 2}], "format version"),
            ([{"rtstage_automation": 1, "samplerate": 48000}], "render runs at 44100"),
        ],
    )
    def test_errors_name_the_line(self, tmp_path, lines, reason):
        path = write_lines(tmp_path / "bad.jsonl", lines)
        with pytest.raises(RtstageError, match=reason):
            load_automation(path, samplerate=44100 if "render runs" in reason else None)

    def test_unreadable(self, tmp_path):
        with pytest.raises(RtstageError, match="cannot read"):
            load_automation(str(tmp_path / "missing.jsonl"))


class TestPlayer:
    def test_segments(self):
        player = AutomationPlayer([(0, {"bits": 8}), (100, {"bits": 9}), (100, {"dither": "rpdf"}), (250, {"bits": 10})])
        assert player.segments(0, 200) == [(0, 100, {"bits": 8}), (100, 100, {"bits": 9, "dither": "rpdf"})]
        assert player.segments(200, 0) == []
        assert player.segments(200, 100) == [(0, 50, None), (50, 50, {"bits": 10})]
        assert player.pending == 0

    def test_matches_a_split_run(self):
        # Reference: the same engine driven by hand, split exactly at the change frames.
        x = sine_block(0, 4000, 2, 48000, level_dbfs=-6.0)
        events = [(1000, {"bits": 8}), (1700, {"gain_db": -12.0}), (3001, {"dither": "rpdf", "shaper": "flat"})]
        by_hand = Engine(SETTINGS, 2, 48000)
        parts = []
        bounds = [0, 1000, 1700, 3001, 4000]
        for i in range(4):
            if i:
                by_hand.apply(params.settings_with(by_hand.settings, events[i - 1][1]))
            parts.append(by_hand.process(x[bounds[i]:bounds[i + 1]]))
        reference = np.concatenate(parts)
        engine = Engine(SETTINGS, 2, 48000)
        player = AutomationPlayer(events)
        out = np.concatenate([process_with_automation(engine, x[i:i + 333], player) for i in range(0, 4000, 333)])
        np.testing.assert_array_equal(out, reference)


def test_live_session_rerenders_bit_for_bit_from_its_log(tmp_path):
    """Changes sent over TCP to a running engine, logged, then rendered offline: identical words."""
    log_path = str(tmp_path / "session.jsonl")
    writer = AutomationWriter(log_path, 48000)
    try:
        with control_stack(settings=SETTINGS, driver=True, automation_log=writer, logger=lambda m: None) as stack:
            with stack.client() as c:
                for values in ({"bits": 8}, {"gain_db": -9.5}, {"shaper": "lvw-e5", "bits": 12}, {"mute": True}):
                    while stack.engine.frame < 2048:
                        time.sleep(0.005)
                    assert c.request({"op": "set", "values": values})["ok"]
                    time.sleep(0.03)
            frame = stack.engine.frame
            while stack.engine.frame < frame + 2048:
                time.sleep(0.005)
            stack.driver.stop()
            tap = np.concatenate(stack.driver.tap)
            applied = list(stack.target.applied)
    finally:
        writer.close()
    events = load_automation(log_path, samplerate=48000)
    assert [(f, v) for f, v, _ in applied] == events and len(events) == 4

    # the first change (8 bits) shows in the tap exactly at its logged frame
    f8 = events[0][0]
    low_bits = tap & 0xFF
    assert np.all(low_bits[f8:events[1][0]] == 0)
    assert np.count_nonzero(low_bits[f8 - 256:f8]) > 256  # 16-bit words before it

    engine = Engine(SETTINGS, 2, 48000)
    player = AutomationPlayer(events)
    x = sine_block(0, len(tap), 2, 48000)
    rerender = np.concatenate([process_with_automation(engine, x[i:i + 1000], player) for i in range(0, len(tap), 1000)])
    np.testing.assert_array_equal(rerender, tap)
