"""Client side of the control protocol (used by ``rtstage send``).

Examples
--------
>>> with ControlClient("127.0.0.1", 47231) as client:          # doctest: +SKIP
...     client.request({"op": "set", "values": {"bits": 12}})
{'id': 1, 'ok': True, 'values': {'bits': 12}, 'at_frame': 123904}
"""

import json
import socket

from ..errors import RtstageError, RuntimeFailure
from . import DEFAULT_CONTROL_PORT


def parse_words(words):
    """Turn command-line words into a request object.

    Either one JSON object (possibly split over several words), or a
    shorthand: ``OP [NAME=VALUE …] [NAME …]``.  ``set bits=12 dither=rpdf``
    becomes a ``set`` with those values (each VALUE read as JSON, else as a
    string); ``get bits dither`` a ``get`` of those names; any other op takes
    ``KEY=VALUE`` fields, as ``subscribe rate_hz=5``.

    Raises
    ------
    RtstageError
        Not a JSON object and not a shorthand.
    """
    if not words:
        raise RtstageError("no request given")
    text = " ".join(words).strip()
    if text.startswith("{"):
        try:
            obj = json.loads(text)
        except json.JSONDecodeError as exc:
            raise RtstageError(f"request is not valid JSON ({exc.msg})") from None
        if not isinstance(obj, dict):
            raise RtstageError("request must be a JSON object")
        return obj
    op, rest = words[0], words[1:]
    pairs = {}
    names = []
    for word in rest:
        if "=" in word:
            key, _, raw = word.partition("=")
            try:
                value = json.loads(raw)
            except json.JSONDecodeError:
                value = raw
            pairs[key] = value
        else:
            names.append(word)
    if op == "set":
        if names:
            raise RtstageError(f"set takes NAME=VALUE pairs, got {names[0]!r}")
        return {"op": "set", "values": pairs}
    if op == "get":
        return {"op": "get", "names": names} if names else {"op": "get"}
    if names:
        if op in ("learn", "preset_load", "preset_save") and len(names) == 1:
            pairs["name"] = names[0]
        else:
            raise RtstageError(f"unexpected word {names[0]!r} (use KEY=VALUE)")
    obj = {"op": op}
    obj.update(pairs)
    return obj


class ControlClient:
    """One connection to a control server.

    Parameters
    ----------
    host : str
        Server address.
    port : int
        Server port.
    token : str or None
        Sent with ``auth`` right after the greeting when given.
    timeout_s : float
        Socket timeout for connecting and for each reply.
    """

    def __init__(self, host="127.0.0.1", port=DEFAULT_CONTROL_PORT, token=None, timeout_s=5.0):
        self.host = host
        self.port = int(port)
        self.token = token
        self.timeout_s = float(timeout_s)
        self.greeting = None
        self.events = []
        self._sock = None
        self._file = None
        self._next_id = 1

    def connect(self):
        """Connect, read the greeting and authenticate when a token is set."""
        try:
            self._sock = socket.create_connection((self.host, self.port), timeout=self.timeout_s)
        except OSError as exc:
            raise RuntimeFailure(f"cannot connect to {self.host}:{self.port}: {exc.strerror or exc}") from None
        self._file = self._sock.makefile("rwb")
        self.greeting = self.read_line()
        if self.greeting.get("event") == "closing":
            raise RtstageError(f"server closed the connection: {self.greeting.get('reason')}")
        if self.token is not None:
            reply = self.request({"op": "auth", "token": self.token})
            if not reply.get("ok"):
                raise RtstageError(f"authentication failed: {reply.get('error')}")
        return self

    def close(self):
        """Close the connection."""
        if self._file is not None:
            try:
                self._file.close()
            finally:
                self._sock.close()
                self._file = None

    def __enter__(self):
        return self.connect()

    def __exit__(self, *exc):
        self.close()

    def send_line(self, data):
        """Send raw bytes (one or more lines, newline included)."""
        try:
            self._file.write(data)
            self._file.flush()
        except OSError as exc:
            raise RtstageError(f"connection to {self.host}:{self.port} lost: {exc.strerror or exc}") from None

    def read_line(self):
        """The next line from the server, decoded."""
        try:
            line = self._file.readline()
        except socket.timeout:
            raise RtstageError(f"no reply from {self.host}:{self.port} within {self.timeout_s:g} s") from None
        except OSError as exc:
            raise RtstageError(f"connection to {self.host}:{self.port} lost: {exc.strerror or exc}") from None
        if not line:
            raise RtstageError(f"{self.host}:{self.port} closed the connection")
        return json.loads(line)

    def request(self, obj):
        """Send one request and return its reply; events read meanwhile go to ``self.events``.

        An ``id`` is added when the request has none.
        """
        obj = dict(obj)
        if "id" not in obj:
            obj["id"] = self._next_id
            self._next_id += 1
        self.send_line((json.dumps(obj) + "\n").encode("utf-8"))
        while True:
            line = self.read_line()
            if "event" in line:
                self.events.append(line)
                if line["event"] == "closing":
                    raise RtstageError(f"server closed the connection: {line.get('reason')}")
                continue
            return line


def send_request(obj, host="127.0.0.1", port=DEFAULT_CONTROL_PORT, token=None, timeout_s=5.0):
    """Connect, send one request, return its reply."""
    with ControlClient(host, port, token, timeout_s) as client:
        return client.request(obj)
