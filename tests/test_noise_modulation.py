"""Noise modulation on a sine far below 1 LSB: TPDF < RPDF < none, against the conditional moments."""

import math

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.meters import MeterBank, NoiseModulation

SAMPLERATE = 48000
NFRAMES = 1 << 20
AMPLITUDE_LSB = 0.3


def _run(dither, shaper="flat"):
    engine = Engine(EngineSettings(bits=16, dither=dither, shaper=shaper, seed=77), channels=1, samplerate=SAMPLERATE)
    n = np.arange(NFRAMES)
    x = (AMPLITUDE_LSB * 2.0**-15 * np.sin(2 * np.pi * 997.0 / SAMPLERATE * n))[:, None]
    bank = MeterBank.for_engine(engine)
    bank.update(x, engine.process(x))
    return bank, x


def _reading_from_conditional_power(bank, x, power_of_a):
    """The estimator applied to the theoretical conditional error power E[e² | a], bin by bin."""
    mod = bank._modulation
    v = x[:, 0] * 2.0**15
    a = v - np.floor(v)
    j = np.minimum((a * mod.nbins).astype(int), mod.nbins - 1)
    means = []
    for b in range(mod.nbins):
        sel = j == b
        if sel.sum() >= mod.min_samples:
            means.append(power_of_a(a[sel]).mean())
    return 10 * math.log10(max(means) / min(means))


@pytest.fixture(scope="module")
def readings():
    return {d: _run(d) for d in ("tpdf", "rpdf", "none")}


def test_ordering_tpdf_rpdf_none(readings):
    # Lipshitz, Wannamaker & Vanderkooy 1992: TPDF makes E[e²|v] independent of v; RPDF does
    # not (a(1-a)Q²), and no dither gives a deterministic error.
    value = {d: bank.report()["channels"][0]["noise_modulation_db"] for d, (bank, _) in readings.items()}
    assert value["tpdf"] < value["rpdf"] < value["none"]
    # Expected TPDF floor ≈ 21/√n_min dB (docs/meters.md); here n_min > 30 000, so < 0.15 dB;
    # assert 0.5 dB.  RPDF and none are clearly higher.
    assert value["tpdf"] < 0.5
    assert value["rpdf"] > 6.0
    assert value["none"] > value["rpdf"] + 6.0


def test_tpdf_reads_estimation_floor_only(readings):
    # Same theorem (LWV 1992): E[e²|v] = Q²/4 for every v, so each bin mean is 1/4 LSB² within
    # its sampling error (relative SD ≈ 1.2/√n, docs/meters.md): within 3 % here.
    bank, _ = readings["tpdf"]
    means = bank._modulation.bin_means_lsb2()[0]
    used = means[np.isfinite(means)]
    assert used.size >= 16
    assert np.all(np.abs(used / 0.25 - 1) < 0.03)


def test_rpdf_matches_conditional_variance(readings):
    # LWV 1992: with RPDF the total error's conditional power is a(1-a)·Q² for input fraction a.
    bank, x = readings["rpdf"]
    expected = _reading_from_conditional_power(bank, x, lambda a: a * (1 - a))
    assert abs(bank.report()["channels"][0]["noise_modulation_db"] - expected) < 0.5


def test_undithered_matches_rounding_error_exactly(readings):
    # No dither: e = round(v) - v, so e² = min(a, 1-a)² exactly; the reading is deterministic.
    bank, x = readings["none"]
    expected = _reading_from_conditional_power(bank, x, lambda a: np.minimum(a, 1 - a) ** 2)
    assert abs(bank.report()["channels"][0]["noise_modulation_db"] - expected) < 1e-6


def test_shaped_tpdf_stays_near_zero():
    # Wannamaker 1992 / LWV 2004: with i.i.d. TPDF inside the loop the total error stays white
    # with signal-independent power, so the added noise NTF·e is unmodulated too.
    bank, _ = _run("tpdf", shaper="wannamaker-f9")
    assert bank.report()["channels"][0]["noise_modulation_db"] < 0.5


def test_too_few_samples_reads_null():
    # Definition (docs/meters.md): fewer than two qualifying bins -> null.
    mod = NoiseModulation(1, nbins=8, min_samples=100)
    v = np.full((50, 1), 0.3)
    mod.update(v, v, np.ones(v.shape, bool))
    assert mod.reading_db() == [None]


def test_block_split_gives_identical_bins():
    # Sums are taken sample by sample in signal order: any split gives the same bits.
    rng = np.random.default_rng(8)
    v = rng.uniform(-3, 3, (30000, 2))
    e = rng.uniform(-1, 1, (30000, 2))
    valid = rng.random((30000, 2)) > 0.1
    whole = NoiseModulation(2, min_samples=10)
    whole.update(v, e, valid)
    split = NoiseModulation(2, min_samples=10)
    for a, b in [(0, 0), (0, 7), (7, 7), (7, 12345), (12345, 30000)]:
        split.update(v[a:b], e[a:b], valid[a:b])
    assert_array_equal(split.sums, whole.sums)
    assert_array_equal(split.counts, whole.counts)
    assert split.reading_db() == whole.reading_db()
