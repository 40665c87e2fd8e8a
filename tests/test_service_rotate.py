"""Rotating taps and automation logs: segments on a fixed grid, nothing lost or duplicated, retention.

The reference for "nothing lost or duplicated" is the unrotated tap written
by :class:`rtstage.live.tap.TapWriter` from the same ring contents; files
are read back with soundfile (libsndfile).  Automation segments are read
with :func:`rtstage.control.automation.load_automation`.
"""

import json
import os
import time

import numpy as np
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage.control.automation import FORMAT_VERSION, load_automation
from rtstage.live import shared as S
from rtstage.live.tap import TapWriter
from rtstage.service.rotate import (RotatingAutomationLog, RotatingTapWriter, list_segments, segment_frames_for,
                                    segment_path)

SR = 48000


def _feed_ring(block, data, rng):
    """Producer: the words of ``data`` into the ring in blocks of random size (0 included), never dropping."""
    pos = 0
    cap = int(block.ctl[S.C_RING_FRAMES])
    while pos < data.shape[0]:
        n = min(int(rng.integers(0, 700)), data.shape[0] - pos)
        while cap - (block.counter(S.C_RING_HEAD) - block.counter(S.C_RING_TAIL)) < n:
            time.sleep(0.002)
        S.ring_write(block.ctl, block.ring, data[pos:pos + n], n)
        pos += n
    assert block.counter(S.C_RING_DROPPED) == 0


def _block():
    return S.SharedBlock(2, 16, 1024, 8192)


def test_segments_concatenate_to_the_unrotated_tap(tmp_path):
    rng = np.random.default_rng(1)
    data = rng.integers(-32768, 32768, size=(100_003, 2), dtype=np.int16)
    plain = str(tmp_path / "plain.wav")
    block = _block()
    writer = TapWriter(plain, block, SR, 16)
    writer.start()
    _feed_ring(block, data, np.random.default_rng(2))
    writer.close()

    block = _block()
    starts = []
    rot = RotatingTapWriter(str(tmp_path / "tap.wav"), block, SR, 16, {"source": "test"}, segment_frames=9_600,
                            run_id="20261202T000000Z", on_segment=starts.append)
    rot.start()
    _feed_ring(block, data, np.random.default_rng(3))
    summary = rot.close()
    segments = list_segments(str(tmp_path / "tap.wav"))
    assert [start for (_, start), _ in segments] == list(range(0, 100_003, 9_600))
    assert starts == [s for (_, s), _ in segments]
    parts = [sf.read(name, dtype="int16", always_2d=True)[0] for _, name in segments]
    assert all(p.shape[0] == 9_600 for p in parts[:-1])
    whole = np.concatenate(parts)
    assert_array_equal(whole, sf.read(plain, dtype="int16", always_2d=True)[0])
    assert_array_equal(whole, data)
    assert summary["frames"] == 100_003 and summary["dropped_frames"] == 0
    side = json.load(open(segments[3][1] + ".json"))
    assert side["start_frame"] == 28_800 and side["frames"] == 9_600 and side["end_frame"] == 38_400
    assert side["source"] == "test" and side["dropped_frames"] == 0


def test_retention_keeps_newest(tmp_path):
    rng = np.random.default_rng(4)
    data = rng.integers(-32768, 32768, size=(50_000, 2), dtype=np.int16)
    path = str(tmp_path / "tap.wav")
    old = segment_path(path, 0, "20261201T000000Z")  # a segment of an earlier run: oldest, removed first
    sf.write(old, np.zeros((10, 2), dtype=np.int16), SR, subtype="PCM_16")
    block = _block()
    rot = RotatingTapWriter(path, block, SR, 16, segment_frames=10_000, keep=2, run_id="20261202T000000Z")
    rot.start()
    _feed_ring(block, data, rng)
    rot.close()
    kept = list_segments(path)
    assert [k for k, _ in kept] == [("20261202T000000Z", 30_000), ("20261202T000000Z", 40_000)]
    assert not os.path.exists(old)
    assert not os.path.exists(segment_path(path, 0, "20261202T000000Z") + ".json")
    tail = np.concatenate([sf.read(n, dtype="int16", always_2d=True)[0] for _, n in kept])
    assert_array_equal(tail, data[30_000:])


def test_segment_length_from_size():
    # 16-bit stereo PCM: 4 bytes a frame; 1 MB minus the 44-byte WAV header
    assert segment_frames_for(48000, 2, 2, rotate_mb=1) == (1_000_000 - 44) // 4
    assert segment_frames_for(48000, 2, 2, rotate_s=3600, rotate_mb=1) == (1_000_000 - 44) // 4
    assert segment_frames_for(48000, 2, 3, rotate_s=1) == 48000
    assert segment_frames_for(48000, 2, 2) is None


def test_automation_segments_restate_state_and_route_by_frame(tmp_path):
    path = str(tmp_path / "auto.jsonl")
    log = RotatingAutomationLog(path, SR, 1000, {"bits": 16, "dither": "tpdf", "gain_db": 0.0}, FORMAT_VERSION,
                               run_id="20261202T000000Z")
    log.write(256, {"bits": 12})
    log.write(2304, {"dither": "rpdf"})  # lands in segment 2000 (opened by the write itself)
    log.advance(1000)  # late call from the tap thread: nothing to do, segment 2000 is open
    log.advance(3500)
    log.close()
    segs = list_segments(path)
    assert [s for (_, s), _ in segs] == [0, 2000, 3000]
    assert load_automation(segs[0][1]) == [(0, {"bits": 16, "dither": "tpdf", "gain_db": 0.0}), (256, {"bits": 12})]
    assert load_automation(segs[1][1]) == [(2000, {"bits": 12, "dither": "tpdf", "gain_db": 0.0}),
                                           (2304, {"dither": "rpdf"})]
    assert load_automation(segs[2][1]) == [(3000, {"bits": 12, "dither": "rpdf", "gain_db": 0.0})]


def test_state_snapshot_only_between_callbacks():
    from rtstage import kernel as K
    from rtstage.service.rotate import take_state_snapshot

    block = _block()
    block.kernel.hist[:] = np.arange(block.kernel.hist.size).reshape(block.kernel.hist.shape) * 0.25
    block.kernel.clock[K.CLK_FRAME] = 3 * 256
    block.ctl[S.C_CALLBACKS] = 3
    block.ctl[S.C_FRAMES] = 3 * 256  # the callback adds its frames last: all three callbacks finished
    snap = take_state_snapshot(block, 256)
    assert snap["frame"] == 768
    assert_array_equal(snap["hist"], block.kernel.hist)
    block.kernel.hist[:] = 0.0
    assert snap["hist"][0, 1] == 0.25  # a copy, not a view of the live arrays
    block.ctl[S.C_CALLBACKS] = 4  # a fourth callback started and has not finished
    assert take_state_snapshot(block, 256) is None
