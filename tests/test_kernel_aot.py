"""The kernel built ahead of time gives the numba kernel's words, and an offline command starts without numba.

Sources of truth: the independent numpy requantizer of tests/reference.py
(written from the kernel's documentation, with numpy's own Philox), and the
numba-compiled :func:`rtstage.kernel.process_block` itself; the built module
must agree with both word for word, for every input type, word container,
meter-word option, dither kind and a split into uneven blocks.  Its loading
rules (a changed source, toolchain or processor never loads an old build)
are checked by changing each input of the fingerprint.
"""

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import BUILTIN_SHAPERS, Engine, EngineSettings, kernel_aot
from rtstage import kernel as K

try:
    from tests import reference as ref
except ImportError:  # tests/ itself on sys.path
    import reference as ref

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture(scope="module")
def aot():
    """The current build, built first if there is none (tools/bootstrap.sh builds it, so CI finds it)."""
    found = kernel_aot.load()
    if found is None:
        kernel_aot.build()
        found = kernel_aot.load()
    assert found is not None
    return found


def _signal(seed, nframes, channels, dtype):
    """Sine plus noise with an overload burst and non-finite samples (clip rule and replacement)."""
    rng = np.random.default_rng(seed)
    n = np.arange(nframes)[:, None]
    x = 0.7 * np.sin(2 * np.pi * (0.013 + 0.004 * np.arange(channels)) * n) + 1e-3 * rng.standard_normal((nframes, channels))
    x[nframes // 3 : nframes // 3 + 25] *= 3.0
    for value in (np.nan, np.inf, -np.inf):
        x[rng.random((nframes, channels)) < 0.003] = value
    return x.astype(dtype)


def _run(process_block, engine, x, splits, meter_words):
    """Words (and meter words) of ``x`` through ``process_block`` on a fresh copy of ``engine``'s state."""
    state = K.KernelState(engine.channels)
    for mine, theirs in zip(engine.state.arrays(), state.arrays()):
        theirs[...] = mine
    y = np.zeros(x.shape, dtype=engine.dtype)
    yq = np.zeros(x.shape, dtype=engine.dtype) if meter_words else None
    vq = np.zeros(x.shape, dtype=np.float64)
    start = 0
    for size in splits:
        stop = min(start + size, x.shape[0])
        extra = () if yq is None else (yq[start:stop],)
        process_block(x[start:stop], y[start:stop], vq[start:stop], stop - start, *state.arrays(), *extra)
        start = stop
    return y, yq, vq, state


@pytest.mark.parametrize("x_type", (np.float64, np.float32))
@pytest.mark.parametrize("bits,format_bits", ((16, 16), (20, 24), (8, 16)))
@pytest.mark.parametrize("dither,shaper", (("tpdf", "wannamaker-f9"), ("gaussian", "lvw-e5"), ("rpdf", "diff2"),
                                           ("tpdf-hp", "flat"), ("none", "flat")))  # fmt: skip
def test_words_equal_numba_and_reference(aot, x_type, bits, format_bits, dither, shaper):
    seed = 0xA07 + bits
    channels = 3  # a channel pair and a single channel: both loops of the kernel
    x = _signal(bits, 700, channels, x_type)
    s = EngineSettings(bits=bits, dither=dither, shaper=shaper, seed=seed, gain_db=-0.5)
    engine = Engine(s, channels, 48000, format_bits=format_bits, start_frame=12345)
    splits = (1, 63, 64, 0, 200, 372)
    meter_words = dither != "none"
    y_aot, yq_aot, vq_aot, st_aot = _run(aot, engine, x, splits, meter_words)
    y_jit, yq_jit, vq_jit, st_jit = _run(K.process_block, engine, x, splits, meter_words)
    # Against numba's own compilation of the same source: every word, meter tap and state array.
    assert_array_equal(y_aot, y_jit)
    assert_array_equal(vq_aot, vq_jit)
    if meter_words:
        assert_array_equal(yq_aot, y_aot)  # requantized monitor mode: meter words are the words
        assert_array_equal(yq_aot, yq_jit)
    for a, b in zip(st_aot.arrays()[:6], st_jit.arrays()[:6]):
        assert_array_equal(a, b)
    # Against the independent reference (tests/reference.py): words and counts.
    r = ref.reference_requantize(x.astype(np.float64), bits, dither, BUILTIN_SHAPERS[shaper].coefs, seed=seed,
                                 gain_db=-0.5, start_frame=12345)  # fmt: skip
    assert_array_equal(y_aot, ref.pack_words(r["q"], bits, format_bits))
    assert_array_equal(st_aot.counts[:, K.CNT_CLIPPED], r["clipped"])
    assert_array_equal(st_aot.counts[:, K.CNT_NONFINITE], r["nonfinite"])


def test_engine_uses_the_build_and_other_types_reach_numba(aot):
    engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper="diff2", seed=5), 2, 48000)
    assert engine.process_block is aot
    # int64 words are not among the build's exports: the call goes to the numba kernel, same words.
    x = _signal(3, 300, 2, np.float64)
    y64_state = K.KernelState(2)
    for mine, theirs in zip(engine.state.arrays(), y64_state.arrays()):
        theirs[...] = mine
    y64 = np.zeros(x.shape, dtype=np.int64)
    aot(x, y64, np.empty((0, 2)), x.shape[0], *y64_state.arrays())
    y16 = engine.process(x)
    assert_array_equal(y64, y16.astype(np.int64))


def test_build_releases_the_gil(aot):
    # The offline drivers run channel groups on threads; the build must let them run at once, as the
    # numba kernel (nogil) does.  While one thread runs a long block, this thread must get to run Python.
    import threading

    engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=1), 2, 48000)
    x = np.zeros((4_000_000, 2))
    y = np.empty(x.shape, dtype=np.int16)
    started, done = threading.Event(), threading.Event()

    def work():
        started.set()
        engine.process(x, out=y)
        done.set()

    t = threading.Thread(target=work)
    t.start()
    started.wait()
    turns = 0
    while not done.is_set():
        turns += 1
    t.join()
    # With the GIL held for the whole block this loop would run a handful of times at most
    # (the switch interval is 5 ms; the block takes tens of milliseconds or more).
    assert turns > 1000


def _copy_sources(tmp_path):
    pkg = tmp_path / "pkg"
    pkg.mkdir()
    for name in kernel_aot._SOURCES:
        shutil.copy(os.path.join(kernel_aot._PACKAGE_DIR, name), pkg / name)
    return pkg


@pytest.mark.parametrize("source", kernel_aot._SOURCES)
def test_fingerprint_follows_every_source(tmp_path, monkeypatch, source):
    pkg = _copy_sources(tmp_path)
    monkeypatch.setattr(kernel_aot, "_PACKAGE_DIR", str(pkg))
    before = kernel_aot.fingerprint()
    with open(pkg / source, "a") as f:
        f.write("\n# changed\n")
    assert kernel_aot.fingerprint() != before


def test_stale_build_is_never_loaded(aot, tmp_path, monkeypatch):
    # A copy of the current build loads from its own directory ...
    shutil.copy(aot.path, tmp_path / os.path.basename(aot.path))
    monkeypatch.setattr(kernel_aot, "_loaded", {})
    assert kernel_aot.load(str(tmp_path)) is not None
    # ... but not once the processor (or anything else fingerprinted) differs: then there is no build.
    monkeypatch.setattr(kernel_aot, "_loaded", {})
    monkeypatch.setattr(kernel_aot, "_processor_text", lambda: "another processor")
    assert kernel_aot.load(str(tmp_path)) is None
    monkeypatch.setattr(kernel_aot, "_loaded", {})
    monkeypatch.setenv(kernel_aot.KERNEL_DIR_ENV, str(tmp_path))
    assert kernel_aot.offline_kernel() is K.process_block


def _rtstage(args, env_extra=None, **kw):
    env = dict(os.environ, **(env_extra or {}))
    return subprocess.run([sys.executable, "-X", "importtime", "-m", "rtstage", *args], cwd=ROOT, env=env,
                          capture_output=True, timeout=300, **kw)  # fmt: skip


def _imported(stderr):
    names = set()
    for line in stderr.decode(errors="replace").splitlines():
        if line.startswith("import time:") and "|" in line:
            names.add(line.rsplit("|", 1)[1].strip())
    return names


def test_render_and_pipe_start_without_numba_and_match_numba(aot, tmp_path):
    import soundfile as sf

    x = _signal(9, 4800, 2, np.float64)
    x[~np.isfinite(x)] = 0.0
    src = tmp_path / "in.wav"
    sf.write(src, np.clip(x, -1, 1 - 2**-23), 48000, subtype="PCM_24")
    args = ["--bits", "16", "--dither", "tpdf", "--shaper", "thr9-48k", "--seed", "7"]
    fast = _rtstage(["render", str(src), str(tmp_path / "fast.wav"), *args])
    assert fast.returncode == 0, fast.stderr[-2000:]
    assert not {"numba", "llvmlite"} & _imported(fast.stderr)
    empty = tmp_path / "no-build"
    empty.mkdir()
    slow = _rtstage(["render", str(src), str(tmp_path / "slow.wav"), *args], {kernel_aot.KERNEL_DIR_ENV: str(empty)})
    assert slow.returncode == 0, slow.stderr[-2000:]
    assert "numba" in _imported(slow.stderr)
    assert (tmp_path / "fast.wav").read_bytes() == (tmp_path / "slow.wav").read_bytes()

    raw = np.clip(np.round(x * 2**23), -(2**23), 2**23 - 1).astype("<i4")
    s24 = b"".join(int(v).to_bytes(3, "little", signed=True) for v in raw.ravel())
    pipe_args = ["pipe", "--samplerate", "48000", "--channels", "2", "--in-format", "s24le", "--out-format", "s16le", *args]
    fast = _rtstage(pipe_args, input=s24)
    slow = _rtstage(pipe_args, {kernel_aot.KERNEL_DIR_ENV: str(empty)}, input=s24)
    assert fast.returncode == slow.returncode == 0
    assert not {"numba", "llvmlite"} & _imported(fast.stderr)
    assert fast.stdout == slow.stdout and len(fast.stdout) == 4800 * 2 * 2
