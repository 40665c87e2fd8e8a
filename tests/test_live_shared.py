"""The compiled callback driven directly (no audio device): equals the offline Engine word for word.

Reference: :class:`rtstage.Engine`, the offline driver ``rtstage render`` uses.
"""

import ctypes

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage.engine import encode_params
from rtstage.live import shared as S
from rtstage.live.cfunc import PA_COMPLETE, PA_OUTPUT_UNDERFLOW, build_callback
from rtstage.live.sources import gen_params, generate, parse_source

SR = 48000


def _block(settings, nch, max_frames, ring_frames, source=None, spec=None):
    bits = 16 if settings.bits <= 16 else 32
    blk = S.SharedBlock(nch, bits, max_frames, ring_frames, 0 if source is None else source.shape[0])
    encode_params(settings, SR, (16 if bits == 16 else 32) - settings.bits, blk.kernel.iparams, blk.kernel.fparams)
    blk.kernel.reset(0)
    blk.ctl[S.C_SAMPLERATE] = SR
    if source is not None:
        blk.source[:] = source
        blk.ctl[S.C_IN_MODE] = S.IN_FILE
    else:
        kind, f, a, seed_bits = gen_params(parse_source(spec), SR)
        blk.ctl[S.C_IN_MODE] = S.IN_GENERATOR
        blk.ctl[S.C_GEN_KIND], blk.ctl[S.C_GEN_SEED] = kind, seed_bits
        blk.gen_fp[0], blk.gen_fp[1] = f, a
    return blk


def _call(blk, out, frames, flags=0):
    return build_callback().ctypes(None, ctypes.c_void_p(out.ctypes.data), frames, None, flags, ctypes.c_void_p(blk.address))


@pytest.mark.parametrize("bits,shaper,frames,max_frames", [(16, "wannamaker-f9", 64, 64), (24, "lvw-e5", 100, 64),
                                                           (12, "flat", 1, 32)])
def test_generator_equals_engine(bits, shaper, frames, max_frames):
    st = EngineSettings(bits=bits, dither="tpdf", shaper=shaper, seed=99).resolved()
    spec = "noise:level_dbfs=-6,seed=4"
    blk = _block(st, 2, max_frames, 1 << 14, spec=spec)
    out = np.zeros((frames, 2), dtype=blk.out_dtype)
    got = []
    for _ in range(4000 // frames):
        assert _call(blk, out, frames) == 0
        got.append(out.copy())
    got = np.concatenate(got)
    ref = Engine(st, 2, SR).process(generate(spec, SR, 2, 0, got.shape[0]))
    assert_array_equal(got, ref)
    tap = np.zeros_like(got)
    assert S.ring_read(blk.ctl, blk.ring, tap) == got.shape[0]
    assert_array_equal(tap, ref)


def test_params_take_effect_at_block_boundary():
    a = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f3", seed=5).resolved()
    b = EngineSettings(bits=14, dither="rpdf", shaper="flat", seed=5, gain_db=-6.0).resolved()
    x = generate("tone:freq_hz=1000,level_dbfs=-3", SR, 2, 0, 64 * 20)
    blk = _block(a, 2, 64, 0, source=x)
    new_ip = np.zeros_like(blk.pending_ip)
    new_fp = np.zeros_like(blk.pending_fp)
    out = np.zeros((64, 2), np.int16)
    got = []
    for i in range(20):
        if i == 7:
            encode_params(b, SR, 2, new_ip, new_fp)
            seq = S.publish_params(blk.ctl, blk.pending_ip, blk.pending_fp, new_ip, new_fp)
        _call(blk, out, 64)
        got.append(out.copy())
    assert tuple(S.applied(blk.ctl)) == (seq, 7 * 64)
    eng = Engine(a, 2, SR)
    ref1 = eng.process(x[: 7 * 64])
    eng.apply(b)
    ref2 = eng.process(x[7 * 64 :])
    assert_array_equal(np.concatenate(got), np.concatenate([ref1, ref2]))


def test_torn_seqlock_is_not_taken():
    st = EngineSettings(seed=1).resolved()
    blk = _block(st, 1, 16, 0, spec="silence")
    blk.ctl[S.C_PARAM_SEQ] = 3  # a writer is in the middle of an update
    blk.pending_ip[:] = 999
    out = np.zeros((16, 1), np.int16)
    _call(blk, out, 16)
    assert blk.kernel.iparams[0] == 16 and blk.ctl[S.C_APPLIED_SEQ] == 0


def test_file_end_pads_with_zero_and_completes():
    st = EngineSettings(seed=2).resolved()
    x = generate("tone:level_dbfs=-1", SR, 1, 0, 100)
    blk = _block(st, 1, 64, 256, source=x)
    out = np.full((64, 1), 7, np.int16)
    assert _call(blk, out, 64) == 0
    first = out.copy()
    assert _call(blk, out, 64) == PA_COMPLETE
    assert_array_equal(out[36:], 0)
    ref = Engine(st, 1, SR).process(x)
    assert_array_equal(np.concatenate([first, out[:36]]), ref)
    assert blk.ctl[S.C_RING_HEAD] == 100


def test_flags_counted_and_full_ring_drops_whole_blocks():
    st = EngineSettings(seed=3).resolved()
    blk = _block(st, 2, 64, 100, spec="silence")
    out = np.zeros((64, 2), np.int16)
    _call(blk, out, 64, PA_OUTPUT_UNDERFLOW)
    _call(blk, out, 64)
    assert blk.ctl[S.C_OUT_UNDERFLOW] == 1 and blk.ctl[S.C_FLAGGED] == 1 and blk.ctl[S.C_CALLBACKS] == 2
    assert blk.ctl[S.C_RING_HEAD] == 64 and blk.ctl[S.C_RING_DROPPED] == 64
