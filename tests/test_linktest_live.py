"""``rtstage linktest run`` on a JACK dummy server, as a subprocess.

The path is wired with JACK-Client (the reference library for JACK) while
the link test's preroll plays: first a direct connection of the link test's
own output ports to its input ports, then a second ``rtstage run`` that
requantizes to 16 bits with TPDF dither in between.  The expected latency of
the direct path is PortAudio's own figure for the duplex stream (input plus
output latency, Pa_GetStreamInfo through sounddevice), which the report
carries under ``stream``.
"""

import json
import os
import signal
import subprocess
import sys
import time

import jack
import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000
PERIOD = 256


@pytest.fixture(scope="module")
def server():
    """One private JACK dummy server for the module (realtime scheduling is granted on the test machines;
    it keeps the dummy graph free of late cycles)."""
    from rtstage.live.jackserver import JackDummyServer

    jackd = JackDummyServer(samplerate=SR, period_frames=PERIOD, realtime=True, name=f"rtstage-linktest-{os.getpid()}")
    jackd.start()
    try:
        yield jackd
    finally:
        jackd.stop()


class Wiring:
    """Reads and changes the server's connections through JACK-Client."""

    def __init__(self, server):
        self.client = jack.Client("linktest-wiring", no_start_server=True, servername=server.name)

    def close(self):
        self.client.close()

    def clients(self):
        return {p.name.split(":")[0] for p in self.client.get_ports(is_audio=True)} - {"system"}

    def ports(self, client, is_input):
        ports = self.client.get_ports(client + ":", is_audio=True, is_input=is_input, is_output=not is_input)
        return sorted((p for p in ports if p.name.split(":")[0] == client), key=lambda p: p.name)

    def wait_new_client(self, known, timeout_s=300, proc=None, err_path=None, channels=2):
        """Name of a new client once all its ports (``channels`` in and out) are registered."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            new = [c for c in self.clients() - set(known)
                   if len(self.ports(c, True)) >= channels and len(self.ports(c, False)) >= channels]
            if new:
                return new[0]
            if proc is not None and proc.poll() is not None:
                text = open(err_path).read() if err_path else ""
                raise AssertionError(f"the process ended (status {proc.returncode}) before its ports appeared: {text}")
            time.sleep(0.005)
        raise AssertionError("no new JACK client appeared" + (": " + open(err_path).read() if err_path else ""))

    def isolate(self, client):
        for port in self.ports(client, False) + self.ports(client, True):
            for other in self.client.get_all_connections(port):
                if port.is_output:
                    self.client.disconnect(port, other)
                else:
                    self.client.disconnect(other, port)

    def route(self, source, destination):
        for a, b in zip(self.ports(source, False), self.ports(destination, True)):
            self.client.connect(a, b)


def _linktest(server, tmp_path, *extra):
    report = str(tmp_path / "report.json")
    cmd = [sys.executable, "-m", "rtstage", "linktest", "run", "--output-device", "system", "--input-device", "system",
           "--seed", "4242", "--seconds", "2", "--blocksize", str(PERIOD), "--preroll", "2.0", "--tail", "0.5",
           "--report", report, "--capture", str(tmp_path / "capture.wav"), *extra]
    err = open(tmp_path / "linktest.err", "w")
    proc = subprocess.Popen(cmd, env=server.client_env(), cwd=ROOT, stdout=subprocess.PIPE, stderr=err, text=True)
    err.close()
    return proc, report


def _finish(proc, tmp_path):
    try:
        out, _ = proc.communicate(timeout=300)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    return proc.returncode, out, open(tmp_path / "linktest.err").read()


@pytest.mark.parametrize("bits", [24, 16])
def test_direct_connection_is_transparent(server, tmp_path, bits):
    # 24-bit words go out as left-justified int32, 16-bit words as int16.
    wiring = Wiring(server)
    try:
        known = wiring.clients() | {"linktest-wiring"}
        proc, report_path = _linktest(server, tmp_path, "--bits", str(bits))
        me = wiring.wait_new_client(known, proc=proc, err_path=tmp_path / "linktest.err")
        wiring.isolate(me)
        wiring.route(me, me)  # its own outputs straight into its own inputs
        code, out, err = _finish(proc, tmp_path)
    finally:
        wiring.close()
    assert code in (0, 1), out + err
    report = json.load(open(report_path))
    # Xruns of the graph that PortAudio reported to the stream: on a loaded machine a late cycle can garble
    # a block; the analyser must then name it as damage (at most a period per xrun) and nothing else.
    xruns = report["stream"]["flagged_callbacks"]
    if xruns == 0:
        assert code == 0 and report["transparent"] is True and out.startswith("TRANSPARENT"), out + err
    # Reference: PortAudio's latency of the duplex stream (input + output), in frames.
    expected = round(sum(report["stream"]["stream_latency_s"]) * SR)
    assert report["latency_frames"] == expected
    for i, ch in enumerate(report["channels"]):
        assert (ch["source_channel"], ch["bits_passed"], ch["requantization"]) == (i, bits, "none")
        assert (ch["polarity"], ch["gain_db"], ch["dc_offset_lsb"], ch["slips"], ch["drift_ppm"], ch["clipped"]) == \
            (1, 0.0, 0.0, [], 0.0, 0)
        assert ch["damaged_frames"] <= xruns * PERIOD, (ch["damaged"], xruns)
        assert ch["transparent"] is (not ch["damaged"]) and (ch["word_errors"] == 0) is (not ch["damaged"])
    assert "caution" in err


def test_through_a_second_rtstage_at_16_bits_tpdf(server, tmp_path):
    wiring = Wiring(server)
    middle_err = tmp_path / "middle.err"
    middle = None
    try:
        known = wiring.clients() | {"linktest-wiring"}
        with open(middle_err, "w") as err:
            middle = subprocess.Popen(
                [sys.executable, "-m", "rtstage", "run", "--device", "system", "--channels", "2", "--samplerate", str(SR),
                 "--blocksize", str(PERIOD), "--bits", "16", "--dither", "tpdf", "--seed", "31", "--quiet",
                 "--control-port", "0", "--duration", "600", "--status-file", str(tmp_path / "middle.json")],
                env=server.client_env(), cwd=ROOT, stdout=subprocess.DEVNULL, stderr=err)
        box = wiring.wait_new_client(known, proc=middle, err_path=middle_err)
        deadline = time.monotonic() + 300  # a cold numba cache compiles the engine's callback first
        while "rtstage: running:" not in middle_err.read_text():
            assert middle.poll() is None and time.monotonic() < deadline, middle_err.read_text()
            time.sleep(0.05)
        proc, report_path = _linktest(server, tmp_path)
        me = wiring.wait_new_client(known | {box}, proc=proc, err_path=tmp_path / "linktest.err")
        wiring.isolate(me)
        wiring.isolate(box)
        wiring.route(me, box)
        wiring.route(box, me)
        code, out, err = _finish(proc, tmp_path)
    finally:
        wiring.close()
        if middle is not None:
            if middle.poll() is None:
                middle.send_signal(signal.SIGTERM)
            try:
                middle.wait(30)
            except subprocess.TimeoutExpired:
                middle.kill()
                middle.wait()
    assert code == 1, out + err
    report = json.load(open(report_path))
    status = json.load(open(tmp_path / "middle.json"))
    assert report["found"] is True and report["transparent"] is False
    assert status["restarts"] == 0, status  # the middle engine kept its ports (and our wiring) throughout
    # Xruns of the graph reported by PortAudio to either stream (the link test's own counters and the
    # middle engine's status); on a loaded machine a late cycle can garble a block of words.
    xruns = report["stream"]["flagged_callbacks"] + status["xruns"]["flagged_callbacks"]
    # The second engine adds at least its own stream's latency to the loop's.
    assert report["latency_frames"] > round(sum(report["stream"]["stream_latency_s"]) * SR)
    for i, ch in enumerate(report["channels"]):
        # What the middle engine does, by its settings: 16-bit words with TPDF dither and nothing else.
        assert (ch["source_channel"], ch["bits_passed"], ch["requantization"]) == (i, 16, "dithered")
        assert (ch["polarity"], ch["gain_db"], ch["dc_offset_lsb"], ch["slips"], ch["drift_ppm"], ch["clipped"]) == \
            (1, 0.0, 0.0, [], 0.0, 0)
        assert ch["dither_in_silence"] is True
        # Damaged stretches only where the graph reported xruns, and then at most one period per xrun.
        assert ch["damaged_frames"] <= xruns * PERIOD, (ch["damaged"], xruns)
