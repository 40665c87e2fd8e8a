"""MIDI mapping logic on byte sequences: decoding, modes, 14-bit pairs, soft takeover, learn, feedback.

Byte-level rules are from the MIDI 1.0 Detailed Specification (MMA, 1996):
status bytes have bit 7 set, data bytes not; running status; system real-time
bytes (0xF8-0xFF) may appear between any two bytes without affecting running
status; SysEx runs from 0xF0 to 0xF7; controllers 102-119 are undefined and
120-127 are channel mode messages; for controllers 0-31 the LSB is controller
n + 32 and a new MSB resets the LSB.  The three relative encodings are common
practice for endless encoders (not part of MIDI 1.0).
"""

import pytest

from rtstage import params
from rtstage.control.midi import (
    UNDEFINED_CCS,
    Control,
    FeedbackScheduler,
    MidiMap,
    MidiMapper,
    MidiStreamParser,
    decode_message,
    decode_relative,
    load_map,
    map_from_dict,
    match_port,
    port_base_name,
)
from rtstage.errors import RtstageError


def mapper_for(*controls, programs=None):
    return MidiMapper(MidiMap("t", list(controls), programs or {}))


def cc(channel, number, value):
    return decode_message([0xB0 | (channel - 1), number, value])


class TestStreamParser:
    def test_running_status(self):
        assert MidiStreamParser().feed([0xB0, 102, 1, 103, 2, 104, 3]) == [
            (0xB0, (102, 1)), (0xB0, (103, 2)), (0xB0, (104, 3))]

    def test_realtime_inside_a_message(self):
        # clock, active sensing and reset between status and data bytes
        assert MidiStreamParser().feed([0xB1, 0xF8, 102, 0xFE, 64, 0xFF]) == [(0xB1, (102, 64))]

    def test_sysex_ignored_and_ends_running_status(self):
        p = MidiStreamParser()
        assert p.feed([0xB0, 102, 1, 0xF0, 0x7E, 102, 5, 0x01, 0xF7, 103, 9]) == [(0xB0, (102, 1))]

    def test_system_common_skipped(self):
        # song position pointer (0xF2) carries two data bytes
        assert MidiStreamParser().feed([0xF2, 0x10, 0x20, 0xC0, 5]) == [(0xC0, (5,))]

    def test_stray_and_truncated(self):
        p = MidiStreamParser()
        assert p.feed([5, 6, 0xB0, 102, 0xB0, 103, 7, 999, -1]) == [(0xB0, (103, 7))]

    def test_split_across_feeds(self):
        p = MidiStreamParser()
        assert p.feed([0xB0, 102]) == [] and p.feed([64]) == [(0xB0, (102, 64))]


class TestDecode:
    def test_control_and_program(self):
        assert decode_message([0xB3, 102, 127]) == ("cc", 4, 102, 127)
        assert decode_message([0xCF, 7]) == ("program", 16, 7)

    @pytest.mark.parametrize("message", [[0x90, 60, 100], [0xF8], [0xFE], [0xF0, 1, 2, 0xF7], [0xB0, 102],
                                         [0xB0, 102, 200], [0xB0, 102, 1, 103, 2], [], None, "x", [0xE0, 0, 64]])
    def test_ignored(self, message):
        assert decode_message(message) is None

    @pytest.mark.parametrize("mode, value, steps", [
        ("relative-twos", 1, 1), ("relative-twos", 63, 63), ("relative-twos", 127, -1), ("relative-twos", 65, -63),
        ("relative-offset", 65, 1), ("relative-offset", 63, -1), ("relative-offset", 64, 0),
        ("relative-signmag", 1, 1), ("relative-signmag", 65, -1), ("relative-signmag", 0x7F, -63),
    ])
    def test_relative_encodings(self, mode, value, steps):
        assert decode_relative(mode, value) == steps


class TestAbsolute:
    def test_full_range(self):
        bits = Control("bits", 1, 102, takeover="jump")
        assert bits.from_position(0) == params.PARAMS["bits"].minimum
        assert bits.from_position(127) == params.PARAMS["bits"].maximum
        dither = Control("dither", 1, 103)
        kinds = params.PARAMS["dither"].allowed()
        assert [dither.from_position(v) for v in (0, 127)] == [kinds[0], kinds[-1]]
        # equal slices: each choice's feedback position maps back to it
        assert all(dither.from_position(dither.to_position(k)) == k for k in kinds)
        mute = Control("mute", 1, 108)
        assert (mute.from_position(63), mute.from_position(64)) == (False, True)

    def test_sub_range(self):
        gain = Control("gain_db", 1, 105, minimum=-24.0, maximum=12.0)
        assert gain.from_position(0) == -24.0 and gain.from_position(127) == 12.0
        assert gain.to_position(12.0) == 127 and gain.to_position(-60.0) == 0

    def test_jump_takeover_follows_at_once(self):
        m = mapper_for(Control("bits", 1, 102, takeover="jump"))
        assert m.handle(cc(1, 102, 127), params.defaults()) == [("set", {"bits": 24}, (1, 102))]

    def test_other_channel_ignored(self):
        m = mapper_for(Control("bits", 1, 102, takeover="jump"))
        assert m.handle(cc(2, 102, 127), params.defaults()) == []


class TestSoftTakeover:
    def test_engages_on_crossing(self):
        m = mapper_for(Control("bits", 1, 102))
        cur = params.defaults()  # bits 16
        assert m.handle(cc(1, 102, 127), cur) == []  # 24: far above, does nothing
        assert m.handle(cc(1, 102, 100), cur) == []  # 19: still above
        assert m.handle(cc(1, 102, 60), cur) == [("set", {"bits": 12}, (1, 102))]  # crossed 16
        cur["bits"] = 12
        assert m.handle(cc(1, 102, 100), cur) == [("set", {"bits": 19}, (1, 102))]  # engaged: follows

    def test_engages_on_meeting(self):
        m = mapper_for(Control("bits", 1, 102))
        pos = Control("bits", 1, 102).to_position(16)
        assert m.handle(cc(1, 102, pos), params.defaults()) == []  # meets the value: engaged, nothing to change
        cur = params.defaults()
        assert m.handle(cc(1, 102, 127), cur) == [("set", {"bits": 24}, (1, 102))]

    def test_change_from_elsewhere_rearms(self):
        m = mapper_for(Control("bits", 1, 102))
        cur = params.defaults()
        m.handle(cc(1, 102, Control("bits", 1, 102).to_position(16)), cur)
        m.released("bits")
        cur["bits"] = 4
        assert m.handle(cc(1, 102, 127), cur) == []


class TestFourteenBit:
    def control(self):
        return Control("gain_db", 1, 114, "14bit", lsb_cc=115, minimum=-24.0, maximum=12.0, takeover="jump")

    def test_msb_then_lsb(self):
        m = mapper_for(self.control())
        cur = params.defaults()
        (_, v1, _), = m.handle(cc(1, 114, 64), cur)
        (_, v2, _), = m.handle(cc(1, 115, 127), cur)
        assert v1["gain_db"] == pytest.approx(-24.0 + 36.0 * (64 << 7) / 16383)
        assert v2["gain_db"] == pytest.approx(-24.0 + 36.0 * ((64 << 7) | 127) / 16383)

    def test_msb_resets_lsb(self):
        m = mapper_for(self.control())
        cur = params.defaults()
        m.handle(cc(1, 114, 64), cur)
        m.handle(cc(1, 115, 100), cur)
        (_, v, _), = m.handle(cc(1, 114, 127), cur)
        assert v["gain_db"] == pytest.approx(-24.0 + 36.0 * (127 << 7) / 16383)

    def test_lsb_without_msb_and_per_channel(self):
        m = mapper_for(self.control(), Control("gain_db", 2, 114, "14bit", lsb_cc=115, takeover="jump"))
        cur = params.defaults()
        assert m.handle(cc(1, 115, 5), cur) == []  # no MSB yet
        m.handle(cc(2, 114, 1), cur)
        assert m.handle(cc(1, 115, 5), cur) == []  # channel 2's MSB does not pair with channel 1's LSB

    def test_full_scale(self):
        c = self.control()
        assert c.from_position(16383) == 12.0 and c.to_position(12.0) == 16383


class TestRelativeAndToggle:
    def test_relative_steps_clamp(self):
        m = mapper_for(Control("bits", 1, 113, "relative-twos"))
        cur = params.defaults()
        assert m.handle(cc(1, 113, 1), cur) == [("set", {"bits": 17}, (1, 113))]
        assert m.handle(cc(1, 113, 127), cur) == [("set", {"bits": 15}, (1, 113))]
        cur["bits"] = 24
        assert m.handle(cc(1, 113, 5), cur) == []  # held at the top of the range

    def test_relative_float_step(self):
        m = mapper_for(Control("gain_db", 1, 112, "relative-offset", step=0.5))
        assert m.handle(cc(1, 112, 62), params.defaults()) == [("set", {"gain_db": -1.0}, (1, 112))]

    def test_relative_enum(self):
        m = mapper_for(Control("dither", 1, 103, "relative-signmag"))
        kinds = params.PARAMS["dither"].allowed()
        cur = params.defaults()
        i = kinds.index(cur["dither"])
        assert m.handle(cc(1, 103, 1), cur) == [("set", {"dither": kinds[i + 1]}, (1, 103))]

    def test_toggle(self):
        m = mapper_for(Control("mute", 1, 108, "toggle"))
        cur = params.defaults()
        assert m.handle(cc(1, 108, 127), cur) == [("set", {"mute": True}, (1, 108))]
        assert m.handle(cc(1, 108, 0), cur) == []  # release


class TestProgramsAndLearn:
    def test_program_recalls_preset(self):
        m = mapper_for(programs={3: "quiet"})
        assert m.handle(decode_message([0xC0, 3]), params.defaults()) == [("recall", "quiet")]
        assert m.handle(decode_message([0xC0, 4]), params.defaults()) == []

    def test_learn_binds_next_control(self):
        m = mapper_for(Control("bits", 1, 102))
        events = []
        m.arm_learn("bits", events.append)
        cur = params.defaults()
        assert m.handle(cc(3, 20, 90), cur) == []
        assert events == [{"event": "learned", "name": "bits", "channel": 3, "cc": 20, "mode": "absolute"}]
        assert m.learning is None
        assert m.map.control_for(1, 102) is None  # the parameter's old binding is replaced
        pos = Control("bits", 3, 20).to_position(16)
        m.handle(cc(3, 20, pos), cur)
        assert m.handle(cc(3, 20, 0), cur) == [("set", {"bits": 2}, (3, 20))]

    def test_learn_bool_is_toggle_and_cancel(self):
        m = mapper_for()
        m.arm_learn("mute")
        m.handle(cc(1, 50, 127), params.defaults())
        assert m.map.control_for(1, 50).mode == "toggle"
        m.arm_learn("bits")
        assert m.cancel_learn() is True and m.cancel_learn() is False


class TestFeedback:
    def scheduler(self):
        controls = [Control("bits", 1, 102), Control("mute", 1, 108, "toggle"),
                    Control("gain_db", 1, 114, "14bit", lsb_cc=115, minimum=-24.0, maximum=12.0),
                    Control("gain_db", 1, 112, "relative-twos")]
        return FeedbackScheduler(MidiMap("t", controls, {}), min_interval_s=0.02, suppress_s=0.3)

    def test_on_connect_sends_every_value(self):
        fb = self.scheduler()
        fb.on_connect(params.defaults())
        out = fb.due(0.0)
        bits_pos = Control("bits", 1, 102).to_position(16)
        g = Control("gain_db", 1, 114, "14bit", lsb_cc=115, minimum=-24.0, maximum=12.0).to_position(0.0)
        assert out == [[0xB0, 102, bits_pos], [0xB0, 108, 0], [0xB0, 114, g >> 7], [0xB0, 115, g & 0x7F]]

    def test_rate_limit_and_duplicates(self):
        fb = self.scheduler()
        fb.on_change({"bits": 12}, None, 0.0)
        assert len(fb.due(0.0)) == 1
        fb.on_change({"bits": 13}, None, 0.005)
        assert fb.due(0.005) == []  # within 20 ms of the last message
        assert fb.due(0.021) == [[0xB0, 102, Control("bits", 1, 102).to_position(13)]]
        fb.on_change({"bits": 13}, None, 0.5)
        assert fb.due(0.5) == []  # the same value again is dropped
        assert not fb.next_due_s()

    def test_suppressed_while_moved(self):
        fb = self.scheduler()
        fb.on_change({"bits": 12}, (1, 102), 0.0)
        fb.on_change({"bits": 11}, (1, 102), 0.1)
        assert fb.due(0.2) == []  # hand on the control
        assert fb.due(0.41) == [[0xB0, 102, Control("bits", 1, 102).to_position(11)]]  # final value, once
        assert fb.due(1.0) == []


class TestMaps:
    def test_default_map(self):
        m = load_map("default")
        assert m.feedback and m.programs
        for control in m.controls:
            assert control.channel == 1 and control.cc in UNDEFINED_CCS
            if control.lsb_cc is not None:
                assert control.lsb_cc in UNDEFINED_CCS
        mapped = {c.param for c in m.controls}
        assert mapped == set(params.PARAMS) - {"seed"}

    @pytest.mark.parametrize("entry, reason", [
        ({"param": "nope", "channel": 1, "cc": 1}, "param must be"),
        ({"param": "seed", "channel": 1, "cc": 1}, "param must be"),
        ({"param": "bits", "channel": 17, "cc": 1}, "channel must be"),
        ({"param": "bits", "channel": 1, "cc": 120}, "cc must be"),  # 120-127: channel mode messages
        ({"param": "bits", "channel": 1, "cc": 1, "mode": "log"}, "mode must be"),
        ({"param": "bits", "channel": 1, "cc": 1, "mode": "toggle"}, "toggle mode needs"),
        ({"param": "bits", "channel": 1, "cc": 1, "lsb_cc": 33}, "only for mode 14bit"),
        ({"param": "bits", "channel": 1, "cc": 1, "min": 30}, "leave nothing"),
        ({"param": "bits", "channel": 1, "cc": 1, "colour": "red"}, "unknown key"),
    ])
    def test_bad_entries(self, entry, reason):
        with pytest.raises(RtstageError, match=reason):
            map_from_dict({"control": [entry]})

    def test_duplicate_and_14bit_default_lsb(self):
        with pytest.raises(RtstageError, match="already mapped"):
            map_from_dict({"control": [{"param": "bits", "channel": 1, "cc": 7, "mode": "14bit"},
                                       {"param": "mute", "channel": 1, "cc": 39}]})
        m = map_from_dict({"control": [{"param": "gain_db", "channel": 1, "cc": 7, "mode": "14bit"}]})
        assert m.controls[0].lsb_cc == 39  # MIDI 1.0: LSB of controller 7 is 39

    def test_unknown_map(self):
        with pytest.raises(RtstageError, match="no MIDI map 'nope'.*default"):
            load_map("nope")


class TestPorts:
    def test_client_numbers_ignored(self):
        # ALSA sequencer names carry "client:port" numbers that change between sessions
        assert port_base_name("Desk Control:Desk Control MIDI 1 20:0") == "Desk Control:Desk Control MIDI 1"
        names = ["Midi Through:Midi Through Port-0 14:0", "Desk Control:Desk Control MIDI 1 24:0"]
        assert match_port(names, "desk control") == 1
        assert match_port(names, "20:0") is None
        assert match_port(["a2j:Desk [24] (capture): Desk MIDI 1"], "Desk MIDI") == 0
