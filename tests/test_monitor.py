"""Monitor modes, mute and auto-mute in the kernel (engine level).

What is checked, and against what:

* error monitor: the output is (requantized output - input) x make-up gain,
  the definition of the total added error (Lipshitz, Wannamaker & Vanderkooy,
  "Quantization and dither: a theoretical survey", JAES 40(5), 1992: the
  total error is output minus input), compared with the requantized run of
  the same seed (the kernel's q never depends on the monitor mode) within
  float precision and the final rounding to the container's LSB;
* its safety limiter holds the -20 dBFS peak ceiling (rtstage.engine.ERROR_CEILING_DBFS);
* crossfades and mute ramps are click-free: the sample-to-sample step is
  bounded by the signal's own step plus the ramp slope (a linear 10 ms ramp,
  common practice for click-free switching);
* auto-mute: exact digital zero only, hold time to the frame, a -100 dBFS
  signal never mutes, shaper history cleared while muted, ramps out and in;
* block-split invariance of all of it (hypothesis, as tests/test_block_exact.py).
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage import params
from rtstage.engine import ERROR_CEILING_DBFS, GAIN_RAMP_SECONDS
from rtstage.errors import RtstageError

SR = 48000
R = round(GAIN_RAMP_SECONDS * SR)  # ramp and crossfade length in frames (480)


def _sine(nframes, nch=2, amp=0.5, freq_hz=997.0, phase=0.3):
    n = np.arange(nframes)[:, None]
    return amp * np.sin(2 * np.pi * freq_hz * n / SR + phase + 0.7 * np.arange(nch))


def _run(settings, x, changes=(), nch=2, blocks=None, requantized=False):
    """Process ``x``; ``changes`` is [(frame, {field: value})] applied at those frames (block boundaries)."""
    engine = Engine(settings, channels=nch, samplerate=SR)
    bounds = sorted({0, x.shape[0], *[f for f, _ in changes], *(blocks or [])})
    pending = dict(changes)
    out, req, vq = [], [], []
    for a, b in zip(bounds[:-1], bounds[1:]):
        if a in pending:
            engine.apply(params.settings_with(engine.settings, pending[a]))
        v = np.zeros((b - a, nch))
        r = np.zeros((b - a, nch), dtype=engine.dtype)
        out.append(engine.process(x[a:b], quantizer_in=v, requantized=r))
        req.append(r)
        vq.append(v)
    return engine, np.concatenate(out), np.concatenate(req), np.concatenate(vq)


BASE = dict(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=1234, gain_db=-1.0)


class TestErrorMonitor:
    def test_error_equals_output_minus_input_times_gain(self):
        # Definition of the total error (LVW 1992): e = output - input; the monitor adds gain g.
        x = _sine(4000, amp=0.3)
        g_db = 24.0
        _, y_req, _, vq = _run(EngineSettings(**BASE), x)
        _, y_err, r_err, _ = _run(EngineSettings(**BASE, monitor="error", error_gain_db=g_db), x)
        assert_array_equal(r_err, y_req)  # the meter words are the requantized words in every mode
        expected = (y_req.astype(np.float64) - vq * 32768.0) * 10 ** (g_db / 20)
        ceiling = 10 ** (ERROR_CEILING_DBFS / 20) * 32768
        assert np.abs(expected).max() < ceiling  # the limiter is not engaged here
        assert np.abs(expected).max() > 20  # and the error is far from trivial
        # Rounding to the container LSB (0.5) plus float precision.
        assert np.abs(y_err - expected).max() <= 0.5 + 1e-9

    def test_limiter_holds_ceiling(self):
        # Hard safety ceiling at ERROR_CEILING_DBFS peak (documented in rtstage.kernel).
        x = _sine(4000, amp=0.5)
        _, y_err, _, _ = _run(EngineSettings(**dict(BASE, bits=4), monitor="error", error_gain_db=40.0), x)
        ceiling = 10 ** (ERROR_CEILING_DBFS / 20) * 32768
        assert np.abs(y_err).max() <= np.floor(ceiling + 0.5)
        assert np.abs(y_err).max() >= np.floor(ceiling)  # 40 dB on a 4-bit error reaches it

    def test_input_mode_and_two_bit_audition(self):
        # bits=2 sits in the 16-bit container with out_shift 14; the input is rounded to 16 bits
        # (plain rounding), so input vs requantized differ by the added error alone.
        x = _sine(3000, amp=0.7)
        s = dict(BASE, bits=2, shaper="flat")
        _, y_req, _, vq = _run(EngineSettings(**s), x)
        _, y_in, _, _ = _run(EngineSettings(**s, monitor="input"), x)
        assert np.all(y_req % (1 << 14) == 0)  # a 2-bit word left-justified, low 14 bits zero
        assert len(np.unique(y_req)) <= 4
        assert_array_equal(y_in, np.floor(vq * 32768.0 + 0.5).astype(np.int16))
        added_error = y_req.astype(np.float64) - vq * 32768.0
        assert np.abs((y_req.astype(np.float64) - y_in) - added_error).max() <= 0.5


def _max_step(y):
    return np.abs(np.diff(y.astype(np.float64), axis=0)).max()


class TestCrossfadeAndMute:
    @pytest.mark.parametrize("to_mode", ["input", "error"])
    def test_crossfade_linear_click_free(self, to_mode):
        nf, at = 6000, 2001
        x = _sine(nf, amp=0.4)
        extra = {"error_gain_db": 30.0}
        a = EngineSettings(**BASE, **extra)
        _, y_a, _, _ = _run(a, x)
        _, y_b, _, _ = _run(EngineSettings(**BASE, **extra, monitor=to_mode), x)
        _, y, _, _ = _run(a, x, changes=[(at, {"monitor": to_mode})])
        assert_array_equal(y[:at], y_a[:at])
        assert_array_equal(y[at + R :], y_b[at + R :])  # the crossfade lasts exactly R frames
        fa, fb = y_a.astype(float), y_b.astype(float)
        w = np.clip(np.arange(1, R + 1) / R, 0, 1)[:, None]
        expected = (1 - w) * fa[at : at + R] + w * fb[at : at + R]
        # Linear, to the rounding: 0.5 LSB for the final word plus 0.5 for mode B's own rounded word.
        assert np.abs(y[at : at + R] - expected).max() <= 1.0 + 1e-6
        # Click-free: step bounded by the larger own step plus |A - B| / R (+1 for rounding).
        bound = max(_max_step(y_a), _max_step(y_b)) + np.abs(fa - fb).max() / R + 1.0
        assert _max_step(y) <= bound

    def test_mute_ramps_to_exact_zero_and_back(self):
        nf, on, off = 5000, 1000, 3000
        x = _sine(nf, amp=0.9)
        s = EngineSettings(**BASE)
        _, y_ref, _, _ = _run(s, x)
        _, y, r, _ = _run(s, x, changes=[(on, {"mute": True}), (off, {"mute": False})])
        assert_array_equal(y[:on], y_ref[:on])
        assert np.all(y[on + R - 1 : off] == 0)
        assert np.all(y[on : on + R - 1] != 0) or np.count_nonzero(y[on : on + R - 1]) > R
        assert_array_equal(y[off + R - 1 :], y_ref[off + R - 1 :])
        assert_array_equal(r, y_ref)  # meters keep the real requantized words
        bound = _max_step(y_ref) + np.abs(y_ref).max() / R + 1.0
        assert _max_step(y) <= bound

    def test_mute_at_start_is_silent(self):
        x = _sine(600, amp=0.5)
        _, y, _, _ = _run(EngineSettings(**BASE, mute=True), x)
        assert np.all(y == 0)


class TestAutoMute:
    HOLD_S = 0.01  # 480 frames at 48 kHz

    def _settings(self, **kw):
        return EngineSettings(**BASE, auto_mute=True, auto_mute_hold_s=self.HOLD_S, **kw)

    def test_minus_100_dbfs_never_mutes(self):
        # The rule: only exact digital zero mutes; a -100 dBFS signal (1e-5 peak) never does.
        x = _sine(20000, amp=1e-5)
        x[:, 1] = 1e-5  # DC at -100 dBFS on the other channel
        eng, y, _, _ = _run(self._settings(), x)
        _, y_off, _, _ = _run(EngineSettings(**BASE), x)
        assert_array_equal(y, y_off)
        assert eng.auto_muted_frames.tolist() == [0, 0]

    def test_hold_time_to_the_frame_history_reset_and_ramps(self):
        hold = round(self.HOLD_S * SR)
        nf, z0, z1 = 8000, 1000, 4000
        x = _sine(nf, amp=0.25)
        x[z0:z1, 0] = 0.0  # exact digital zero on channel 0 only
        eng = Engine(self._settings(), channels=2, samplerate=SR)
        y = np.zeros((nf, 2), dtype=np.int16)
        muted, hist_zero = [], []
        for n in range(0, nf, 100):
            eng.process(x[n : n + 100], out=y[n : n + 100])
            muted.append(bool(eng.auto_muted[0]))
            hist_zero.append(not eng.state.hist[0].any())
        # Muted frames: from the hold-th zero sample to the last zero sample.
        assert eng.auto_muted_frames.tolist() == [z1 - z0 - hold + 1, 0]
        ends = np.arange(100, nf + 1, 100)  # frame after each block
        in_mute = (ends - 1 >= z0 + hold - 1) & (ends - 1 < z1)
        assert muted == in_mute.tolist()
        assert all(h for h, m in zip(hist_zero, muted) if m)  # history cleared while muted
        assert not hist_zero[-1]  # and running again afterwards
        _, y_off, _, _ = _run(EngineSettings(**BASE), x)
        onset = z0 + hold - 1
        assert_array_equal(y[:onset, 0], y_off[:onset, 0])  # the hold counts to the frame
        assert np.all(y[onset + R - 1 : z1, 0] == 0)  # ramped out to exact zero
        assert np.any(y[onset : onset + R - 1, 0] != 0)  # dither noise ramps out, not cut
        assert_array_equal(y[:, 1], y_off[:, 1])  # per channel
        # Ramp in after the first non-zero sample; step bounded (own step + slope).
        assert np.all(y[z1 + R :, 0] != 0) or np.count_nonzero(y[z1 + R :, 0]) > 0.9 * (nf - z1 - R)
        bound = _max_step(y_off[:, :1]) + np.abs(y_off[:, 0]).max() / R + 1.0
        assert _max_step(y[:, :1]) <= bound

    def test_isolated_zeros_do_not_mute(self):
        # A sine through exact zeros (every 24 samples at 1 kHz, phase 0) never holds zero for 480 frames.
        n = np.arange(20000)[:, None]
        x = np.repeat(np.sin(2 * np.pi * 1000 * n / SR), 2, axis=1) * 0.5
        x[::24] = 0.0
        eng, _, _, _ = _run(self._settings(), x)
        assert eng.auto_muted_frames.tolist() == [0, 0]


class TestValidationOneSource:
    @pytest.mark.parametrize("name, bad", [("error_gain_db", 90.5), ("error_gain_db", -1.0),
                                           ("auto_mute_hold_s", 61.0), ("monitor", "loud"), ("mute", 1)])
    def test_engine_and_table_refuse_alike(self, name, bad):
        with pytest.raises(RtstageError, match=name.split("_")[0]):
            EngineSettings(**{name: bad}).validate()
        with pytest.raises(RtstageError):
            params.validate(name, bad)

    def test_fields_reach_the_engine(self):
        s = params.settings_with(EngineSettings(), {"monitor": "error", "error_gain_db": 6.0, "mute": True,
                                                    "auto_mute": True, "auto_mute_hold_s": 2.0})
        assert (s.monitor, s.error_gain_db, s.mute, s.auto_mute, s.auto_mute_hold_s) == ("error", 6.0, True, True, 2.0)


@st.composite
def _schedules(draw):
    nf = 3000
    frames = sorted(draw(st.lists(st.integers(1, nf - 1), min_size=1, max_size=5, unique=True)))
    choices = [{"monitor": "error"}, {"monitor": "input"}, {"monitor": "requantized"}, {"mute": True},
               {"mute": False}, {"error_gain_db": 20.0}, {"auto_mute": False}]
    changes = [(f, draw(st.sampled_from(choices))) for f in frames]
    blocks = draw(st.lists(st.integers(0, nf), max_size=12))
    return changes, blocks


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_schedules())
def test_block_split_invariance(schedule):
    # rtstage.kernel's promise: any split gives the same words (ramp positions are integer state).
    changes, blocks = schedule
    x = _sine(3000, amp=0.3)
    x[700:1400, 1] = 0.0
    s = EngineSettings(**BASE, auto_mute=True, auto_mute_hold_s=0.002)
    e1, y1, r1, _ = _run(s, x, changes)
    e2, y2, r2, _ = _run(s, x, changes, blocks=blocks)
    assert_array_equal(y1, y2)
    assert_array_equal(r1, r2)
    assert_array_equal(e1.state.counts, e2.state.counts)
    assert_array_equal(e1.state.hist, e2.state.hist)


def test_live_monitor_switching_over_the_socket_matches_the_rerender(jack_server, tmp_path):
    # The live path: switch the monitor to the added error (with make-up gain), to the input, mute and
    # back over the real socket while `rtstage run` taps what the device receives; the tap must equal the
    # offline re-render from the engine's own --automation-log (kernel: one computation, two drivers),
    # and the first raise of error_gain_db above 0 dB carries the hearing-safety caution.  At bits=2:
    # audition with an extreme word length, with the input A/B, works live.
    import time

    import soundfile as sf
    from numpy.testing import assert_array_equal

    from rtstage.control.client import ControlClient
    from procs import free_port
    from test_live_control import RunProcess, _rerender

    source = "tone:freq_hz=997,level_dbfs=-60"  # a quiet tone: the error monitor is audible next to it
    tap, log_path, st, err = (str(tmp_path / n) for n in ("tap.wav", "changes.jsonl", "status.json", "run.err"))
    port = free_port()
    run = RunProcess(jack_server, [
        "--source", source, "--bits", "2", "--dither", "tpdf", "--shaper", "flat", "--seed", "99",
        "--blocksize", "128", "--tap", tap, "--status-file", st, "--automation-log", log_path,
        "--control-port", str(port), "--quiet"], err)
    try:
        run.wait_for_log("rtstage: running:")
        with ControlClient("127.0.0.1", port, timeout_s=10) as client:
            request = client.request  # one request, its reply (events in between are kept aside)

            changes = (
                {"monitor": "error", "error_gain_db": 24.0},
                {"monitor": "input"},
                {"mute": True},
                {"mute": False, "monitor": "requantized"},
            )
            replies = []
            for values in changes:
                time.sleep(0.15)
                replies.append(request({"op": "set", "values": values}))
                assert replies[-1]["ok"], replies[-1]
            assert "caution" in replies[0] and "hearing" in replies[0]["caution"].lower()
            assert all("caution" not in r for r in replies[1:])
            time.sleep(0.15)
        assert run.terminate() == 0, run.log()
    finally:
        run.kill()
    assert "caution" in run.log().lower()
    words = sf.read(tap, dtype="int16", always_2d=True)[0]
    settings = EngineSettings(bits=2, dither="tpdf", shaper="flat", seed=99)
    assert_array_equal(_rerender(settings, source, words.shape[0], log_path), words)
    frames = [r["at_frame"] for r in replies]
    # While muted (after the 10 ms ramp) the device receives exact zeros.
    ramp = int(round(0.010 * 48000))
    assert np.all(words[frames[2] + ramp : frames[3]] == 0)
