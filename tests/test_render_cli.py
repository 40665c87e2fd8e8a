"""`rtstage render`: file formats, word placement, atomic writes and every error path.

The reference for the words is the engine itself driven directly (the render
driver must add nothing), and libsndfile's own decoding of what was written.
"""

import os
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.cli import main
from rtstage.render import render_array, render_file


@pytest.fixture
def programme():
    """A 0.25 s stereo signal at 48 kHz with a low-level tone and a loud burst."""
    samplerate = 48000
    t = np.arange(samplerate // 4) / samplerate
    x = np.stack([0.5 * np.sin(2 * np.pi * 997 * t), 1e-4 * np.sin(2 * np.pi * 60 * t)], axis=1)
    return x, samplerate


def write(path, x, samplerate, subtype):
    sf.write(path, x, samplerate, subtype=subtype)
    return sf.read(path, dtype="float64", always_2d=True)[0]


@pytest.mark.parametrize(
    "ext,subtype",
    [(".wav", "PCM_16"), (".wav", "PCM_24"), (".wav", "PCM_32"), (".wav", "FLOAT"), (".wav", "DOUBLE"), (".flac", "PCM_24"), (".aiff", "PCM_24")],
)
def test_render_equals_engine(tmp_path, programme, ext, subtype):
    # The driver must produce exactly the engine's words for what libsndfile decodes.
    x, samplerate = programme
    src = str(tmp_path / f"in{ext}")
    decoded = write(src, x, samplerate, subtype)
    out = str(tmp_path / "out.wav")
    assert main([ "render", src, out, "--bits", "16", "--shaper", "wannamaker-f9", "--seed", "11"]) == 0
    got = sf.read(out, dtype="int16", always_2d=True)[0]
    want = Engine(EngineSettings(16, "tpdf", "wannamaker-f9", seed=11), 2, samplerate).process(decoded)
    assert sf.info(out).subtype == "PCM_16"
    assert_array_equal(got, want)


@pytest.mark.parametrize("bits,subtype,container_bits", [(12, "PCM_16", 16), (8, "PCM_16", 16), (20, "PCM_24", 24), (24, "PCM_24", 24)])
def test_words_left_justified_low_bits_zero(tmp_path, programme, bits, subtype, container_bits):
    # Output words are exactly on the 2^-(bits-1) grid: low (container - bits) bits zero.
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "FLOAT")
    out = str(tmp_path / "out.wav")
    assert main(["render", src, out, "--bits", str(bits), "--seed", "3"]) == 0
    assert sf.info(out).subtype == subtype
    words = sf.read(out, dtype="int32", always_2d=True)[0] >> (32 - container_bits)
    assert np.all(words % (1 << (container_bits - bits)) == 0)
    q = words >> (container_bits - bits)
    assert q.min() >= -(2 ** (bits - 1)) and q.max() <= 2 ** (bits - 1) - 1
    # Near-exact level: the output is the input plus error of at most a few LSB.
    assert np.max(np.abs(q * 2.0 ** -(bits - 1) - x)) < 4 * 2.0 ** -(bits - 1)


@pytest.mark.parametrize(
    "subtype,bits,ext", [("PCM_S8", 6, ".aiff"), ("PCM_U8", 8, ".wav"), ("PCM_32", 24, ".wav"), ("FLOAT", 20, ".wav"), ("DOUBLE", 24, ".wav")]
)
def test_explicit_subtypes_hold_the_words_exactly(tmp_path, programme, subtype, bits, ext):
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "DOUBLE")
    out = str(tmp_path / f"out{ext}")
    assert main(["render", src, out, "--bits", str(bits), "--seed", "5", "--subtype", subtype]) == 0
    format_bits = 16 if bits <= 16 and subtype.startswith("PCM_") and subtype != "PCM_32" else (32 if subtype == "PCM_32" else 24)
    words, _ = render_array(sf.read(src, dtype="float64", always_2d=True)[0], samplerate, EngineSettings(bits, seed=5), format_bits=format_bits)
    want = words * (2.0**-15 if words.dtype == np.int16 else 2.0**-31)
    got = sf.read(out, dtype="float64", always_2d=True)[0]
    assert_array_equal(got, want)


def test_blocksize_does_not_change_output(tmp_path, programme):
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x[:3000], samplerate, "PCM_24")
    outs = []
    for blocksize in ("1", "7", "4096"):
        out = str(tmp_path / f"out{blocksize}.wav")
        assert main(["render", src, out, "--seed", "9", "--shaper", "lvw-ie9", "--blocksize", blocksize]) == 0
        outs.append(sf.read(out, dtype="int16")[0])
    assert_array_equal(outs[0], outs[1])
    assert_array_equal(outs[0], outs[2])


def test_random_seed_is_logged_and_reproduces(tmp_path, programme, capsys):
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "PCM_24")
    assert main(["render", src, str(tmp_path / "a.wav")]) == 0
    err = capsys.readouterr().err
    seed = int(err.split("seed ")[1].split()[0])
    assert main(["render", src, str(tmp_path / "b.wav"), "--seed", str(seed)]) == 0
    assert_array_equal(sf.read(str(tmp_path / "a.wav"), dtype="int16")[0], sf.read(str(tmp_path / "b.wav"), dtype="int16")[0])


def test_preset_and_override(tmp_path, programme):
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    decoded = write(src, x, samplerate, "PCM_24")
    out = str(tmp_path / "out.wav")
    # master16 says thr9 (shaped); --shaper overrides it.
    assert main(["render", src, out, "--preset", "master16", "--shaper", "flat", "--seed", "2"]) == 0
    want, _ = render_array(decoded, samplerate, EngineSettings(16, "tpdf", "flat", seed=2))
    assert_array_equal(sf.read(out, dtype="int16", always_2d=True)[0], want)


def leftovers(directory):
    return [f for f in os.listdir(directory) if f.startswith(".rtstage-")]


def run_error(argv, capsys):
    status = main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2
    assert len(err) == 1 and err[0].startswith("rtstage: ")
    return err[0]


def test_error_paths(tmp_path, programme, capsys):
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "PCM_24")
    out = str(tmp_path / "out.wav")
    assert "no such file" in run_error(["render", str(tmp_path / "missing.wav"), out], capsys)
    junk = tmp_path / "junk.wav"
    junk.write_bytes(b"RIFF not really a wave file")
    assert "cannot read" in run_error(["render", str(junk), out], capsys)
    assert "bits must be between 2 and 24" in run_error(["render", src, out, "--bits", "25"], capsys)
    assert "bits must be between 2 and 24" in run_error(["render", src, out, "--bits", "1"], capsys)
    assert "unknown dither" in run_error(["render", src, out, "--dither", "blue"], capsys)
    assert "unknown shaper" in run_error(["render", src, out, "--shaper", "nope"], capsys)
    assert "unknown preset" in run_error(["render", src, out, "--preset", "nope"], capsys)
    assert "without dither refused" in run_error(["render", src, out, "--dither", "none", "--shaper", "diff2"], capsys)
    assert "not i.i.d." in run_error(["render", src, out, "--dither", "tpdf-hp", "--shaper", "diff1"], capsys)
    assert "unsupported output subtype" in run_error(["render", src, out, "--subtype", "ULAW"], capsys)
    assert "does not fit subtype PCM_16" in run_error(["render", src, out, "--bits", "20", "--subtype", "PCM_16"], capsys)
    assert "cannot tell the output format" in run_error(["render", src, str(tmp_path / "out.xyz")], capsys)
    assert "cannot hold subtype" in run_error(["render", src, str(tmp_path / "out.flac"), "--subtype", "PCM_32"], capsys)
    assert "blocksize" in run_error(["render", src, out, "--blocksize", "0"], capsys)
    assert "is the input" in run_error(["render", src, src, "--overwrite"], capsys)
    assert not os.path.exists(out) and not leftovers(tmp_path)
    # Out-of-range stream shapes.
    slow = str(tmp_path / "slow.wav")
    sf.write(slow, np.zeros((100, 1)), 4000, subtype="PCM_16")
    assert "sample rate 4000 Hz" in run_error(["render", slow, out], capsys)
    wide = str(tmp_path / "wide.wav")
    sf.write(wide, np.zeros((100, 65)), 48000, subtype="PCM_16")
    assert "65 channels" in run_error(["render", wide, out], capsys)
    # An existing output is refused without --overwrite and kept untouched.
    open(out, "wb").write(b"keep")
    assert "exists" in run_error(["render", src, out], capsys)
    assert open(out, "rb").read() == b"keep"
    assert main(["render", src, out, "--overwrite", "--seed", "1"]) == 0
    assert sf.info(out).frames == x.shape[0]
    assert not leftovers(tmp_path)


def test_failed_render_leaves_nothing(tmp_path, programme):
    # A render interrupted by an error in the middle removes its temporary file.
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "PCM_24")
    out = str(tmp_path / "out.wav")

    def fail(x_block, words, engine):
        if engine.frame > 5000:
            raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        render_file(src, out, EngineSettings(seed=1), blocksize=1024, observers=[fail])
    assert not os.path.exists(out) and not leftovers(tmp_path)


def test_console_script_and_module_entry(tmp_path, programme):
    # `python -m rtstage` is the same program; exit status and stderr-only logging.
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "PCM_24")
    out = str(tmp_path / "out.wav")
    proc = subprocess.run([sys.executable, "-m", "rtstage", "render", src, out, "--seed", "4"], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""
    assert "seed 4" in proc.stderr
    proc = subprocess.run([sys.executable, "-m", "rtstage", "render", src, out], capture_output=True, text=True)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1


def test_report_written_and_flat_tpdf_matches_theory(tmp_path, capsys):
    # 16-bit flat TPDF adds white noise of power Q²/4 (Lipshitz, Wannamaker & Vanderkooy 1992);
    # over 20 Hz–20 kHz at 48 kHz that is the fraction 19980/24000 of it, read in dBFS with
    # 0 dBFS = a full-scale sine's RMS (AES17), i.e. level = 10·log10(2 · power).
    samplerate = 48000
    rng = np.random.default_rng(5)
    x = rng.uniform(-0.25, 0.25, (samplerate * 4, 2))
    src = str(tmp_path / "in.wav")
    sf.write(src, x, samplerate, subtype="DOUBLE")
    report_path = str(tmp_path / "r.json")
    assert main(["render", src, str(tmp_path / "out.wav"), "--seed", "8", "--report", report_path]) == 0
    import json

    from rtstage.meters import CHANNEL_KEYS

    report = json.load(open(report_path))
    q = 2.0**-15
    theory_dbfs = 10 * np.log10(2 * q**2 / 4 * 19980 / 24000)
    assert len(report["channels"]) == 2
    for channel in report["channels"]:
        assert set(CHANNEL_KEYS) <= set(channel)
        assert channel["added_noise_dbfs"]["unweighted"] == pytest.approx(theory_dbfs, abs=0.1)
        assert channel["clipped_samples"] == 0
    assert "wrote the meter report" in capsys.readouterr().err


def test_automation_equals_manual_block_split(tmp_path):
    # Timed changes apply at the named frames: the same words as driving the engine by hand.
    samplerate = 48000
    x = np.random.default_rng(6).uniform(-0.5, 0.5, (9000, 2))
    src = str(tmp_path / "in.wav")
    sf.write(src, x, samplerate, subtype="DOUBLE")
    auto = tmp_path / "changes.jsonl"
    auto.write_text('{"at_frame": 1000, "values": {"gain_db": -6.0}}\n{"at_s": 0.0625, "values": {"bits": 12, "dither": "rpdf"}}\n')
    out = str(tmp_path / "out.wav")
    assert main(["render", src, out, "--seed", "21", "--automation", str(auto), "--blocksize", "777"]) == 0
    engine = Engine(EngineSettings(16, "tpdf", "flat", seed=21), 2, samplerate)
    want = np.concatenate([
        engine.process(x[:1000]),
        (engine.apply(EngineSettings(16, "tpdf", "flat", seed=21, gain_db=-6.0)), engine.process(x[1000:3000]))[1],
        (engine.apply(EngineSettings(12, "rpdf", "flat", seed=21, gain_db=-6.0)), engine.process(x[3000:]))[1],
    ])
    assert_array_equal(sf.read(out, dtype="int16", always_2d=True)[0], want)


def test_report_refuses_automation_that_changes_the_quantizer(tmp_path, programme, capsys):
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "PCM_24")
    auto = tmp_path / "changes.jsonl"
    auto.write_text('{"at_frame": 10, "values": {"bits": 8}}\n')
    message = run_error(["render", src, str(tmp_path / "o.wav"), "--automation", str(auto), "--report", str(tmp_path / "r.json")], capsys)
    assert "--report and --plot cannot follow automation" in message
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"at_frame": 10, "values": {"bits": 99}}\n')
    assert "bits" in run_error(["render", src, str(tmp_path / "o.wav"), "--automation", str(bad)], capsys)


def test_shaper_off_its_design_rate_warns_with_the_right_preset(tmp_path, programme, capsys):
    # The published sets were designed for 44.1 kHz (Wannamaker 1992); at 48 kHz rtstage names the shipped 48 kHz design.
    x, samplerate = programme
    src = str(tmp_path / "in.wav")
    write(src, x, samplerate, "PCM_24")
    assert main(["render", src, str(tmp_path / "o.wav"), "--seed", "1", "--shaper", "wannamaker-f9"]) == 0
    err = capsys.readouterr().err
    assert "44100" in err or "44.1" in err
    assert "thr9-48k" in err
    assert main(["render", src, str(tmp_path / "o2.wav"), "--seed", "1", "--shaper", "thr9-48k"]) == 0
    assert "designed for" not in capsys.readouterr().err


def test_headroom_warning_for_a_hot_programme(tmp_path, capsys):
    # A 9-tap shaper can add tens of LSB of excursion (design.headroom_lsb); a programme peaking at
    # -0.001 dBFS leaves less than that at 8 bits, so rtstage warns.
    samplerate = 44100
    t = np.arange(samplerate // 4) / samplerate
    x = np.stack([0.9999 * np.sin(2 * np.pi * 440 * t)] * 2, axis=1)
    src = str(tmp_path / "in.wav")
    sf.write(src, x, samplerate, subtype="DOUBLE")
    assert main(["render", src, str(tmp_path / "o.wav"), "--seed", "1", "--bits", "8", "--shaper", "wannamaker-f9"]) == 0
    assert "headroom" in capsys.readouterr().err
