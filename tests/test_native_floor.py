"""rtstage beside a native C JACK client on one realtime server: nothing lost that the server itself did not lose.

The native client is ``tools/jack_passthrough.c``, built here with gcc against
libjack.  It and rtstage's callback count the same things from the server's
exact frame counter (``jack_last_frame_time``): *late* cycles (a process call
that ran in the following cycle and was caught up) and *jumps* (cycles the
server counted and ran nobody in: a stall of the server itself).

Strict checks, and why they hold on a shared machine:

* The tap equals ``rtstage render`` of the same file, bit for bit, with no
  dropped frames (nothing on the audio path depends on timing).
* Every server cycle rtstage reports as passed without it (a gap record in the
  status and in the tap's sidecar) is one the native client also saw pass in
  the same cycle (within two periods): a stall of the machine or the server
  reaches every client at once, so it is excluded by being *shared*; a cycle
  lost by rtstage alone would be a defect of rtstage and fails the test.  The
  server and both clients run on one CPU, so that "every client at once" holds
  on a virtual machine too, where the host may deschedule one virtual CPU
  while the other runs on (seen in CI: 50 server jumps in 6 s, some of them on
  one client only when the clients ran on different CPUs).
* The gap records in the status and in the tap's sidecar agree.

The reverse (every native jump is in rtstage's report) does not hold in
general: a client whose thread is late for a whole cycle is woken once for two
cycles by JACK2, so the native client can lose a cycle alone.

Late cycles are reported, not asserted: which of two clients of equal
priority a stall of another process on the same core delays is chance, so a
strict count would test the machine, not rtstage; ``tools/bench_live.py``
measures them against the native floor over minutes.
"""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage.live.sources import generate

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000


def _near(frame, frames, tol):
    return any(abs(((frame - f + 2**31) % 2**32) - 2**31) <= tol for f in frames)


# Re-run up to twice: the native client's jump detector needs two calls to confirm a jump, so two server
# stalls in consecutive cycles can hide the first from it (seen once in a CI run with 253 server xruns in
# 6 s); a cycle lost by rtstage alone fails every run.
@pytest.mark.flaky(reruns=2)
def test_rtstage_loses_no_cycle_the_native_client_did_not(jack_server_factory, tmp_path):
    # The server and both clients share one CPU: on a virtual machine a stall of one CPU (the hypervisor
    # descheduling it) would otherwise reach only the client that runs there, and "shared" would not hold.
    jack_server = jack_server_factory(samplerate=SR, period_frames=64, cpus={min(os.sched_getaffinity(0))})
    binary = str(tmp_path / "jack_passthrough")
    subprocess.run(["gcc", "-O2", "-Wall", "-o", binary, os.path.join(ROOT, "tools", "jack_passthrough.c"), "-ljack"],
                   check=True)
    x = generate("noise:level_dbfs=-14,seed=21", SR, 2, 0, 6 * SR)
    src = str(tmp_path / "src.wav")
    sf.write(src, x, SR, subtype="DOUBLE")
    ref_path = str(tmp_path / "render.wav")
    args = ["--bits", "16", "--dither", "tpdf", "--shaper", "wannamaker-f9", "--seed", "99"]
    subprocess.run([sys.executable, "-m", "rtstage", "render", src, ref_path, *args], cwd=ROOT, check=True,
                   capture_output=True)
    env = jack_server.client_env()
    native = subprocess.Popen([binary, "floor-check"], env=env, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                              preexec_fn=jack_server.pin)
    try:
        ready = json.loads(native.stdout.readline())
        assert ready["ready"] and ready["realtime"] == int(jack_server.realtime)
        tap, status_path = str(tmp_path / "tap.wav"), str(tmp_path / "status.json")
        run = subprocess.run([sys.executable, "-m", "rtstage", "run", "--source", src, *args, "--blocksize", "64",
                              "--tap", tap, "--status-file", status_path, "--quiet"],
                             env=env, cwd=ROOT, capture_output=True, text=True, timeout=600, preexec_fn=jack_server.pin)
        assert run.returncode == 0, run.stderr
        native.stdin.write("report\n")
        native.stdin.flush()
        counts = json.loads(native.stdout.readline())
    finally:
        native.stdin.close()
        native.wait(10)
    status = json.load(open(status_path))

    reference = sf.read(ref_path, dtype="int16", always_2d=True)[0]
    assert status["tap_dropped_frames"] == 0
    assert_array_equal(sf.read(tap, dtype="int16", always_2d=True)[0], reference)

    period = status["port"]["host_period_frames"]
    assert period == 64 and status["port"]["cycle_check"]
    lost = [g for g in status["gaps"] if g["reason"].startswith("port:")]
    tol = 2 * period
    native_events = counts["jump_at"] + counts["late_at"]
    for g in lost:  # shared stalls only
        assert _near(g["server_frame"], native_events, tol), (g, counts)
    sidecar = json.load(open(tap + ".gaps.json"))
    assert [g["server_frame"] for g in sidecar["gaps"] if g["reason"].startswith("port:")] == \
        [g["server_frame"] for g in lost]
    # (The reverse is not asserted: with JACK2 a client whose thread was late for a whole cycle is woken once
    # for two cycles, so the native client can lose a cycle alone; those are the native client's, not shared.)
    ran = status["port"]
    print(json.dumps({"native": {k: counts[k] for k in ("calls", "late", "jumps", "xruns")},
                      "rtstage_lost": [g["server_frame"] for g in lost], "rtstage_late": ran["late_cycles"],
                      "callback_max_us": ran["callback_max_us"], "p999_us": ran["callback_p999_us_at_most"]}))
