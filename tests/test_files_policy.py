"""The output policy (rtstage/files/policy.py): refusals, atomic writes, clean-up on every way out.

What a test checks against is the operating system itself (os.stat identities,
the umask, errno values from the kernel, signals delivered to a real child
process), never values the policy computes.
"""

import errno
import os
import resource
import signal
import stat
import subprocess
import sys
import textwrap
import time

import pytest

from rtstage.files.policy import Interrupted, OutputPlan, OutputRefused, WriteFailed, file_mode

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def listing(directory):
    return sorted(os.listdir(directory))


@pytest.fixture
def src(tmp_path):
    path = tmp_path / "in.wav"
    path.write_bytes(b"RIFF input bytes")
    return path


def refused(plan):
    with pytest.raises(OutputRefused) as info:
        plan.check()
    return str(info.value)


def test_output_equal_to_the_input_is_refused(tmp_path, src):
    plan = OutputPlan("testing", inputs=[src], overwrite=True)
    plan.add_file(src)
    assert "is the input" in refused(plan)
    assert listing(tmp_path) == ["in.wav"]


def test_symlink_dotdot_and_hard_link_to_the_input_are_refused(tmp_path, src):
    (tmp_path / "sub").mkdir()
    os.symlink(src, tmp_path / "link.wav")
    os.link(src, tmp_path / "hard.wav")
    # The hard link shares (st_dev, st_ino) with the input: POSIX stat semantics.
    assert os.stat(tmp_path / "hard.wav").st_ino == os.stat(src).st_ino
    for name in ("link.wav", os.path.join("sub", "..", "in.wav"), "hard.wav"):
        plan = OutputPlan("testing", inputs=[src], overwrite=True)
        plan.add_file(tmp_path / name)
        assert "resolves to the input" in refused(plan)
    assert listing(tmp_path) == ["hard.wav", "in.wav", "link.wav", "sub"]


def test_two_outputs_naming_the_same_file_are_refused(tmp_path, src):
    plan = OutputPlan("testing", inputs=[src])
    plan.add_file(tmp_path / "a.wav", "output")
    plan.add_file(tmp_path / "sub" / ".." / "a.wav", "--report")
    (tmp_path / "sub").mkdir()
    assert "are the same file" in refused(plan)


def test_existing_file_needs_overwrite_and_folder_is_refused(tmp_path, src):
    (tmp_path / "out.wav").write_bytes(b"old")
    (tmp_path / "dir.wav").mkdir()
    plan = OutputPlan("testing", inputs=[src])
    plan.add_file(tmp_path / "out.wav")
    assert "exists (use --overwrite" in refused(plan)
    plan = OutputPlan("testing", inputs=[src], overwrite=True)
    plan.add_file(tmp_path / "dir.wav")
    assert "is a folder" in refused(plan)
    plan = OutputPlan("testing", inputs=[src], overwrite=True)
    out = plan.add_file(tmp_path / "out.wav")
    with plan:
        plan.write_text(out, "new")
    assert (tmp_path / "out.wav").read_text() == "new"


def test_missing_folder_is_refused_before_anything_is_written(tmp_path, src):
    plan = OutputPlan("testing", inputs=[src])
    plan.add_file(tmp_path / "a.wav")
    plan.add_file(tmp_path / "missing" / "b.json", "--report")
    assert "does not exist" in refused(plan)
    assert listing(tmp_path) == ["in.wav"]


def test_atomic_write_has_the_umask_mode_and_no_leftovers(tmp_path, src):
    old = os.umask(0o027)
    try:
        plan = OutputPlan("testing", inputs=[src])
        a = plan.add_file(tmp_path / "a.json")
        b = plan.add_file(tmp_path / "b.bin")
        with plan:
            plan.write_text(a, "{}\n")
            with plan.open(b, "wb") as f:
                f.write(b"\0" * 10)
    finally:
        os.umask(old)
    # An ordinary new file: 0666 masked by the umask (POSIX open(2) with mode 0666).
    for name in ("a.json", "b.bin"):
        assert stat.S_IMODE(os.stat(tmp_path / name).st_mode) == 0o666 & ~0o027
    assert listing(tmp_path) == ["a.json", "b.bin", "in.wav"]
    mask = os.umask(0)
    os.umask(mask)
    assert file_mode() == 0o666 & ~mask


def test_failure_in_a_later_output_leaves_no_earlier_one(tmp_path, src):
    plan = OutputPlan("testing", inputs=[src])
    a = plan.add_file(tmp_path / "a.wav")
    b = plan.add_file(tmp_path / "b.json")
    with pytest.raises(ValueError):
        with plan:
            plan.write_text(a, "audio")
            with plan.open(b) as f:
                f.write("partial")
                raise ValueError("boom")
    assert listing(tmp_path) == ["in.wav"]


def test_folder_output_created_and_removed_on_failure(tmp_path, src):
    plan = OutputPlan("testing", inputs=[src])
    folder = plan.add_folder(tmp_path / "plots", "--plot", ["one.png", "two.png"])
    with pytest.raises(RuntimeError):
        with plan:
            plan.write_text(plan.file_in(folder, "one.png"), "x")
            raise RuntimeError("stop")
    assert listing(tmp_path) == ["in.wav"]
    plan = OutputPlan("testing", inputs=[src])
    folder = plan.add_folder(tmp_path / "plots", "--plot", ["one.png"])
    with plan:
        plan.write_text(plan.file_in(folder, "one.png"), "x")
    assert listing(tmp_path / "plots") == ["one.png"]
    (tmp_path / "plots2").write_text("a file")
    plan = OutputPlan("testing", inputs=[src])
    plan.add_folder(tmp_path / "plots2", "--plot", ["one.png"])
    assert "not a folder" in refused(plan)


CHILD = textwrap.dedent("""
    import os, sys, time
    from rtstage.files.policy import OutputPlan, install_signal_handlers, Interrupted, WriteFailed
    install_signal_handlers()
    folder = sys.argv[1]
    plan = OutputPlan("writing a test file", inputs=[])
    out = plan.add_file(os.path.join(folder, "out.bin"))
    try:
        with plan:
            with plan.open(out, "wb") as f:
                f.write(b"x" * 100000)
                f.flush()
                print("ready", flush=True)
                for _ in range(int(sys.argv[2])):
                    f.write(b"y" * 65536)
                    f.flush()
                time.sleep(30)
    except Interrupted as exc:
        print(exc.message(), file=sys.stderr)
        sys.exit(exc.exit_status)
    except WriteFailed as exc:
        print(exc, file=sys.stderr)
        sys.exit(exc.exit_status)
""")


def child(tmp_path, blocks, preexec=None):
    env = dict(os.environ, PYTHONPATH=ROOT)
    return subprocess.Popen([sys.executable, "-c", CHILD, str(tmp_path), str(blocks)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, preexec_fn=preexec)


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM, signal.SIGHUP])
def test_signal_removes_the_temporary_file(tmp_path, sig):
    proc = child(tmp_path, 1)
    assert proc.stdout.readline().strip() == "ready"
    # The temporary file exists while writing ...
    assert len(os.listdir(tmp_path)) == 1
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    # ... and is gone after the signal; exit status 128 + signal number (POSIX shell convention).
    assert proc.returncode == 128 + sig
    assert err.strip().startswith(f"interrupted by {signal.Signals(sig).name} while writing a test file")
    assert os.listdir(tmp_path) == []


def test_file_size_limit_gives_efbig_and_no_leftover(tmp_path):
    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (200000, 200000))

    proc = child(tmp_path, 50, preexec=limit)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 1, err
    # EFBIG is what write(2) returns past RLIMIT_FSIZE when SIGXFSZ is ignored (POSIX setrlimit).
    assert "file too large" in err and "Traceback" not in err
    assert os.listdir(tmp_path) == []
    assert errno.EFBIG == 27  # Linux errno value, asm-generic/errno-base.h


def test_interrupted_is_a_keyboard_interrupt():
    assert issubclass(Interrupted, KeyboardInterrupt)
    assert Interrupted(signal.SIGTERM).exit_status == 143
    assert issubclass(WriteFailed, Exception) and WriteFailed.exit_status == 1
