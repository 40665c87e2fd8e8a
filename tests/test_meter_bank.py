"""MeterBank: documented report keys, block-split invariance, counts against the engine, bit activity, JSON."""

import json
import os

import numpy as np
import pytest

from rtstage import Engine, EngineSettings
from rtstage.meters import CHANNEL_KEYS, MeterBank, write_report
from rtstage.meters.report import json_ready

SAMPLERATE = 48000
READING_KEYS = {"unweighted", "a_weighted", "itu468"}


def _engine(**settings):
    settings.setdefault("seed", 5)
    return Engine(EngineSettings(**settings), channels=2, samplerate=SAMPLERATE)


def _program(nframes, level=0.3, seed=0):
    rng = np.random.default_rng(seed)
    n = np.arange(nframes)
    left = level * np.sin(2 * np.pi * 1234.5 / SAMPLERATE * n)
    right = level * 0.3 * rng.standard_normal(nframes)
    return np.stack([left, right], axis=1)


def _metered(engine, x, blocks):
    bank = MeterBank.for_engine(engine)
    engine.state.reset(0)
    for a, b in blocks:
        bank.update(x[a:b], engine.process(x[a:b]))
    return bank


def test_report_has_the_documented_keys():
    # docs/meters.md lists the per-channel keys; the three readings in each noise dict.
    engine = _engine(bits=16, dither="tpdf", shaper="wannamaker-f9")
    x = _program(20000)
    bank = _metered(engine, x, [(0, x.shape[0])])
    report = bank.report()
    assert len(report["channels"]) == 2
    for channel in report["channels"]:
        assert set(CHANNEL_KEYS) <= set(channel)
        assert set(channel["added_noise_dbfs"]) == READING_KEYS
        assert set(channel["predicted_noise_dbfs"]) == READING_KEYS
        assert len(channel["error_spectrum_dbfs"]) == len(report["error_spectrum_bands_hz"])
    assert report["samplerate"] == SAMPLERATE and report["bits"] == 16 and report["dither"] == "tpdf"


def test_any_block_split_gives_the_same_report():
    # The requirement: final figures independent of the split (zero-frame blocks included).
    # Every accumulator sums in signal order, so the reports are equal exactly, not approximately.
    engine = _engine(bits=16, dither="tpdf", shaper="lvw-e5")
    x = _program(50000, seed=1)
    rng = np.random.default_rng(2)
    cuts = np.sort(np.concatenate((rng.integers(0, x.shape[0], 30), [0, 0, 8192, 8192, 16384])))
    edges = np.concatenate(([0], cuts, [x.shape[0]]))
    reference = _metered(engine, x, [(0, x.shape[0])]).report()
    for blocks in (list(zip(edges[:-1], edges[1:])), [(a, min(a + 64, x.shape[0])) for a in range(0, x.shape[0], 64)]):
        assert _metered(engine, x, blocks).report() == reference


def test_clipped_and_nonfinite_match_the_engine():
    # The kernel's clip rule without dither and shaping (rtstage/kernel.py): a sample clips when
    # its input is more than half a step beyond the range; non-finite inputs are counted.
    engine = _engine(bits=16, dither="none", gain_db=6.0)
    x = _program(10000, level=0.9)
    x[100, 0] = np.nan
    x[200, 1] = np.inf
    x[300, 1] = -np.inf
    words = engine.process(x)
    bank = MeterBank.for_engine(engine)
    bank.update(x * 10 ** (6 / 20), words)  # the quantizer's input: after gain
    channels = bank.report()["channels"]
    assert [c["clipped_samples"] for c in channels] == list(engine.clipped)
    assert [c["nonfinite_samples"] for c in channels] == list(engine.nonfinite) == [1, 2]
    assert channels[0]["clipped_samples"] > 0
    bank.set_engine_counts([7, 8], [1, 2])
    assert [c["clipped_samples"] for c in bank.report()["channels"]] == [7, 8]


def test_peaks_of_input_and_output():
    # Sample peak = 20·log10(max|x|) (definition); output words are q·Q, Q = 2^-15.
    engine = _engine(bits=16, dither="tpdf")
    x = _program(30000, level=0.5)
    words = engine.process(x)
    bank = MeterBank.for_engine(engine)
    bank.update(x, words)
    channels = bank.report()["channels"]
    for c, channel in enumerate(channels):
        assert channel["input_sample_peak_dbfs"] == pytest.approx(20 * np.log10(np.abs(x[:, c]).max()), abs=1e-12)
        assert channel["sample_peak_dbfs"] == pytest.approx(20 * np.log10(np.abs(words[:, c].astype(float)).max() / 32768), abs=1e-12)
        assert channel["true_peak_dbtp"] >= channel["sample_peak_dbfs"]


def test_bit_activity_exposes_truncation_and_container():
    # Two's-complement words (common practice): a dithered 16-bit signal toggles all 16 bits; a
    # downstream stage that truncates to 14 bits leaves the 2 low bits stuck at 0; a 16-bit word
    # left-justified in a 32-bit container shows 16 stuck low bits and an effective length of 16.
    engine = _engine(bits=16, dither="tpdf")
    x = _program(20000)
    words = engine.process(x)
    bank = MeterBank.for_engine(engine)
    bank.update(x, words)
    channel = bank.report()["channels"][0]
    assert (channel["active_bits"], channel["effective_bits"], channel["bit_pattern"]) == (16, 16, "*" * 16)

    truncated = MeterBank.for_engine(engine)
    truncated.update(x, words & np.int16(~0b11))
    channel = truncated.report()["channels"][0]
    assert (channel["active_bits"], channel["effective_bits"], channel["bit_pattern"]) == (14, 14, "*" * 14 + "00")

    wide = Engine(EngineSettings(bits=16, dither="tpdf", seed=5), channels=2, samplerate=SAMPLERATE, format_bits=24)
    bank = MeterBank.for_engine(wide)
    bank.update(x, wide.process(x))
    channel = bank.report()["channels"][0]
    assert bank.report()["container_bits"] == 32
    assert (channel["active_bits"], channel["effective_bits"]) == (16, 16)
    assert channel["bit_pattern"] == "*" * 16 + "0" * 16


def test_write_report_is_strict_json_and_atomic(tmp_path):
    # RFC 8259 JSON has no NaN/Infinity: an empty bank's undefined figures must be null.
    engine = _engine(bits=16, dither="tpdf")
    bank = MeterBank.for_engine(engine)
    bank.update(np.zeros((0, 2)), np.zeros((0, 2), np.int16))
    report = bank.report()
    assert report["channels"][0]["sample_peak_dbfs"] is None
    assert report["channels"][0]["added_noise_dbfs"]["unweighted"] is None
    path = tmp_path / "report.json"
    write_report(path, report)
    text = path.read_text()
    assert json.loads(text, parse_constant=lambda name: pytest.fail(f"non-JSON constant {name}")) == json_ready(report)
    assert os.listdir(tmp_path) == ["report.json"]


def test_error_spectrum_follows_predicted_ntf():
    # Gerzon & Craven 1989: added-noise PSD = σ²|NTF|²; third-octave bands from 1 kHz up hold many
    # FFT bins and segments, so measured and predicted agree within 0.5 dB.
    engine = _engine(bits=16, dither="tpdf", shaper="wannamaker-f9")
    x = _program(1 << 18, level=0.1)
    bank = _metered(engine, x, [(0, x.shape[0])])
    report = bank.report()
    centres = np.array(report["error_spectrum_bands_hz"])
    measured = np.array(report["channels"][0]["error_spectrum_dbfs"], dtype=float)
    predicted = np.array(report["predicted_spectrum_dbfs"], dtype=float)
    keep = centres >= 1000
    assert np.all(np.abs(measured[keep] - predicted[keep]) < 0.5)


def test_render_observer_meters_the_file(tmp_path):
    # End to end through rtstage.render_file: the observer sees the raw input, applies the
    # engine's gain, and the report's output peak is that of the written 16-bit file (numpy
    # reference); 16-bit flat TPDF reads its prediction (LWV 1992, Q²/4) within 0.2 dB.
    import soundfile as sf

    from rtstage.render import render_file

    n = np.arange(1 << 17)
    x = np.stack([0.5 * np.sin(2 * np.pi * 997.0 / SAMPLERATE * n)] * 2, axis=1)
    src, dst = tmp_path / "in.wav", tmp_path / "out.wav"
    sf.write(src, x, SAMPLERATE, subtype="DOUBLE")
    settings = EngineSettings(bits=16, dither="tpdf", seed=3, gain_db=-3.0)
    banks = []

    def observer(block, words, engine):
        if not banks:
            banks.append(MeterBank.for_engine(engine))
        banks[0].observe(block, words, engine)

    result = render_file(str(src), str(dst), settings, blocksize=1000, observers=(observer,), meters=MeterBank.for_engine)
    engine = result.engine
    report = banks[0].report()
    # The kernel's meter tap (x·gain as the quantizer saw it) gives the same report as the observer's x·gain.
    assert result.meter.report() == report
    written, _ = sf.read(dst, dtype="int16", always_2d=True)
    for c, channel in enumerate(report["channels"]):
        assert channel["sample_peak_dbfs"] == pytest.approx(20 * np.log10(np.abs(written[:, c].astype(float)).max() / 32768), abs=1e-12)
        assert channel["input_sample_peak_dbfs"] == pytest.approx(20 * np.log10(0.5) - 3.0, abs=0.01)
        assert channel["clipped_samples"] == engine.clipped[c] == 0
        for key, diff in channel["noise_difference_db"].items():
            assert abs(diff) < 0.2, key


def test_headroom_histogram_and_modulation_bins_in_the_report():
    # The bank's headroom figures are design.headroom_lsb / headroom_dbfs (the engine's authority); its
    # error histogram holds every sample, inside the range that bound allows; the noise-modulation bins
    # are the means the reading is made from (10·log10(max/min) of them).
    from rtstage import design
    from rtstage.shapers import get_shaper

    shaper = get_shaper("wannamaker-f9")
    x = np.random.default_rng(4).uniform(-0.5, 0.5, (1 << 16, 2))
    engine = Engine(EngineSettings(bits=12, dither="tpdf", shaper=shaper, seed=9), 2, SAMPLERATE)
    vq = np.empty_like(x)
    words = engine.process(x, quantizer_in=vq)
    bank = MeterBank.for_engine(engine, modulation_min_samples=100)
    bank.update(vq, words)
    report = bank.report()
    assert report["shaped_error_headroom_lsb"] == design.headroom_lsb(shaper, "tpdf")
    assert report["peak_limit_dbfs"] == pytest.approx(design.headroom_dbfs(shaper, "tpdf", 12))
    for ch in report["channels"]:
        hist = ch["error_histogram"]
        assert sum(hist["counts"]) == x.shape[0] and hist["outside"] == 0
        assert len(hist["edges_lsb"]) == len(hist["counts"]) + 1
        bins = np.array([b for b in ch["noise_modulation_bins_lsb2"] if b is not None])
        assert ch["noise_modulation_db"] == pytest.approx(10 * np.log10(bins.max() / bins.min()))
        # -6 dBFS programme: far below the limit 12-bit f9 shaping leaves.
        assert ch["headroom_exceeded"] is False
    hot = MeterBank.for_engine(engine)
    hot.update(np.full((64, 2), 0.999), np.zeros((64, 2), dtype=np.int16))
    assert all(ch["headroom_exceeded"] for ch in hot.report()["channels"])
