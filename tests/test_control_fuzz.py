"""Fuzz: 10,000 random and malformed request lines while the engine runs in real time with a tap.

Claims checked:

* the server stays up and every line gets exactly one reply, or its client is
  dropped with a stated reason (here only an oversized line drops a client);
* every reply follows the wire format (``id``, ``ok``, ``error`` when not ok),
  decoded with Python's ``json`` as the RFC 8259 reference parser;
* the tapped output words are bit-identical to a run of the same engine
  without any control traffic (the fuzz holds only refused changes and
  changes to the values already in force, which must not disturb the words).
"""

import json
import random
import socket
import threading

import numpy as np

from rtstage.control.target import sine_block
from rtstage.control.testing import control_stack
from rtstage.engine import Engine, EngineSettings

N_LINES = 10_000
N_CLIENTS = 2
BATCH = 40
MAX_LINE_BYTES = 4096
SETTINGS = EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f3", seed=20261201)


def _random_json(rng, depth=0):
    kind = rng.randrange(8 if depth < 3 else 5)
    if kind == 0:
        return rng.choice([None, True, False])
    if kind == 1:
        return rng.choice([0, -1, 1, 2**63, -(2**70), 1e308, -1e-320, 0.5, 12, 25, 3.0])
    if kind == 2:
        return "".join(rng.choice("abc\"\\\u00e9\u2603\x00 {}[]:,") for _ in range(rng.randrange(12)))
    if kind == 3:
        return rng.choice(["bits", "dither", "set", "get", "op", "values", "tpdf", "flat", "gain_db"])
    if kind == 4:
        return rng.randrange(-5, 30)
    if kind == 5:
        return [_random_json(rng, depth + 1) for _ in range(rng.randrange(4))]
    return {str(_random_json(rng, depth + 1))[:10]: _random_json(rng, depth + 1) for _ in range(rng.randrange(4))}


def _refused_set(rng):
    bad = rng.choice([
        {"bits": rng.choice([0, 1, 25, 99, -3, 12.5, "16", True, None])},
        {"dither": rng.choice(["TPDF", "", 3, "none "])},
        {"shaper": rng.choice(["../x", "flat\x00", 0, "nope"])},
        {"gain_db": rng.choice([41.0, -121.0, "0", [0], 1e300])},
        {"dither": "none"},  # refused: shaper without dither (EngineSettings rule)
        {"volume": 1},
        {"bits": 12, "dither": "blue"},  # atomic: the valid half must not apply
        {"mute": "yes"},
        {"seed": -1},
    ])
    return {"op": "set", "values": bad, "id": rng.randrange(10**6)}


def _noop_set(rng):
    # The values already in force: accepted, applied at a block boundary, no change in the words.
    name = rng.choice(["bits", "dither", "shaper", "gain_db", "dither_scale"])
    value = {"bits": 16, "dither": "tpdf", "shaper": "wannamaker-f3", "gain_db": 0.0, "dither_scale": 1.0}[name]
    return {"op": "set", "values": {name: value}, "id": rng.randrange(10**6)}


def make_line(rng):
    """One fuzz line (bytes, no newline) and whether it must drop its client."""
    r = rng.random()
    if r < 0.002:
        return b"{" + b"x" * (MAX_LINE_BYTES + rng.randrange(1, 3000)) + b"}", True
    if r < 0.15:
        return bytes(rng.randrange(256) for _ in range(rng.randrange(80))).replace(b"\n", b""), False
    if r < 0.30:
        return json.dumps(_random_json(rng)).encode(), False
    if r < 0.40:
        depth = rng.randrange(500, 2000)
        return b"[" * depth + b"]" * depth, False
    if r < 0.55:
        return json.dumps(_refused_set(rng)).encode(), False
    if r < 0.62:
        return json.dumps(_noop_set(rng)).encode(), False
    if r < 0.75:
        req = rng.choice([{"op": "get"}, {"op": "get", "names": ["bits"]}, {"op": "status"}, {"op": "meters"},
                          {"op": "list"}, {"op": "hello"}, {"op": "presets"}, {"op": "learn", "name": "bits"}])
        return json.dumps(req).encode(), False
    # truncations and corruptions of a valid request
    text = json.dumps({"op": rng.choice(["set", "get", "subscribe", "x"]), "id": rng.randrange(99),
                       "values": {"bits": 12}, "rate_hz": rng.choice([0, 100, -1])})
    cut = rng.randrange(len(text))
    text = rng.choice([text[:cut], text[:cut] + text[cut + 1:], text.replace("\"", "'"), text.replace(":", "=")])
    return text.encode("utf-8", "surrogatepass"), False


def fuzz_client(port, seed, n_lines, result):
    rng = random.Random(seed)
    answered = dropped = 0
    reasons = []
    bad_replies = []
    sent = 0
    sock = None
    reader = None
    while sent < n_lines:
        if sock is None:
            sock = socket.create_connection(("127.0.0.1", port), timeout=30)
            reader = sock.makefile("rb")
            assert json.loads(reader.readline())["event"] == "greeting"
        batch = [make_line(rng) for _ in range(min(BATCH, n_lines - sent))]
        sock.sendall(b"".join(line + b"\n" for line, _ in batch))
        sent += len(batch)
        expected = len(batch)
        drop_at = next((i for i, (_, drops) in enumerate(batch) if drops), None)
        if drop_at is not None:
            expected = drop_at + 1
        got = 0
        while got < expected:
            line = reader.readline()
            assert line, "server closed without a stated reason"
            reply = json.loads(line)
            if "event" in reply:
                assert reply["event"] == "closing"
                reasons.append(reply["reason"])
                break
            if set(reply) - {"id", "ok", "error", "values", "at_frame", "params", "status", "meters", "protocol",
                             "rtstage", "ops", "authenticated", "presets", "subscription", "rate_hz"} \
                    or not isinstance(reply.get("ok"), bool) or (not reply["ok"] and not reply.get("error")):
                bad_replies.append(reply)
            got += 1
        answered += got
        if drop_at is not None:
            tail = json.loads(reader.readline())
            assert tail["event"] == "closing", tail
            reasons.append(tail["reason"])
            dropped += len(batch) - expected
            reader.close()
            sock.close()
            sock = None
    if sock is not None:
        reader.close()
        sock.close()
    result.update(answered=answered, dropped=dropped, reasons=reasons, sent=sent, bad=bad_replies)


def test_fuzz_while_running_keeps_server_up_and_words_identical():
    options = {"max_line_bytes": MAX_LINE_BYTES, "rate_hz": 1e6, "burst": 1e6}
    with control_stack(settings=SETTINGS, driver=True, server_options=options, logger=lambda m: None) as stack:
        results = [{} for _ in range(N_CLIENTS)]
        threads = [threading.Thread(target=fuzz_client, args=(stack.server.port, 1000 + i, N_LINES // N_CLIENTS, results[i]))
                   for i in range(N_CLIENTS)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        with stack.client() as c:
            assert c.request({"op": "hello"})["ok"]  # still up
        stack.driver.stop()
        assert stack.driver.error is None
        tap = np.concatenate(stack.driver.tap)
        noop_sets_applied = len(stack.target.applied)
        nblocks = len(stack.driver.tap)

    for r in results:
        assert r["sent"] == N_LINES // N_CLIENTS
        assert r["bad"] == []
        # every line answered, except the lines behind an oversized one in its batch
        assert r["answered"] + r["dropped"] == r["sent"]
        assert all(reason.startswith("oversized line") for reason in r["reasons"])
    assert sum(r["sent"] for r in results) >= 10_000
    assert sum(len(r["reasons"]) for r in results) > 0  # the drop path was taken
    assert noop_sets_applied > 0  # accepted changes did reach the engine at block boundaries

    reference = Engine(SETTINGS, channels=2, samplerate=48000)
    ref = np.concatenate([reference.process(sine_block(b * 256, 256, 2, 48000)) for b in range(nblocks)])
    np.testing.assert_array_equal(tap, ref)
    assert nblocks > 10
