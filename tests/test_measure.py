"""rtstage measure: bits, low-bit verdict, peaks, DC, noise floor and loudness of files made with numpy."""

import json

import numpy as np
import pytest
import soundfile as sf

from rtstage.cli import main
from rtstage.meters.measure import measure_file

FS = 48000


def programme(seconds_loud=3.0, seconds_fade=3.0, level=0.3, floor=1e-7):
    """A 440 Hz tone, held and then faded exponentially to ``floor`` (full-scale units)."""
    n1, n2 = int(seconds_loud * FS), int(seconds_fade * FS)
    env = np.concatenate([np.full(n1, level), np.geomspace(level, floor, n2)])
    x = env * np.sin(2 * np.pi * 440 / FS * np.arange(n1 + n2))
    return np.stack([x, 0.5 * x], axis=1)


def tpdf_16(x, seed=1):
    # Textbook TPDF requantization with numpy (sum of two uniform variates, one step each).
    rng = np.random.default_rng(seed)
    d = rng.uniform(-0.5, 0.5, x.shape) + rng.uniform(-0.5, 0.5, x.shape)
    return np.clip(np.round(x * 32768 + d), -32768, 32767).astype(np.int16)


@pytest.fixture
def files(tmp_path):
    x = programme()
    paths = {}
    paths["dithered"] = str(tmp_path / "dithered.wav")
    sf.write(paths["dithered"], tpdf_16(x), FS, subtype="PCM_16")
    paths["truncated"] = str(tmp_path / "truncated.wav")
    sf.write(paths["truncated"], np.floor(x * 32768).astype(np.int16), FS, subtype="PCM_16")
    paths["padded"] = str(tmp_path / "padded.wav")
    sf.write(paths["padded"], tpdf_16(x).astype(np.int32) << 16, FS, subtype="PCM_24")
    rng = np.random.default_rng(3)
    paths["untouched"] = str(tmp_path / "untouched.wav")
    sf.write(paths["untouched"], x + rng.normal(0, 10 ** (-110 / 20), x.shape), FS, subtype="PCM_24")
    loud = 0.5 * rng.uniform(-1, 1, (FS * 4, 2))
    paths["loud"] = str(tmp_path / "loud.wav")
    sf.write(paths["loud"], tpdf_16(loud), FS, subtype="PCM_16")
    return paths


def test_low_bits_verdicts(files):
    # Rules of thumb (common practice), on files whose history numpy made: see rtstage/meters/measure.py.
    assert measure_file(files["dithered"])["channels"][0]["low_bits"] == "dithered"
    assert measure_file(files["truncated"])["channels"][0]["low_bits"] == "truncated"
    assert measure_file(files["untouched"])["channels"][0]["low_bits"] == "untouched"
    assert measure_file(files["loud"])["channels"][0]["low_bits"] == "undetermined"


def test_bits_of_a_16_bit_word_in_a_24_bit_container(files):
    ch = measure_file(files["padded"])["channels"][0]
    assert (ch["active_bits"], ch["effective_bits"]) == (16, 16)
    assert ch["bit_pattern"] == "*" * 16 + "0" * 8
    assert ch["low_bits"] == "dithered" and "low 8 bits" in ch["low_bits_reason"]


def test_peaks_dc_and_loudness_against_numpy_and_pyloudnorm(files):
    import pyloudnorm

    report = measure_file(files["dithered"])
    words, _ = sf.read(files["dithered"], dtype="int16", always_2d=True)
    x = words / 32768.0
    for c, ch in enumerate(report["channels"]):
        assert ch["sample_peak_dbfs"] == pytest.approx(20 * np.log10(np.abs(x[:, c]).max()), abs=1e-9)  # numpy
        assert ch["true_peak_dbtp"] >= ch["sample_peak_dbfs"]
        assert ch["dc_offset"] == pytest.approx(x[:, c].mean(), abs=1e-12)  # numpy
    # pyloudnorm (general-purpose BS.1770-4 reference), to 0.1 LU.
    assert report["loudness"]["integrated_lufs"] == pytest.approx(pyloudnorm.Meter(FS).integrated_loudness(x), abs=0.1)
    assert report["frames"] == x.shape[0] and report["container_bits"] == 16


def test_noise_floor_of_the_dithered_fade(files):
    # TPDF leaves Q^2/4 of noise power (Lipshitz, Wannamaker & Vanderkooy 1992): at 16 bits
    # 10*log10(2 * 2^-30 / 4) = -93.3 dBFS (AES17); the quietest tenth of the fade sits near it.
    floor = measure_file(files["dithered"])["channels"][0]["noise_floor_dbfs"]
    assert -95.0 < floor < -85.0


def test_measure_command_report_json_plot_and_target(files, tmp_path, capsys):
    report_path = tmp_path / "m.json"
    status = main(["measure", files["dithered"], "--report", str(report_path), "--json", "--quiet",
                   "--plot", str(tmp_path / "plots"), "--loudness-target=-10:0.5"])
    out = json.loads(capsys.readouterr().out)
    assert status == 1  # a -10 LUFS target fails for this quiet file
    assert out["loudness"]["target"]["pass"] is False
    assert json.loads(report_path.read_text()) == out
    assert sorted(p.name for p in (tmp_path / "plots").iterdir()) == ["levels.png", "loudness.png"]
    assert main(["measure", files["dithered"], "--quiet"]) == 0


def test_missing_file_is_one_line(tmp_path, capsys):
    assert main(["measure", str(tmp_path / "none.wav")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("rtstage: cannot read") and err.count("\n") == 1


def test_report_command_reads_a_measure_report(files, tmp_path, capsys):
    path = str(tmp_path / "m.json")
    assert main(["measure", files["dithered"], "--report", path, "--quiet"]) == 0
    capsys.readouterr()
    assert main(["report", path]) == 0
    assert "low bits: dithered" in capsys.readouterr().out
    assert main(["report", path, "--plot", str(tmp_path / "p")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("rtstage: ") and err.count("\n") == 1


def test_outputs_follow_the_output_policy(files, tmp_path, capsys):
    # An existing report is kept unless --overwrite; the input itself is never an output.
    path = tmp_path / "m.json"
    path.write_text("keep")
    assert main(["measure", files["dithered"], "--report", str(path), "--quiet"]) == 2
    assert path.read_text() == "keep"
    assert main(["measure", files["dithered"], "--report", str(path), "--quiet", "--overwrite"]) == 0
    assert json.loads(path.read_text())["frames"] > 0
    assert main(["measure", files["dithered"], "--report", files["dithered"], "--quiet", "--overwrite"]) == 2
    assert sf.info(files["dithered"]).frames > 0
    capsys.readouterr()
