"""The meter ring written in place (the live callback's fast path) reads back like the copying writer.

Promise (rtstage.live.shared): :func:`meter_ring_reserve` hands out the slot
where a block's rows can be written directly (the kernel's taps point there)
only when the whole block fits before the ring's end and the ring has room;
otherwise the callback falls back to :func:`meter_ring_write`, which copies or
counts the block dropped.  Either way the consumer reads every published frame
once, in order; the expected frames are the numpy arrays written.
"""

import numpy as np
from numpy.testing import assert_array_equal

from rtstage.live import shared as S


def _write_block(blk, vq, words, n):
    """The callback's order: reserve, write in place and commit, else copy (or drop)."""
    slot = S.meter_ring_reserve(blk.ctl, n)
    if slot >= 0:
        blk.meter_x[slot : slot + n] = vq[:n]
        blk.meter_words[slot : slot + n] = words[:n]
        S.meter_ring_commit(blk.ctl, n)
        return "in place"
    S.meter_ring_write(blk.ctl, blk.meter_x, blk.meter_words, vq, words, n)
    return "copied"


def test_in_place_and_copied_blocks_read_back_in_order():
    nch, cap = 3, 100
    blk = S.SharedBlock(nch, 16, 64, 0, 0, cap)
    rng = np.random.default_rng(11)
    out_x = np.zeros((cap, nch))
    out_w = np.zeros((cap, nch), dtype=np.int16)
    written_x, written_w, got_x, got_w, ways, dropped = [], [], [], [], [], 0
    for size in (30, 30, 30, 20, 0, 64, 33, 40, 64, 7):
        vq = rng.standard_normal((64, nch))
        words = rng.integers(-32768, 32767, (64, nch)).astype(np.int16)
        free = cap - (int(blk.ctl[S.C_MRING_HEAD]) - int(blk.ctl[S.C_MRING_TAIL]))
        ways.append(_write_block(blk, vq, words, size))
        if size <= free:
            written_x.append(vq[:size])
            written_w.append(words[:size])
        else:
            dropped += size
        if size in (64, 40):  # the consumer catches up
            n = S.meter_ring_read(blk.ctl, blk.meter_x, blk.meter_words, out_x, out_w, 0)
            got_x.append(out_x[:n].copy())
            got_w.append(out_w[:n].copy())
    n = S.meter_ring_read(blk.ctl, blk.meter_x, blk.meter_words, out_x, out_w, 0)
    got_x.append(out_x[:n].copy())
    got_w.append(out_w[:n].copy())
    assert "in place" in ways and "copied" in ways  # both paths taken (a wrap or a full ring forces a copy)
    assert dropped > 0 and int(blk.ctl[S.C_MRING_DROPPED]) == dropped
    assert_array_equal(np.concatenate(got_x), np.concatenate(written_x))
    assert_array_equal(np.concatenate(got_w), np.concatenate(written_w))


def test_reserve_refuses_a_run_across_the_end_and_a_full_ring():
    blk = S.SharedBlock(2, 16, 64, 0, 0, 100)
    assert S.meter_ring_reserve(blk.ctl, 0) == -1
    assert S.meter_ring_reserve(blk.ctl, 60) == 0
    S.meter_ring_commit(blk.ctl, 60)
    assert S.meter_ring_reserve(blk.ctl, 41) == -1  # only 40 free
    blk.ctl[S.C_MRING_TAIL] = 60  # consumer caught up: 100 free, but 60 + 50 crosses the end
    assert S.meter_ring_reserve(blk.ctl, 50) == -1
    assert S.meter_ring_reserve(blk.ctl, 40) == 60
    off = S.SharedBlock(2, 16, 64, 0, 0, 0)  # no meter ring: never in place
    assert S.meter_ring_reserve(off.ctl, 10) == -1
