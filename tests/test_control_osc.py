"""OSC control: python-osc's own client over loopback UDP against the controller.

python-osc (the reference OSC 1.0 implementation we test against) builds and
parses every datagram on the client side; the address scheme is ours
(``/rtstage/param/<name>``, ``/rtstage/get[/<name>]``,
``/rtstage/subscribe``).  The in-process part runs the offline stand-in
target (:class:`rtstage.control.target.EngineTarget`); the live part, with a
tap and the automation log, is in ``test_service_live``.
"""

import time

from pythonosc.udp_client import SimpleUDPClient

from rtstage.control.osc import OscControl
from rtstage.control.testing import control_stack
from rtstage.engine import EngineSettings


def replies(client, timeout_s=2.0, until=None):
    """Messages arriving at the client's socket (address, params) until quiet or ``until`` matched."""
    out = []
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        for msg in client.get_messages(0.2):
            out.append((msg.address, msg.params))
            if until is not None and until(out):
                return out
        if until is None and out:
            return out
    return out


def test_set_get_error_subscribe_over_udp():
    settings = EngineSettings(bits=16, dither="tpdf", seed=3)
    with control_stack(settings, driver=True) as stack, OscControl(stack.controller, port=0) as osc:
        deadline = time.monotonic() + 120  # the first block may compile the kernel
        while stack.engine.frame == 0 and time.monotonic() < deadline:
            time.sleep(0.05)
        surface = SimpleUDPClient("127.0.0.1", osc.port)
        other = SimpleUDPClient("127.0.0.1", osc.port)
        surface.send_message("/rtstage/subscribe", [])
        initial = dict(replies(surface, until=lambda o: len(o) >= 11))
        assert initial["/rtstage/param/bits"] == [16] and initial["/rtstage/param/dither"] == ["tpdf"]
        assert initial["/rtstage/param/seed"] == ["3"]  # 64-bit seed as a decimal string
        other.send_message("/rtstage/param/bits", 12)
        # feedback of a change from another client (and from any other path) to the subscriber
        assert ("/rtstage/param/bits", [12]) in replies(surface, until=lambda o: ("/rtstage/param/bits", [12]) in o)
        assert stack.target.get()["bits"] == 12
        other.send_message("/rtstage/get/bits", [])
        assert replies(other) == [("/rtstage/param/bits", [12])]
        other.send_message("/rtstage/param/mute", 1.0)  # a toggle surface sends 1.0 for on
        other.send_message("/rtstage/param/gain_db", -3.5)  # float32: -3.5 is exact
        time.sleep(0.2)
        assert stack.target.get()["mute"] is True and stack.target.get()["gain_db"] == -3.5
        other.send_message("/rtstage/param/bits", 40)
        ((address, (where, reason)),) = replies(other)
        assert address == "/rtstage/error" and where == "/rtstage/param/bits" and "between 2 and 24" in reason
        other.send_message("/rtstage/param/loudness", 1)
        assert "unknown parameter" in replies(other)[0][1][1]
        other.send_message("/elsewhere", 1)
        assert replies(other)[0][0] == "/rtstage/error"
        # the socket path's change reaches the OSC subscriber too
        stack.controller.change({"dither": "rpdf"}, source="socket")
        assert ("/rtstage/param/dither", ["rpdf"]) in replies(surface, until=lambda o: ("/rtstage/param/dither",
                                                                                        ["rpdf"]) in o)
        surface.send_message("/rtstage/unsubscribe", [])
        time.sleep(0.2)
        assert osc.subscribers == []
        assert osc.applied == 3 and osc.refused == 3
        # every OSC change went through the target's applied log with its sample index
        # (changes less than a block apart are applied together at one boundary)
        applied = {}
        for _, values, _ in stack.target.applied:
            applied.update(values)
        assert applied == {"bits": 12, "mute": True, "gain_db": -3.5, "dither": "rpdf"}


def test_garbage_datagrams_leave_the_server_answering():
    import socket

    with control_stack(EngineSettings(bits=16, dither="tpdf", seed=3), driver=False) as stack, \
            OscControl(stack.controller, port=0) as osc:
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as raw:
            for junk in (b"", b"\x00" * 3, b"not osc at all", b"/rtstage/param/bits\x00,i\x00\x00", b"#bundle\x00" + b"\xff" * 9):
                raw.sendto(junk, ("127.0.0.1", osc.port))
        client = SimpleUDPClient("127.0.0.1", osc.port)
        client.send_message("/rtstage/get/bits", [])
        assert replies(client) == [("/rtstage/param/bits", [16])]  # still serving
        assert stack.target.get()["bits"] == 16  # nothing was changed by the junk
