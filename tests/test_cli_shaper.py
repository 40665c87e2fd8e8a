"""Tests of the ``rtstage shaper`` subcommand (list, design, plot), run in-process through rtstage.cli.main.

Figures printed by the command are checked against scipy.signal.freqz and
numpy, not against rtstage's own analysis functions.
"""

import json

import numpy as np
import pytest
import scipy.signal as ss
from numpy.testing import assert_allclose

from rtstage import Engine, EngineSettings
from rtstage.cli import main
from rtstage.shapers import BUILTIN_SHAPERS, get_shaper, preset_shapers


def run(capsys, *argv):
    status = main(list(argv))
    out = capsys.readouterr()
    return status, out.out, out.err


class TestList:
    def test_json_lists_every_shaper_with_reference_figures(self, capsys):
        status, out, _ = run(capsys, "shaper", "list", "--json")
        assert status == 0
        rows = {r["id"]: r for r in json.loads(out)}
        assert set(BUILTIN_SHAPERS) | set(preset_shapers()) <= set(rows)
        for sid in ("wannamaker-f9", "lvw-e5", "thr9-96k"):
            shaper = get_shaper(sid)
            r = rows[sid]
            b = shaper.ntf_b
            rate = shaper.design_samplerate_hz
            # DC gain |Σ b_k|, Nyquist gain |Σ (-1)^k b_k|, noise-power gain Σ b_k² (Parseval), numpy.
            assert_allclose(r["dc_gain_db"], 20 * np.log10(abs(b.sum())), atol=1e-6)
            assert_allclose(r["nyquist_gain_db"], 20 * np.log10(abs(np.sum(b * (-1.0) ** np.arange(b.size)))), atol=1e-6)
            assert_allclose(r["noise_gain_db"], 10 * np.log10(np.sum(b**2)), atol=1e-9)
            # Deepest notch from scipy.signal.freqz on a fine grid.
            freqs, h = ss.freqz(b, worN=1 << 15, fs=rate)
            assert_allclose(r["min_gain_db"], 20 * np.log10(np.abs(h).min()), atol=0.05)
            assert abs(r["min_gain_hz"] - freqs[np.argmin(np.abs(h))]) < 20.0
            # Gerzon & Craven: the published and designed sets are minimum phase with 0 dB log-mean.
            assert r["minimum_phase"] is True and abs(r["log_mean_db"]) < 1e-6
            # TPDF: |e| <= 1.5 LSB (Lipshitz, Wannamaker & Vanderkooy 1992), times the NTF's L1 norm.
            assert_allclose(r["headroom_tpdf_lsb"], 1.5 * np.sum(np.abs(b)), rtol=1e-12)

    def test_text_table(self, capsys):
        status, out, _ = run(capsys, "shaper", "list")
        assert status == 0
        lines = out.splitlines()
        assert lines[0].split()[0] == "id"
        ids = {line.split()[0] for line in lines[1:]}
        assert {"flat", "wannamaker-f9", "thr9-44k1", "thr24-192k"} <= ids


class TestDesign:
    def test_save_and_render_with_the_preset(self, capsys, tmp_path):
        path = tmp_path / "mine.toml"
        status, out, err = run(
            capsys, "shaper", "design", "--samplerate", "48000", "--taps", "9", "--weighting", "threshold",
            "--max-gain-db", "18", "--id", "mine9", "--save", str(path), "--json",
        )
        assert status == 0
        assert "saved" in err
        result = json.loads(out)
        shaper = get_shaper(str(path))
        assert shaper.id == "mine9" and list(shaper.coefs) == result["coefs"]
        _, h = ss.freqz(shaper.ntf_b, worN=1 << 15)  # scipy.signal.freqz as reference
        assert 20 * np.log10(np.abs(h).max()) <= 18.01
        # Usable by the engine (what render and run drive).
        engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper=str(path), seed=3), 2, 48000)
        words = engine.process(np.zeros((256, 2)))
        assert words.dtype == np.int16 and np.any(words != 0)

    def test_table_weighting(self, capsys, tmp_path):
        table = tmp_path / "ear.txt"
        table.write_text("50 -30\n1000 0\n3500 8\n12000 -20\n18000 -45\n")
        status, out, _ = run(capsys, "shaper", "design", "--samplerate", "44100", "--taps", "12", "--table", str(table), "--json")
        assert status == 0
        result = json.loads(out)
        b = np.concatenate(([1.0], -np.asarray(result["coefs"])))
        freqs, h = ss.freqz(b, worN=8192, fs=44100)
        # The table's most audible region (3.5 kHz) gets the least noise (Gerzon & Craven: |NTF|² ~ 1/W).
        assert 2000.0 <= freqs[np.argmin(np.abs(h))] <= 5500.0
        assert np.max(np.abs(np.roots(b))) < 1.0

    @pytest.mark.parametrize(
        "extra,words",
        [
            (["--max-gain-db", "-2"], "impossible"),
            (["--max-noise-gain-db", "-1"], "impossible"),
            (["--weighting", "table"], "--table"),
        ],
    )
    def test_impossible_request_fails_with_one_line(self, capsys, extra, words):
        status, out, err = run(capsys, "shaper", "design", "--samplerate", "48000", "--taps", "9", *extra)
        assert status == 2 and out == ""
        assert err.startswith("rtstage: ") and words in err and err.count("\n") == 1


class TestPlot:
    def test_json_matches_freqz(self, capsys):
        status, out, _ = run(capsys, "shaper", "plot", "lvw-e5", "--json", "--points", "64")
        assert status == 0
        data = json.loads(out)
        assert data["samplerate_hz"] == 44100.0
        _, h = ss.freqz(BUILTIN_SHAPERS["lvw-e5"].ntf_b, worN=np.asarray(data["freqs_hz"]), fs=44100)
        assert_allclose(data["gain_db"], 20 * np.log10(np.abs(h)), atol=1e-9)

    def test_text_rows(self, capsys):
        status, out, _ = run(capsys, "shaper", "plot", "thr9-96k", "--points", "16")
        assert status == 0
        rows = np.array([[float(v) for v in line.split()] for line in out.splitlines() if not line.startswith("#")])
        assert rows.shape == (17, 2) and rows[-1, 0] == 48000.0
        _, h = ss.freqz(get_shaper("thr9-96k").ntf_b, worN=rows[:, 0], fs=96000)
        assert_allclose(rows[:, 1], 20 * np.log10(np.abs(h)), atol=1e-3)

    def test_png(self, capsys, tmp_path):
        path = tmp_path / "ntf.png"
        status, _, _ = run(capsys, "shaper", "plot", "thr24-96k", "--png", str(path))
        assert status == 0
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)

    def test_unknown_shaper(self, capsys):
        status, _, err = run(capsys, "shaper", "plot", "no-such-shaper")
        assert status == 2 and "unknown shaper" in err
