"""NaN, Inf and full-scale overload through a 9-tap shaper (wannamaker-f9).

Promises (module docstring of rtstage.kernel, "Clip rule"): a clipped
sample feeds back an error limited to ±feedback_peak LSB (half a step plus
the dither's peak); a non-finite sample is replaced (NaN by 0, ±Inf by ±full
scale), counted, and clears the channel's error history; fed-back errors
below 1e-30 LSB are stored as zero, so no denormal enters the state.

Consequences checked here, each derived outside the engine:

* bounded output: with every fed-back error |e| <= 1.5 LSB (TPDF), the added
  noise of an unclipped sample is |e[n] - Σ h_k e[n-k]| <= 1.5·(1 + Σ|h_k|)
  (triangle inequality);
* recovery: the NTF is FIR with N = 9 taps, so N + 1 samples after the last
  disturbance the added noise is again (Q^2/4)·|NTF|^2 noise, whose power
  is (Q^2/4)·Σ b_k^2 (Parseval; TPDF error power from Lipshitz, Wannamaker &
  Vanderkooy, JAES 40(5), 1992).

Caution: the signals here are full-scale and overloaded test tones.  They
are only computed, never played; if you listen to such material, start at a
low monitoring level and follow local codes and licensed practice on
hearing safety.
"""

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import BUILTIN_SHAPERS, Engine, EngineSettings

try:
    from tests import reference as ref
except ImportError:  # tests/ itself on sys.path
    import reference as ref

SHAPER = "wannamaker-f9"
COEFS = np.asarray(BUILTIN_SHAPERS[SHAPER].coefs)
NTAPS = COEFS.size
BITS = 16
SCALE = 2.0 ** (BITS - 1)
TPDF_FEEDBACK_PEAK_LSB = 1.5  # Q/2 + TPDF peak Q (dither.py table)
PERIOD = 1024


def _disturbed_signal(nperiods, channels, seed=0):
    """A -12 dBFS sine with, in every period, an overload burst and NaN, +Inf, -Inf samples.

    Returns the signal and a boolean mask of the disturbed samples.
    """
    rng = np.random.default_rng(seed)
    nframes = nperiods * PERIOD
    n = np.arange(nframes)[:, None]
    x = 0.25 * np.sin(2 * np.pi * 0.01234 * n + np.arange(channels))
    disturbed = np.zeros(x.shape, dtype=bool)
    for p in range(nperiods):
        base = p * PERIOD
        sign = 1.0 if p % 2 == 0 else -1.0
        length = int(rng.integers(8, 80))
        x[base : base + length] = sign * 1.5  # 3.5 dB over full scale
        disturbed[base : base + length] = True
        for offset, value in ((200, np.nan), (400, np.inf), (600, -np.inf)):
            at = base + offset + int(rng.integers(0, 50))
            c = int(rng.integers(0, channels))
            x[at, c] = value
            disturbed[at, c] = True
        x[base + 800 : base + 830] = sign * 1.0  # exactly full scale
        disturbed[base + 800 : base + 830] = True
    return x, disturbed


def _engine(channels, dither="tpdf", force=False, seed=2822):
    return Engine(EngineSettings(bits=BITS, dither=dither, shaper=SHAPER, seed=seed, accept_unsafe=force), channels, 44100)


def _replaced(x):
    """Input after the documented replacement: NaN -> 0, ±Inf -> ±1."""
    return np.nan_to_num(x, nan=0.0, posinf=1.0, neginf=-1.0)


def test_output_bounded_and_counts_exact():
    x, disturbed = _disturbed_signal(4, 2)
    engine = _engine(2)
    q = engine.process(x).astype(np.int64)
    v = _replaced(x) * SCALE
    r = ref.reference_requantize(x, BITS, "tpdf", COEFS, seed=2822)
    assert_array_equal(q, r["q"])
    # Non-finite samples: counted one by one.
    assert_array_equal(engine.nonfinite, np.sum(~np.isfinite(x), axis=0))
    # Clipped samples: the reference's count; at least every sample of the 1.5 FS bursts.
    assert_array_equal(engine.clipped, r["clipped"])
    assert np.all(engine.clipped >= np.sum(np.abs(x) == 1.5, axis=0))
    # Overload goes to the rail of its own sign (no wrap-around).
    assert np.all(q[x == 1.5] == SCALE - 1) and np.all(q[x == -1.5] == -SCALE)
    # Unclipped samples: added noise within 1.5·(1 + Σ|h|) LSB (triangle inequality).
    unclipped = (q > -SCALE) & (q < SCALE - 1)
    bound = TPDF_FEEDBACK_PEAK_LSB * (1.0 + np.sum(np.abs(COEFS)))
    assert np.max(np.abs(q - v)[unclipped]) <= bound


def test_shaper_recovers_within_its_length():
    channels = 4
    x, disturbed = _disturbed_signal(128, channels, seed=1)
    engine = _engine(channels)
    q = engine.process(x).astype(np.float64)
    noise = q - _replaced(x) * SCALE
    # Samples more than NTAPS after the last disturbed sample of their channel.
    frame = np.arange(x.shape[0])[:, None]
    last = np.maximum.accumulate(np.where(disturbed, frame, -(10**9)), axis=0)
    since = frame - last
    b = np.concatenate(([1.0], -COEFS))
    r = 0.25 * np.correlate(b, b, mode="full")
    expected = r[NTAPS]  # (Q^2/4)·Σ b_k^2
    # Standard error of a mean square of a linear process (Bartlett, Gaussian approximation,
    # from memory): sqrt(2·Σ_l r(l)^2 / M); 8 of them to cover the TPDF error's kurtosis.
    settled = since > NTAPS
    just_settled = settled & (since <= NTAPS + 64)  # the first 64 samples after each recovery
    for mask in (settled, just_settled):
        se = np.sqrt(2.0 * np.sum(r**2) / mask.sum())
        measured = np.mean(noise[mask] ** 2)
        assert abs(measured - expected) < 8.0 * se, (measured, expected, se)
    # No clipping once settled: the disturbance leaves no limit cycle behind.
    rail = (q == SCALE - 1) | (q == -SCALE)
    assert not np.any(rail & settled & (np.abs(x) < 0.5))


def test_history_cleared_by_non_finite_sample():
    engine = _engine(2)
    engine.process(_disturbed_signal(1, 2)[0][300:500])  # fill the history with shaped errors
    assert np.count_nonzero(engine.state.hist[0]) > NTAPS
    x = np.array([[np.nan, 0.1]])
    before_other = engine.state.hist[1].copy()
    q = engine.process(x).astype(np.int64)
    hist = engine.state.hist
    newest = (int(engine.state.clock[1]) - 1) % hist.shape[1]
    # Channel 0: everything cleared, then this sample's error written.  Its input is 0 and its
    # feedback 0, so its error is its word q (kernel docstring: e = q - u, u = 0).
    others = np.delete(hist[0], newest)
    assert np.all(others == 0.0)
    assert hist[0, newest] == q[0, 0]
    # Channel 1 keeps its history (one new entry written).
    assert_array_equal(np.delete(hist[1], newest), np.delete(before_other, newest))


@pytest.mark.parametrize("dither,force", (("tpdf", False), ("none", True)))
def test_no_denormal_ever_in_history(dither, force):
    # Kernel docstring: fed-back errors below 1e-30 LSB are stored as zero.  Inputs: subnormal
    # float64 values (their v = x·2^15 is subnormal too), tiny normals, exact zeros and a
    # low-level sine.  The history is circular over 64 frames; checking after every 16-frame
    # block sees every value ever written.
    tiny = np.finfo(np.float64).tiny
    rng = np.random.default_rng(9)
    nframes = 4096
    choices = np.array([5e-324, -5e-324, 1e-320, -3e-316, 1e-300, 1e-40, 0.0, -0.0])
    x = rng.choice(choices, size=(nframes, 2))
    x[nframes // 2 :, 1] += 1e-4 * np.sin(0.05 * np.arange(nframes - nframes // 2))
    engine = _engine(2, dither=dither, force=force)
    for start in range(0, nframes, 16):
        engine.process(x[start : start + 16])
        h = np.abs(engine.state.hist)
        assert np.all(np.isfinite(h))
        assert not np.any((h > 0.0) & (h < tiny)), "denormal in the error history"
        assert not np.any((h > 0.0) & (h < 1e-30))
    if dither == "none":
        # Undithered, |v| < 1e-4 LSB everywhere on channel 0: every word 0 and every error
        # |0 - v| < 1e-30 or a tiny normal from 1e-300·2^15; the history must be all zero.
        assert np.all(engine.state.hist[0] == 0.0)
