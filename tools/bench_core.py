"""Benchmark of rtstage's core engine (a tool, not a test).

Three measurements, each reported as a ratio of times taken in the same run,
so that the figures mean something on a shared, noisy machine:

1. **Kernel throughput.**  :func:`rtstage.kernel.process_block` against
   ``tools/kernel_plain.c``, a plain C version of the same recurrence built
   here with ``gcc -O3``, on the same input (2 channels, TPDF, 16 bits,
   ``wannamaker-f9``).  Both outputs are compared word for word before any
   time is reported; a benchmark of two different computations is worthless.
   Goal: the kernel at least 2x the plain C throughput.
2. **End-to-end render.**  ``rtstage render`` of a 10-minute stereo 48 kHz
   24-bit WAV to 16 bits, as a subprocess and as an in-process
   :func:`rtstage.render.render_file` call, against pure I/O with soundfile
   (read the same input, write a 16-bit WAV of the same size).
   Goal: the subprocess at most 1.3x the pure I/O time.
3. **Warm start.**  Wall time of a fresh ``rtstage render`` process on a
   1-second file once the numba cache is warm.  Goal: at most 1 s.

Every time is the best of ``--reps`` repetitions after a warm-up run; the
spread (slowest / best - 1) is printed beside it as a measure of the noise.

Usage
-----
``.venv/bin/python tools/bench_core.py [--json] [--reps N] [--kernel-seconds S]
[--render-minutes M] [--skip-render] [--skip-warm]``

The table (or, with ``--json``, one JSON object) goes to stdout; progress
lines go to stderr.  Generated audio and the compiled C baseline live in
``tools/build/`` (git-ignored).
"""

import argparse
import ctypes
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import time

import numpy as np
from scipy.signal import lfilter

TOOLS_DIR = os.path.dirname(os.path.abspath(__file__))
REPO_DIR = os.path.dirname(TOOLS_DIR)
BUILD_DIR = os.path.join(TOOLS_DIR, "build")
PLAIN_C_SOURCE = os.path.join(TOOLS_DIR, "kernel_plain.c")

sys.path.insert(0, REPO_DIR)

from rtstage import kernel as K  # noqa: E402
from rtstage.engine import EngineSettings, encode_params  # noqa: E402

BENCH_SAMPLERATE = 48000
BENCH_CHANNELS = 2
BENCH_BITS = 16
BENCH_DITHER = "tpdf"
BENCH_SHAPER = "wannamaker-f9"
BENCH_SEED = 1
PROGRAM_SEED = 20240607
"""Seed of the generated test programme (not the dither seed)."""

GOAL_KERNEL_SPEEDUP = 2.0
GOAL_RENDER_RATIO = 1.3
GOAL_WARM_START_S = 1.0

C_BUILDS = (
    # (label, extra gcc flags, counts for the goal)
    ("gcc -O3", [], True),
    ("gcc -O3 -march=native", ["-march=native"], False),
)


def log(message):
    """One progress line on stderr (stdout carries the results)."""
    print(f"bench_core: {message}", file=sys.stderr, flush=True)


# --------------------------------------------------------------------------------------
# timing helpers
# --------------------------------------------------------------------------------------


def time_best(fn, reps, warmup=1):
    """Run ``fn`` ``warmup`` times untimed, then ``reps`` times; return the times in seconds."""
    for _ in range(warmup):
        fn()
    times_s = []
    for _ in range(reps):
        t0 = time.perf_counter()
        fn()
        times_s.append(time.perf_counter() - t0)
    return times_s


def summary(times_s):
    """Best, median and spread (slowest / best - 1) of a list of times."""
    best_s = min(times_s)
    return {
        "best_s": best_s,
        "median_s": statistics.median(times_s),
        "spread": max(times_s) / best_s - 1.0,
        "reps": len(times_s),
    }


# --------------------------------------------------------------------------------------
# test programme
# --------------------------------------------------------------------------------------


def make_programme(nframes, samplerate, seed=PROGRAM_SEED, chunk_frames=1 << 20):
    """A generated stereo programme in full-scale units, float64, shape (nframes, 2).

    A slowly gliding two-tone chord plus lowpassed noise, about -14 dBFS RMS
    with peaks near -2 dBFS: busy enough that the shaper, dither and
    rounding all work as on music, without clipping.  Built in chunks so that
    10 minutes do not need several copies in memory.
    """
    rng = np.random.default_rng(seed)
    out = np.empty((nframes, 2), dtype=np.float64)
    noise_state = np.zeros(2)
    pole = 0.97
    for start in range(0, nframes, chunk_frames):
        stop = min(nframes, start + chunk_frames)
        t_s = np.arange(start, stop, dtype=np.float64) / samplerate
        glide = 1.0 + 0.05 * np.sin(2.0 * np.pi * 0.05 * t_s)
        tone_l = 0.25 * np.sin(2.0 * np.pi * 220.0 * glide * t_s) + 0.12 * np.sin(2.0 * np.pi * 1318.5 * t_s)
        tone_r = 0.25 * np.sin(2.0 * np.pi * 277.2 * glide * t_s + 0.7) + 0.12 * np.sin(2.0 * np.pi * 1760.0 * t_s)
        white = rng.standard_normal((stop - start, 2))
        noise = np.empty_like(white)
        # one-pole lowpass, state carried across chunks
        for c in range(2):
            noise[:, c], zf = lfilter([1.0 - pole], [1.0, -pole], white[:, c], zi=[noise_state[c] * pole])
            noise_state[c] = noise[-1, c]
        out[start:stop, 0] = tone_l + 0.35 * noise[:, 0]
        out[start:stop, 1] = tone_r + 0.35 * noise[:, 1]
    return np.clip(out, -0.8, 0.8)


# --------------------------------------------------------------------------------------
# 1. kernel against plain C
# --------------------------------------------------------------------------------------


def build_plain_c(extra_flags, tag):
    """Compile ``kernel_plain.c`` into ``tools/build/`` (when stale); return the ctypes function."""
    os.makedirs(BUILD_DIR, exist_ok=True)
    lib_path = os.path.join(BUILD_DIR, f"kernel_plain_{tag}.so")
    cmd = ["gcc", "-O3", "-ffp-contract=off", *extra_flags, "-shared", "-fPIC", "-o", lib_path, PLAIN_C_SOURCE, "-lm"]
    if not os.path.exists(lib_path) or os.path.getmtime(lib_path) < os.path.getmtime(PLAIN_C_SOURCE):
        log("building: " + " ".join(cmd))
        subprocess.run(cmd, check=True)
    lib = ctypes.CDLL(lib_path)
    fn = lib.rq_plain_tpdf_f64_i16
    dptr = np.ctypeslib.ndpointer(dtype=np.float64, flags="C_CONTIGUOUS")
    i16ptr = np.ctypeslib.ndpointer(dtype=np.int16, flags="C_CONTIGUOUS")
    i64ptr = np.ctypeslib.ndpointer(dtype=np.int64, flags="C_CONTIGUOUS")
    i64 = ctypes.c_int64
    fn.argtypes = [
        dptr, i16ptr, i64, i64, i64, ctypes.c_uint64, dptr, i64,
        ctypes.c_double, ctypes.c_double, ctypes.c_double, i64, i64, dptr, i64ptr, i64ptr,
    ]  # fmt: skip
    fn.restype = None
    return fn, " ".join(cmd[:-3] + ["..."])


class PlainC:
    """State and call of the C baseline for one fixed setting."""

    MAX_TAPS = 32

    def __init__(self, fn, settings, nchannels, iparams, fparams):
        self.fn = fn
        self.nchannels = nchannels
        self.bits = int(iparams[K.IP_BITS])
        self.seed = int(settings.seed)
        self.ntaps = int(iparams[K.IP_NTAPS])
        self.coefs = np.ascontiguousarray(fparams[K.FP_COEF0 : K.FP_COEF0 + max(self.ntaps, 1)], dtype=np.float64)
        self.gain = float(fparams[K.FP_GAIN])
        self.dither_scale = float(fparams[K.FP_DITHER_SCALE])
        self.feedback_peak = float(fparams[K.FP_FEEDBACK_PEAK])
        self.out_shift = int(iparams[K.IP_OUT_SHIFT])
        self.hist = np.zeros(nchannels * self.MAX_TAPS, dtype=np.float64)
        self.clipped = np.zeros(nchannels, dtype=np.int64)
        self.nonfinite = np.zeros(nchannels, dtype=np.int64)

    def reset(self):
        self.hist[:] = 0.0
        self.clipped[:] = 0
        self.nonfinite[:] = 0

    def process(self, x, y, frame0=0):
        self.fn(
            x, y, x.shape[0], self.nchannels, self.bits, self.seed, self.coefs, self.ntaps,
            self.gain, self.dither_scale, self.feedback_peak, self.out_shift, frame0,
            self.hist, self.clipped, self.nonfinite,
        )  # fmt: skip


def load_kernel_module(path):
    """A kernel module to measure: rtstage's own (None) or a private copy at ``path``.

    A copy must offer ``KernelState`` and ``process_block`` with the layout of
    :mod:`rtstage.kernel`; it is how a proposed kernel change is measured
    without touching ``rtstage/`` (keep such copies in ``tools/build/``).
    """
    if path is None:
        return K, "rtstage.kernel"
    import importlib

    # imported under its own file name, as numba's on-disk cache expects
    sys.path.insert(0, os.path.dirname(os.path.abspath(path)))
    module = importlib.import_module(os.path.splitext(os.path.basename(path))[0])
    return module, os.path.relpath(path, REPO_DIR)


def bench_kernel(seconds, reps, kernel_path=None):
    """Kernel against the plain C builds on ``seconds`` of generated stereo audio."""
    KM, kernel_name = load_kernel_module(kernel_path)
    nframes = int(round(seconds * BENCH_SAMPLERATE))
    nsamples = nframes * BENCH_CHANNELS
    settings = EngineSettings(bits=BENCH_BITS, dither=BENCH_DITHER, shaper=BENCH_SHAPER, seed=BENCH_SEED).resolved()
    st = KM.KernelState(BENCH_CHANNELS)
    encode_params(settings, BENCH_SAMPLERATE, 16 - BENCH_BITS, st.iparams, st.fparams)
    st.reset(0)
    x = make_programme(nframes, BENCH_SAMPLERATE)
    y_kernel = np.zeros((nframes, BENCH_CHANNELS), dtype=np.int16)

    def run_kernel():
        st.reset(0)
        KM.process_block(x, y_kernel, np.empty((0, x.shape[1])), nframes, *st.arrays())

    log(f"kernel: {seconds:g} s of stereo audio ({nsamples} samples), best of {reps}, interleaved")
    t0 = time.perf_counter()
    run_kernel()  # compiles, or loads the numba cache
    first_call_s = time.perf_counter() - t0
    kernel_clipped = st.counts[:, K.CNT_CLIPPED].copy()

    contenders = [("kernel", run_kernel)]
    c_entries = []
    for label, flags, for_goal in C_BUILDS:
        tag = "o3" if not flags else "o3_" + "_".join(f.strip("-").replace("=", "") for f in flags)
        try:
            fn, cmdline = build_plain_c(flags, tag)
        except (OSError, subprocess.CalledProcessError) as exc:
            log(f"cannot build {label}: {exc}")
            continue
        plain = PlainC(fn, settings, BENCH_CHANNELS, st.iparams, st.fparams)
        y_c = np.full((nframes, BENCH_CHANNELS), 0x5A5A, dtype=np.int16)

        def run_c(plain=plain, y_c=y_c):
            plain.reset()
            plain.process(x, y_c)

        run_c()
        mismatched = int(np.count_nonzero(y_c != y_kernel))
        c_entries.append(
            {
                "label": label,
                "build": cmdline,
                "for_goal": for_goal,
                "identical": mismatched == 0 and np.array_equal(plain.clipped, kernel_clipped),
                "mismatched_words": mismatched,
                "clipped": plain.clipped.tolist(),
            }
        )
        contenders.append((label, run_c))
    # Interleave the contenders in every repetition, so that a burst of load
    # from other processes hits all of them alike; keep each one's best.
    times = {name: [] for name, _ in contenders}
    for _ in range(reps):
        for name, fn in contenders:
            t0 = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - t0)
    result = {
        "frames": nframes,
        "channels": BENCH_CHANNELS,
        "samples": nsamples,
        "setting": f"{BENCH_BITS} bits, {BENCH_DITHER}, {BENCH_SHAPER}, seed {BENCH_SEED}, float64 in, int16 out",
        "kernel": {**summary(times["kernel"]), "module": kernel_name, "first_call_s": first_call_s,
                   "clipped": kernel_clipped.tolist()},  # fmt: skip
        "c": c_entries,
    }
    result["kernel"]["samples_per_s"] = nsamples / result["kernel"]["best_s"]
    for entry in c_entries:
        entry.update(summary(times[entry["label"]]))
        entry["samples_per_s"] = nsamples / entry["best_s"]
        entry["kernel_speedup"] = entry["best_s"] / result["kernel"]["best_s"]
    return result


# --------------------------------------------------------------------------------------
# 2. end-to-end render against pure I/O
# --------------------------------------------------------------------------------------


def render_command(in_path, out_path):
    """The ``rtstage render`` command line under test."""
    return [
        sys.executable, "-m", "rtstage", "render", in_path, out_path,
        "--bits", str(BENCH_BITS), "--dither", BENCH_DITHER, "--shaper", BENCH_SHAPER,
        "--seed", str(BENCH_SEED), "--force",
    ]  # fmt: skip


def write_programme_wav(path, seconds, subtype="PCM_24", chunk_frames=1 << 20):
    """Write the generated programme to a WAV file (once; reused while it exists)."""
    import soundfile as sf

    nframes = int(round(seconds * BENCH_SAMPLERATE))
    if os.path.exists(path):
        with sf.SoundFile(path) as f:
            if f.frames == nframes and f.samplerate == BENCH_SAMPLERATE and f.subtype == subtype:
                return
    log(f"writing {seconds:g} s test programme to {path}")
    x = make_programme(nframes, BENCH_SAMPLERATE)
    tmp = path + ".part.wav"
    with sf.SoundFile(tmp, "w", BENCH_SAMPLERATE, BENCH_CHANNELS, subtype=subtype, format="WAV") as f:
        for start in range(0, nframes, chunk_frames):
            f.write(x[start : start + chunk_frames])
    os.replace(tmp, path)


def pure_io(in_path, out_path, blocksize=65536):
    """The I/O baseline: read ``in_path`` with soundfile, write a 16-bit WAV of the same size.

    The input is read as float64, as the renderer reads it, in large blocks;
    each block's frames are written from a preallocated int16 array (the
    words' values do not change libsndfile's cost of writing PCM_16).  No
    other work is done, so this is the floor that a render cannot go below.
    """
    import soundfile as sf

    with sf.SoundFile(in_path) as src, sf.SoundFile(
        out_path, "w", src.samplerate, src.channels, subtype="PCM_16", format="WAV"
    ) as dst:
        buf = np.empty((blocksize, src.channels), dtype=np.float64)
        words = np.zeros((blocksize, src.channels), dtype=np.int16)
        while True:
            n = src.read(out=buf).shape[0]
            if n == 0:
                break
            dst.write(words[:n])


def run_render_subprocess(in_path, out_path, env):
    proc = subprocess.run(render_command(in_path, out_path), cwd=REPO_DIR, env=env, capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"rtstage render exited with {proc.returncode}: {proc.stderr.strip()[-400:]}")


def render_in_process(in_path, out_path):
    """Call :func:`rtstage.render.render_file` with the settings of :func:`render_command`."""
    from rtstage import render as R

    settings = EngineSettings(bits=BENCH_BITS, dither=BENCH_DITHER, shaper=BENCH_SHAPER, seed=BENCH_SEED)
    return R.render_file(in_path, out_path, settings, force=True)


def subprocess_env():
    env = dict(os.environ)
    env["PYTHONPATH"] = REPO_DIR + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def bench_render(minutes, reps):
    """``rtstage render`` (subprocess and in-process) against pure soundfile I/O."""
    import soundfile as sf

    seconds = 60.0 * minutes
    in_path = os.path.join(BUILD_DIR, f"programme_{minutes:g}min_48k_24bit.wav")
    out_io = os.path.join(BUILD_DIR, "out_pure_io.wav")
    out_cli = os.path.join(BUILD_DIR, "out_render_cli.wav")
    out_lib = os.path.join(BUILD_DIR, "out_render_lib.wav")
    write_programme_wav(in_path, seconds)
    env = subprocess_env()
    log(f"render: {minutes:g} min stereo 48 kHz, best of {reps} (interleaved)")
    # one untimed run of each warms the page cache and the numba cache
    pure_io(in_path, out_io)
    run_render_subprocess(in_path, out_cli, env)
    render_in_process(in_path, out_lib)
    times = {"io": [], "cli": [], "lib": []}
    for _ in range(reps):
        for key, fn in (
            ("io", lambda: pure_io(in_path, out_io)),
            ("cli", lambda: run_render_subprocess(in_path, out_cli, env)),
            ("lib", lambda: render_in_process(in_path, out_lib)),
        ):
            t0 = time.perf_counter()
            fn()
            times[key].append(time.perf_counter() - t0)
    sizes = {k: os.path.getsize(p) for k, p in (("io", out_io), ("cli", out_cli), ("lib", out_lib))}
    with sf.SoundFile(out_cli) as f:
        out_subtype = f.subtype
    same_words = _files_equal(out_cli, out_lib)
    result = {
        "input": in_path,
        "input_bytes": os.path.getsize(in_path),
        "seconds_of_audio": seconds,
        "output_subtype": out_subtype,
        "output_bytes": sizes,
        "cli_and_lib_identical": same_words,
        "io": summary(times["io"]),
        "cli": summary(times["cli"]),
        "lib": summary(times["lib"]),
    }
    result["cli_ratio"] = result["cli"]["best_s"] / result["io"]["best_s"]
    result["lib_ratio"] = result["lib"]["best_s"] / result["io"]["best_s"]
    for p in (out_io, out_cli, out_lib):
        os.remove(p)
    return result


def _files_equal(path_a, path_b, chunk_bytes=1 << 24):
    if os.path.getsize(path_a) != os.path.getsize(path_b):
        return False
    with open(path_a, "rb") as fa, open(path_b, "rb") as fb:
        while True:
            a = fa.read(chunk_bytes)
            b = fb.read(chunk_bytes)
            if a != b:
                return False
            if not a:
                return True


# --------------------------------------------------------------------------------------
# 3. warm start
# --------------------------------------------------------------------------------------


def bench_warm_start(reps):
    """Wall time of fresh ``rtstage render`` processes on a 1-second file, numba cache warm."""
    in_path = os.path.join(BUILD_DIR, "programme_1s_48k_24bit.wav")
    out_path = os.path.join(BUILD_DIR, "out_warm.wav")
    write_programme_wav(in_path, 1.0)
    env = subprocess_env()
    log(f"warm start: 1 s file, fresh process each time, best of {reps}")
    times_s = time_best(lambda: run_render_subprocess(in_path, out_path, env), reps, warmup=1)
    # the interpreter and imports alone, for telling start-up apart from work
    import_cmd = [sys.executable, "-c", "import rtstage.cli, rtstage.render, rtstage.engine"]
    import_times_s = time_best(
        lambda: subprocess.run(import_cmd, cwd=REPO_DIR, env=env, check=True, capture_output=True), reps, warmup=1
    )
    bare_times_s = time_best(
        lambda: subprocess.run([sys.executable, "-c", "pass"], check=True, capture_output=True), reps, warmup=1
    )
    steps = [startup_steps(env) for _ in range(reps)]
    os.remove(out_path)
    return {
        "render": summary(times_s),
        "imports": summary(import_times_s),
        "bare_python": summary(bare_times_s),
        "steps_best_s": {key: min(s[key] for s in steps) for key in steps[0]},
    }


_STARTUP_PROBE = """
import json, time
t = [time.perf_counter()]
import numpy; t.append(time.perf_counter())
import numba; t.append(time.perf_counter())
import rtstage.cli, rtstage.render; t.append(time.perf_counter())
rtstage.cli.build_parser(); t.append(time.perf_counter())
from rtstage.engine import Engine, EngineSettings
Engine(EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=1), 2, 48000); t.append(time.perf_counter())
names = ["import numpy", "import numba", "import rtstage.cli, rtstage.render", "cli.build_parser()", "Engine() (numba cache load)"]
print(json.dumps({n: b - a for n, a, b in zip(names, t, t[1:])}))
"""


def startup_steps(env):
    """Seconds spent in each start-up step of a fresh process (cache warm)."""
    proc = subprocess.run([sys.executable, "-c", _STARTUP_PROBE], cwd=REPO_DIR, env=env, check=True,
                          capture_output=True, text=True)  # fmt: skip
    return json.loads(proc.stdout.strip().splitlines()[-1])


# --------------------------------------------------------------------------------------
# report
# --------------------------------------------------------------------------------------


def verdict(ok):
    return "PASS" if ok else "MISS"


def goals(results):
    """The three goals as (name, measured, goal text, ok)."""
    rows = []
    kr = results.get("kernel")
    if kr:
        for c in kr["c"]:
            if c["for_goal"]:
                ok = c["identical"] and c["kernel_speedup"] >= GOAL_KERNEL_SPEEDUP
                rows.append(("kernel vs plain C (" + c["label"] + ")", f"{c['kernel_speedup']:.2f}x",
                             f">= {GOAL_KERNEL_SPEEDUP:g}x, bit-identical", ok))  # fmt: skip
    rr = results.get("render")
    if rr and "error" not in rr:
        ok = rr["cli_ratio"] <= GOAL_RENDER_RATIO
        rows.append(("rtstage render vs pure I/O", f"{rr['cli_ratio']:.2f}x", f"<= {GOAL_RENDER_RATIO:g}x", ok))
    elif rr:
        rows.append(("rtstage render vs pure I/O", "n/a", f"<= {GOAL_RENDER_RATIO:g}x", False))
    wr = results.get("warm")
    if wr and "error" not in wr:
        ok = wr["render"]["best_s"] <= GOAL_WARM_START_S
        rows.append(("warm start, 1 s file", f"{wr['render']['best_s']:.3f} s", f"<= {GOAL_WARM_START_S:g} s", ok))
    elif wr:
        rows.append(("warm start, 1 s file", "n/a", f"<= {GOAL_WARM_START_S:g} s", False))
    return rows


def _t(s):
    return f"{s['best_s'] * 1e3:9.1f} ms  (median {s['median_s'] * 1e3:.1f}, spread {100 * s['spread']:.0f}%)"


def print_table(results, out=sys.stdout):
    """Human-readable report."""
    w = out.write
    m = results["machine"]
    w(f"rtstage core benchmark -- {m['cpu']}, {m['cores']} cores, load {m['loadavg']}, python {m['python']}\n")
    w("(times are best of N; spread = slowest/best - 1, a measure of the machine's noise)\n\n")
    kr = results.get("kernel")
    if kr:
        w(f"1. kernel throughput: {kr['samples']} samples ({kr['frames']} frames x {kr['channels']} ch), {kr['setting']}\n")
        k = kr["kernel"]
        w(f"   {'kernel: ' + k['module']:34s} {_t(k)}  {k['samples_per_s'] / 1e6:7.1f} Msamples/s\n")
        for c in kr["c"]:
            w(f"   {'plain C, ' + c['label']:34s} {_t(c)}  {c['samples_per_s'] / 1e6:7.1f} Msamples/s"
              f"  -> kernel {c['kernel_speedup']:.2f}x\n")  # fmt: skip
        for c in kr["c"]:
            same = "IDENTICAL" if c["identical"] else f"DIFFERENT ({c['mismatched_words']} words differ)"
            w(f"   check: plain C ({c['label']}) output vs kernel output, {kr['samples']} words: {same}\n")
        w(f"   (kernel first call, compile or cache load: {k['first_call_s']:.2f} s)\n\n")
    rr = results.get("render")
    if rr and "error" in rr:
        w(f"2. end-to-end render: not measured: {rr['error']}\n\n")
    elif rr:
        w(f"2. end-to-end render: {rr['seconds_of_audio'] / 60:g} min stereo 48 kHz, 24-bit WAV in "
          f"({rr['input_bytes'] / 1e6:.0f} MB), {rr['output_subtype']} WAV out\n")  # fmt: skip
        w(f"   {'pure I/O (soundfile read+write)':34s} {_t(rr['io'])}\n")
        w(f"   {'rtstage render (subprocess)':34s} {_t(rr['cli'])}  -> {rr['cli_ratio']:.2f}x I/O\n")
        w(f"   {'render_file() (in process)':34s} {_t(rr['lib'])}  -> {rr['lib_ratio']:.2f}x I/O\n")
        w(f"   output sizes (bytes): {rr['output_bytes']}; subprocess and in-process outputs identical: "
          f"{rr['cli_and_lib_identical']}\n\n")  # fmt: skip
    wr = results.get("warm")
    if wr and "error" in wr:
        w(f"3. warm start: not measured: {wr['error']}\n\n")
    elif wr:
        w("3. warm start (fresh process, numba cache warm):\n")
        w(f"   {'rtstage render, 1 s file':34s} {_t(wr['render'])}\n")
        w(f"   {'python + rtstage imports only':34s} {_t(wr['imports'])}\n")
        w(f"   {'bare python':34s} {_t(wr['bare_python'])}\n")
        w("   start-up steps in a fresh process (best of N each):\n")
        for name, step_s in wr["steps_best_s"].items():
            w(f"     {name:40s} {step_s * 1e3:8.1f} ms\n")
        w("\n")
    w("goals\n")
    for name, measured, goal, ok in goals(results):
        w(f"   {name:38s} {measured:>10s}   goal {goal:28s} {verdict(ok)}\n")


def machine_info():
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "loadavg": " ".join(f"{v:.2f}" for v in load),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "numba": __import__("numba").__version__,
        "gcc": subprocess.run(["gcc", "-dumpfullversion"], capture_output=True, text=True).stdout.strip()
        if shutil.which("gcc")
        else None,
    }


def main(argv=None):
    parser = argparse.ArgumentParser(description="Benchmark rtstage's core engine against plain C and pure I/O.")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of the table")
    parser.add_argument("--reps", type=int, default=9, help="timed repetitions per measurement (best is kept)")
    parser.add_argument("--kernel-seconds", type=float, default=10.0, help="seconds of audio per kernel run")
    parser.add_argument("--render-minutes", type=float, default=10.0, help="length of the render test file")
    parser.add_argument("--render-reps", type=int, default=3, help="timed repetitions of the render comparison")
    parser.add_argument("--kernel-from", metavar="PATH", help="measure a private kernel copy (a .py file) instead of rtstage.kernel")
    parser.add_argument("--skip-kernel", action="store_true")
    parser.add_argument("--skip-render", action="store_true")
    parser.add_argument("--skip-warm", action="store_true")
    args = parser.parse_args(argv)
    if args.reps < 1 or args.render_reps < 1:
        parser.error("--reps and --render-reps must be at least 1")
    os.makedirs(BUILD_DIR, exist_ok=True)
    results = {"machine": machine_info()}
    if not args.skip_kernel:
        results["kernel"] = bench_kernel(args.kernel_seconds, args.reps, args.kernel_from)
    if not args.skip_render:
        try:
            results["render"] = bench_render(args.render_minutes, args.render_reps)
        except (ImportError, AttributeError, RuntimeError, OSError) as exc:
            log(f"render not measured: {exc}")
            results["render"] = {"error": str(exc).splitlines()[-1] if str(exc) else type(exc).__name__}
    if not args.skip_warm:
        try:
            results["warm"] = bench_warm_start(args.reps)
        except (RuntimeError, OSError, subprocess.CalledProcessError) as exc:
            log(f"warm start not measured: {exc}")
            results["warm"] = {"error": str(exc).splitlines()[-1] if str(exc) else type(exc).__name__}
    results["goals"] = [
        {"name": name, "measured": measured, "goal": goal, "verdict": verdict(ok)}
        for name, measured, goal, ok in goals(results)
    ]
    if args.json:
        json.dump(results, sys.stdout, indent=2, default=float)
        sys.stdout.write("\n")
    else:
        print_table(results)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
