"""Benchmark of rtstage's core engine (a tool, not a test).

Three measurements, each reported as a ratio of times taken in the same run,
so that the figures mean something on a shared, noisy machine:

1. **Kernel throughput.**  :func:`rtstage.kernel.process_block` against
   ``tools/kernel_plain.c``, a plain C version of the same recurrence built
   here with ``gcc -O3``, on the same input (2 channels, TPDF, 16 bits,
   ``wannamaker-f9``).  Both outputs are compared word for word before any
   time is reported; a benchmark of two different computations is worthless.
   Goal: the kernel at least 4x the plain C ``-O3`` throughput and 2.5x the
   ``-march=native`` build.
2. **End-to-end render.**  ``rtstage render`` of a 10-minute stereo 48 kHz
   24-bit WAV to 16 bits, as a subprocess and as an in-process
   :func:`rtstage.render.render_file` call, against pure I/O with soundfile
   (read the same input, write a 16-bit WAV of the same size).
   Goal: the subprocess at most 1.5x the pure I/O time; ``rtstage pipe`` at
   least 0.9x the render's throughput.
3. **Warm start.**  Wall time of a fresh ``rtstage render`` process on a
   1-second file once the caches are warm (the kernel built ahead of time,
   :mod:`rtstage.kernel_aot`, or else numba's cache).  Goal: at most 0.5 s.

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

GOAL_KERNEL_SPEEDUP = 4.0
"""Kernel throughput against the plain C loop built with ``gcc -O3``."""
GOAL_KERNEL_SPEEDUP_NATIVE = 2.5
"""Kernel throughput against the same C built with ``-march=native``."""
GOAL_RENDER_RATIO = 1.5
GOAL_PIPE_RATIO = 0.9
"""``rtstage pipe`` throughput as a fraction of ``rtstage render``'s on the same material."""
GOAL_WARM_START_S = 0.5

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

    def __init__(self, fn, settings, channels, iparams, fparams):
        self.fn = fn
        self.channels = channels
        self.bits = int(iparams[K.IP_BITS])
        self.seed = int(settings.seed)
        self.ntaps = int(iparams[K.IP_NTAPS])
        self.coefs = np.ascontiguousarray(fparams[K.FP_COEF0 : K.FP_COEF0 + max(self.ntaps, 1)], dtype=np.float64)
        self.gain = float(fparams[K.FP_GAIN])
        self.dither_scale = float(fparams[K.FP_DITHER_SCALE])
        self.feedback_peak = float(fparams[K.FP_FEEDBACK_PEAK])
        self.out_shift = int(iparams[K.IP_OUT_SHIFT])
        self.hist = np.zeros(channels * self.MAX_TAPS, dtype=np.float64)
        self.clipped = np.zeros(channels, dtype=np.int64)
        self.nonfinite = np.zeros(channels, dtype=np.int64)

    def reset(self):
        self.hist[:] = 0.0
        self.clipped[:] = 0
        self.nonfinite[:] = 0

    def process(self, x, y, frame0=0):
        self.fn(
            x, y, x.shape[0], self.channels, self.bits, self.seed, self.coefs, self.ntaps,
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


def kernel_at_revision(rev):
    """Write ``rtstage/kernel.py`` as of git revision ``rev`` into ``tools/build/`` and return its path.

    Its relative imports become absolute (``from rtstage._philox``), so that
    it runs against today's generator; it is measured beside today's kernel
    in the same run (the before/after table) and its words are compared.
    """
    text = subprocess.run(["git", "show", f"{rev}:rtstage/kernel.py"], cwd=REPO_DIR, check=True, capture_output=True,
                          text=True).stdout  # fmt: skip
    text = text.replace("from ._philox import", "from rtstage._philox import").replace("from .", "from rtstage.")
    sha = subprocess.run(["git", "rev-parse", "--short", rev], cwd=REPO_DIR, check=True, capture_output=True,
                         text=True).stdout.strip()  # fmt: skip
    os.makedirs(BUILD_DIR, exist_ok=True)
    path = os.path.join(BUILD_DIR, f"kernel_at_{sha}.py")
    if not os.path.exists(path) or open(path).read() != text:
        with open(path, "w") as f:
            f.write(text)
    return path


def programme_channels(nframes, channels):
    """The stereo programme spread over ``channels`` channels (each a little quieter than the last pair)."""
    stereo = make_programme(nframes, BENCH_SAMPLERATE)
    x = np.empty((nframes, channels), dtype=np.float64)
    for c in range(channels):
        x[:, c] = stereo[:, c % 2] * (1.0 - 0.01 * (c // 2))
    return x


def _c_builds():
    """[(label, fn, cmdline, for_goal)] of the C baselines that build here."""
    builds = []
    for label, flags, for_goal in C_BUILDS:
        tag = "o3" if not flags else "o3_" + "_".join(f.strip("-").replace("=", "") for f in flags)
        try:
            fn, cmdline = build_plain_c(flags, tag)
        except (OSError, subprocess.CalledProcessError) as exc:
            log(f"cannot build {label}: {exc}")
            continue
        builds.append((label, fn, cmdline, for_goal))
    return builds


def compare_kernels(kernels, x, shaper, reps, c_builds):
    """Time ``kernels`` (name -> module) and the C builds on ``x``; check every output against the first kernel's.

    Returns ``{"kernels": {name: entry}, "c": [entry], "identical_all": bool}``; an entry holds
    the timing summary only when its words (and clip counts) equal the reference kernel's.
    """
    nframes, nch = x.shape
    settings = EngineSettings(bits=BENCH_BITS, dither=BENCH_DITHER, shaper=shaper, seed=BENCH_SEED).resolved()
    contenders = []
    outputs = {}
    states = {}
    for name, KM in kernels.items():
        st = KM.KernelState(nch)
        encode_params(settings, BENCH_SAMPLERATE, 16 - BENCH_BITS, st.iparams, st.fparams)
        st.reset(0)
        y = np.full((nframes, nch), 0x5A5A, dtype=np.int16)
        no_tap = np.empty((0, nch))

        def run(KM=KM, st=st, y=y, no_tap=no_tap):
            st.reset(0)
            KM.process_block(x, y, no_tap, nframes, *st.arrays())

        run()  # compiles, or loads the numba cache
        outputs[name] = (y, st.counts[:, K.CNT_CLIPPED].copy())
        states[name] = st
        contenders.append((name, run, True))
    ref_name = next(iter(kernels))
    ref_y, ref_clipped = outputs[ref_name]
    c_entries = []
    for label, fn, cmdline, for_goal in c_builds:
        st = states[ref_name]
        plain = PlainC(fn, settings, nch, st.iparams, st.fparams)
        y_c = np.full((nframes, nch), 0x5A5A, dtype=np.int16)

        def run_c(plain=plain, y_c=y_c):
            plain.reset()
            plain.process(x, y_c)

        run_c()
        outputs[label] = (y_c, plain.clipped.copy())
        c_entries.append({"label": label, "build": cmdline, "for_goal": for_goal})
        contenders.append((label, run_c, False))
    identical = {}
    for name, (y, clipped) in outputs.items():
        mismatched = int(np.count_nonzero(y != ref_y))
        identical[name] = (mismatched == 0 and np.array_equal(clipped, ref_clipped), mismatched)
    # Interleave the contenders in every repetition, so that a burst of load
    # from other processes hits all of them alike; keep each one's best.
    times = {name: [] for name, _, _ in contenders}
    for _ in range(reps):
        for name, fn, _ in contenders:
            t0 = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - t0)
    nsamples = nframes * nch
    kernel_entries = {}
    for name in kernels:
        same, mismatched = identical[name]
        entry = {"identical": same, "mismatched_words": mismatched, "clipped": outputs[name][1].tolist()}
        if same:  # a speed is printed only for outputs equal word for word
            entry.update(summary(times[name]))
            entry["samples_per_s"] = nsamples / entry["best_s"]
        kernel_entries[name] = entry
    ref_best = kernel_entries[ref_name]["best_s"]
    for name, entry in kernel_entries.items():
        if "best_s" in entry:
            entry["speedup_vs_first"] = entry["best_s"] / ref_best
    for entry in c_entries:
        same, mismatched = identical[entry["label"]]
        entry.update({"identical": same, "mismatched_words": mismatched, "clipped": outputs[entry["label"]][1].tolist()})
        if same:
            entry.update(summary(times[entry["label"]]))
            entry["samples_per_s"] = nsamples / entry["best_s"]
            entry["kernel_speedup"] = entry["best_s"] / ref_best
    return {"frames": nframes, "channels": nch, "samples": nsamples, "shaper": shaper, "kernels": kernel_entries,
            "c": c_entries, "identical_all": all(v[0] for v in identical.values())}


def bench_kernel(seconds, reps, kernel_path=None, before_rev=None):
    """Kernel against the plain C builds (and the kernel at ``before_rev``) on ``seconds`` of stereo audio."""
    KM, kernel_name = load_kernel_module(kernel_path)
    kernels = {kernel_name: KM}
    if before_rev:
        path = kernel_at_revision(before_rev)
        BM, _ = load_kernel_module(path)
        kernels[f"kernel at {before_rev}"] = BM
    nframes = int(round(seconds * BENCH_SAMPLERATE))
    x = make_programme(nframes, BENCH_SAMPLERATE)
    log(f"kernel: {seconds:g} s of stereo audio ({nframes * BENCH_CHANNELS} samples), best of {reps}, interleaved")
    t0 = time.perf_counter()
    KM.process_block(x[:64], np.zeros((64, 2), np.int16), np.empty((0, 2)), 64, *KM.KernelState(2).arrays())
    first_call_s = time.perf_counter() - t0
    result = compare_kernels(kernels, x, BENCH_SHAPER, reps, _c_builds())
    result["recurrence_alone"] = recurrence_alone(KM, x, reps)
    result["setting"] = f"{BENCH_BITS} bits, {BENCH_DITHER}, {BENCH_SHAPER}, seed {BENCH_SEED}, float64 in, int16 out"
    result["kernel_name"] = kernel_name
    result["first_call_s"] = first_call_s
    return result


def recurrence_alone(KM, x, reps):
    """Throughput of the same kernel with no dither: the feedback recurrence and packing alone.

    The recurrence is serial per channel (the next word needs the last
    error, and the documented sum ``h_1·e[n-1] + … + h_N·e[n-N]`` puts every
    tap's addition on that path), so no dithered kernel can run faster than
    this on the same channels; it bounds the speed-up any kernel can have
    over the plain C loop.  Its words differ from the dithered ones by
    design, so nothing is compared.
    """
    nframes, nch = x.shape
    settings = EngineSettings(bits=BENCH_BITS, dither="none", shaper=BENCH_SHAPER, seed=BENCH_SEED,
                              accept_unsafe=True).resolved()  # fmt: skip
    st = KM.KernelState(nch)
    encode_params(settings, BENCH_SAMPLERATE, 16 - BENCH_BITS, st.iparams, st.fparams)
    y = np.zeros((nframes, nch), dtype=np.int16)
    no_tap = np.empty((0, nch))

    def run():
        st.reset(0)
        KM.process_block(x, y, no_tap, nframes, *st.arrays())

    times = time_best(run, reps)
    out = summary(times)
    out["samples_per_s"] = nframes * nch / out["best_s"]
    return out


MATRIX_CHANNELS = (1, 2, 8, 64)
MATRIX_SHAPERS = (("flat", 0), ("diff2", 2), (BENCH_SHAPER, 9), ("thr24-48k", 24))


def bench_matrix(seconds, reps, kernel_path=None, before_rev=None):
    """The kernel for 1, 2, 8, 64 channels (9 taps) and 0, 2, 9, 24 taps (stereo), each against the C builds."""
    KM, kernel_name = load_kernel_module(kernel_path)
    kernels = {kernel_name: KM}
    if before_rev:
        BM, _ = load_kernel_module(kernel_at_revision(before_rev))
        kernels[f"kernel at {before_rev}"] = BM
    builds = _c_builds()
    nframes = int(round(seconds * BENCH_SAMPLERATE))
    rows = []
    cases = [(nch, BENCH_SHAPER, 9) for nch in MATRIX_CHANNELS]
    cases += [(2, shaper, ntaps) for shaper, ntaps in MATRIX_SHAPERS if ntaps != 9]
    for nch, shaper, ntaps in cases:
        log(f"matrix: {nch} ch, {ntaps} taps ({shaper}), {seconds:g} s, best of {reps}")
        x = programme_channels(nframes, nch)
        r = compare_kernels(kernels, x, shaper, reps, builds)
        r["ntaps"] = ntaps
        rows.append(r)
    return {"kernel_name": kernel_name, "seconds": seconds, "rows": rows}


# --------------------------------------------------------------------------------------
# 2. end-to-end render against pure I/O
# --------------------------------------------------------------------------------------


def render_command(in_path, out_path):
    """The ``rtstage render`` command line under test."""
    return [
        sys.executable, "-m", "rtstage", "render", in_path, out_path,
        "--bits", str(BENCH_BITS), "--dither", BENCH_DITHER, "--shaper", BENCH_SHAPER,
        "--seed", str(BENCH_SEED), "--overwrite",
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


def pipe_command():
    """The ``rtstage pipe`` command line under test (same settings as :func:`render_command`)."""
    return [
        sys.executable, "-m", "rtstage", "pipe", "--samplerate", str(BENCH_SAMPLERATE), "--channels", str(BENCH_CHANNELS),
        "--in-format", "s24le", "--out-format", "s16le", "--bits", str(BENCH_BITS), "--dither", BENCH_DITHER,
        "--shaper", BENCH_SHAPER, "--seed", str(BENCH_SEED),
    ]  # fmt: skip


def write_raw_s24(wav_path, raw_path, chunk_frames=1 << 20):
    """The WAV's samples as raw s24le (once; reused while it exists): the pipe's input, the same material."""
    import soundfile as sf

    with sf.SoundFile(wav_path) as src:
        want = src.frames * src.channels * 3
        if os.path.exists(raw_path) and os.path.getsize(raw_path) == want:
            return
        with sf.SoundFile(raw_path + ".part", "w", src.samplerate, src.channels, subtype="PCM_24", format="RAW",
                          endian="LITTLE") as dst:  # fmt: skip
            while True:
                block = src.read(chunk_frames, dtype="int32")
                if block.shape[0] == 0:
                    break
                dst.write(block)
    os.replace(raw_path + ".part", raw_path)


def run_pipe_subprocess(raw_path, out_path, env):
    with open(raw_path, "rb") as fin, open(out_path, "wb") as fout:
        proc = subprocess.run(pipe_command(), cwd=REPO_DIR, env=env, stdin=fin, stdout=fout, stderr=subprocess.PIPE,
                              text=True)  # fmt: skip
    if proc.returncode != 0:
        raise RuntimeError(f"rtstage pipe exited with {proc.returncode}: {proc.stderr.strip()[-400:]}")


_RSS_PROBE = (
    "import resource, subprocess, sys\n"
    "proc = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)\n"
    "sys.stderr.write(proc.stderr.decode()[-400:]) if proc.returncode else None\n"
    "print(proc.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
)


def peak_rss_kb(cmd, env):
    """Peak resident memory (kB) of ``cmd``, from the kernel's accounting, in a fresh parent of its own."""
    proc = subprocess.run([sys.executable, "-c", _RSS_PROBE, *cmd], cwd=REPO_DIR, env=env, capture_output=True, text=True)
    code, rss_kb = proc.stdout.split()
    if int(code) != 0:
        raise RuntimeError(f"{' '.join(cmd[2:4])} exited with {code}: {proc.stderr.strip()[-400:]}")
    return int(rss_kb)


def bench_memory(minutes_list):
    """Peak RSS of ``rtstage render`` (subprocess) for files of the given lengths: flat in the length?"""
    env = subprocess_env()
    rows = []
    for minutes in minutes_list:
        in_path = os.path.join(BUILD_DIR, f"programme_{minutes:g}min_48k_24bit.wav")
        out_path = os.path.join(BUILD_DIR, "out_memory.wav")
        write_programme_wav(in_path, 60.0 * minutes)
        log(f"memory: rtstage render of {minutes:g} min")
        t0 = time.perf_counter()
        rss_kb = peak_rss_kb(render_command(in_path, out_path), env)
        rows.append({"minutes": minutes, "input_bytes": os.path.getsize(in_path), "peak_rss_kb": rss_kb,
                     "wall_s": time.perf_counter() - t0})
        os.remove(out_path)
    return {"rows": rows}


def run_render_subprocess(in_path, out_path, env):
    proc = subprocess.run(render_command(in_path, out_path), cwd=REPO_DIR, env=env, capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"rtstage render exited with {proc.returncode}: {proc.stderr.strip()[-400:]}")


def render_in_process(in_path, out_path):
    """Call :func:`rtstage.render.render_file` with the settings of :func:`render_command`."""
    from rtstage import render as R

    settings = EngineSettings(bits=BENCH_BITS, dither=BENCH_DITHER, shaper=BENCH_SHAPER, seed=BENCH_SEED)
    return R.render_file(in_path, out_path, settings, overwrite=True)


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
    raw_in = os.path.join(BUILD_DIR, f"programme_{minutes:g}min_48k_s24le.raw")
    out_pipe = os.path.join(BUILD_DIR, "out_pipe.raw")
    write_programme_wav(in_path, seconds)
    write_raw_s24(in_path, raw_in)
    env = subprocess_env()
    log(f"render: {minutes:g} min stereo 48 kHz, best of {reps} (interleaved)")
    # one untimed run of each warms the page cache and the numba cache
    pure_io(in_path, out_io)
    run_render_subprocess(in_path, out_cli, env)
    render_in_process(in_path, out_lib)
    run_pipe_subprocess(raw_in, out_pipe, env)
    times = {"io": [], "cli": [], "lib": [], "pipe": []}
    for _ in range(reps):
        for key, fn in (
            ("io", lambda: pure_io(in_path, out_io)),
            ("cli", lambda: run_render_subprocess(in_path, out_cli, env)),
            ("lib", lambda: render_in_process(in_path, out_lib)),
            ("pipe", lambda: run_pipe_subprocess(raw_in, out_pipe, env)),
        ):
            t0 = time.perf_counter()
            fn()
            times[key].append(time.perf_counter() - t0)
    sizes = {k: os.path.getsize(p) for k, p in (("io", out_io), ("cli", out_cli), ("lib", out_lib))}
    with sf.SoundFile(out_cli) as f:
        out_subtype = f.subtype
    same_words = _files_equal(out_cli, out_lib)
    with sf.SoundFile(out_cli) as f:
        cli_words = f.read(dtype="int16")
    pipe_words = np.fromfile(out_pipe, dtype="<i2").reshape(-1, BENCH_CHANNELS)
    pipe_same = pipe_words.shape == cli_words.shape and np.array_equal(pipe_words, cli_words)
    del cli_words, pipe_words
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
        "pipe": summary(times["pipe"]),
        "pipe_and_render_identical": pipe_same,
    }
    result["cli_ratio"] = result["cli"]["best_s"] / result["io"]["best_s"]
    result["lib_ratio"] = result["lib"]["best_s"] / result["io"]["best_s"]
    # throughput ratio: render time / pipe time (>= 1 means the pipe is at least as fast)
    result["pipe_throughput_ratio"] = result["cli"]["best_s"] / result["pipe"]["best_s"] if pipe_same else 0.0
    for p in (out_io, out_cli, out_lib, out_pipe):
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
        "steps_best_s": {key: min(s[key] for s in steps) for key in steps[0] if isinstance(steps[0][key], float)},
        "kernel": steps[0]["kernel"],
        "numba_imported": steps[0]["numba imported"],
    }


_STARTUP_PROBE = """
import json, sys, time
t = [time.perf_counter()]
import numpy; t.append(time.perf_counter())
import rtstage.cli, rtstage.render; t.append(time.perf_counter())
rtstage.cli.build_parser("render"); t.append(time.perf_counter())
from rtstage.engine import Engine, EngineSettings
e = Engine(EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=1), 2, 48000); t.append(time.perf_counter())
e.process(numpy.zeros((64, 2))); t.append(time.perf_counter())
names = ["import numpy", "import rtstage.cli, rtstage.render", "cli.build_parser('render')", "Engine() (finds the kernel)",
         "first block (loads the kernel)"]
steps = {n: b - a for n, a, b in zip(names, t, t[1:])}
steps["kernel"] = type(e.process_block).__name__
steps["numba imported"] = "numba" in sys.modules
print(json.dumps(steps))
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
    """The goals as (name, measured, goal text, ok)."""
    rows = []
    kr = results.get("kernel")
    if kr:
        for c in kr["c"]:
            goal = GOAL_KERNEL_SPEEDUP if c["for_goal"] else GOAL_KERNEL_SPEEDUP_NATIVE
            if not c["identical"]:
                rows.append(("kernel vs plain C (" + c["label"] + ")", "DIFFERENT", f">= {goal:g}x, bit-identical", False))
                continue
            rows.append(("kernel vs plain C (" + c["label"] + ")", f"{c['kernel_speedup']:.2f}x",
                         f">= {goal:g}x, bit-identical", c["kernel_speedup"] >= goal))  # fmt: skip
    rr = results.get("render")
    if rr and "error" not in rr:
        ok = rr["cli_ratio"] <= GOAL_RENDER_RATIO
        rows.append(("rtstage render vs pure I/O", f"{rr['cli_ratio']:.2f}x", f"<= {GOAL_RENDER_RATIO:g}x", ok))
        if "pipe" in rr:
            rows.append(("rtstage pipe vs render throughput", f"{rr['pipe_throughput_ratio']:.2f}x",
                         f">= {GOAL_PIPE_RATIO:g}x", rr["pipe_throughput_ratio"] >= GOAL_PIPE_RATIO))  # fmt: skip
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


def _print_comparison(w, r, indent):
    """Kernel(s) and C builds of one :func:`compare_kernels` result; no speed for an output that differs."""
    for name, k in r["kernels"].items():
        if "best_s" in k:
            extra = "" if k["speedup_vs_first"] == 1.0 else f"  (first kernel {k['speedup_vs_first']:.2f}x this)"
            w(f"{indent}{'kernel: ' + name:34s} {_t(k)}  {k['samples_per_s'] / 1e6:7.1f} Msamples/s{extra}\n")
        else:
            w(f"{indent}{'kernel: ' + name:34s} DIFFERENT words ({k['mismatched_words']}): no speed printed\n")
    for c in r["c"]:
        if "best_s" in c:
            w(f"{indent}{'plain C, ' + c['label']:34s} {_t(c)}  {c['samples_per_s'] / 1e6:7.1f} Msamples/s"
              f"  -> kernel {c['kernel_speedup']:.2f}x\n")  # fmt: skip
        else:
            w(f"{indent}{'plain C, ' + c['label']:34s} DIFFERENT words ({c['mismatched_words']}): no speed printed\n")
    first = next(iter(r["kernels"]))
    for name in list(r["kernels"])[1:] + [c["label"] for c in r["c"]]:
        entry = r["kernels"].get(name) or next(c for c in r["c"] if c["label"] == name)
        same = "IDENTICAL" if entry["identical"] else f"DIFFERENT ({entry['mismatched_words']} words differ)"
        w(f"{indent}check: {name} output vs {first} output, {r['samples']} words: {same}\n")


def print_table(results, out=sys.stdout):
    """Human-readable report."""
    w = out.write
    m = results["machine"]
    w(f"rtstage core benchmark -- {m['cpu']}, {m['cores']} cores, load {m['loadavg']}, python {m['python']}\n")
    w("(times are best of N; spread = slowest/best - 1, a measure of the machine's noise)\n\n")
    kr = results.get("kernel")
    if kr:
        w(f"1. kernel throughput: {kr['samples']} samples ({kr['frames']} frames x {kr['channels']} ch), {kr['setting']}\n")
        _print_comparison(w, kr, "   ")
        ra = kr.get("recurrence_alone")
        c_o3 = next((c for c in kr["c"] if c["for_goal"] and "best_s" in c), None)
        if ra and c_o3:
            w(f"   {'bound: same kernel, dither none':34s} {_t(ra)}  {ra['samples_per_s'] / 1e6:7.1f} Msamples/s"
              f"  -> {c_o3['best_s'] / ra['best_s']:.2f}x the plain C -O3 loop: no dithered kernel can beat this\n")
        w(f"   (kernel first call, compile or cache load: {kr['first_call_s']:.2f} s)\n\n")
    mr = results.get("matrix")
    if mr:
        w(f"1b. kernel by channel count and taps ({mr['seconds']:g} s of audio per case, 16 bits, tpdf):\n")
        names = list(mr["rows"][0]["kernels"])
        head = "".join(f"{n[:22]:>24s}" for n in names)
        w(f"   {'ch':>3s} {'taps':>4s}{head}{'C -O3':>12s}{'C native':>12s}  kernel/C-O3  kernel/C-native\n")
        for r in mr["rows"]:
            cells = ""
            for n in names:
                e = r["kernels"][n]
                cells += f"{e['samples_per_s'] / 1e6:17.1f} Ms/s" if "samples_per_s" in e else f"{'DIFFERENT':>24s}"
            cs = {c["label"]: c for c in r["c"]}
            line = f"   {r['channels']:3d} {r['ntaps']:4d}{cells}"
            ratios = ""
            for label, _, _ in C_BUILDS:
                c = cs.get(label)
                if c is None:
                    line += f"{'-':>12s}"
                    ratios += f"{'-':>13s}"
                elif "samples_per_s" not in c:
                    line += f"{'DIFFERENT':>12s}"
                    ratios += f"{'-':>13s}"
                else:
                    line += f"{c['samples_per_s'] / 1e6:7.1f} Ms/s"
                    ratios += f"{c['kernel_speedup']:12.2f}x"
            w(line + ratios + "\n")
        w("   (Ms/s = million samples per second, best of N; every output checked word for word against the first kernel)\n\n")
    rr = results.get("render")
    if rr and "error" in rr:
        w(f"2. end-to-end render: not measured: {rr['error']}\n\n")
    elif rr:
        w(f"2. end-to-end render: {rr['seconds_of_audio'] / 60:g} min stereo 48 kHz, 24-bit WAV in "
          f"({rr['input_bytes'] / 1e6:.0f} MB), {rr['output_subtype']} WAV out\n")  # fmt: skip
        w(f"   {'pure I/O (soundfile read+write)':34s} {_t(rr['io'])}\n")
        w(f"   {'rtstage render (subprocess)':34s} {_t(rr['cli'])}  -> {rr['cli_ratio']:.2f}x I/O\n")
        w(f"   {'render_file() (in process)':34s} {_t(rr['lib'])}  -> {rr['lib_ratio']:.2f}x I/O\n")
        if rr["pipe_and_render_identical"]:
            w(f"   {'rtstage pipe, s24le -> s16le':34s} {_t(rr['pipe'])}  -> {rr['pipe_throughput_ratio']:.2f}x render's throughput\n")
        else:
            w(f"   {'rtstage pipe, s24le -> s16le':34s} DIFFERENT words from the render: no speed printed\n")
        w(f"   output sizes (bytes): {rr['output_bytes']}; subprocess and in-process outputs identical: "
          f"{rr['cli_and_lib_identical']}\n\n")  # fmt: skip
    wr = results.get("warm")
    if wr and "error" in wr:
        w(f"3. warm start: not measured: {wr['error']}\n\n")
    elif wr:
        w("3. warm start (fresh process, caches warm; kernel: "
          + ("built ahead of time, numba not imported" if wr.get("kernel") == "AotKernel" and not wr.get("numba_imported")
             else f"{wr.get('kernel')}, numba imported: {wr.get('numba_imported')}") + "):\n")
        w(f"   {'rtstage render, 1 s file':34s} {_t(wr['render'])}\n")
        w(f"   {'python + rtstage imports only':34s} {_t(wr['imports'])}\n")
        w(f"   {'bare python':34s} {_t(wr['bare_python'])}\n")
        w("   start-up steps in a fresh process (best of N each):\n")
        for name, step_s in wr["steps_best_s"].items():
            w(f"     {name:40s} {step_s * 1e3:8.1f} ms\n")
        w("\n")
    mem = results.get("memory")
    if mem:
        w("4. memory: peak resident set of rtstage render (subprocess), by file length\n")
        for r in mem["rows"]:
            w(f"   {r['minutes']:6g} min ({r['input_bytes'] / 1e6:6.0f} MB in): {r['peak_rss_kb'] / 1024:7.1f} MiB peak RSS"
              f"  ({r['wall_s']:.1f} s)\n")  # fmt: skip
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
    parser.add_argument("--kernel-seconds", type=float, default=0.5,
                        help="seconds of audio per kernel run (short runs fit in one time slice of a loaded machine)")
    parser.add_argument("--kernel-reps", type=int, default=41, help="timed repetitions of each kernel case")
    parser.add_argument("--render-minutes", type=float, default=10.0, help="length of the render test file")
    parser.add_argument("--render-reps", type=int, default=3, help="timed repetitions of the render comparison")
    parser.add_argument("--kernel-from", metavar="PATH", help="measure a private kernel copy (a .py file) instead of rtstage.kernel")
    parser.add_argument("--before", metavar="REV", help="also measure rtstage/kernel.py as of git revision REV (before/after in one run)")
    parser.add_argument("--matrix-seconds", type=float, default=0.2, help="seconds of audio per channel/taps case")
    parser.add_argument("--skip-kernel", action="store_true")
    parser.add_argument("--skip-matrix", action="store_true")
    parser.add_argument("--memory-minutes", metavar="M,M", default="",
                        help="peak RSS of rtstage render for files of these lengths, e.g. 10,60 (default: not measured)")
    parser.add_argument("--skip-render", action="store_true")
    parser.add_argument("--skip-warm", action="store_true")
    args = parser.parse_args(argv)
    if args.reps < 1 or args.render_reps < 1:
        parser.error("--reps and --render-reps must be at least 1")
    os.makedirs(BUILD_DIR, exist_ok=True)
    results = {"machine": machine_info()}
    if not args.skip_kernel:
        results["kernel"] = bench_kernel(args.kernel_seconds, args.kernel_reps, args.kernel_from, args.before)
    if not args.skip_matrix:
        results["matrix"] = bench_matrix(args.matrix_seconds, args.kernel_reps, args.kernel_from, args.before)
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
    if args.memory_minutes:
        results["memory"] = bench_memory([float(m) for m in args.memory_minutes.split(",") if m])
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
