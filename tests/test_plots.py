"""Plot theory overlays against numpy simulations, titles in words, and the figures drawn."""

import numpy as np
import pytest

from rtstage.meters.plots import (
    error_density,
    modulation_theory_lsb2,
    rate_text,
    shaped_error_variance_lsb2,
    title_text,
    write_plots,
)


@pytest.mark.parametrize("dither", ["rpdf", "tpdf", "gaussian"])
def test_flat_error_density_matches_a_numpy_simulation(dither):
    # Total error of a dithered rounding quantizer, simulated with numpy on inputs spread over a step.
    rng = np.random.default_rng(1)
    n = 400_000
    v = rng.uniform(-50, 50, n)
    d = {"rpdf": rng.uniform(-0.5, 0.5, n),
         "tpdf": rng.uniform(-0.5, 0.5, n) + rng.uniform(-0.5, 0.5, n),
         "gaussian": rng.normal(0, 0.5, n)}[dither]
    e = np.round(v + d) - v
    counts, edges = np.histogram(e, bins=60, range=(-2.5, 2.5), density=True)
    centres = 0.5 * (edges[1:] + edges[:-1])
    np.testing.assert_allclose(error_density(centres, dither), counts, atol=0.03)


def test_shaped_variance_matches_simulation():
    # Error feedback with white TPDF: the added error is NTF-filtered total error (Gerzon & Craven).
    rng = np.random.default_rng(2)
    coefs = [1.2, -0.5]
    n = 200_000
    v = rng.uniform(-100, 100, n)
    d = rng.uniform(-0.5, 0.5, n) + rng.uniform(-0.5, 0.5, n)
    err = np.zeros(n)
    out = np.zeros(n)
    for i in range(n):
        fb = coefs[0] * (err[i - 1] if i >= 1 else 0.0) + coefs[1] * (err[i - 2] if i >= 2 else 0.0)
        u = v[i] + fb
        q = np.round(u + d[i])
        err[i] = u - q
        out[i] = q
    assert np.var(out - v) == pytest.approx(shaped_error_variance_lsb2("tpdf", 1.0, coefs), rel=0.02)


def test_modulation_theory_matches_simulation():
    # E[e^2 | a] for RPDF and TPDF at fixed input positions, numpy Monte Carlo.
    rng = np.random.default_rng(3)
    for a in (0.0, 0.2, 0.5):
        for dither in ("rpdf", "tpdf"):
            n = 200_000
            d = rng.uniform(-0.5, 0.5, n) + (rng.uniform(-0.5, 0.5, n) if dither == "tpdf" else 0.0)
            e = np.round(a + d) - a
            assert modulation_theory_lsb2(np.array([a]), dither)[0] == pytest.approx(np.mean(e * e), abs=0.005)
    # A dither scale other than 1 takes the general sum.
    d = 0.7 * (rng.uniform(-0.5, 0.5, 200_000) + rng.uniform(-0.5, 0.5, 200_000))
    e = np.round(0.3 + d) - 0.3
    assert modulation_theory_lsb2(np.array([0.3]), "tpdf", 0.7)[0] == pytest.approx(np.mean(e * e), abs=0.005)


def test_titles_in_words():
    report = {"bits": 16, "dither": "tpdf", "shaper": "thr9-48k", "shaper_coefs": [1.0], "samplerate": 48000.0}
    assert title_text(report) == "16-bit, TPDF dither, shaper thr9-48k, 48 kHz, channel 1"
    assert rate_text(44100.0) == "44.1 kHz" and rate_text(96000) == "96 kHz"


def test_report_figures_are_written(tmp_path):
    from rtstage import Engine, EngineSettings
    from rtstage.meters import MeterBank

    engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper="gentle9", seed=1), channels=1, samplerate=96000)
    bank = MeterBank.for_engine(engine)
    x = 0.3 * np.sin(2 * np.pi * 997 / 96000 * np.arange(96000))[:, None]
    bank.update(x, engine.process(x))
    paths = write_plots(bank.report(), str(tmp_path))
    assert sorted(p.rsplit("/", 1)[1] for p in paths) == [
        "error-histogram.png", "error-spectrum.png", "noise-modulation.png", "shaper-ntf.png"]
    assert all((tmp_path / p.rsplit("/", 1)[1]).stat().st_size > 10_000 for p in paths)
