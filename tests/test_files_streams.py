"""Streams of the output policy: files written while a live run lasts, sealed into place, never lost.

What a test checks against is outside the policy: the operating system
(file identities and modes from ``os.stat``, the umask, RLIMIT_FSIZE and the
EFBIG it gives, signals delivered to a real child process), and readers that
are not rtstage's: libsndfile (through soundfile) and Python's own ``wave``
module for the audio, ``json`` for the automation lines.  The live runs are
real ``rtstage run`` processes, each stopped by its test.
"""

import json
import os
import re
import resource
import signal
import stat
import subprocess
import sys
import textwrap
import time
import wave

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage.files.policy import LineStream, OutputPlan, open_stream, seal_open_streams

from procs import free_port, wait_for

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000
TEMP = re.compile(r"^\.rtstage-.*\.part$")


def temps(folder):
    return sorted(n for n in os.listdir(folder) if TEMP.match(n))


def lines_of(text):
    return [line for line in text.splitlines() if line.strip()]


def words(n, seed=1, channels=2):
    return np.random.default_rng(seed).integers(-32768, 32768, size=(n, channels), dtype=np.int16)


# -- unit: the stream itself ------------------------------------------------------------------------------

def test_stream_appears_only_when_sealed(tmp_path):
    plan = OutputPlan("testing streams")
    out = plan.add_file(tmp_path / "tap.wav", "--tap")
    plan.check()
    plan.finish()
    stream = plan.stream(out)
    data = words(1000)
    with sf.SoundFile(stream.tmp, "w", SR, 2, "PCM_16", format="WAV") as f:
        f.write(data)
        f.flush()
        # While it is written: a hidden temporary file in the same folder, nothing at the final name.
        assert not os.path.exists(tmp_path / "tap.wav")
        assert os.path.dirname(stream.tmp) == str(tmp_path)
        assert temps(tmp_path) == [os.path.basename(stream.tmp)]
    assert stream.seal() is True
    assert stream.seal() is False  # once only
    assert os.listdir(tmp_path) == ["tap.wav"]
    assert_array_equal(sf.read(tmp_path / "tap.wav", dtype="int16")[0], data)
    # A plan's clean-up never touches a stream it handed out.
    plan.discard()
    assert os.listdir(tmp_path) == ["tap.wav"]


def test_seal_fsyncs_the_file_renames_it_and_fsyncs_the_folder(tmp_path, monkeypatch):
    stream = open_stream(str(tmp_path / "log.jsonl"), "automation log")
    with open(stream.tmp, "w") as f:
        f.write('{"rtstage_automation": 1}\n')
    inode = os.stat(stream.tmp).st_ino
    events = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd):
        st = os.fstat(fd)
        events.append(("fsync", stat.S_ISDIR(st.st_mode), (st.st_dev, st.st_ino)))
        return real_fsync(fd)

    def replace(src, dst):
        events.append(("replace", src, dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    stream.seal()
    monkeypatch.undo()
    folder = os.stat(tmp_path)
    # The file's data reaches the disk before the rename, and the folder entry after it (rename(2) and fsync(2)
    # on the directory: the POSIX way to make a new name durable).
    assert events == [("fsync", False, (folder.st_dev, inode)),
                      ("replace", stream.tmp, str(tmp_path / "log.jsonl")),
                      ("fsync", True, (folder.st_dev, folder.st_ino))]
    # Renamed, not copied: the final name is the temporary file's inode.
    assert os.stat(tmp_path / "log.jsonl").st_ino == inode
    assert os.listdir(tmp_path) == ["log.jsonl"]


def test_stream_mode_follows_the_umask(tmp_path):
    old = os.umask(0o027)
    try:
        stream = open_stream(str(tmp_path / "a.wav"), "tap")
        with sf.SoundFile(stream.tmp, "w", SR, 1, "PCM_16", format="WAV") as f:
            f.write(np.zeros(10, dtype=np.int16))
        stream.seal()
        line = LineStream(open_stream(str(tmp_path / "b.jsonl"), "automation log"))
        line.write_line("{}")
        line.close()
    finally:
        os.umask(old)
    # An ordinary new file: 0666 masked by the umask (POSIX open(2) with mode 0666), as any program's output.
    for name in ("a.wav", "b.jsonl"):
        assert stat.S_IMODE(os.stat(tmp_path / name).st_mode) == 0o666 & ~0o027


def test_exception_seals_the_part_written_with_one_warning(tmp_path, capsys):
    data = words(5000, seed=2)
    with pytest.raises(ValueError):
        with open_stream(str(tmp_path / "tap.wav"), "tap") as stream:
            with sf.SoundFile(stream.tmp, "w", SR, 2, "PCM_16", format="WAV") as f:
                f.write(data[:3000])
                raise ValueError("the run broke")
    # The part written is in place, its header finalized by closing the file: libsndfile and Python's wave
    # module (two independent RIFF readers) both read exactly the 3000 frames written.
    assert os.listdir(tmp_path) == ["tap.wav"]
    assert_array_equal(sf.read(tmp_path / "tap.wav", dtype="int16")[0], data[:3000])
    with wave.open(str(tmp_path / "tap.wav")) as w:
        assert w.getnframes() == 3000
    err = lines_of(capsys.readouterr().err)
    assert len(err) == 1 and err[0].startswith("rtstage: warning: tap") and "cut short" in err[0]
    assert "ValueError: the run broke" in err[0]


def test_open_streams_are_sealed_on_the_way_out_and_empty_ones_removed(tmp_path, capsys):
    stream = open_stream(str(tmp_path / "tap.wav"), "tap")
    f = sf.SoundFile(stream.tmp, "w", SR, 2, "PCM_16", format="WAV")
    stream.finalize = f.close
    data = words(700, seed=3)
    f.write(data)
    open_stream(str(tmp_path / "never.wav"), "tap")  # its writer never opened it: nothing to keep
    assert seal_open_streams() == 1
    assert f.closed  # finalized (header written) before sealing
    assert os.listdir(tmp_path) == ["tap.wav"]
    assert_array_equal(sf.read(tmp_path / "tap.wav", dtype="int16")[0], data)
    err = lines_of(capsys.readouterr().err)
    assert len(err) == 1 and "cut short" in err[0]
    assert seal_open_streams() == 0


# -- unit: a full disk or a file-size limit, in a child process -----------------------------------------------

def _child(code, folder, limit_bytes):
    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))

    env = dict(os.environ, PYTHONPATH=ROOT)
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code), str(folder)], env=env, cwd=ROOT,
                          capture_output=True, text=True, timeout=300, preexec_fn=limit)


STREAM_CHILD = """
    import os, sys
    import numpy as np, soundfile as sf
    from rtstage.files.policy import install_signal_handlers, open_stream, WriteFailed
    install_signal_handlers()  # SIGXFSZ ignored: the limit becomes EFBIG, as in every rtstage command
    data = np.random.default_rng(5).integers(-32768, 32768, size=(60000, 2), dtype=np.int16)
    try:
        with open_stream(os.path.join(sys.argv[1], "tap.wav"), "tap") as stream:
            with sf.SoundFile(stream.tmp, "w", 48000, 2, "PCM_16", format="WAV") as f:
                for start in range(0, 60000, 1000):
                    f.write(data[start:start + 1000])
    except WriteFailed as exc:
        print(f"rtstage: {exc}", file=sys.stderr)
        sys.exit(exc.exit_status)
"""


def test_file_size_limit_keeps_what_was_written_with_one_line(tmp_path):
    limit = 100_001
    proc = _child(STREAM_CHILD, tmp_path, limit)
    # EFBIG is what write(2) returns past RLIMIT_FSIZE when SIGXFSZ is ignored (POSIX setrlimit).
    assert proc.returncode == 1, proc.stderr
    err = lines_of(proc.stderr)
    assert len(err) == 1 and "file too large" in err[0] and "kept" in err[0], proc.stderr
    assert os.listdir(tmp_path) == ["tap.wav"]
    assert os.path.getsize(tmp_path / "tap.wav") <= limit
    got = sf.read(tmp_path / "tap.wav", dtype="int16")[0]
    with wave.open(str(tmp_path / "tap.wav")) as w:
        assert w.getnframes() == got.shape[0]
    # The frames kept are the first ones written, as many as fit under the limit (4 bytes a frame).
    expected = np.random.default_rng(5).integers(-32768, 32768, size=(60000, 2), dtype=np.int16)
    assert limit - 1000 < got.shape[0] * 4 < limit
    assert_array_equal(got, expected[:got.shape[0]])


TAP_CHILD = """
    import json, os, sys, time
    import numpy as np
    from rtstage.files.policy import install_signal_handlers, WriteFailed
    from rtstage.live import shared as S
    from rtstage.live.tap import TapWriter
    install_signal_handlers()
    path = os.path.join(sys.argv[1], "tap.wav")
    block = S.SharedBlock(2, 16, 1024, 8192)
    writer = TapWriter(path, block, 48000, 16)
    writer.start()
    data = np.random.default_rng(6).integers(-32768, 32768, size=(60000, 2), dtype=np.int16)
    pos = 0
    while pos < data.shape[0] and writer.error is None:
        free = int(block.ctl[S.C_RING_FRAMES]) - (block.counter(S.C_RING_HEAD) - block.counter(S.C_RING_TAIL))
        n = min(512, free, data.shape[0] - pos)
        S.ring_write(block.ctl, block.ring, data[pos:pos + n], n)
        pos += n
        time.sleep(0.001)
    deadline = time.monotonic() + 30
    while writer.error is None and time.monotonic() < deadline:
        time.sleep(0.01)
    sealed_at_once = os.path.exists(path)  # in place while the run would still go on
    print("CLOSING", file=sys.stderr, flush=True)
    try:
        writer.close()
        status = 0
    except WriteFailed as exc:
        print(f"rtstage: {exc}", file=sys.stderr)
        status = exc.exit_status
    print(json.dumps({"sealed_at_once": sealed_at_once}))
    sys.exit(status)
"""


def test_tap_writer_seals_at_the_write_error_and_says_so_once(tmp_path):
    limit = 80_001
    proc = _child(TAP_CHILD, tmp_path, limit)
    assert proc.returncode == 1, proc.stderr
    report = json.loads(proc.stdout)
    assert report["sealed_at_once"], proc.stderr
    before, _, after = proc.stderr.partition("CLOSING")
    # One warning line when it happened; the command's one error line when the run ends.
    warn = lines_of(before)
    assert len(warn) == 1 and warn[0].startswith("rtstage: warning: tap") and "cut short" in warn[0], proc.stderr
    assert "file too large" in warn[0]
    end = lines_of(after)
    assert len(end) == 1 and "write failed" in end[0] and "kept" in end[0]
    got = sf.read(tmp_path / "tap.wav", dtype="int16")[0]
    expected = np.random.default_rng(6).integers(-32768, 32768, size=(60000, 2), dtype=np.int16)
    assert got.shape[0] > 10000
    assert_array_equal(got, expected[:got.shape[0]])
    assert sorted(os.listdir(tmp_path)) == ["tap.wav", "tap.wav.gaps.json"]


LOG_CHILD = """
    import os, sys
    from rtstage.control.automation import AutomationWriter
    from rtstage.files.policy import install_signal_handlers
    install_signal_handlers()
    writer = AutomationWriter(os.path.join(sys.argv[1], "auto.jsonl"), 48000)
    for k in range(5000):
        writer.write(256 * k, {"gain_db": -0.125 * (k % 97), "dither": "tpdf"})
    writer.close()
"""


def test_automation_log_at_the_size_limit_keeps_whole_lines(tmp_path):
    limit = 20_011  # not on a line boundary
    proc = _child(LOG_CHILD, tmp_path, limit)
    assert proc.returncode == 0, proc.stderr
    err = lines_of(proc.stderr)
    assert len(err) == 1 and "automation log" in err[0] and "cut short" in err[0], proc.stderr
    assert os.listdir(tmp_path) == ["auto.jsonl"]
    text = (tmp_path / "auto.jsonl").read_text()
    assert text.endswith("\n") and len(text) <= limit
    rows = [json.loads(line) for line in text.splitlines()]  # every line parses: no half line was kept
    assert rows[0] == {"rtstage_automation": 1, "samplerate": 48000}
    assert [r["at_frame"] for r in rows[1:]] == [256 * k for k in range(len(rows) - 1)] and len(rows) > 100


SIGNAL_CHILD = """
    import os, sys, time
    import numpy as np, soundfile as sf
    from rtstage.files.policy import Interrupted, OutputPlan, install_signal_handlers
    install_signal_handlers()
    folder = sys.argv[1]
    plan = OutputPlan("recording a test stream")
    report = plan.add_file(os.path.join(folder, "report.json"), "--report")
    tap = plan.add_file(os.path.join(folder, "tap.wav"), "--tap")
    plan.check()
    data = np.random.default_rng(8).integers(-32768, 32768, size=(4800, 2), dtype=np.int16)
    try:
        with plan.atomic(report) as tmp:
            with open(tmp, "w") as f:
                f.write("{")  # a render's output, half written when the signal comes
            with plan.stream(tap) as stream:
                with sf.SoundFile(stream.tmp, "w", 48000, 2, "PCM_16", format="WAV") as f:
                    f.write(data)
                    f.flush()
                    print("ready", flush=True)
                    time.sleep(60)
    except Interrupted as exc:
        print(f"rtstage: {exc.message()}", file=sys.stderr)
        sys.exit(exc.exit_status)
"""


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM, signal.SIGHUP])
def test_a_signal_removes_render_temporaries_but_seals_streams(tmp_path, sig):
    proc = subprocess.Popen([sys.executable, "-c", textwrap.dedent(SIGNAL_CHILD), str(tmp_path)],
                            env=dict(os.environ, PYTHONPATH=ROOT), cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "ready", proc.stderr.read() if proc.poll() is not None else ""
        assert len(temps(tmp_path)) == 2 and not os.path.exists(tmp_path / "tap.wav")
        proc.send_signal(sig)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # Exit status 128 + signal number (POSIX shell convention); the half-written report is gone, the recording
    # is in place, whole as far as it went, with one warning line beside the interruption's line.
    assert proc.returncode == 128 + sig
    assert os.listdir(tmp_path) == ["tap.wav"]
    expected = np.random.default_rng(8).integers(-32768, 32768, size=(4800, 2), dtype=np.int16)
    assert_array_equal(sf.read(tmp_path / "tap.wav", dtype="int16")[0], expected)
    err = lines_of(err)
    assert len(err) == 2 and "cut short" in err[0] and signal.Signals(sig).name in err[0], err
    assert err[1].startswith(f"rtstage: interrupted by {signal.Signals(sig).name}")


# -- unit: rotated segments ------------------------------------------------------------------------------

def test_a_segment_is_sealed_when_the_next_one_starts(tmp_path):
    from rtstage.live import shared as S
    from rtstage.service.rotate import RotatingTapWriter, segment_path

    block = S.SharedBlock(2, 16, 1024, 8192)
    path = str(tmp_path / "tap.wav")
    rot = RotatingTapWriter(path, block, SR, 16, segment_frames=4000, run_id="20261202T000000Z")
    first, second = segment_path(path, 0, "20261202T000000Z"), segment_path(path, 4000, "20261202T000000Z")
    assert not os.path.exists(first) and len(temps(tmp_path)) == 1
    rot.start()
    data = words(6000, seed=7)
    for start in range(0, 6000, 500):
        while int(block.ctl[S.C_RING_FRAMES]) - (block.counter(S.C_RING_HEAD) - block.counter(S.C_RING_TAIL)) < 500:
            time.sleep(0.002)
        S.ring_write(block.ctl, block.ring, data[start:start + 500], 500)
    deadline = time.monotonic() + 30
    while not os.path.exists(first + ".json") and time.monotonic() < deadline:  # the sidecar comes after the seal
        time.sleep(0.01)
    try:
        # Frame 4000 arrived: the first segment is whole under its name (with its sidecar), the second is not.
        assert_array_equal(sf.read(first, dtype="int16")[0], data[:4000])
        assert json.load(open(first + ".json"))["frames"] == 4000
        assert not os.path.exists(second) and len(temps(tmp_path)) == 1
    finally:
        rot.close()
    assert_array_equal(sf.read(second, dtype="int16")[0], data[4000:])
    assert temps(tmp_path) == []


# -- integration: rtstage run --device none --------------------------------------------------------------------



def test_deviceless_run_writes_tap_and_log_as_streams_sealed_on_sigterm(tmp_path):
    from rtstage.control.client import ControlClient

    out = tmp_path / "out"
    out.mkdir()
    tap, log_path, st, err = str(out / "T.wav"), str(out / "A.jsonl"), str(tmp_path / "s.json"), str(tmp_path / "e")
    with open(err, "w") as f:
        proc = subprocess.Popen(
            [sys.executable, "-m", "rtstage", "run", "--device", "none", "--source", "tone:freq_hz=997,level_dbfs=-6",
             "--samplerate", str(SR), "--channels", "2", "--bits", "16", "--seed", "4", "--tap", tap,
             "--automation-log", log_path, "--status-file", st, "--control-port", str(free_port()), "--quiet",
             "--duration", "120"],
            cwd=ROOT, env={**os.environ, "PYTHONPATH": ROOT}, stderr=f, stdout=subprocess.DEVNULL)
    try:
        port = int(wait_for(err, r"control: listening on 127\.0\.0\.1:(\d+)", proc).group(1))
        wait_for(err, r"running without a device", proc)
        time.sleep(0.5)
        # While it runs: neither final name exists; the tap and the log are hidden temporary files beside them.
        assert sorted(os.listdir(out)) == temps(out) and len(temps(out)) == 2
        with ControlClient("127.0.0.1", port, timeout_s=10) as client:
            reply = client.request({"op": "set", "values": {"gain_db": -3.0}})
        assert reply["ok"]
        time.sleep(0.5)
        assert not os.path.exists(tap) and not os.path.exists(log_path)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0, open(err).read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # After the stop: complete files under their names, no temporary file left.
    assert sorted(os.listdir(out)) == ["A.jsonl", "T.wav", "T.wav.gaps.json"]
    status = json.load(open(st))
    got = sf.read(tap, dtype="int16", always_2d=True)[0]
    with wave.open(tap) as w:
        assert w.getnframes() == got.shape[0] and w.getframerate() == SR
    assert got.shape[0] == status["tap"]["frames"] == status["frames"] > SR // 2
    rows = [json.loads(line) for line in open(log_path)]
    assert rows[0] == {"rtstage_automation": 1, "samplerate": SR}
    assert rows[1:] == [{"at_frame": reply["at_frame"], "values": {"gain_db": -3.0}}]
    assert json.load(open(tap + ".gaps.json"))["frames"] == got.shape[0]
    assert "cut short" not in open(err).read()


# -- integration: rtstage run on a JACK dummy server, with rotation ---------------------------------------------

def test_live_run_seals_rotated_segments_as_it_goes(jack_server, tmp_path):
    from rtstage.service.rotate import list_segments

    out = tmp_path / "out"
    out.mkdir()
    tap, log_path, st, err = str(out / "tap.wav"), str(out / "auto.jsonl"), str(tmp_path / "s.json"), str(tmp_path / "e")
    with open(err, "w") as f:
        proc = subprocess.Popen(
            [sys.executable, "-m", "rtstage", "run", "--source", "noise:level_dbfs=-20,seed=3", "--seed", "8",
             "--blocksize", "256", "--tap", tap, "--automation-log", log_path, "--tap-rotate-s", "0.5",
             "--status-file", st, "--control-port", "0", "--quiet"],
            env=jack_server.client_env(), cwd=ROOT, stderr=f, stdout=subprocess.DEVNULL)
    try:
        wait_for(err, r"rtstage: running:", proc, timeout_s=90)
        deadline = time.monotonic() + 60
        while len(list_segments(tap)) < 2:
            assert time.monotonic() < deadline and proc.poll() is None, open(err).read()
            time.sleep(0.05)
        # Every tap segment under its name is whole (its sidecar is written after it is sealed); the one being
        # written and the automation log segment of the run so far are temporary files.
        sealed = list_segments(tap)
        for _, name in sealed:
            frames = sf.info(name).frames
            assert frames == SR // 2, name
        assert len(temps(out)) >= 1
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0, open(err).read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    status = json.load(open(st))
    assert temps(out) == []
    segments = list_segments(tap)
    whole = np.concatenate([sf.read(name, dtype="int16", always_2d=True)[0] for _, name in segments])
    assert whole.shape[0] == status["engine_frame"] and status["tap_dropped_frames"] == 0
    logs = list_segments(log_path)
    assert [s for (_, s), _ in logs] == [s for (_, s), _ in segments]
    for _, name in logs:
        assert all(json.loads(line) for line in open(name))
