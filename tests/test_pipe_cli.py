"""`rtstage pipe`: raw PCM through stdin/stdout, as a pipeline stage.

The reference is the engine driven directly on the same decoded samples, and
numpy's own decoding of the little-endian formats.
"""

import os
import subprocess
import sys
import threading

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rtstage import Engine, EngineSettings
from rtstage import pcm

PIPE = [sys.executable, "-m", "rtstage", "pipe"]


def signal(frames=6000, channels=2, seed=0):
    rng = np.random.default_rng(seed)
    return rng.uniform(-0.9, 0.9, (frames, channels))


def to_s24(words24):
    b = (words24.astype("<i4").reshape(-1).view(np.uint8).reshape(-1, 4))[:, :3]
    return np.ascontiguousarray(b).tobytes()


def test_formats_round_trip_against_numpy():
    # Integer formats decode as int / 2^(width-1) (exact); s24le packs the three low bytes of the value.
    v = np.array([[-(2**23), 2**23 - 1], [1, -1], [123456, -654321]], dtype=np.int32)
    assert_array_equal(pcm.decode(to_s24(v), "s24le", 2), v * 2.0**-23)
    v16 = np.array([[-32768, 32767], [5, -5]], dtype="<i2")
    assert_array_equal(pcm.decode(v16.tobytes(), "s16le", 2), v16 * 2.0**-15)
    w = (np.array([[-(2**23), 2**23 - 1], [7, -7]], dtype=np.int32) << 8)
    assert pcm.encode(w, "s24le") == to_s24(w >> 8)


@pytest.mark.parametrize("in_format,out_format,bits", [("f32le", "s16le", 16), ("s24le", "s24le", 20), ("f64le", "s32le", 24), ("s16le", "s16le", 8), ("s32le", "s24le", 24)])
def test_pipe_equals_engine(in_format, out_format, bits):
    x = signal()
    if in_format == "f32le":
        raw = x.astype("<f4").tobytes()
    elif in_format == "f64le":
        raw = x.astype("<f8").tobytes()
    elif in_format == "s16le":
        raw = np.round(x * 2**15).astype("<i2").tobytes()
    elif in_format == "s32le":
        raw = np.round(x * 2**31).astype("<i4").tobytes()
    else:
        raw = to_s24(np.round(x * 2**23).astype(np.int32))
    decoded = pcm.decode(raw, in_format, 2)
    proc = subprocess.run(
        PIPE + ["--samplerate", "44100", "--channels", "2", "--in-format", in_format, "--out-format", out_format,
                "--bits", str(bits), "--seed", "77", "--shaper", "wannamaker-f3", "--blocksize", "333"],
        input=raw, capture_output=True,
    )
    assert proc.returncode == 0, proc.stderr
    format_bits = pcm.engine_format_bits(out_format)
    words = Engine(EngineSettings(bits, "tpdf", "wannamaker-f3", seed=77), 2, 44100, format_bits=format_bits).process(decoded)
    assert proc.stdout == pcm.encode(words, out_format)
    assert b"rtstage" not in proc.stdout  # logs go to stderr only


def test_short_reads_and_partial_frames_lose_nothing():
    # Feed the pipe in odd-sized chunks that split samples and frames; the output must equal one-shot processing.
    x = signal(frames=5000, channels=3, seed=1)
    raw = x.astype("<f4").tobytes()
    proc = subprocess.Popen(
        PIPE + ["--samplerate", "48000", "--channels", "3", "--in-format", "f32le", "--out-format", "s16le", "--seed", "5", "--blocksize", "64"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
    )
    try:
        rng = np.random.default_rng(2)
        pos = 0
        while pos < len(raw):
            step = int(rng.integers(1, 700))
            proc.stdin.write(raw[pos : pos + step])
            proc.stdin.flush()
            pos += step
        # A trailing partial frame (5 bytes) is reported, not processed.
        proc.stdin.write(b"\x00" * 5)
        proc.stdin.close()
        out = proc.stdout.read()
        err = proc.stderr.read().decode()
        assert proc.wait(timeout=60) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    words = Engine(EngineSettings(16, seed=5), 3, 48000).process(x.astype(np.float32))
    assert out == pcm.encode(words, "s16le")
    assert "5 trailing bytes" in err


def test_broken_pipe_exits_cleanly():
    # The reader closes early (like `head -c`): rtstage stops with status 0 and no traceback.
    proc = subprocess.Popen(
        PIPE + ["--samplerate", "48000", "--channels", "2", "--in-format", "s16le", "--out-format", "s16le", "--seed", "1"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
    )
    def feed():
        chunk = np.zeros(48000 * 2, dtype="<i2").tobytes()
        try:
            for _ in range(20):
                proc.stdin.write(chunk)
                proc.stdin.flush()
            proc.stdin.close()
        except (BrokenPipeError, ValueError):
            pass

    writer = threading.Thread(target=feed, daemon=True)
    writer.start()
    try:
        assert len(proc.stdout.read(4096)) == 4096
        proc.stdout.close()
        assert proc.wait(timeout=60) == 0
        err = proc.stderr.read().decode()
        writer.join(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # A closed stdout ends the command quietly: nothing on stderr (README, exit statuses).
    assert err == ""


def test_closed_reader_ends_the_pipe_cleanly_every_time():
    # The reader goes away while input is still being read on the reader thread: the process must end
    # with status 0 and nothing on stderr, whatever that thread is doing (a daemon thread holding the
    # buffered stdin's lock aborted the interpreter at exit in about half of the runs).
    for _ in range(10):
        proc = subprocess.Popen(PIPE + ["--samplerate", "48000", "--channels", "2", "--in-format", "s16le",
                                        "--out-format", "s16le", "--seed", "1"],
                                stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)  # fmt: skip
        try:
            proc.stdout.close()
            try:
                proc.stdin.write(bytes(4 * 480000))
                proc.stdin.close()
            except BrokenPipeError:
                pass
            err = proc.stderr.read().decode()
            assert proc.wait(timeout=60) == 0, err
            assert err == ""
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()


@pytest.mark.parametrize(
    "extra,message",
    [
        (["--bits", "20", "--out-format", "s16le"], "does not fit output format s16le"),
        (["--channels", "0"], "channels"),
        (["--samplerate", "500000"], "sample rate"),
        (["--dither", "pink"], "unknown dither"),
        (["--blocksize", "0"], "blocksize"),
    ],
)
def test_pipe_errors(extra, message):
    base = {"--samplerate": "48000", "--channels": "2", "--in-format": "f32le", "--out-format": "s24le"}
    args = []
    for key, value in base.items():
        if key not in extra:
            args += [key, value]
    proc = subprocess.run(PIPE + args + extra, input=b"", capture_output=True, text=False)
    err = proc.stderr.decode().strip().splitlines()
    assert proc.returncode == 2
    assert len(err) == 1 and message in err[0]
    assert proc.stdout == b""


def test_frames_pass_as_they_arrive():
    # A live feed: the words of the frames that have arrived come out before the producer sends more
    # (a read takes what has arrived; the writer flushes once it has caught up).  The reference for
    # the words is the engine on the same samples, as above.
    x = signal(frames=30, seed=4)
    raw = np.round(x * 2**15).astype("<i2").tobytes()
    engine = Engine(EngineSettings(bits=16, seed=9), 2, 48000, format_bits=16)
    expected = engine.process(pcm.decode(raw, "s16le", 2))
    proc = subprocess.Popen(PIPE + ["--samplerate", "48000", "--channels", "2", "--in-format", "s16le",
                                    "--out-format", "s16le", "--seed", "9"],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)  # fmt: skip
    got = []
    try:
        for first, last in ((0, 10), (10, 11), (11, 30)):
            proc.stdin.write(raw[first * 4 : last * 4])
            proc.stdin.flush()
            want = (last - first) * 4
            chunk = b""
            while len(chunk) < want:
                got.clear()
                reader = threading.Thread(target=lambda n=want - len(chunk): got.append(os.read(proc.stdout.fileno(), n)))
                reader.start()
                reader.join(60)
                assert not reader.is_alive(), f"frames {first}..{last - 1} did not come out while the feed waited"
                assert got[0], "the pipe ended early"
                chunk += got[0]
            assert_array_equal(np.frombuffer(chunk, "<i2").reshape(-1, 2), expected[first:last])
        proc.stdin.close()
        assert proc.wait(60) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
