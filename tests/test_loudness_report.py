"""Loudness in the meter report, the live display and the target verdict."""

import numpy as np
import pytest

from rtstage import Engine, EngineSettings
from rtstage.live.display import render_text, status_line
from rtstage.meters import MeterBank
from rtstage.meters.loudness import LoudnessMeter, parse_target


def _tone(level_dbfs, seconds, samplerate=48000):
    n = int(seconds * samplerate)
    tone = 10 ** (level_dbfs / 20) * np.sin(2 * np.pi * 1000 / samplerate * np.arange(n))
    return np.stack([tone, tone], axis=1)


def test_report_carries_the_output_loudness_and_verdict():
    # EBU Tech 3341 case 1 (stereo 1 kHz at -23 dBFS peak reads -23.0 +- 0.1 LUFS, from memory),
    # requantized to 16 bits: the report's loudness is that of the output words.
    engine = Engine(EngineSettings(bits=16, dither="tpdf", seed=3), channels=2, samplerate=48000)
    bank = MeterBank.for_engine(engine, loudness_target=parse_target("ebu-r128"))
    x = _tone(-23.0, 10.0)
    for start in range(0, x.shape[0], 4096):
        block = x[start:start + 4096]
        bank.update(block, engine.process(block))
    loud = bank.report()["loudness"]
    assert loud["integrated_lufs"] == pytest.approx(-23.0, abs=0.1)
    assert loud["true_peak_dbtp"] == pytest.approx(-23.0, abs=0.1)
    assert loud["target"]["pass"] is True
    # The same figure as a standalone meter on the output words (scaled to full-scale units).
    engine2 = Engine(EngineSettings(bits=16, dither="tpdf", seed=3), channels=2, samplerate=48000)
    meter = LoudnessMeter(2, 48000)
    meter.update(engine2.process(x).astype(np.float64) / 32768.0)
    assert loud["integrated_lufs"] == meter.integrated()["integrated_lufs"]


def test_target_fails_when_too_loud_and_display_says_so():
    engine = Engine(EngineSettings(bits=16, dither="tpdf", seed=3), channels=2, samplerate=48000)
    bank = MeterBank.for_engine(engine, loudness_target=parse_target("-30:1:-20"))
    x = _tone(-20.0, 5.0)
    bank.update(x, engine.process(x))
    snap = bank.report()
    snap.update({"peak_dbfs": [-20.0, -20.0], "rms_dbfs": [-23.0, -23.0], "frame": x.shape[0]})
    text = render_text(snap)
    assert "loudness LUFS" in text and "FAIL (integrated_lufs, true_peak_dbtp)" in text
    assert "FAIL" in status_line(snap)


def test_handed_over_meter_continues_the_programme():
    engine = Engine(EngineSettings(bits=16, dither="tpdf", seed=3), channels=2, samplerate=48000)
    first = MeterBank.for_engine(engine)
    x = _tone(-23.0, 4.0)
    first.update(x, engine.process(x))
    second = MeterBank.for_engine(engine, loudness_meter=first.loudness_meter)
    second.update(x, engine.process(x))
    assert second.report()["loudness"]["duration_s"] == pytest.approx(8.0)


def test_programmes_are_measured_apart():
    # Two programmes back to back, EBU Tech 3341 case 1 tone at -23 dBFS then the same at -30:
    # each reads its own level (+-0.1 LU, the Tech's tolerance).
    engine = Engine(EngineSettings(bits=16, dither="tpdf", seed=3), channels=2, samplerate=48000)
    bank = MeterBank.for_engine(engine)
    first, second = _tone(-23.0, 5.0), _tone(-30.0, 5.0)
    bank.update(first, engine.process(first))
    bank.loudness_meter.new_programme("late news")
    bank.update(second, engine.process(second))
    loud = bank.report()["loudness"]
    assert loud["programme"] == 2 and loud["programme_label"] == "late news"
    assert loud["integrated_lufs"] == pytest.approx(-30.0, abs=0.1)
    assert [round(p["integrated_lufs"], 1) for p in loud["programmes"]] == [-23.0]
