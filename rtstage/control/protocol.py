"""The control protocol: request validation, dispatch and replies.

Transport-independent: :class:`Controller` owns the one path by which every
change (socket, MIDI, program change, preset) reaches a
:class:`~rtstage.control.target.ControlTarget`, and :class:`Dispatcher` turns
one request line into one reply object.  The TCP server
(:mod:`rtstage.control.server`) adds framing, limits and subscriptions.  See
``docs/protocol.md`` for the wire format with examples.

Wire format
-----------
A request is a JSON object with ``op`` (a string) and an optional ``id`` (a
string, an integer or null, at most 64 characters).  Every reply carries the
same ``id``, ``ok`` (true or false), and ``error`` (a one-line reason) when
not ok.  Unsolicited lines (greeting, meter frames, learn results, closing)
carry ``event`` instead of ``ok``.
"""

import json
import math
import os
import re
import threading

from .. import __version__, params
from ..errors import RtstageError
from ..files.tomlread import load_toml, TomlFileMissing
from . import PROTOCOL_VERSION

OPS = ("hello", "auth", "list", "get", "set", "status", "meters", "subscribe", "unsubscribe", "programme",
       "presets", "preset_load", "preset_save", "learn", "learn_cancel", "bye")
"""Every operation the server knows, in documentation order."""

MAX_PROGRAMME_LABEL_CHARS = 200
"""Longest loudness programme label the ``programme`` op takes (the meter keeps as many)."""
MAX_ID_CHARS = 64
MAX_SUBSCRIPTIONS = 4
"""Meter subscriptions one client may hold at once."""
MIN_METER_RATE_HZ = 0.1
MAX_METER_RATE_HZ = 60.0

PRESET_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
"""Preset names: letters, digits, ``_ . -``; no path separators, so a name never leaves the preset directory."""


class RequestError(RtstageError):
    """A request that gets an error reply (the connection stays open)."""


def parse_request(line):
    """Decode one request line.

    Parameters
    ----------
    line : bytes or str
        One line without its newline.

    Returns
    -------
    (dict or None, object)
        The request object and its ``id``; the object is None when the line
        is not a usable request, and then the second item is the reply to send.
    """
    if isinstance(line, bytes):
        try:
            line = line.decode("utf-8")
        except UnicodeDecodeError:
            return None, error_reply(None, "request is not UTF-8 text")
    try:
        obj = json.loads(line, parse_constant=_refuse_constant)
    except (json.JSONDecodeError, RequestError) as exc:
        reason = exc.msg if isinstance(exc, json.JSONDecodeError) else str(exc)
        return None, error_reply(None, f"request is not valid JSON ({reason})")
    except RecursionError:
        return None, error_reply(None, "request is nested too deeply")
    if not isinstance(obj, dict):
        return None, error_reply(None, f"request must be a JSON object, got {type(obj).__name__}")
    rid = obj.get("id")
    if not (rid is None or isinstance(rid, str) and len(rid) <= MAX_ID_CHARS
            or isinstance(rid, int) and not isinstance(rid, bool) and abs(rid) < 2**53):
        return None, error_reply(None, f"id must be a string of at most {MAX_ID_CHARS} characters, an integer or null")
    op = obj.get("op")
    if not isinstance(op, str):
        return None, error_reply(rid, "request needs 'op', a string")
    if op not in OPS:
        return None, error_reply(rid, f"unknown op {op[:40]!r} (known: {', '.join(OPS)})")
    return obj, rid


def _log_warning(message):
    from ..log import log

    log(message)


def _refuse_constant(name):
    raise RequestError(f"{name} is not a JSON number")


def error_reply(rid, reason):
    """The reply to a request that failed."""
    return {"id": rid, "ok": False, "error": str(reason)}


def ok_reply(rid, **fields):
    """The reply to a request that succeeded."""
    reply = {"id": rid, "ok": True}
    reply.update(fields)
    return reply


def encode(obj):
    """One line of the wire format (UTF-8 bytes with the newline)."""
    return (json.dumps(obj, separators=(",", ":"), allow_nan=False) + "\n").encode("utf-8")


def _fields(req, allowed):
    extra = set(req) - set(allowed) - {"op", "id"}
    if extra:
        raise RequestError(f"unknown field(s) for {req['op']}: {', '.join(sorted(map(str, extra)))}")


# ----------------------------------------------------------------------------- presets


def _toml_value(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value)
    return json.dumps(value)  # a TOML basic string: JSON's escapes are valid TOML escapes


class PresetStore:
    """Parameter presets: TOML files ``<name>.toml`` with a ``[values]`` table.

    Parameters
    ----------
    directory : str
        Directory holding the presets (created on the first save).

    Notes
    -----
    Names are checked against :data:`PRESET_NAME`, so a request can neither
    read nor write outside ``directory``.  ``seed`` is not stored: it applies
    at a start, not to a running engine.
    """

    def __init__(self, directory):
        self.directory = directory

    def _path(self, name):
        if not isinstance(name, str) or not PRESET_NAME.match(name):
            raise RequestError("preset name must be 1-64 letters, digits, '_', '.' or '-', starting with a letter or digit")
        return os.path.join(self.directory, name + ".toml")

    def names(self):
        """Names of the stored presets, sorted."""
        if not os.path.isdir(self.directory):
            return []
        return sorted(n[:-5] for n in os.listdir(self.directory) if n.endswith(".toml") and PRESET_NAME.match(n[:-5]))

    def load(self, name):
        """The values of preset ``name``, validated one by one."""
        path = self._path(name)
        try:
            data = load_toml(path, f"preset {name!r}")
        except TomlFileMissing:
            raise RequestError(f"no preset named {name!r}") from None
        except RtstageError as exc:
            raise RequestError(str(exc)) from None
        values = data.get("values")
        if not isinstance(values, dict) or not values:
            raise RequestError(f"preset {name!r} has no [values] table")
        values = {k: v for k, v in values.items() if k != "seed"}
        try:
            return {k: params.validate(k, v) for k, v in values.items()}
        except RtstageError as exc:
            raise RequestError(f"preset {name!r}: {exc}") from None

    def save(self, name, values, overwrite=False):
        """Write ``values`` (without ``seed``) as preset ``name`` through the output policy.

        ``name`` is a plain name (no separator, no ``..``, not absolute); the
        file stays inside the preset folder even through a symbolic link, and
        an existing preset is replaced only when ``overwrite`` is true.
        """
        from ..files.policy import OutputPlan

        path = self._path(name)
        folder = os.path.realpath(self.directory)
        if os.path.dirname(os.path.realpath(path)) != folder:
            raise RequestError(f"preset {name!r} would resolve outside the preset folder")
        lines = ["# rtstage parameter preset", "[values]"]
        lines += [f"{k} = {_toml_value(v)}" for k, v in values.items() if k != "seed" and v is not None]
        try:
            os.makedirs(self.directory, exist_ok=True)
        except OSError as exc:
            raise RequestError(f"cannot create the preset folder: {exc.strerror}") from None
        plan = OutputPlan(f"saving preset {name!r}", overwrite=overwrite)
        out = plan.add_file(path, f"preset {name!r}")
        try:
            with plan:
                plan.write_text(out, "\n".join(lines) + "\n")
        except RtstageError as exc:
            text = str(exc)
            if "use --overwrite" in text:
                text = f"preset {name!r} exists; send overwrite: true to replace it"
            raise RequestError(text) from None


# ----------------------------------------------------------------------------- controller


class Controller:
    """The single path from every control source to the target.

    Parameters
    ----------
    target : ControlTarget
        What is controlled.
    presets : PresetStore or None
        Parameter presets for ``preset_load``/``preset_save`` and program changes.
    accept_unsafe : bool
        Accept combinations the engine's rules mark unsafe (as
        ``--accept-unsafe-shaping`` does); every change that uses it logs a
        warning naming the risk and the change's source.

    Notes
    -----
    :meth:`change` validates, checks against the target and sets under one
    lock, so two sources can never interleave a validation with another's
    set.  Listeners (``add_listener``) are called after each applied change
    with ``(values, source)``, on the caller's thread; they must be quick
    (MIDI feedback queues, the server schedules a write).
    """

    def __init__(self, target, presets=None, accept_unsafe=False):
        self.target = target
        self.presets = presets
        self.accept_unsafe = accept_unsafe
        self.midi = None
        self._lock = threading.Lock()
        self._listeners = []

    def add_listener(self, callback):
        """Call ``callback(values, source)`` after every applied change."""
        self._listeners.append(callback)

    def remove_listener(self, callback):
        """Stop calling ``callback``."""
        if callback in self._listeners:
            self._listeners.remove(callback)

    def submit(self, values, source="api"):
        """Validate ``values`` and queue them atomically, without waiting.

        Returns
        -------
        (dict, int)
            The canonical values queued and the target's ticket for
            :meth:`ControlTarget.wait`.

        Raises
        ------
        RtstageError
            The reason nothing was applied.
        """
        with self._lock:
            checked = params.validate_values(values, self.target.get(), accept_unsafe=self.accept_unsafe,
                                             warn=_log_warning, source=f"control source '{source}'")
            self.target.check(checked)
            ticket = self.target.submit(checked)
        for callback in list(self._listeners):
            callback(checked, source)
        return checked, ticket

    def change(self, values, source="api"):
        """Validate and apply ``values`` atomically; returns ``(values, frame)``, frame None if not known in time."""
        checked, ticket = self.submit(values, source)
        return checked, self.target.wait(ticket)

    def recall(self, name, source="preset"):
        """Load preset ``name`` and apply it atomically."""
        if self.presets is None:
            raise RequestError("no preset directory is configured")
        return self.change(self.presets.load(name), source=source)


# ----------------------------------------------------------------------------- dispatcher


class Session:
    """Per-connection state the dispatcher needs.

    Attributes
    ----------
    subscriptions : dict
        Subscription number to meter rate in Hz.
    send_event : callable
        ``send_event(obj)`` queues an unsolicited line to this client (thread-safe).
    authenticated : bool
        False until ``auth`` succeeds when the server requires a token.
    closing : str or None
        Set to a reason when the connection must close after the reply.
    """

    def __init__(self, send_event=None, authenticated=True):
        self.subscriptions = {}
        self.send_event = send_event or (lambda obj: None)
        self.authenticated = authenticated
        self.closing = None
        self._next_sub = 1


class Dispatcher:
    """Turn requests into replies.

    Parameters
    ----------
    controller : Controller
        Where changes go.
    server_status : callable or None
        Returns extra fields for ``status`` (clients, limits).
    """

    def __init__(self, controller, server_status=None):
        self.controller = controller
        self.server_status = server_status or (lambda: {})

    def handle_line(self, line, session):
        """Reply to one raw request line (bytes without the newline)."""
        req, rid = parse_request(line)
        if req is None:
            return rid
        return self.handle(req, session)

    def handle(self, req, session, defer_wait=False):
        """Reply to one decoded request; never raises for a bad request.

        With ``defer_wait`` a ``set`` reply comes back as soon as the change is
        queued, marked for :meth:`finish_set`, which the caller runs where
        blocking is allowed.
        """
        rid = req.get("id")
        op = req["op"]
        if not session.authenticated and op not in ("hello", "auth"):
            session.closing = "not authenticated"
            return error_reply(rid, "authenticate first: send {\"op\": \"auth\", \"token\": ...}")
        try:
            reply = getattr(self, "_op_" + op)(req, rid, session)
        except RtstageError as exc:
            return error_reply(rid, exc)
        return reply if defer_wait else self.finish_set(reply)

    # Each _op_ returns the reply or raises RtstageError with the reason.
    def _op_hello(self, req, rid, session):
        _fields(req, ())
        return ok_reply(rid, protocol=PROTOCOL_VERSION, rtstage=__version__, ops=list(OPS),
                        authenticated=session.authenticated)

    def _op_auth(self, req, rid, session):
        # The server checks tokens before a request reaches the dispatcher.
        _fields(req, ("token",))
        return ok_reply(rid, authenticated=session.authenticated)

    def _op_list(self, req, rid, session):
        _fields(req, ())
        return ok_reply(rid, params=params.spec_table())

    def _op_get(self, req, rid, session):
        _fields(req, ("names",))
        values = self.controller.target.get()
        names = req.get("names")
        if names is None:
            return ok_reply(rid, values=values)
        if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
            raise RequestError("names must be a list of parameter names")
        unknown = [n for n in names if n not in params.PARAMS]
        if unknown:
            raise RequestError(f"unknown parameter(s) {', '.join(repr(n[:40]) for n in unknown[:5])} "
                               f"(known: {', '.join(params.PARAMS)})")
        return ok_reply(rid, values={n: values[n] for n in names})

    def _op_set(self, req, rid, session):
        # Validates and queues at once; the server then waits for the block
        # boundary off its loop (see ``finish_set``) to report ``at_frame``.
        _fields(req, ("values",))
        if "values" not in req:
            raise RequestError("set needs 'values', an object of parameter names to values")
        checked, ticket = self.controller.submit(req["values"], source="socket")
        reply = ok_reply(rid, values=checked, at_frame=ticket, _wait=True)
        caution = getattr(self.controller.target, "caution", lambda t: None)(ticket)
        if caution:
            reply["caution"] = caution
        return reply

    def finish_set(self, reply):
        """Turn the ticket of a queued ``set`` reply into the sample index it took effect at (blocks)."""
        if reply.pop("_wait", False):
            reply["at_frame"] = self.controller.target.wait(reply["at_frame"])
        return reply

    def _op_status(self, req, rid, session):
        _fields(req, ())
        status = self.controller.target.status()
        status["server"] = self.server_status()
        status["midi"] = self.controller.midi.status() if self.controller.midi is not None else None
        return ok_reply(rid, status=status)

    def _op_meters(self, req, rid, session):
        _fields(req, ())
        return ok_reply(rid, meters=self.controller.target.meters())

    def _op_subscribe(self, req, rid, session):
        _fields(req, ("rate_hz",))
        rate = req.get("rate_hz", 10.0)
        if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not math.isfinite(rate) \
                or not MIN_METER_RATE_HZ <= rate <= MAX_METER_RATE_HZ:
            raise RequestError(f"rate_hz must be a number from {MIN_METER_RATE_HZ:g} to {MAX_METER_RATE_HZ:g}")
        if len(session.subscriptions) >= MAX_SUBSCRIPTIONS:
            raise RequestError(f"at most {MAX_SUBSCRIPTIONS} subscriptions per client")
        sub = session._next_sub
        session._next_sub += 1
        session.subscriptions[sub] = float(rate)
        return ok_reply(rid, subscription=sub, rate_hz=float(rate))

    def _op_unsubscribe(self, req, rid, session):
        _fields(req, ("subscription",))
        sub = req.get("subscription")
        if sub is None:
            n = len(session.subscriptions)
            session.subscriptions.clear()
            return ok_reply(rid, cancelled=n)
        if isinstance(sub, bool) or not isinstance(sub, int) or sub not in session.subscriptions:
            raise RequestError(f"no subscription {sub!r} on this connection")
        del session.subscriptions[sub]
        return ok_reply(rid, cancelled=1)

    def _op_programme(self, req, rid, session):
        _fields(req, ("label",))
        label = req.get("label")
        if label is not None and (not isinstance(label, str) or len(label) > MAX_PROGRAMME_LABEL_CHARS):
            raise RequestError(f"label must be a string of at most {MAX_PROGRAMME_LABEL_CHARS} characters")
        self.controller.target.new_programme(label)
        return ok_reply(rid, label=label)

    def _op_presets(self, req, rid, session):
        _fields(req, ())
        store = self.controller.presets
        return ok_reply(rid, presets=store.names() if store is not None else [])

    def _op_preset_load(self, req, rid, session):
        _fields(req, ("name",))
        checked, frame = self.controller.recall(req.get("name"), source="socket")
        return ok_reply(rid, values=checked, at_frame=frame)

    def _op_preset_save(self, req, rid, session):
        _fields(req, ("name", "overwrite"))
        if self.controller.presets is None:
            raise RequestError("no preset directory is configured")
        overwrite = req.get("overwrite", False)
        if not isinstance(overwrite, bool):
            raise RequestError("overwrite must be true or false")
        self.controller.presets.save(req.get("name"), self.controller.target.get(), overwrite=overwrite)
        return ok_reply(rid, name=req["name"])

    def _op_learn(self, req, rid, session):
        _fields(req, ("name",))
        name = req.get("name")
        if not isinstance(name, str) or name not in params.PARAMS or params.PARAMS[name].kind == "seed":
            raise RequestError(f"learn needs 'name', a parameter other than seed (known: {', '.join(params.PARAMS)})")
        midi = self.controller.midi
        if midi is None:
            raise RequestError("MIDI control is not enabled")
        midi.arm_learn(name, session.send_event)
        return ok_reply(rid, armed=name)

    def _op_learn_cancel(self, req, rid, session):
        _fields(req, ())
        midi = self.controller.midi
        if midi is None:
            raise RequestError("MIDI control is not enabled")
        return ok_reply(rid, cancelled=midi.cancel_learn())

    def _op_bye(self, req, rid, session):
        _fields(req, ())
        session.closing = "bye"
        return ok_reply(rid)
