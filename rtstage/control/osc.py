"""Open Sound Control over UDP, beside MIDI and the JSON socket.

Control surfaces and tablet apps that speak OSC drive the same parameter
table (:mod:`rtstage.params`) through the same
:class:`~rtstage.control.protocol.Controller` as the socket and MIDI: every
change is validated there, reaches the engine at a block boundary, is logged
with its sample index in the automation log, and re-renders bit for bit.
The server uses the ``python-osc`` library (its message parser and builder,
and its UDP server).

Address scheme (ours)
---------------------
``/rtstage/param/<name> VALUE``
    Set one parameter.  ``VALUE`` is an OSC int, float, string, true/false
    or nil, taken as the table's type: a bool parameter also takes 0 or 1
    (int or float), an integer parameter a float with an integral value.
    Success sends nothing back (the change is announced to subscribers);
    a refused value answers ``/rtstage/error <address> <reason>`` to the sender.
``/rtstage/get/<name>``
    Answers ``/rtstage/param/<name> VALUE`` (the current value) to the sender.
``/rtstage/get``
    Answers one ``/rtstage/param/<name> VALUE`` per parameter to the sender.
``/rtstage/subscribe``, ``/rtstage/unsubscribe``
    The sender's address (host and port) receives ``/rtstage/param/<name>
    VALUE`` for every change, whatever path it came by (socket, MIDI, OSC,
    a feed reload), and the current value of every parameter at once on
    subscribing.  At most :data:`MAX_SUBSCRIBERS`; feedback goes only to the
    address a subscription came from.

Values go out as OSC int32 (``bits``), float32 (dB values, ``dither_scale``,
``auto_mute_hold_s``), true/false (``mute``, ``auto_mute``), string
(``dither``, ``shaper``, ``monitor``) and, for the seed, a string of its
decimal digits (a 64-bit seed does not fit int32), nil for "random".

Network
-------
The server listens on 127.0.0.1 unless told otherwise.  UDP has no
connection and OSC no authentication, so anyone who can reach the port can
change the feed; listen elsewhere only on a control network the station
controls (``--osc-listen-any``), never on a public one.

References
----------
.. [1] M. Wright, "The Open Sound Control 1.0 Specification", CNMAT, 2002
   (address patterns, type tags i f s T F N).
"""

import threading

from .. import params
from ..log import log
from ..errors import RtstageError

PARAM_PREFIX = "/rtstage/param/"
GET_PREFIX = "/rtstage/get"
ERROR_ADDRESS = "/rtstage/error"
MAX_SUBSCRIBERS = 16
"""Subscribers one server keeps; the oldest is dropped for a new one beyond this."""
DEFAULT_OSC_PORT = 47232
"""UDP port the OSC server listens on unless told otherwise."""


def value_from_osc(name, value):
    """Map an OSC argument to the parameter's JSON-like type (validation follows in the controller).

    Raises
    ------
    RtstageError
        Unknown parameter.
    """
    spec = params.PARAMS.get(name)
    if spec is None:
        raise RtstageError(f"unknown parameter {name!r} (known: {', '.join(params.PARAMS)})")
    if spec.kind == "bool" and not isinstance(value, bool) and isinstance(value, (int, float)) and value in (0, 1):
        return bool(value)
    if spec.kind == "seed" and isinstance(value, str) and value.isdigit():
        return int(value)
    return value


def value_to_osc(name, value):
    """One parameter value as an OSC argument (see the module notes)."""
    spec = params.PARAMS[name]
    if value is None:
        return None
    if spec.kind == "seed":
        return str(int(value))
    if spec.kind == "int":
        return int(value)
    if spec.kind == "float":
        return float(value)
    return value


class OscControl:
    """OSC server on a :class:`~rtstage.control.protocol.Controller`.

    Parameters
    ----------
    controller : Controller
        The one path to the engine.
    host : str
        Listen address (127.0.0.1 by default).
    port : int
        UDP port; 0 chooses a free one (read :attr:`port` after :meth:`start`).

    Attributes
    ----------
    received, applied, refused : int
        Counts of messages received, changes handed to the controller, and
        messages refused.
    """

    def __init__(self, controller, host="127.0.0.1", port=DEFAULT_OSC_PORT):
        self.controller = controller
        self.host = host
        self.port = int(port)
        self.received = 0
        self.applied = 0
        self.refused = 0
        self.subscribers = []
        self._lock = threading.Lock()
        self._server = None
        self._thread = None

    # -- lifecycle ----------------------------------------------------------------------------
    def start(self):
        """Bind and serve on a thread; returns self."""
        from pythonosc.dispatcher import Dispatcher
        from pythonosc.osc_server import BlockingOSCUDPServer

        dispatcher = Dispatcher()
        dispatcher.map(PARAM_PREFIX + "*", self._on_set, needs_reply_address=True)
        dispatcher.map(GET_PREFIX, self._on_get_all, needs_reply_address=True)
        dispatcher.map(GET_PREFIX + "/*", self._on_get, needs_reply_address=True)
        dispatcher.map("/rtstage/subscribe", self._on_subscribe, needs_reply_address=True)
        dispatcher.map("/rtstage/unsubscribe", self._on_unsubscribe, needs_reply_address=True)
        dispatcher.set_default_handler(self._on_unknown, needs_reply_address=True)
        try:
            self._server = BlockingOSCUDPServer((self.host, self.port), dispatcher)
        except OSError as exc:
            raise RtstageError(f"osc: cannot listen on {self.host}:{self.port}: {exc.strerror or exc}") from None
        self.port = self._server.server_address[1]
        self.controller.add_listener(self._on_change)
        self._thread = threading.Thread(target=self._server.serve_forever, kwargs={"poll_interval": 0.1},
                                        name="rtstage-osc", daemon=True)
        self._thread.start()
        log(f"osc: listening on {self.host}:{self.port} (udp)")
        return self

    def stop(self):
        """Stop serving and close the socket."""
        self.controller.remove_listener(self._on_change)
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._thread.join(5.0)
            self._server = None

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()

    def status(self):
        """OSC fields for status reports."""
        return {"port": self.port, "received": self.received, "applied": self.applied, "refused": self.refused,
                "subscribers": len(self.subscribers)}

    # -- handlers (server thread) ---------------------------------------------------------------
    def _refuse(self, address, reason):
        self.refused += 1
        return (ERROR_ADDRESS, address, str(reason))

    def _on_set(self, client, address, *args):
        self.received += 1
        name = address[len(PARAM_PREFIX):]
        if len(args) != 1:
            return self._refuse(address, f"expected one value, got {len(args)}")
        try:
            value = value_from_osc(name, args[0])
            self.controller.submit({name: value}, source=("osc", tuple(client)))
        except RtstageError as exc:
            return self._refuse(address, exc)
        self.applied += 1
        return None

    def _on_get(self, client, address, *args):
        self.received += 1
        name = address[len(GET_PREFIX) + 1:]
        values = self.controller.target.get()
        if name not in values:
            return self._refuse(address, f"unknown parameter {name!r}")
        return (PARAM_PREFIX + name, value_to_osc(name, values[name]))

    def _on_get_all(self, client, address, *args):
        self.received += 1
        self._send_all(tuple(client))
        return None

    def _on_subscribe(self, client, address, *args):
        self.received += 1
        client = tuple(client)
        with self._lock:
            if client not in self.subscribers:
                self.subscribers.append(client)
                del self.subscribers[:-MAX_SUBSCRIBERS]
        self._send_all(client)
        return None

    def _on_unsubscribe(self, client, address, *args):
        self.received += 1
        with self._lock:
            if tuple(client) in self.subscribers:
                self.subscribers.remove(tuple(client))
        return None

    def _on_unknown(self, client, address, *args):
        self.received += 1
        return self._refuse(address, "unknown address (see docs/service.md, OSC)")

    # -- sending ------------------------------------------------------------------------------
    def _message(self, name, value):
        from pythonosc.osc_message_builder import OscMessageBuilder

        builder = OscMessageBuilder(address=PARAM_PREFIX + name)
        value = value_to_osc(name, value)
        if value is not None:
            builder.add_arg(value)
        else:
            builder.add_arg(None, OscMessageBuilder.ARG_TYPE_NIL)
        return builder.build().dgram

    def _sendto(self, data, client):
        server = self._server
        if server is None:
            return
        try:
            server.socket.sendto(data, client)
        except OSError:
            pass  # a subscriber that went away; UDP has nobody to tell

    def _send_all(self, client):
        for name, value in self.controller.target.get().items():
            self._sendto(self._message(name, value), client)

    def _on_change(self, values, source):
        """Controller listener: feedback of every change to the subscribers (quick: a few sendto calls)."""
        with self._lock:
            subscribers = list(self.subscribers)
        if not subscribers:
            return
        for name, value in values.items():
            data = self._message(name, value)
            for client in subscribers:
                self._sendto(data, client)
