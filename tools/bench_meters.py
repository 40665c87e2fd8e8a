"""Live meter cost: on the audio thread (vs the kernel alone) and on the meter thread (CPU share at 48 kHz stereo).

1. **Audio thread.**  One compiled loop runs the callback's per-block work on
   10 s of a generated stereo programme at 48 kHz (float64 in, int16 out,
   16 bits, TPDF, ``wannamaker-f9``), in blocks of 64 and 256 frames, twice:
   ``process_block`` with the meter tap off (a zero-row ``vq``), and
   ``process_block`` with the tap on plus :func:`rtstage.live.shared.meter_ring_write`
   (the consumer's tail is advanced in the same loop, so nothing is dropped).
   Reported: the extra time as a fraction of the kernel's own time (goal
   <= 0.10, issue 17), best of ``--reps`` runs each.  As in the live callback,
   the kernel's taps write into the meter ring in place when the block fits
   before the ring's end (:func:`rtstage.live.shared.meter_ring_reserve`).
2. **Meter thread.**  A :class:`rtstage.live.meterthread.MeterThread` drains the
   same programme from a meter ring filled in 64-frame blocks, publishing a
   snapshot every 100 ms of audio (10 Hz, as live); reported: thread CPU time
   per second of audio (the share of one core it needs in real time).

Usage: ``.venv/bin/python tools/bench_meters.py [--seconds 1] [--reps 41] [--json]``
"""

import argparse
import json
import sys
import time

import numpy as np
from numba import njit

from rtstage import EngineSettings
from rtstage import kernel as K
from rtstage.engine import encode_params
from rtstage.live import shared as S
from rtstage.live.meterthread import MeterThread
from rtstage.live.sources import generate

SR = 48000
NCH = 2


@njit(nogil=True)
def _loop(x, y, vq, blocksize, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag, ctl, ring_x, ring_w,
          metered):
    nframes = x.shape[0]
    pos = 0
    while pos < nframes:
        n = min(blocksize, nframes - pos)
        # as the live callback does: the kernel's taps write into the meter ring in place when the
        # block fits before the ring's end, else into scratch rows that are then copied
        slot = S.meter_ring_reserve(ctl, n) if metered else -1
        if slot >= 0:
            K.process_block(x[pos:], y[pos:], ring_x[slot : slot + n], n, iparams, fparams, hist, counts, clock, ramp,
                            rng_words, rng_tag, ring_w[slot : slot + n])
            S.meter_ring_commit(ctl, n)
        else:
            K.process_block(x[pos:], y[pos:], vq, n, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag)
            if metered:
                S.meter_ring_write(ctl, ring_x, ring_w, vq, y[pos:], n)
        if metered:
            ctl[S.C_MRING_TAIL] = ctl[S.C_MRING_HEAD]  # the consumer keeps up
        pos += n


def _state(settings):
    st = K.KernelState(NCH)
    encode_params(settings, SR, 0, st.iparams, st.fparams)
    st.reset(0)
    return st


def audio_thread(x, settings, blocksize, reps):
    """(kernel-only seconds, kernel+meter seconds), best of ``reps``."""
    blk = S.SharedBlock(NCH, 16, blocksize, 0, 0, 8 * blocksize)
    y = np.zeros(x.shape, dtype=np.int16)
    vq_on = np.zeros((blocksize, NCH))
    vq_off = np.zeros((0, NCH))
    best = {False: float("inf"), True: float("inf")}
    for _ in range(reps):
        for metered in (False, True):
            st = _state(settings)
            t0 = time.perf_counter()
            _loop(x, y, vq_on if metered else vq_off, blocksize, *st.arrays(), blk.ctl, blk.meter_x, blk.meter_words,
                  metered)
            best[metered] = min(best[metered], time.perf_counter() - t0)
    return best[False], best[True]


def meter_thread(x, settings, blocksize=64):
    """Meter-thread CPU seconds for ``x``, fed and drained as live (snapshot every 100 ms of audio)."""
    blk = S.SharedBlock(NCH, 16, blocksize, 0, 0, SR)
    encode_params(settings, SR, 0, blk.kernel.iparams, blk.kernel.fparams)
    blk.kernel.reset(0)
    y = np.zeros(x.shape, dtype=np.int16)
    vq = np.zeros(x.shape)
    # Words and tap values straight from the kernel (compiled before timing).
    K.process_block(x, y, vq, x.shape[0], *blk.kernel.arrays())
    meters = MeterThread(blk, SR)
    period = SR // 10
    busy = 0.0
    for start in range(0, x.shape[0], period):
        stop = min(start + period, x.shape[0])
        for b in range(start, stop, blocksize):
            n = min(blocksize, stop - b)
            S.meter_ring_write(blk.ctl, blk.meter_x, blk.meter_words, vq[b:], y[b:], n)
        t0 = time.thread_time()
        meters.step(final=True)
        busy += time.thread_time() - t0
    assert meters.latest()["frame"] == x.shape[0]
    return busy


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seconds", type=float, default=1.0, help="audio per timed run (short runs fit in a time slice)")
    p.add_argument("--reps", type=int, default=41)
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    settings = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=1).resolved()
    nframes = int(args.seconds * SR)
    x = generate("noise:level_dbfs=-12,seed=3", SR, NCH, 0, nframes)
    print("warming up (compiling)", file=sys.stderr)
    audio_thread(x[:4096], settings, 64, 1)
    meter_thread(x[: SR // 2], settings)
    result = {"audio_s": args.seconds, "samplerate": SR, "channels": NCH, "blocks": {}}
    for blocksize in (64, 256):
        plain_s, metered_s = audio_thread(x, settings, blocksize, args.reps)
        result["blocks"][str(blocksize)] = {
            "kernel_s": round(plain_s, 6),
            "kernel_plus_meter_s": round(metered_s, 6),
            "meter_over_kernel": round((metered_s - plain_s) / plain_s, 4),
        }
        print(f"{blocksize}-frame blocks: meter work on the audio thread = "
              f"{100 * (metered_s - plain_s) / plain_s:.1f} % of the kernel's time (goal <= 10 %)", file=sys.stderr)
    busy_s = meter_thread(x, settings)
    result["meter_thread_cpu_s"] = round(busy_s, 4)
    result["meter_thread_core_share"] = round(busy_s / args.seconds, 4)
    print(f"meter thread: {100 * busy_s / args.seconds:.1f} % of one core at 48 kHz stereo", file=sys.stderr)
    if args.json:
        print(json.dumps(result))
    else:
        print(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
