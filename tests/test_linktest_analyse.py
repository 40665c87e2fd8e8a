"""The link test analyser against captures made here with numpy (and one with ``rtstage render``).

Each capture applies one known change to the generated sequence; the
analyser must name that change with the right figures and report every other
field at its neutral value.  The source of each expectation is named beside
the check: the change itself as numpy computes it, the textbook error
statistics of truncation, rounding and dither (Lipshitz, Wannamaker and
Vanderkooy, "Quantization and dither: a theoretical survey", JAES 40(5),
1992), and scipy.signal.resample_poly's documented rate change (up/down).
"""

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import resample_poly

from rtstage.cli import main
from rtstage.linktest import sequence as seq
from rtstage.linktest.analyse import analyse, report_keys

SR = 48000
SEED = 20261202
BITS = 24
FS = 2.0 ** (BITS - 1)


@pytest.fixture(scope="module")
def frames():
    return seq.sequence_frames(SR, 3.0)


@pytest.fixture(scope="module")
def words(frames):
    """The stereo 24-bit sequence as float64 integers (LSB units)."""
    return seq.sequence_words(SEED, BITS, SR, 2, frames).astype(np.float64)


def _analyse(capture_lsb, **kwargs):
    return analyse(capture_lsb / FS, SR, SEED, bits=BITS, **kwargs)


NEUTRAL = {"polarity": 1, "gain_db": 0.0, "dc_offset_lsb": 0.0, "slips": [], "drift_ppm": 0.0, "clipped": 0,
           "requantization": "none", "bits_passed": BITS, "frames_missing": 0, "damaged": []}


def check(report, named, latency=0, sources=(0, 1), transparent=False):
    """Every channel reports ``named`` (dict per channel or one for all) and the neutral value elsewhere."""
    top, keys = report_keys()
    assert all(k in report for k in top)
    assert report["found"] is True and report["latency_frames"] == latency
    assert report["transparent"] is transparent
    for i, ch in enumerate(report["channels"]):
        assert all(k in ch for k in keys)
        want = dict(NEUTRAL, source_channel=sources[i])
        want.update(named[i] if isinstance(named, (list, tuple)) else named)
        got = {k: ch[k] for k in want}
        assert got == want, f"channel {i}: {got} != {want}"
        # A channel is transparent exactly when it reports nothing and carries its own source unchanged.
        assert ch["transparent"] is (want == dict(NEUTRAL, source_channel=i) and ch["word_errors"] == 0)
        assert ch["latency_frames"] == latency


def word_errors(capture, source):
    """Words that differ, counted by numpy (the reference for ``word_errors``)."""
    return [int(np.count_nonzero(capture[:, c] != source[:, c])) for c in range(source.shape[1])]


def test_delay_with_foreign_material(words):
    # Reference: the capture is the sequence exactly, after 12345 frames of other (louder) noise,
    # with 7000 frames of noise after it; numpy makes both.
    rng = np.random.default_rng(4)
    before = np.round(rng.normal(0, 0.3 * FS, (12345, 2)))
    after = np.round(rng.normal(0, 0.3 * FS, (7000, 2)))
    report = _analyse(np.concatenate([before, words, after]))
    check(report, {}, latency=12345, transparent=True)
    assert [c["word_errors"] for c in report["channels"]] == [0, 0]
    assert report["summary"][0].startswith("TRANSPARENT")


@pytest.mark.parametrize("keep_bits", [16, 20])
def test_truncation(words, keep_bits):
    # Reference: two's-complement truncation is floor(x / q) * q (numpy.floor); textbook error
    # statistics: uniform on (-q, 0], biased by -(q - 1)/2 LSB on integer words, i.e. half a step.
    q = 2.0 ** (BITS - keep_bits)
    capture = np.floor(words / q) * q
    report = _analyse(capture)
    check(report, {"requantization": "truncation", "bits_passed": keep_bits})
    assert [c["word_errors"] for c in report["channels"]] == word_errors(capture, words)
    for ch in report["channels"]:
        assert abs(ch["error_mean_lsb"] + (q - 1) / 2) < 0.05 * q


def test_rounding_to_16_bits(words):
    # Reference: rounding to the nearest 16-bit word (ties up), numpy.floor(x / q + 0.5) * q; the error
    # is deterministic and within half a step (textbook).
    q = 256.0
    capture = np.floor(words / q + 0.5) * q
    report = _analyse(capture)
    check(report, {"requantization": "rounding", "bits_passed": 16})
    assert [c["word_errors"] for c in report["channels"]] == word_errors(capture, words)
    for ch in report["channels"]:
        assert ch["error_rms_lsb"] <= q / 2


def test_rtstage_render_to_16_bits_with_tpdf(tmp_path, frames):
    # The capture is what `rtstage render` writes at 16 bits with TPDF dither (the real executable
    # path through rtstage.cli.main, as tests/test_render_cli.py runs it).
    src, out = str(tmp_path / "seq.wav"), str(tmp_path / "air.wav")
    assert main(["linktest", "generate", src, "--seed", str(SEED), "--seconds", "3"]) == 0
    assert main(["render", src, out, "--bits", "16", "--dither", "tpdf", "--seed", "77"]) == 0
    data, rate = sf.read(out, dtype="float64", always_2d=True)
    report = analyse(data, rate, SEED, bits=BITS)
    check(report, {"requantization": "dithered", "bits_passed": 16})
    for ch in report["channels"]:
        # Textbook (LVW 1992): with non-subtractive TPDF dither the total error power is q^2/4,
        # independent of the signal, and the dither shows in digital silence.
        assert abs(ch["error_rms_lsb"] - 128.0) < 128.0 * 0.02
        assert ch["dither_in_silence"] is True
    assert main(["linktest", "analyse", out, "--seed", str(SEED)]) == 1


@pytest.mark.parametrize("gain_db", [-0.5, 0.1])
def test_gain(words, gain_db):
    # Reference: the capture is the sequence times 10^(gain_db/20) (numpy), kept in float (a float path).
    capture = words * 10 ** (gain_db / 20)
    report = _analyse(capture)
    check(report, {"gain_db": gain_db})
    assert [c["word_errors"] for c in report["channels"]] == word_errors(capture, words)


def test_gain_in_a_fixed_point_path(words):
    # A -0.5 dB gain whose product is rounded back to 24 bits (numpy.round): the words keep 24 bits,
    # the gain is named and nothing else.
    capture = np.round(words * 10 ** (-0.5 / 20))
    check(_analyse(capture), {"gain_db": -0.5})


def test_polarity_inverted_on_one_channel(words):
    # Reference: numpy negates channel 2 (exact: the sequence never uses -2^(N-1)).
    capture = words.copy()
    capture[:, 1] = -capture[:, 1]
    report = _analyse(capture)
    check(report, [{}, {"polarity": -1}])
    assert report["channels"][0]["transparent"] and not report["channels"][1]["transparent"]
    assert [c["word_errors"] for c in report["channels"]] == [0, 0]  # counted after undoing the inversion


def test_swapped_channels(words):
    # Reference: numpy swaps the two columns; each captured channel carries the other's words.
    report = _analyse(words[:, ::-1].copy())
    check(report, {}, sources=(1, 0))
    assert not any(c["transparent"] for c in report["channels"])


def test_duplicated_channel_is_recognised(words):
    # Reference: numpy copies channel 1 onto channel 2.
    report = _analyse(np.stack([words[:, 0], words[:, 0]], axis=1))
    check(report, {}, sources=(0, 0))
    assert "sequence channel 2 did not arrive" in report["summary"]


def test_one_dropped_and_one_inserted_sample(words):
    # Reference: numpy.delete removes source frame 50000; numpy.insert repeats a sample before source
    # frame 100001 (capture index 100000 after the drop).
    capture = np.delete(words, 50000, axis=0)
    capture = np.insert(capture, 100000, capture[99999], axis=0)
    report = _analyse(capture)
    slips = [{"frame": 50000, "capture_frame": 50000, "count": -1}, {"frame": 100001, "capture_frame": 100000, "count": 1}]
    check(report, {"slips": slips})
    assert [c["word_errors"] for c in report["channels"]] == [0, 0]


def test_a_lost_block_and_an_inserted_block(words):
    # Reference: numpy.delete removes 256 frames from source frame 60000 on (a lost packet); numpy.insert
    # puts 48 zeros before source frame 90256 (capture index 90000: a concealed gap of another link).
    capture = np.delete(words, np.arange(60000, 60256), axis=0)
    capture = np.insert(capture, 90000, np.zeros((48, 2)), axis=0)
    slips = [{"frame": 60000, "capture_frame": 60000, "count": -256}, {"frame": 90256, "capture_frame": 90000, "count": 48}]
    check(_analyse(capture), {"slips": slips})


def test_a_slip_in_a_requantized_path(words):
    # Rounding to 16 bits (numpy) and one dropped frame: both named, the drop at its exact frame.
    capture = np.delete(np.floor(words / 256 + 0.5) * 256, 70000, axis=0)
    slips = [{"frame": 70000, "capture_frame": 70000, "count": -1}]
    check(_analyse(capture), {"slips": slips, "requantization": "rounding", "bits_passed": 16})


@pytest.mark.parametrize("up,down", [(9601, 9600), (19999, 20000)])
def test_slow_resampling(words, up, down):
    # Reference: scipy.signal.resample_poly(x, up, down) changes the rate by up/down, so the capture has
    # (up/down - 1) * 10^6 ppm more samples per source sample (+104.2 and -50.0 ppm); its passband gain is 1.
    capture = resample_poly(words, up, down, axis=0)
    report = _analyse(capture)
    for ch in report["channels"]:
        assert abs(ch["drift_ppm"] - (up / down - 1) * 1e6) < 0.5
        # scipy's anti-alias filter (Kaiser-windowed sinc, beta 5) itself ripples by about +-0.012 dB in the
        # passband (measured with sines through resample_poly at 0.05, 0.1 and 0.2 fs); the gain the
        # analyser reads may differ from 0 dB by that much.
        assert abs(ch["gain_db"]) <= 0.02
    drift = [{"drift_ppm": ch["drift_ppm"], "gain_db": ch["gain_db"], "requantization": "other", "bits_passed": 0}
             for ch in report["channels"]]
    check(report, drift)


def test_added_dc(words):
    # Reference: numpy adds 3 LSB to every word; digital silence arrives as a constant 3.
    report = _analyse(words + 3)
    check(report, {"dc_offset_lsb": 3.0})
    assert [c["word_errors"] for c in report["channels"]] == [words.shape[0]] * 2


def test_hard_clipping(words):
    # Reference: numpy.clip at 0.8 of full scale; the clipped count is numpy's count of |s| > T.
    limit = np.round(0.8 * FS)
    report = _analyse(np.clip(words, -limit, limit))
    counts = [int(np.count_nonzero(np.abs(words[:, c]) > limit)) for c in range(2)]
    check(report, [{"clipped": counts[0]}, {"clipped": counts[1]}])
    assert [c["word_errors"] for c in report["channels"]] == counts


def test_a_bit_stuck_at_zero(words):
    # Reference: numpy clears bit 3 of every word (a broken data line): the words keep their top 20 bits
    # unchanged, and the change is none of truncation, rounding or dither.
    capture = (words.astype(np.int64) & ~np.int64(1 << 3)).astype(np.float64)
    report = _analyse(capture)
    check(report, {"requantization": "other", "bits_passed": 20})
    assert [c["word_errors"] for c in report["channels"]] == word_errors(capture, words)


def test_not_found(words):
    # Noise from numpy's generator, and the sequence of another seed, hold no marker of this seed.
    rng = np.random.default_rng(9)
    report = analyse(rng.normal(0, 0.2, (200000, 2)), SR, SEED, bits=BITS)
    assert report["found"] is False and report["transparent"] is False and report["latency_frames"] is None
    report = analyse(words / FS, SR, SEED + 1, bits=BITS)  # another seed's sequence
    assert report["found"] is False


def test_cli_exit_codes_and_report(tmp_path, words, capsys):
    import json

    good, cut, noise = (str(tmp_path / n) for n in ("good.wav", "cut.wav", "noise.wav"))
    sf.write(good, np.concatenate([np.zeros((500, 2)), words]) / FS, SR, subtype="PCM_24")
    sf.write(cut, np.floor(words / 256) * 256 / FS, SR, subtype="PCM_24")
    sf.write(noise, np.random.default_rng(1).normal(0, 0.1, (SR, 2)), SR, subtype="FLOAT")
    report_path = str(tmp_path / "r.json")
    assert main(["linktest", "analyse", good, "--seed", str(SEED), "--report", report_path]) == 0
    report = json.load(open(report_path))
    assert report["transparent"] is True and report["latency_frames"] == 500
    assert main(["linktest", "analyse", cut, "--seed", str(SEED)]) == 1
    assert "truncated to 16 bits" in capsys.readouterr().out
    assert main(["linktest", "analyse", noise, "--seed", str(SEED)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("rtstage:") and "not in the capture" in err[-1]
    assert main(["linktest", "analyse", good]) == 2  # no --seed
    assert capsys.readouterr().err.strip().startswith("rtstage:")
    # The report goes through the output policy: an existing one is kept unless --overwrite.
    assert main(["linktest", "analyse", good, "--seed", str(SEED), "--report", report_path]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert main(["linktest", "analyse", good, "--seed", str(SEED), "--report", report_path, "--overwrite"]) == 0


def test_gain_and_dither_in_one_path(tmp_path):
    # `rtstage render --gain-db -0.5 --bits 16` (TPDF): both changes are named, nothing else.
    src, out = str(tmp_path / "seq.wav"), str(tmp_path / "air.wav")
    assert main(["linktest", "generate", src, "--seed", str(SEED), "--seconds", "3"]) == 0
    assert main(["render", src, out, "--bits", "16", "--gain-db", "-0.5", "--seed", "5"]) == 0
    data, rate = sf.read(out, dtype="float64", always_2d=True)
    check(analyse(data, rate, SEED, bits=BITS), {"gain_db": -0.5, "requantization": "dithered", "bits_passed": 16})


def test_gain_then_truncation(words):
    # Reference: numpy, a -0.5 dB gain and then floor to 16 bits (textbook truncation after a gain stage).
    q = 256.0
    check(_analyse(np.floor(words * 10 ** (-0.5 / 20) / q) * q),
          {"gain_db": -0.5, "requantization": "truncation", "bits_passed": 16})


def test_a_16_bit_sequence(tmp_path):
    # A 16-bit sequence carried in a 24-bit file is transparent at 16 bits; `rtstage render --bits 12`
    # (TPDF, in a 16-bit container) passes 12 bits, dithered.
    src, wide, short = (str(tmp_path / n) for n in ("seq16.wav", "wide.wav", "short.wav"))
    assert main(["linktest", "generate", src, "--seed", "16", "--bits", "16", "--seconds", "2"]) == 0
    data, rate = sf.read(src, dtype="float64", always_2d=True)
    sf.write(wide, data, rate, subtype="PCM_24")
    assert main(["linktest", "analyse", wide, "--seed", "16", "--bits", "16"]) == 0
    assert main(["render", src, short, "--bits", "12", "--seed", "2"]) == 0
    report = analyse(sf.read(short, dtype="float64", always_2d=True)[0], rate, 16, bits=16)
    assert [(c["requantization"], c["bits_passed"], c["gain_db"], c["slips"]) for c in report["channels"]] == \
        [("dithered", 12, 0.0, [])] * 2


def test_a_dead_channel(words):
    # Reference: numpy silences channel 2; channel 1 still passes, channel 2 carries nothing.
    capture = words.copy()
    capture[:, 1] = 0
    report = _analyse(capture)
    assert report["found"] is True and report["transparent"] is False
    assert report["channels"][0]["transparent"] is True
    dead = report["channels"][1]
    assert dead["source_channel"] is None and dead["transparent"] is False and dead["bits_passed"] == 0
    assert "channel 2: no link test marker" in "\n".join(report["summary"])
    assert "sequence channel 2 did not arrive" in report["summary"]


def test_damaged_stretches_in_a_dithered_path(tmp_path, frames):
    # What a glitching link does, made with numpy on an `rtstage render` 16-bit TPDF capture: 256 frames
    # replaced by zeros (a concealed lost packet) and 64 frames repeated from just before (a stale buffer).
    src, out = str(tmp_path / "seq.wav"), str(tmp_path / "air.wav")
    assert main(["linktest", "generate", src, "--seed", str(SEED), "--seconds", "3"]) == 0
    assert main(["render", src, out, "--bits", "16", "--seed", "8"]) == 0
    data, rate = sf.read(out, dtype="float64", always_2d=True)
    secs = {s.name: s for s in seq.sections(SR, frames)}
    zero_at = secs["full"].start + 10000
    stale_at = secs["full"].start + 50000
    data[zero_at : zero_at + 256] = 0.0
    data[stale_at : stale_at + 64] = data[stale_at - 64 : stale_at]
    report = analyse(data, rate, SEED, bits=BITS)
    # A stale word can by chance lie within 2^-9 of full scale of the right one (about 0.2 % of the
    # uniform full-range words, from their distribution); such a word at either end of a stretch is not
    # told apart, so each stretch lies inside its block and misses at most two words of it.
    for ch in report["channels"]:
        assert len(ch["damaged"]) == 2
        for got, (start, length) in zip(ch["damaged"], ((zero_at, 256), (stale_at, 64))):
            assert start <= got["frame"] and got["frame"] + got["frames"] <= start + length
            assert got["frames"] >= length - 2
    check(report, [{"requantization": "dithered", "bits_passed": 16, "damaged": ch["damaged"]}
                   for ch in report["channels"]])
    assert all("damaged in 2 stretch(es)" in line for line in report["summary"][1:])
