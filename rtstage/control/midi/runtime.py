"""The MIDI runtime: ports, the worker thread, and the wiring to the controller.

Part of :mod:`rtstage.control.midi` (its notes describe the map format and the modes).
"""

import queue
import threading
import time

from ...errors import RtstageError
from ...log import log as _log
from ...threads import Startable, StoppableThread
from .feedback import FeedbackScheduler
from .mapper import MidiMapper
from .ports import _rtmidi, api_constants, match_port, open_api
from .wire import decode_message

IN_POLL_S = 0.001
"""How often the MIDI worker thread takes input messages from RtMidi's queue (JACK delivers MIDI once per period)."""


class MidiControl(Startable):
    """MIDI input and feedback output driving a :class:`~rtstage.control.protocol.Controller`.

    Parameters
    ----------
    controller : Controller
        Where changes go; ``controller.midi`` is set to this object.
    midi_map : MidiMap
        Controls and program presets.
    api : str
        ``auto`` or one of :data:`API_NAMES`.
    in_port, out_port : str or None
        Name substrings of the ports to connect (client numbers ignored);
        None with ``virtual`` opens virtual ports instead.
    virtual : bool
        Open virtual ports ``control-in`` / ``control-out`` for others to connect to.
    client_name : str
        MIDI client name.
    poll_s : float
        How often vanished ports are looked for again.

    Notes
    -----
    RtMidi queues input messages (no Python runs in the MIDI backend's
    thread, which with JACK is the graph's process thread); a worker thread
    takes them every :data:`IN_POLL_S`, decodes, maps and applies them, and
    sends feedback.  Errors from a change (out of
    range for this engine, for example) are logged and dropped.
    """

    def __init__(self, controller, midi_map, api="auto", in_port=None, out_port=None, virtual=False,
                 client_name="rtstage", poll_s=1.0, feedback_interval_s=0.02, suppress_s=0.3):
        self.controller = controller
        self.map = midi_map
        self.mapper = MidiMapper(midi_map)
        self.feedback = FeedbackScheduler(midi_map, feedback_interval_s, suppress_s)
        self.api, self._in, self._out = open_api(api, client_name)
        self.in_port = in_port
        self.out_port = out_port
        self.virtual = virtual
        self.poll_s = float(poll_s)
        self.received = 0
        self.applied = 0
        self.ignored = 0
        self.in_connected = None
        self.out_connected = None
        self._queue = queue.SimpleQueue()
        self._fb_lock = threading.Lock()
        self._worker = StoppableThread(self._run, "rtstage-midi")
        self.client_name = client_name
        self._setup_in()
        controller.midi = self
        controller.add_listener(self._on_change)

    def start(self):
        """Open the ports and start the worker thread."""
        if self.virtual:
            self._in.open_virtual_port("control-in")
            self.in_connected = "control-in (virtual)"
            if self.map.feedback:
                self._out.open_virtual_port("control-out")
                self.out_connected = "control-out (virtual)"
                self._connected_out()
        self._reconnect()
        self._worker.start()
        _log(f"midi: {self.api} API; in: {self.in_connected or 'waiting for ' + repr(self.in_port)}; "
             f"out: {self.out_connected or ('waiting for ' + repr(self.out_port) if self.out_port else 'none')}")
        return self

    def stop(self):
        """Stop the worker and close the ports."""
        self._worker.request_stop()
        self._queue.put(None)
        self._worker.stop()
        self.controller.remove_listener(self._on_change)
        if self.controller.midi is self:
            self.controller.midi = None
        for port in (self._in, self._out):
            try:
                port.close_port()
            except Exception:
                pass
        self._cancel_in_callback()
        del self._in
        del self._out

    # socket hooks
    def arm_learn(self, name, send_event):
        """Arm learn for ``name``; ``send_event`` receives the ``learned`` event."""
        self._queue.put(("learn", name, send_event))

    def cancel_learn(self):
        """Disarm learn; returns True when it was armed."""
        armed = self.mapper.learning is not None
        self._queue.put(("learn_cancel",))
        return armed

    def status(self):
        """MIDI fields for the ``status`` reply."""
        return {"api": self.api, "in": self.in_connected, "out": self.out_connected, "map": self.map.name,
                "received": self.received, "applied": self.applied, "ignored": self.ignored,
                "learning": self.mapper.learning}

    # threads
    def _on_message(self, event, data=None):
        self._queue.put(("midi", event[0]))

    def _on_change(self, values, source):
        for name in values:
            if not (isinstance(source, tuple) and source[0] == "midi"):
                self._queue.put(("released", name))
        if self.map.feedback:
            key = source[1] if isinstance(source, tuple) and source[0] == "midi" else None
            self._queue.put(("feedback", values, key))

    def _setup_in(self):
        # No rtmidi callback: with the JACK API, RtMidi calls it from JACK's process thread, where the Python
        # wrapper must take the GIL; any Python thread holding it (a meter update, a compile) then stalls the
        # whole JACK graph.  The worker thread takes messages from RtMidi's queue instead (IN_POLL_S).
        self._in.ignore_types(sysex=True, timing=True, active_sense=True)

    def _renew(self, old, factory):
        # A port that went away is reopened on a new client: some backends
        # (JACK in RtMidi) deliver nothing to a port closed and opened again.
        try:
            old.close_port()
        except Exception:
            pass
        return factory(api_constants()[self.api], name=self.client_name)

    def _reconnect(self):
        if not self.virtual and self.in_port is not None:
            names = self._in.get_ports()
            if self.in_connected is not None and self.in_connected not in names:
                self._cancel_in_callback()
                self._in = self._renew(self._in, _rtmidi().MidiIn)
                self._setup_in()
                _log(f"midi: input {self.in_connected} went away")
                self.in_connected = None
                names = self._in.get_ports()
            if self.in_connected is None:
                i = match_port(names, self.in_port)
                if i is not None:
                    self._in.open_port(i)
                    self.in_connected = names[i]
                    _log(f"midi: input connected to {names[i]}")
        if not self.virtual and self.out_port is not None and self.map.feedback:
            names = self._out.get_ports()
            if self.out_connected is not None and self.out_connected not in names:
                self._out = self._renew(self._out, _rtmidi().MidiOut)
                _log(f"midi: output {self.out_connected} went away")
                self.out_connected = None
                names = self._out.get_ports()
            if self.out_connected is None:
                i = match_port(names, self.out_port)
                if i is not None:
                    self._out.open_port(i)
                    self.out_connected = names[i]
                    _log(f"midi: output connected to {names[i]}")
                    self._connected_out()

    def _connected_out(self):
        with self._fb_lock:
            self.feedback.on_connect(self.controller.target.get())

    def _cancel_in_callback(self):
        try:
            self._in.cancel_callback()  # none is set (see _setup_in); kept for ports opened by older code
        except Exception:
            pass

    def _drain_input(self):
        while True:
            try:
                message = self._in.get_message()
            except Exception:
                return
            if not message:
                return
            self._handle_item(("midi", message[0]))

    def _run(self):
        t_poll = time.monotonic() + self.poll_s
        while not self._worker.stopping:
            timeout = IN_POLL_S
            try:
                item = self._queue.get(timeout=timeout)
            except queue.Empty:
                item = ()
            if item is None:
                break
            try:
                self._drain_input()
                self._handle_item(item)
                if time.monotonic() >= t_poll:
                    self._reconnect()
                    t_poll = time.monotonic() + self.poll_s
                if self.out_connected is not None:
                    with self._fb_lock:
                        messages = self.feedback.due(time.monotonic())
                    for message in messages:
                        self._out.send_message(message)
            except Exception as exc:  # a failing port must not end control; say why and go on
                _log(f"midi: {exc}")

    def _handle_item(self, item):
        if not item:
            return
        kind = item[0]
        if kind == "midi":
            self.received += 1
            message = decode_message(item[1])
            actions = self.mapper.handle(message, self.controller.target.get())
            if not actions:
                self.ignored += 1
            for action in actions:
                try:
                    if action[0] == "set":
                        self.controller.submit(action[1], source=("midi", action[2]))  # never wait here
                    else:
                        self.controller.recall(action[1], source="program")
                    self.applied += 1
                except RtstageError as exc:
                    _log(f"midi: change refused: {exc}")
        elif kind == "feedback":
            with self._fb_lock:
                self.feedback.on_change(item[1], item[2], time.monotonic())
        elif kind == "released":
            self.mapper.released(item[1])
        elif kind == "learn":
            self.mapper.arm_learn(item[1], item[2])
        elif kind == "learn_cancel":
            self.mapper.cancel_learn()
