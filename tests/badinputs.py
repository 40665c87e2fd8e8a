"""Harness of the bad-input catalogue (tests/test_bad_inputs*.py).

Every case runs the real command line (``python -m rtstage`` with this
checkout on PYTHONPATH) in a folder of its own, built from named fixture
files, and records:

* the exit status, stdout and stderr;
* a snapshot (SHA-256 of every file, the target of every link, every folder)
  of the case folder, and of the small file system mounted for it, taken
  before and after the run.

The checks are those the issue states and the documented exit statuses
(README, "Exit status"): 2 for bad input or usage, 1 for a run-time failure
(I/O), 128 + the signal number for SIGINT/SIGTERM/SIGHUP (the POSIX shells'
convention); one line on stderr starting ``rtstage:``; no traceback; nothing
changed but the declared, accepted outputs.
"""

import hashlib
import json
import os
import resource
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import soundfile as sf

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
RATE = 48000


# ----------------------------------------------------------------------------- fixture files


def _noise(seconds, channels=2, level=0.25, seed=3550):
    rng = np.random.default_rng(seed)
    return np.clip(rng.normal(0.0, level, (int(seconds * RATE), channels)), -1.0, 1.0)


def _wav_header_only(path):
    fmt = struct.pack("<HHIIHH", 1, 2, RATE, RATE * 4, 4, 16)
    body = b"WAVE" + b"fmt " + struct.pack("<I", 16) + fmt + b"data" + struct.pack("<I", 0)
    with open(path, "wb") as f:
        f.write(b"RIFF" + struct.pack("<I", len(body)) + body)


def _truncated(path, ext="wav"):
    sf.write(path, _noise(0.2), RATE, subtype="PCM_24", format="WAV" if ext == "wav" else "AIFF")
    data = open(path, "rb").read()
    with open(path, "wb") as f:
        f.write(data[: len(data) - 6000])


def _mid_corrupt_flac(path):
    sf.write(path, _noise(2.0), RATE, subtype="PCM_16", format="FLAC")
    data = bytearray(open(path, "rb").read())
    middle = len(data) // 2
    data[middle : middle + 4000] = bytes(4000)
    with open(path, "wb") as f:
        f.write(bytes(data))


def _unix_socket(path):
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    s.bind(path)
    s.close()


def _report(path):
    with open(path, "w") as f:
        json.dump({"bits": 16, "dither": "tpdf", "shaper": "flat", "samplerate": RATE, "channels": []}, f)


AUTOMATION_HEADER = json.dumps({"rtstage_automation": 1, "samplerate": RATE})

FILES = {
    "in.wav": lambda p: sf.write(p, _noise(0.25), RATE, subtype="PCM_24"),
    "in.flac": lambda p: sf.write(p, _noise(0.25, 1), RATE, subtype="PCM_16"),
    "in.aiff": lambda p: sf.write(p, _noise(0.25), RATE, subtype="PCM_24", format="AIFF"),
    "long.wav": lambda p: sf.write(p, _noise(6.0), RATE, subtype="PCM_16"),
    "big.wav": lambda p: sf.write(p, _noise(12.0), RATE, subtype="PCM_16"),
    "slow.wav": lambda p: sf.write(p, _noise(0.1, 1), 4000, subtype="PCM_16"),
    "wide.wav": lambda p: sf.write(p, np.zeros((100, 65)), RATE, subtype="PCM_16"),
    "trunc.wav": _truncated,
    "trunc.aiff": lambda p: _truncated(p, "aiff"),
    "header.wav": _wav_header_only,
    "empty.wav": lambda p: open(p, "wb").close(),
    "garbage.wav": lambda p: open(p, "wb").write(b"RIFF\x10\x00\x00\x00WAVEjunkjunkjunk"),
    "text.wav": lambda p: open(p, "w").write("not audio at all\n"),
    "text.flac": lambda p: open(p, "w").write("fLaC? no\n"),
    "midbad.flac": _mid_corrupt_flac,
    "dir.wav": os.mkdir,
    "dir": os.mkdir,
    "sock.wav": _unix_socket,
    "exists.wav": lambda p: open(p, "wb").write(b"an older take, keep me"),
    "exists.json": lambda p: open(p, "w").write("{}\n"),
    "exists.toml": lambda p: open(p, "w").write("# keep\n"),
    "exists.png": lambda p: open(p, "wb").write(b"\x89PNG keep"),
    "exists.txt": lambda p: open(p, "w").write("keep\n"),
    "plots": os.mkdir,
    "plots/error-spectrum.png": lambda p: open(p, "wb").write(b"\x89PNG older figure"),
    "sub": os.mkdir,
    "link.wav": lambda p: os.symlink("in.wav", p),
    "hard.wav": lambda p: os.link(os.path.join(os.path.dirname(p), "in.wav"), p),
    "bad.toml": lambda p: open(p, "w").write("bits = = 16\n"),
    "nonutf8.toml": lambda p: open(p, "wb").write(b'description = "\xff\xfe caf\xe9"\nbits = 16\n'),
    "field.toml": lambda p: open(p, "w").write('colour = "blue"\n'),
    "type.toml": lambda p: open(p, "w").write('bits = "sixteen"\n'),
    "range.toml": lambda p: open(p, "w").write("bits = 40\n"),
    "unsafe.toml": lambda p: open(p, "w").write('description = "x"\ndither = "none"\nshaper = "diff2"\n'),
    "shaper-bad.toml": lambda p: open(p, "w").write('id = "s"\ncoefs = [1.0, "x"]\n'),
    "shaper-long.toml": lambda p: open(p, "w").write('id = "s"\ncoefs = [' + ", ".join(["0.01"] * 40) + "]\n"),
    "shaper-nan.toml": lambda p: open(p, "w").write('id = "s"\ncoefs = [nan, 0.1]\n'),
    "shaper-noid.toml": lambda p: open(p, "w").write("coefs = [0.5]\n"),
    "shaper-nonutf8.toml": lambda p: open(p, "wb").write(b'id = "\xff\xfe"\ncoefs = [0.5]\n'),
    "shaper-notoml.toml": lambda p: open(p, "w").write("coefs: [0.5]\n"),
    "table-bad.txt": lambda p: open(p, "w").write("100 x\n"),
    "table-empty.txt": lambda p: open(p, "w").write("# nothing\n"),
    "table-nonutf8.txt": lambda p: open(p, "wb").write(b"100 \xff\n"),
    "auto-notjson.jsonl": lambda p: open(p, "w").write("{at_frame: 1}\n"),
    "auto-version.jsonl": lambda p: open(p, "w").write('{"rtstage_automation": 9}\n'),
    "auto-rate.jsonl": lambda p: open(p, "w").write('{"rtstage_automation": 1, "samplerate": 44100}\n'),
    "auto-neg.jsonl": lambda p: open(p, "w").write('{"at_frame": -5, "values": {"gain_db": -1}}\n'),
    "auto-both.jsonl": lambda p: open(p, "w").write('{"at_frame": 5, "at_s": 1, "values": {"gain_db": -1}}\n'),
    "auto-unknown.jsonl": lambda p: open(p, "w").write('{"at_frame": 5, "values": {"colour": 1}}\n'),
    "auto-value.jsonl": lambda p: open(p, "w").write('{"at_frame": 5, "values": {"bits": 99}}\n'),
    "auto-empty-values.jsonl": lambda p: open(p, "w").write('{"at_frame": 5, "values": {}}\n'),
    "auto-key.jsonl": lambda p: open(p, "w").write('{"at_frame": 5, "when": 1, "values": {"gain_db": 0}}\n'),
    "auto-array.jsonl": lambda p: open(p, "w").write("[1, 2]\n"),
    "auto-nonutf8.jsonl": lambda p: open(p, "wb").write(b'{"at_frame": 1, "values": {"dither": "\xff"}}\n'),
    "auto-unsafe.jsonl": lambda p: open(p, "w").write('{"at_frame": 100, "values": {"dither": "none"}}\n'),
    "auto-late.jsonl": lambda p: open(p, "w").write(
        AUTOMATION_HEADER + "\n" + '{"at_frame": 2000, "values": {"gain_db": 0.0}}\n'
        + '{"at_frame": 3000, "values": {"gain_db": -1.0}}\n' + '{"at_frame": 99000000, "values": {"gain_db": -2.0}}\n'),
    "auto-quantizer.jsonl": lambda p: open(p, "w").write('{"at_frame": 100, "values": {"bits": 12}}\n'),
    "report-wav.json": lambda p: sf.write(p, _noise(0.05), RATE, subtype="PCM_16", format="WAV"),
    "report-notjson.json": lambda p: open(p, "w").write("bits: 16\n"),
    "report-list.json": lambda p: open(p, "w").write("[1, 2, 3]\n"),
    "report-other.json": lambda p: open(p, "w").write('{"hello": "world"}\n'),
    "report-nonutf8.json": lambda p: open(p, "wb").write(b'{"bits": "\xff"}\n'),
    "report-broken.json": lambda p: open(p, "w").write('{"channels": [{"added_noise_dbfs": 3}]}\n'),
    "report-channels.json": lambda p: open(p, "w").write('{"channels": "none"}\n'),
    "report-empty.json": _report,
    "token.txt": lambda p: open(p, "w").write("secret-token-for-tests\n"),
    "midi-bad.toml": lambda p: open(p, "w").write("[[cc]]\nnumber = 500\n"),
}


def build(folder, names):
    """Create the named fixture files in ``folder`` (in order: a hard link needs its target first)."""
    for name in names:
        path = os.path.join(folder, name)
        os.makedirs(os.path.dirname(path), exist_ok=True)
        FILES[name](path)


# ----------------------------------------------------------------------------- snapshot


def snapshot(*roots):
    """{relative path: digest} of every entry under ``roots``: file SHA-256 and mode, link target, folder."""
    state = {}
    for index, root in enumerate(roots):
        for dirpath, dirnames, filenames in os.walk(root):
            for name in dirnames + filenames:
                path = os.path.join(dirpath, name)
                rel = f"{index}:{os.path.relpath(path, root)}"
                st = os.lstat(path)
                if os.path.islink(path):
                    state[rel] = "link:" + os.readlink(path)
                elif os.path.isdir(path):
                    state[rel] = "dir"
                elif os.path.isfile(path):
                    with open(path, "rb") as f:
                        state[rel] = f"{hashlib.sha256(f.read()).hexdigest()}:{oct(st.st_mode)}"
                else:
                    state[rel] = f"special:{oct(st.st_mode)}"
    return state


def changes(before, after):
    """Paths created, changed or removed (without the root index prefix when it is 0)."""
    paths = {p for p in set(before) | set(after) if before.get(p) != after.get(p)}
    return {p[2:] if p.startswith("0:") else p for p in paths}


# ----------------------------------------------------------------------------- cases


@dataclass
class Case:
    """One bad invocation.

    ``argv`` items may hold ``{d}`` (the case folder) and ``{m}`` (the small
    mounted file system, when ``mount`` is set); ``status`` is the documented
    exit status; ``expect`` a lower-case fragment of the one stderr line;
    ``accepted`` the outputs (relative to the case folder) the command may
    create or change.
    """

    name: str
    argv: list
    status: int
    expect: str = ""
    files: tuple = ()
    accepted: tuple = ()
    stdin: bytes = b""
    mount: str = None
    """'full' (a 1 MiB tmpfs), 'ro' (a read-only tmpfs) or None."""
    fsize: int = None
    """RLIMIT_FSIZE in bytes for the child (a size-limited file system)."""
    signal: int = None
    """Signal sent once a temporary output file has grown."""
    close_stdout: bool = False
    lines: int = 1
    """Lines expected on stderr; 0 for a quiet end, -1 when a successful run may log more (then ``expect`` is searched)."""
    contents: dict = field(default_factory=dict)
    """Extra files {name: bytes} written into the case folder (generated cases)."""


@dataclass
class Result:
    case: Case
    status: int
    stdout: str
    stderr: str
    changed: set = field(default_factory=set)
    elapsed_s: float = 0.0


def _free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


CLOSED_PORT = str(_free_port())
"""A loopback port nobody listens on (for send and watch)."""


def _mount(folder, kind):
    os.makedirs(folder, exist_ok=True)
    if kind == "full":
        subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", folder], check=True)
    else:
        subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", folder], check=True)
        subprocess.run(["mount", "-o", "remount,ro", folder], check=True)


def _umount(folder):
    subprocess.run(["umount", "-l", folder], check=False)


def _wait_for_temp(folder, proc, timeout_s=60.0):
    """Wait until a temporary output (.rtstage-*) exists and holds data, or the process ends."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and proc.poll() is None:
        for name in os.listdir(folder):
            if name.startswith(".rtstage-"):
                try:
                    if os.path.getsize(os.path.join(folder, name)) > 65536:
                        return True
                except OSError:
                    pass
        time.sleep(0.01)
    return False


CASE_TIMEOUT_S = 300


def _read_all(stream, proc):
    data = stream.read()
    proc.wait(timeout=CASE_TIMEOUT_S)
    return data


def run_case(case, base):
    """Run one case in a fresh folder under ``base``; returns a :class:`Result`."""
    folder = tempfile.mkdtemp(prefix=case.name[:40] + "-", dir=base)
    build(folder, case.files)
    for name, data in case.contents.items():
        with open(os.path.join(folder, name), "wb") as f:
            f.write(data)
    mnt = os.path.join(base, "mnt-" + os.path.basename(folder)) if case.mount else None
    if mnt:
        _mount(mnt, case.mount)
    try:
        argv = [a.replace("{d}", folder).replace("{m}", mnt or "") for a in case.argv]
        env = dict(os.environ, PYTHONPATH=ROOT, XDG_STATE_HOME=os.path.join(base, "state"), COLUMNS="100")
        env.pop("PYTHONWARNINGS", None)
        roots = (folder,) + ((mnt,) if mnt else ())
        before = snapshot(*roots)
        limit = case.fsize

        def preexec():
            if limit is not None:
                resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

        start = time.monotonic()
        stdout = subprocess.PIPE
        proc = subprocess.Popen([sys.executable, "-m", "rtstage", *argv], cwd=folder, env=env,
                                stdin=subprocess.PIPE, stdout=stdout, stderr=subprocess.PIPE,
                                preexec_fn=preexec)
        try:
            if case.close_stdout:
                proc.stdout.close()
            if case.signal is not None:
                proc.stdin.close()
                _wait_for_temp(mnt or folder, proc)
                proc.send_signal(case.signal)
                out = b""
                err = _read_all(proc.stderr, proc)
            elif case.close_stdout:
                try:
                    proc.stdin.write(case.stdin)
                    proc.stdin.close()
                except BrokenPipeError:
                    pass
                out = b""
                err = _read_all(proc.stderr, proc)
            else:
                out, err = proc.communicate(case.stdin, timeout=CASE_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
            return Result(case, None, "", f"timed out after {CASE_TIMEOUT_S} s", set(), CASE_TIMEOUT_S)
        elapsed = time.monotonic() - start
        after = snapshot(*roots)
        return Result(case, proc.returncode, out.decode("utf-8", "replace"), err.decode("utf-8", "replace"),
                      changes(before, after), elapsed)
    finally:
        if mnt:
            _umount(mnt)


def _guarded(case, base):
    try:
        return run_case(case, base)
    except Exception as exc:  # a harness failure is reported on that case, not on all of them
        import traceback

        return Result(case, None, "", "harness: " + "".join(traceback.format_exception(exc)), set())


def run_all(cases, base, workers=None):
    """Run every case on a thread pool; returns {name: Result}."""
    workers = workers or max(2, min(4, (os.cpu_count() or 2) + 1))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        results = list(pool.map(lambda c: _guarded(c, base), cases))
    return {r.case.name: r for r in results}


def check_either(result, accepted):
    """For generated cases whose status depends on the drawn value: either refused (status 2, one line,
    nothing changed) or done (status 0, only ``accepted`` outputs changed); never a traceback."""
    err_lines = [line for line in result.stderr.splitlines() if line.strip()]
    where = f"{result.case.name} {result.case.argv}: status {result.status}, stderr {result.stderr!r}"
    assert "Traceback" not in result.stderr, where
    assert result.status in (0, 2), where
    if result.status == 2:
        assert len(err_lines) == 1 and err_lines[0].startswith("rtstage:"), where
        assert not result.changed, f"{where}: changed {sorted(result.changed)}"
    else:
        assert result.changed <= set(accepted), f"{where}: changed {sorted(result.changed)}"


def check(result):
    """Assert everything the catalogue promises about one result."""
    case = result.case
    err_lines = [line for line in result.stderr.splitlines() if line.strip()]
    where = f"{case.name}: status {result.status}, stderr {result.stderr!r}"
    assert "Traceback" not in result.stderr, where
    assert result.status == case.status, where
    if case.lines == 0:
        assert err_lines == [], where
    elif case.lines > 0:
        assert len(err_lines) == case.lines, where
        assert all(line.startswith("rtstage:") for line in err_lines), where
        assert not any(line.startswith("rtstage: rtstage") for line in err_lines), where  # the name said once
    if case.expect:
        assert case.expect in result.stderr.lower(), where
    allowed = set(case.accepted) if case.status == 0 else set()
    assert result.changed <= allowed, f"{case.name}: changed {sorted(result.changed)}, allowed {sorted(allowed)}"
