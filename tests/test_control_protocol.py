"""Every operation of the control protocol, and every error reply, over real 127.0.0.1 TCP.

The wire format is JSON text as RFC 8259 defines it; replies are decoded with
Python's own ``json`` module as the reference parser.
"""

import json
import os

import numpy as np
import pytest

from rtstage import params
from rtstage.control import PROTOCOL_VERSION
from rtstage.control.protocol import OPS
from rtstage.control.testing import control_stack

QUIET = {"logger": lambda message: None}


@pytest.fixture
def stack(tmp_path):
    with control_stack(preset_dir=str(tmp_path / "presets"), logger=QUIET["logger"]) as s:
        yield s


@pytest.fixture
def client(stack):
    with stack.client() as c:
        yield c


def raw(client, line):
    """Send one raw line; return the next reply (events skipped)."""
    client.send_line(line if isinstance(line, bytes) else line.encode("utf-8"))
    while True:
        reply = client.read_line()
        if "event" not in reply:
            return reply


class TestOperations:
    def test_greeting_and_hello(self, client):
        assert client.greeting == {"event": "greeting", "protocol": PROTOCOL_VERSION, "rtstage": client.greeting["rtstage"],
                                   "auth": "none"}
        reply = client.request({"op": "hello", "id": "a"})
        assert reply["id"] == "a" and reply["ok"] and reply["protocol"] == PROTOCOL_VERSION
        assert reply["ops"] == list(OPS)

    def test_list(self, client):
        reply = client.request({"op": "list", "id": 3})
        assert reply["id"] == 3 and [p["name"] for p in reply["params"]] == list(params.PARAMS)

    def test_get_all_and_some(self, client, stack):
        everything = client.request({"op": "get"})["values"]
        assert set(everything) == set(params.PARAMS) and everything["seed"] == stack.engine.settings.seed
        assert client.request({"op": "get", "names": ["bits", "dither"]})["values"] == {"bits": 16, "dither": "tpdf"}

    def test_set_atomic_several(self, client, stack):
        reply = client.request({"op": "set", "values": {"bits": 12, "dither": "rpdf", "gain_db": -6}})
        assert reply["ok"] and reply["values"] == {"bits": 12, "dither": "rpdf", "gain_db": -6.0}
        assert isinstance(reply["at_frame"], int)
        s = stack.engine.settings
        assert (s.bits, s.dither, s.gain_db) == (12, "rpdf", -6.0)
        # one applied entry: all three took effect at one frame
        assert len(stack.target.applied) == 1 and stack.target.applied[0][1] == reply["values"]

    def test_set_refused_changes_nothing(self, client, stack):
        reply = client.request({"op": "set", "id": 9, "values": {"dither": "rpdf", "bits": 1}})
        assert reply == {"id": 9, "ok": False, "error": reply["error"]} and "bits" in reply["error"]
        assert stack.engine.settings.dither == "tpdf" and stack.target.applied == []

    def test_set_while_running_takes_effect_at_block_boundary(self, tmp_path):
        with control_stack(driver=True, logger=QUIET["logger"]) as stack:
            with stack.client() as c:
                reply = c.request({"op": "set", "values": {"bits": 8}})
            assert reply["ok"] and reply["at_frame"] % stack.target.blocksize == 0

    def test_status_fields(self, client, stack):
        status = client.request({"op": "status"})["status"]
        for key in ("state", "frame", "samplerate", "channels", "blocksize", "uptime_s", "xruns", "cpu_load", "seed",
                    "settings", "server"):
            assert key in status
        assert status["seed"] == stack.engine.settings.seed and status["server"]["clients"] == 1
        assert status["midi"] is None

    def test_meters(self, client, stack):
        x = np.full((256, 2), 0.5)
        stack.target.process(x)
        meters = client.request({"op": "meters"})["meters"]
        assert meters["frame"] == 256 and len(meters["peak_dbfs"]) == 2
        # 0.5 of full scale is 20·log10(0.5) = -6.0206 dBFS (plus at most 1 LSB of dither)
        assert meters["peak_dbfs"][0] == pytest.approx(20 * np.log10(0.5), abs=0.001)
        assert meters["clipped"] == [0, 0]

    def test_subscribe_stream_and_cancel(self, client):
        reply = client.request({"op": "subscribe", "rate_hz": 50})
        sub = reply["subscription"]
        frames = [client.read_line() for _ in range(3)]
        assert all(f["event"] == "meters" and f["subscription"] == sub and "peak_dbfs" in f["meters"] for f in frames)
        assert client.request({"op": "unsubscribe", "subscription": sub}) == {"id": reply["id"] + 1, "ok": True,
                                                                               "cancelled": 1}
        # frames sent before the reply arrive before it (TCP keeps order); none follow it
        client.events.clear()
        client.request({"op": "hello"})
        assert client.request({"op": "hello"})["ok"]
        assert not [e for e in client.events if e.get("subscription") == sub]

    def test_unsubscribe_all(self, client):
        client.request({"op": "subscribe", "rate_hz": 1})
        client.request({"op": "subscribe", "rate_hz": 1})
        assert client.request({"op": "unsubscribe"})["cancelled"] == 2

    def test_presets_save_list_load(self, client, stack, tmp_path):
        client.request({"op": "set", "values": {"bits": 10, "shaper": "wannamaker-f3", "mute": True}})
        assert client.request({"op": "preset_save", "name": "desk-a"})["ok"]
        assert client.request({"op": "presets"})["presets"] == ["desk-a"]
        client.request({"op": "set", "values": {"bits": 16, "shaper": "flat", "mute": False}})
        reply = client.request({"op": "preset_load", "name": "desk-a"})
        assert reply["ok"] and reply["values"]["bits"] == 10 and reply["values"]["mute"] is True
        assert stack.engine.settings.shaper.id == "wannamaker-f3"
        text = (tmp_path / "presets" / "desk-a.toml").read_text()
        assert "seed" not in text  # the seed applies at a start only

    def test_preset_overwrite(self, client):
        assert client.request({"op": "preset_save", "name": "p"})["ok"]
        assert "exists" in client.request({"op": "preset_save", "name": "p"})["error"]
        assert client.request({"op": "preset_save", "name": "p", "overwrite": True})["ok"]

    def test_learn_without_midi(self, client):
        assert client.request({"op": "learn", "name": "bits"})["error"] == "MIDI control is not enabled"
        assert client.request({"op": "learn_cancel"})["error"] == "MIDI control is not enabled"

    def test_bye_closes(self, client):
        assert client.request({"op": "bye"})["ok"]
        assert client.read_line() == {"event": "closing", "reason": "bye"}

    def test_auth_without_token_is_a_no_op(self, client):
        assert client.request({"op": "auth", "token": "x"}) == {"id": 1, "ok": True, "authenticated": True}


class TestErrors:
    @pytest.mark.parametrize(
        "line, reason",
        [
            ("not json", "not valid JSON"),
            ("[1, 2]", "must be a JSON object"),
            ('"op"', "must be a JSON object"),
            ('{"op": "set", "values": {"gain_db": NaN}}', "not a JSON number"),
            ('{"op": "set", "values": {"gain_db": Infinity}}', "not a JSON number"),
            ('{"id": 1}', "needs 'op'"),
            ('{"op": 5}', "needs 'op'"),
            ('{"op": "reboot"}', "unknown op"),
            ('{"op": "hello", "id": [1]}', "id must be"),
            ('{"op": "hello", "id": "' + "x" * 65 + '"}', "id must be"),
            ('{"op": "hello", "extra": 1}', "unknown field"),
            ('{"op": "get", "names": "bits"}', "names must be a list"),
            ('{"op": "get", "names": ["bitz"]}', "unknown parameter"),
            ('{"op": "set"}', "set needs 'values'"),
            ('{"op": "set", "values": []}', "values must be an object"),
            ('{"op": "set", "values": {}}', "values is empty"),
            ('{"op": "set", "values": {"bits": "12"}}', "bits must be an integer"),
            ('{"op": "set", "values": {"bits": 25}}', "between 2 and 24"),
            ('{"op": "set", "values": {"dither": "blue"}}', "unknown dither"),
            ('{"op": "set", "values": {"volume": 1}}', "unknown parameter"),
            ('{"op": "set", "values": {"shaper": "lvw-e5", "dither": "none"}}', "without dither"),
            ('{"op": "subscribe", "rate_hz": 0}', "rate_hz must be"),
            ('{"op": "subscribe", "rate_hz": "fast"}', "rate_hz must be"),
            ('{"op": "unsubscribe", "subscription": 77}', "no subscription"),
            ('{"op": "preset_load", "name": "../x"}', "preset name"),
            ('{"op": "preset_load", "name": "missing"}', "no preset named"),
            ('{"op": "preset_save", "name": "a/b"}', "preset name"),
            ('{"op": "preset_save", "name": "ok", "overwrite": "yes"}', "overwrite must be"),
            ('{"op": "learn", "name": "seed"}', "learn needs"),
            ("\xff\xfe", "not valid JSON"),
            ("", "empty request"),
        ],
    )
    def test_error_reply_and_server_keeps_running(self, client, line, reason):
        reply = raw(client, line + "\n")
        assert reply["ok"] is False and reason in reply["error"]
        assert set(reply) == {"id", "ok", "error"}
        assert client.request({"op": "hello"})["ok"]  # same connection still served

    def test_not_utf8(self, client):
        reply = raw(client, b"\xff\xfe\n")
        assert reply["ok"] is False and "UTF-8" in reply["error"]

    def test_id_echoed_on_error(self, client):
        assert raw(client, '{"op": "set", "id": "q7", "values": {"bits": 0}}\n')["id"] == "q7"

    def test_bits_beyond_container(self, client):
        # a 16-bit engine cannot switch to 20 bits (EngineSettings/Engine.apply rule)
        reply = client.request({"op": "set", "values": {"bits": 20}})
        assert not reply["ok"] and "16-bit output" in reply["error"]

    def test_subscription_limit(self, client):
        for _ in range(4):
            assert client.request({"op": "subscribe", "rate_hz": 0.1})["ok"]
        assert "at most 4" in client.request({"op": "subscribe", "rate_hz": 0.1})["error"]

    def test_corrupt_preset_file(self, client, tmp_path):
        os.makedirs(tmp_path / "presets", exist_ok=True)
        (tmp_path / "presets" / "bad.toml").write_text("[values]\nbits = 99\n")
        (tmp_path / "presets" / "broken.toml").write_text("[values\n")
        assert "between 2 and 24" in client.request({"op": "preset_load", "name": "bad"})["error"]
        assert "not valid TOML" in client.request({"op": "preset_load", "name": "broken"})["error"]

    def test_pipelined_requests_answered_in_order(self, client):
        lines = "".join(json.dumps({"op": "get", "names": ["bits"], "id": i}) + "\n" for i in range(50))
        client.send_line(lines.encode())
        assert [client.read_line()["id"] for _ in range(50)] == list(range(50))


def test_no_preset_dir():
    with control_stack(logger=QUIET["logger"]) as stack, stack.client() as c:
        assert c.request({"op": "presets"})["presets"] == []
        assert "no preset directory" in c.request({"op": "preset_load", "name": "x"})["error"]
        assert "no preset directory" in c.request({"op": "preset_save", "name": "x"})["error"]
