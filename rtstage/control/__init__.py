"""The control layer: the parameter socket, MIDI control and automation files.

Public API
----------
ControlTarget, EngineTarget, BlockDriver (:mod:`rtstage.control.target`)
    What the control layer drives, and its in-process implementation.
ControlServer (:mod:`rtstage.control.server`)
    JSON-lines control protocol over TCP (see ``docs/protocol.md``).
send_request, ControlClient (:mod:`rtstage.control.client`)
    Client side, used by ``rtstage send``.
MidiMap, MidiMapper, FeedbackScheduler, MidiControl (:mod:`rtstage.control.midi`)
    Controller maps, decoding, soft takeover, learn and value feedback.
load_automation, AutomationWriter, AutomationPlayer (:mod:`rtstage.control.automation`)
    Timed parameter changes, for reproducible renders of live sessions.

Everything whose name begins with an underscore is private.
"""

PROTOCOL_VERSION = 1
"""Version of the JSON-lines control protocol (``docs/protocol.md``)."""

DEFAULT_CONTROL_PORT = 47231
"""TCP port the control server listens on unless told otherwise."""
