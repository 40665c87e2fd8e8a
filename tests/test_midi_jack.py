"""MIDI control over real JACK MIDI ports (python-rtmidi, JACK API) against a private JACK dummy server.

A probe client plays the hardware controller: it owns a virtual output (the
controller's knobs) and a virtual input (its LEDs or motor faders).  rtstage
connects to both by name substring.  Checks: a change of ``bits`` from a
control shows in the engine's tap at the sample index written to the
automation log, and rendering that log offline gives the tap bit for bit;
feedback on connect and after changes; learn armed over the socket; program
change recalls a preset; SysEx, clock and active sensing are ignored; the
input is reopened when the controller's port comes back.

Status bytes and controller numbers follow the MIDI 1.0 Detailed
Specification (MMA, 1996); the default map uses the undefined controllers 102-119.
"""

import queue
import time

import numpy as np
import pytest
import rtmidi

from rtstage.control.automation import AutomationPlayer, AutomationWriter, load_automation, process_with_automation
from rtstage.control.midi import Control, MidiControl, load_map, open_api
from rtstage.control.target import sine_block
from rtstage.control.testing import control_stack
from rtstage.engine import Engine, EngineSettings
from rtstage.errors import RtstageError
from rtstage.live.jackserver import JackDummyServer

SETTINGS = EngineSettings(bits=16, dither="tpdf", shaper="flat", seed=4242)
QUIET = lambda message: None  # noqa: E731


@pytest.fixture(scope="module")
def jack_env():
    server = JackDummyServer(samplerate=48000, period_frames=64)
    server.start()
    try:
        env = server.client_env()
        yield {k: env[k] for k in ("JACK_DEFAULT_SERVER", "JACK_NO_START_SERVER", "JACK_NO_AUDIO_RESERVATION")}
    finally:
        server.stop()


@pytest.fixture
def jack(jack_env, monkeypatch):
    for key, value in jack_env.items():
        monkeypatch.setenv(key, value)
    return jack_env


class Desk:
    """The probe controller: virtual ports on the JACK server."""

    def __init__(self, suffix=""):
        self.out = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, name="deskprobe")
        self.out.open_virtual_port("desk knobs" + suffix)
        self.inp = rtmidi.MidiIn(rtmidi.API_UNIX_JACK, name="deskprobe-in")
        self.inp.open_virtual_port("desk lights" + suffix)
        self.received = queue.SimpleQueue()
        self.inp.set_callback(lambda event, data=None: self.received.put(event[0]))

    def send(self, *messages):
        for message in messages:
            self.out.send_message(message)

    def wait_for(self, wanted, timeout_s=10.0):
        deadline = time.monotonic() + timeout_s
        seen = []
        while time.monotonic() < deadline:
            try:
                message = self.received.get(timeout=0.05)
            except queue.Empty:
                continue
            seen.append(message)
            if message == wanted:
                return seen
        raise AssertionError(f"{wanted} not received; got {seen}")

    def close(self):
        self.inp.cancel_callback()
        self.out.close_port()
        self.inp.close_port()
        del self.out, self.inp


def wait_until(predicate, timeout_s=10.0):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.01)
    return predicate()


@pytest.fixture
def desk(jack):
    d = Desk()
    try:
        yield d
    finally:
        d.close()


def test_api_selection_errors(jack):
    with pytest.raises(RtstageError, match="unknown MIDI API"):
        open_api("serial")
    name, midi_in, midi_out = open_api("auto")
    assert name in ("jack", "alsa")  # JACK first when compiled in; ALSA needs /dev/snd/seq
    del midi_in, midi_out


def test_bits_change_from_control_in_tap_and_rerender(jack, desk, tmp_path):
    log_path = str(tmp_path / "midi-session.jsonl")
    writer = AutomationWriter(log_path, 48000)
    bits_cc = Control("bits", 1, 102)
    try:
        with control_stack(settings=SETTINGS, driver=True, automation_log=writer, logger=QUIET,
                           preset_dir=str(tmp_path / "presets")) as stack:
            midi = MidiControl(stack.controller, load_map("default"), api="jack", in_port="desk knobs",
                               out_port="desk lights", poll_s=0.1)
            with midi:
                assert wait_until(lambda: midi.in_connected and midi.out_connected)
                # feedback on connect: the current word length on CC 102
                desk.wait_for([0xB0, 102, bits_cc.to_position(16)])
                while stack.engine.frame < 4096:
                    time.sleep(0.005)
                # SysEx, clock, active sensing and a note first: all ignored
                desk.send([0xF0, 0x7D, 0x01, 0xF7], [0xF8], [0xFE], [0x90, 60, 100])
                # soft takeover: meet the current value, then move to 8 bits
                desk.send([0xB0, 102, bits_cc.to_position(16)], [0xB0, 102, bits_cc.to_position(8)])
                assert wait_until(lambda: stack.engine.settings.bits == 8)
                # the moved control gets its final value after the hand leaves it (suppression), once
                desk.wait_for([0xB0, 102, bits_cc.to_position(8)])
                # a change from the socket is fed back at once
                with stack.client() as c:
                    assert c.request({"op": "set", "values": {"dither": "rpdf"}})["ok"]
                    dither_pos = Control("dither", 1, 103).to_position("rpdf")
                    desk.wait_for([0xB0, 103, dither_pos])
                    status = c.request({"op": "status"})["status"]["midi"]
                    assert status["api"] == "jack" and status["map"] == "default"
                frame = stack.engine.frame
                while stack.engine.frame < frame + 4096:
                    time.sleep(0.005)
            stack.driver.stop()
            tap = np.concatenate(stack.driver.tap)
    finally:
        writer.close()
    events = load_automation(log_path, samplerate=48000)
    assert [v for _, v in events] == [{"bits": 8}, {"dither": "rpdf"}]
    f8 = events[0][0]
    # kernel rule: an 8-bit word in a 16-bit container is q << 8
    assert np.all(tap[f8:] & 0xFF == 0)
    assert np.count_nonzero(tap[f8 - 256:f8] & 0xFF) > 256
    engine = Engine(SETTINGS, 2, 48000)
    player = AutomationPlayer(events)
    x = sine_block(0, len(tap), 2, 48000)
    rerender = np.concatenate([process_with_automation(engine, x[i:i + 4096], player) for i in range(0, len(tap), 4096)])
    np.testing.assert_array_equal(rerender, tap)


# Re-run up to twice: once in a CI run the program change did not arrive within the wait (not reproduced
# alone; under investigation); a mapping or recall that is wrong fails every run.
@pytest.mark.flaky(reruns=2)
def test_learn_program_change_and_reconnect(jack, tmp_path):
    with control_stack(settings=SETTINGS, logger=QUIET, preset_dir=str(tmp_path / "presets")) as stack:
        desk = Desk()
        midi = MidiControl(stack.controller, load_map("default"), api="jack", in_port="desk knobs",
                           out_port="desk lights", poll_s=0.1)
        try:
            with midi, stack.client() as c:
                assert wait_until(lambda: midi.in_connected)
                # learn: arm over the socket, move an unmapped control, get the event
                assert c.request({"op": "learn", "name": "dither_scale"})["armed"] == "dither_scale"
                desk.send([0xB1, 20, 3])
                assert wait_until(lambda: c.request({"op": "hello"})["ok"]
                                  and any(e.get("event") == "learned" for e in c.events))
                learned = [e for e in c.events if e.get("event") == "learned"][0]
                assert learned == {"event": "learned", "name": "dither_scale", "channel": 2, "cc": 20, "mode": "absolute"}
                learned_control = midi.map.control_for(2, 20)
                desk.send([0xB1, 20, learned_control.to_position(1.0)], [0xB1, 20, 127])
                assert wait_until(lambda: stack.engine.settings.dither_scale == 4.0)
                # program change 0 recalls preset program-1 (default map)
                assert c.request({"op": "set", "values": {"bits": 10}})["ok"]
                assert c.request({"op": "preset_save", "name": "program-1"})["ok"]
                assert c.request({"op": "set", "values": {"bits": 14}})["ok"]
                desk.send([0xC0, 0])
                assert wait_until(lambda: stack.engine.settings.bits == 10)
                # the controller goes away and comes back: the input is reopened by name
                desk.close()
                assert wait_until(lambda: midi.in_connected is None)
                desk = Desk()
                assert wait_until(lambda: midi.in_connected is not None)
                time.sleep(0.2)
                bits_cc = Control("bits", 1, 113, "relative-twos")
                desk.send([0xB0, bits_cc.cc, 1])  # encoder one step up
                assert wait_until(lambda: stack.engine.settings.bits == 11)
        finally:
            desk.close()
