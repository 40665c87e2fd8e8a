"""MIDI control: controller maps, decoding, soft takeover, learn, value feedback, and the ports.

The mapping logic is pure and takes explicit time (``now_s``), so it is tested
on byte sequences; :class:`MidiControl` wires it to python-rtmidi ports.

Controller maps (TOML, ``presets/midi/*.toml``)
-----------------------------------------------
::

    name = "desk"
    description = "one line"
    feedback = true                  # send current values back to the controller

    [[control]]
    param = "bits"                   # a name from rtstage.params.PARAMS
    channel = 1                      # MIDI channel 1..16
    cc = 102                         # controller number 0..119
    mode = "absolute"                # absolute | relative-twos | relative-offset
                                     # | relative-signmag | 14bit | toggle
    # lsb_cc = 103                   # 14bit: the LSB controller (default cc + 32)
    # min = 8, max = 24              # part of the parameter's range the control covers
    # step = 1                       # relative: change per tick
    # takeover = "soft"              # soft | jump (absolute and 14bit)

    [programs]                       # program change (0..127, as sent) -> preset name
    0 = "mastering-16"

Modes
-----
``absolute``
    The 7-bit value spans the range: ``min + (value / 127)·(max - min)``
    (rounded for integers; an enum's choices get equal slices; a bool is on
    from 64).
``relative-twos`` / ``relative-offset`` / ``relative-signmag``
    Each message is a signed number of steps: two's complement in 7 bits
    (1..63 up, 127..65 down), offset 64 (65 = +1, 63 = -1), or sign and
    magnitude (bit 6 is the sign, 0x41 = -1).
``14bit``
    A pair of controllers, MSB then LSB (MIDI 1.0: LSB of controller n is
    n + 32 for n < 32); per channel, an MSB resets the LSB to 0, so the value
    is ``msb·128`` until the LSB arrives; the range is spanned by 0..16383.
``toggle``
    A bool flips on every press (value ≥ 64); releases are ignored.

Soft takeover: after a start, or after the parameter was changed from
elsewhere, an absolute control does nothing until its position crosses (or
meets) the parameter's current value, so a fader that sits elsewhere cannot
make it jump.

Everything that is not a control change or a program change (SysEx, clock,
active sensing, notes, malformed bytes) is ignored.

References
----------
.. [1] MIDI Manufacturers Association, "The Complete MIDI 1.0 Detailed
   Specification", 1996: controller numbers 102–119 are undefined; 0–31 MSB
   with 32–63 LSB; running status; system real-time bytes may appear anywhere.
"""

import glob
import os
import queue
import re
import threading
import time
import tomllib
from dataclasses import dataclass

from .. import params
from ..log import log as _log
from ..errors import RtstageError

NOTE_OFF = 0x80
NOTE_ON = 0x90
POLY_PRESSURE = 0xA0
CONTROL_CHANGE = 0xB0
PROGRAM_CHANGE = 0xC0
CHANNEL_PRESSURE = 0xD0
PITCH_BEND = 0xE0
SYSEX_START = 0xF0
SYSEX_END = 0xF7
REALTIME_FIRST = 0xF8
"""0xF8..0xFF: clock, start, continue, stop, active sensing, reset (single bytes)."""

_DATA_BYTES = {NOTE_OFF: 2, NOTE_ON: 2, POLY_PRESSURE: 2, CONTROL_CHANGE: 2, PROGRAM_CHANGE: 1,
               CHANNEL_PRESSURE: 1, PITCH_BEND: 2}
_SYSTEM_COMMON_DATA = {0xF1: 1, 0xF2: 2, 0xF3: 1, 0xF6: 0}

MODES = ("absolute", "relative-twos", "relative-offset", "relative-signmag", "14bit", "toggle")
UNDEFINED_CCS = tuple(range(102, 120))
"""MIDI 1.0 undefined controller numbers, used by the default map."""
MAX_CC = 119
"""120..127 are channel mode messages, never mapped."""

PRESET_MIDI_DIR = os.path.join(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))),
                               "presets", "midi")

API_NAMES = ("jack", "alsa", "coremidi", "winmm")
"""MIDI APIs by name, in the order ``auto`` tries them."""


# ----------------------------------------------------------------------------- decoding


class MidiStreamParser:
    """Split a MIDI byte stream into channel messages.

    Handles running status, drops SysEx and system common messages, lets
    real-time bytes pass anywhere without disturbing a message, and discards
    stray data bytes and messages cut short by a new status byte.

    Yields ``(status, data)`` tuples of channel messages with all data bytes.
    """

    def __init__(self):
        self._status = None
        self._data = []
        self._need = 0
        self._in_sysex = False
        self._skip = 0

    def feed(self, data):
        """Parse ``data`` (iterable of ints or bytes); returns the complete channel messages."""
        out = []
        for byte in data:
            byte = int(byte)
            if not 0 <= byte <= 0xFF:
                self._status = None
                continue
            if byte >= REALTIME_FIRST:
                continue
            if byte & 0x80:
                self._in_sysex = byte == SYSEX_START
                self._data = []
                if byte == SYSEX_END or self._in_sysex:
                    self._status = None
                    continue
                if byte >= 0xF0:
                    self._status = None
                    self._skip = _SYSTEM_COMMON_DATA.get(byte, 0)
                    continue
                self._status = byte
                self._need = _DATA_BYTES[byte & 0xF0]
                self._skip = 0
                continue
            if self._in_sysex:
                continue
            if self._skip:
                self._skip -= 1
                continue
            if self._status is None:
                continue
            self._data.append(byte)
            if len(self._data) == self._need:
                out.append((self._status, tuple(self._data)))
                self._data = []
        return out


def decode_message(message):
    """Decode one message as python-rtmidi delivers it.

    Returns
    -------
    tuple or None
        ``("cc", channel, number, value)`` or ``("program", channel, program)``
        with channel 1..16; None for anything else or anything malformed.
    """
    try:
        found = MidiStreamParser().feed(message)
    except (TypeError, ValueError):
        return None
    if len(found) != 1:
        return None
    status, data = found[0]
    channel = (status & 0x0F) + 1
    if status & 0xF0 == CONTROL_CHANGE:
        return ("cc", channel, data[0], data[1])
    if status & 0xF0 == PROGRAM_CHANGE:
        return ("program", channel, data[0])
    return None


def decode_relative(mode, value):
    """Signed step count of a relative control's 7-bit value."""
    if mode == "relative-twos":
        return value - 128 if value >= 64 else value
    if mode == "relative-offset":
        return value - 64
    if mode == "relative-signmag":
        magnitude = value & 0x3F
        return -magnitude if value & 0x40 else magnitude
    raise ValueError(mode)


def cc_message(channel, number, value):
    """Bytes of a control change (channel 1..16)."""
    return [CONTROL_CHANGE | (channel - 1), number & 0x7F, value & 0x7F]


# ----------------------------------------------------------------------------- maps


@dataclass(frozen=True)
class Control:
    """One mapped controller.

    Attributes
    ----------
    param : str
        Parameter it drives.
    channel : int
        MIDI channel 1..16.
    cc : int
        Controller number (the MSB of a 14-bit pair).
    mode : str
        One of :data:`MODES`.
    lsb_cc : int or None
        LSB controller of a 14-bit pair.
    minimum, maximum : float or None
        Part of the parameter's range covered (None: all of it).
    step : float or None
        Change per relative tick (None: 1 for integers and enums, 1/127 of
        the range for numbers).
    takeover : str
        ``soft`` or ``jump``.
    """

    param: str
    channel: int
    cc: int
    mode: str = "absolute"
    lsb_cc: int = None
    minimum: float = None
    maximum: float = None
    step: float = None
    takeover: str = "soft"

    @property
    def key(self):
        """``(channel, cc)``: what identifies the control on the wire."""
        return (self.channel, self.cc)

    @property
    def spec(self):
        return params.PARAMS[self.param]

    def span(self):
        """``(lo, hi)`` covered, in the parameter's numeric space (enum: indices)."""
        spec = self.spec
        if spec.kind == "enum":
            n = len(spec.allowed())
            lo, hi = 0, n - 1
        elif spec.kind == "bool":
            lo, hi = 0, 1
        else:
            lo, hi = spec.minimum, spec.maximum
        lo = lo if self.minimum is None else max(lo, self.minimum)
        hi = hi if self.maximum is None else min(hi, self.maximum)
        return lo, hi

    def resolution(self):
        """Largest raw value: 16383 for a 14-bit pair, else 127."""
        return 16383 if self.mode == "14bit" else 127

    def from_position(self, raw):
        """Parameter value for raw position ``raw`` (0..resolution)."""
        spec = self.spec
        p = raw / self.resolution()
        lo, hi = self.span()
        if spec.kind == "bool":
            return p >= 0.5
        if spec.kind == "enum":
            choices = spec.allowed()
            n = hi - lo + 1
            return choices[lo + min(int(p * n), n - 1)]
        value = lo + p * (hi - lo)
        return int(round(value)) if spec.kind == "int" else value

    def to_position(self, value):
        """Raw position (0..resolution) that shows ``value``."""
        spec = self.spec
        top = self.resolution()
        lo, hi = self.span()
        if spec.kind == "bool":
            return top if value else 0
        if spec.kind == "enum":
            choices = spec.allowed()
            n = hi - lo + 1
            index = choices.index(value) - lo if value in choices else 0
            index = min(max(index, 0), n - 1)
            return int(round((index + 0.5) / n * top))
        if hi == lo:
            return 0
        p = (float(value) - lo) / (hi - lo)
        return int(round(min(max(p, 0.0), 1.0) * top))

    def number(self, value):
        """``value`` in the numeric space of :meth:`span`."""
        spec = self.spec
        if spec.kind == "enum":
            choices = spec.allowed()
            return choices.index(value) if value in choices else 0
        if spec.kind == "bool":
            return 1 if value else 0
        return float(value)

    def step_by(self, value, steps):
        """``value`` moved by ``steps`` relative ticks, held within the span."""
        spec = self.spec
        lo, hi = self.span()
        if spec.kind == "bool":
            return True if steps > 0 else False if steps < 0 else value
        if spec.kind == "enum":
            choices = spec.allowed()
            index = min(max(self.number(value) + steps * int(self.step or 1), lo), hi)
            return choices[index]
        step = self.step if self.step is not None else (1 if spec.kind == "int" else (hi - lo) / 127.0)
        moved = min(max(float(value) + steps * step, lo), hi)
        return int(round(moved)) if spec.kind == "int" else moved


@dataclass
class MidiMap:
    """A controller map: controls, program-change presets, feedback on or off."""

    name: str
    controls: list
    programs: dict
    feedback: bool = True
    description: str = ""

    def control_for(self, channel, cc):
        """The control bound to ``(channel, cc)`` (an MSB or an LSB of a pair), or None."""
        for control in self.controls:
            if control.channel == channel and (control.cc == cc or control.mode == "14bit" and control.lsb_cc == cc):
                return control
        return None


def _check_int(where, name, value, lo, hi):
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise RtstageError(f"{where}: {name} must be an integer from {lo} to {hi}, got {value!r}")
    return value


def map_from_dict(data, where="MIDI map"):
    """Build a :class:`MidiMap` from parsed TOML, checking every field."""
    controls = []
    used = {}
    for i, entry in enumerate(data.get("control", []), 1):
        w = f"{where}, control {i}"
        if not isinstance(entry, dict):
            raise RtstageError(f"{w}: expected a table")
        extra = set(entry) - {"param", "channel", "cc", "mode", "lsb_cc", "min", "max", "step", "takeover"}
        if extra:
            raise RtstageError(f"{w}: unknown key(s) {', '.join(sorted(extra))}")
        name = entry.get("param")
        if name not in params.PARAMS or params.PARAMS[name].kind == "seed":
            raise RtstageError(f"{w}: param must be a parameter other than seed, got {name!r}")
        channel = _check_int(w, "channel", entry.get("channel"), 1, 16)
        cc = _check_int(w, "cc", entry.get("cc"), 0, MAX_CC)
        mode = entry.get("mode", "absolute")
        if mode not in MODES:
            raise RtstageError(f"{w}: mode must be one of {', '.join(MODES)}, got {mode!r}")
        kind = params.PARAMS[name].kind
        if mode == "toggle" and kind != "bool":
            raise RtstageError(f"{w}: toggle mode needs a true/false parameter, {name} is {kind}")
        lsb = entry.get("lsb_cc")
        if mode == "14bit":
            lsb = _check_int(w, "lsb_cc", cc + 32 if lsb is None and cc < 32 else lsb, 0, MAX_CC)
            if lsb == cc:
                raise RtstageError(f"{w}: lsb_cc must differ from cc")
        elif lsb is not None:
            raise RtstageError(f"{w}: lsb_cc is only for mode 14bit")
        for key in ("min", "max", "step"):
            v = entry.get(key)
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
                raise RtstageError(f"{w}: {key} must be a number")
        takeover = entry.get("takeover", "soft")
        if takeover not in ("soft", "jump"):
            raise RtstageError(f"{w}: takeover must be soft or jump")
        control = Control(name, channel, cc, mode, lsb, entry.get("min"), entry.get("max"), entry.get("step"), takeover)
        lo, hi = control.span()
        if lo > hi:
            raise RtstageError(f"{w}: min/max leave nothing of {name}'s range")
        for number in (cc, lsb) if lsb is not None else (cc,):
            if (channel, number) in used:
                raise RtstageError(f"{w}: channel {channel} controller {number} is already mapped (control {used[(channel, number)]})")
            used[(channel, number)] = i
        controls.append(control)
    programs = {}
    for key, preset in data.get("programs", {}).items():
        try:
            number = int(key)
        except ValueError:
            raise RtstageError(f"{where}: programs keys must be program numbers 0..127, got {key!r}") from None
        _check_int(where, "program number", number, 0, 127)
        if not isinstance(preset, str):
            raise RtstageError(f"{where}: program {number} must name a preset")
        programs[number] = preset
    feedback = data.get("feedback", True)
    if not isinstance(feedback, bool):
        raise RtstageError(f"{where}: feedback must be true or false")
    return MidiMap(str(data.get("name", "")), controls, programs, feedback, str(data.get("description", "")))


def load_map(name_or_path):
    """Load a controller map by name (``presets/midi/<name>.toml``) or path."""
    path = name_or_path
    if not (path.endswith(".toml") or os.sep in path):
        path = os.path.join(PRESET_MIDI_DIR, name_or_path + ".toml")
    try:
        with open(path, "rb") as f:
            data = tomllib.load(f)
    except FileNotFoundError:
        known = ", ".join(sorted(os.path.basename(p)[:-5] for p in glob.glob(os.path.join(PRESET_MIDI_DIR, "*.toml"))))
        raise RtstageError(f"no MIDI map {name_or_path!r} (known: {known}; or give a path)") from None
    except OSError as exc:
        raise RtstageError(f"cannot read MIDI map {path}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise RtstageError(f"MIDI map {path}: not valid TOML ({exc})") from None
    except UnicodeDecodeError as exc:
        raise RtstageError(f"MIDI map {path}: not UTF-8 text (byte {exc.start})") from None
    return map_from_dict(data, where=f"MIDI map {path}")


# ----------------------------------------------------------------------------- mapping


class MidiMapper:
    """Turn decoded MIDI messages into parameter changes.

    Parameters
    ----------
    midi_map : MidiMap
        The controls.

    Notes
    -----
    :meth:`handle` returns actions: ``("set", values, control_key)`` or
    ``("recall", preset_name)``.  Call :meth:`released` for every change
    that did not come from a control, so soft takeover re-arms.
    """

    def __init__(self, midi_map):
        self.map = midi_map
        self._msb = {}
        self._engaged = {}
        self._last_target = {}
        self._learn = None
        self._learn_callback = None

    # learn
    def arm_learn(self, name, callback=None):
        """Bind the next control change that arrives to parameter ``name``."""
        self._learn = name
        self._learn_callback = callback

    def cancel_learn(self):
        """Disarm learn; returns True when it was armed."""
        armed = self._learn is not None
        self._learn = None
        self._learn_callback = None
        return armed

    @property
    def learning(self):
        """The parameter armed for learn, or None."""
        return self._learn

    def released(self, name):
        """Parameter ``name`` changed from elsewhere: its soft-takeover controls wait to cross it again."""
        for control in self.map.controls:
            if control.param == name:
                self._engaged.pop(control.key, None)
                self._last_target.pop(control.key, None)

    def handle(self, message, current):
        """Actions for one decoded message (see :func:`decode_message`) given the ``current`` values."""
        if message is None:
            return []
        if message[0] == "program":
            preset = self.map.programs.get(message[2])
            return [("recall", preset)] if preset is not None else []
        _, channel, cc, value = message
        if self._learn is not None:
            return self._do_learn(channel, cc)
        control = self.map.control_for(channel, cc)
        if control is None:
            return []
        if control.mode == "14bit":
            if cc == control.cc:
                self._msb[control.key] = value
                raw = value << 7
            else:
                msb = self._msb.get(control.key)
                if msb is None:
                    return []
                raw = (msb << 7) | value
            return self._absolute(control, raw, current)
        if control.mode == "absolute":
            return self._absolute(control, value, current)
        cur = current[control.param]
        if control.mode == "toggle":
            if value < 64:
                return []
            return [("set", {control.param: not bool(cur)}, control.key)]
        steps = decode_relative(control.mode, value)
        if steps == 0:
            return []
        new = control.step_by(cur, steps)
        return [("set", {control.param: new}, control.key)] if new != cur else []

    def _absolute(self, control, raw, current):
        target = control.from_position(raw)
        cur = current[control.param]
        key = control.key
        if control.takeover == "soft" and not self._engaged.get(key):
            cur_n = control.number(cur)
            new_n = control.number(target)
            prev = self._last_target.get(key)
            self._last_target[key] = target
            met = new_n == cur_n or raw == control.to_position(cur)  # same value, or the position that shows it
            crossed = met or (prev is not None and (control.number(prev) - cur_n) * (new_n - cur_n) <= 0)
            if not crossed:
                return []
            self._engaged[key] = True
        self._last_target[key] = target
        if target == cur:
            return []
        return [("set", {control.param: target}, key)]

    def _do_learn(self, channel, cc):
        name = self._learn
        callback = self._learn_callback
        self._learn = None
        self._learn_callback = None
        self.map.controls = [c for c in self.map.controls
                             if not (c.channel == channel and (c.cc == cc or c.lsb_cc == cc)) and c.param != name]
        control = Control(name, channel, cc, "toggle" if params.PARAMS[name].kind == "bool" else "absolute")
        self.map.controls.append(control)
        self._engaged.pop(control.key, None)
        self._last_target.pop(control.key, None)
        if callback is not None:
            callback({"event": "learned", "name": name, "channel": channel, "cc": cc, "mode": control.mode})
        return []


# ----------------------------------------------------------------------------- feedback


class FeedbackScheduler:
    """Decide which values to send back to the controller, and when.

    Parameters
    ----------
    midi_map : MidiMap
        The controls (shared with the :class:`MidiMapper`).
    min_interval_s : float
        Least time between two messages to one control (rate limit).
    suppress_s : float
        After a control is moved, nothing is sent to it for this long (the
        hand is on it); then its final value is sent once.

    Notes
    -----
    Values identical to the last one sent to a control are dropped.
    :meth:`on_connect` forgets what was sent and queues every control.
    """

    def __init__(self, midi_map, min_interval_s=0.02, suppress_s=0.3):
        self.map = midi_map
        self.min_interval_s = float(min_interval_s)
        self.suppress_s = float(suppress_s)
        self._pending = {}
        self._last_sent = {}
        self._last_t = {}
        self._suppress_until = {}

    def on_connect(self, values):
        """The output (re)opened: queue every control's current value."""
        self._last_sent.clear()
        for control in self.map.controls:
            if control.param in values:
                self._pending[control.key] = (control, control.to_position(values[control.param]))

    def on_change(self, values, source_key, now_s):
        """Parameters changed; ``source_key`` is the control that moved them (or None)."""
        for control in self.map.controls:
            if control.param not in values:
                continue
            raw = control.to_position(values[control.param])
            if control.key == source_key:
                self._suppress_until[control.key] = now_s + self.suppress_s
            self._pending[control.key] = (control, raw)

    def due(self, now_s):
        """Messages to send now (lists of bytes), in order."""
        out = []
        for key in list(self._pending):
            control, raw = self._pending[key]
            if now_s < self._suppress_until.get(key, -1.0):
                continue
            if self._last_sent.get(key) == raw:
                del self._pending[key]
                continue
            if now_s - self._last_t.get(key, -1e9) < self.min_interval_s:
                continue
            del self._pending[key]
            self._last_sent[key] = raw
            self._last_t[key] = now_s
            if control.mode == "14bit":
                out.append(cc_message(control.channel, control.cc, raw >> 7))
                out.append(cc_message(control.channel, control.lsb_cc, raw & 0x7F))
            elif control.mode.startswith("relative"):
                continue  # an endless encoder shows nothing
            else:
                out.append(cc_message(control.channel, control.cc, raw))
        return out

    def next_due_s(self):
        """True when messages wait (sent by a later :meth:`due`)."""
        return bool(self._pending)


# ----------------------------------------------------------------------------- ports


_CLIENT_NUMBERS = re.compile(r"(\s+\d+:\d+$)|(^\d+:\s*)")


def port_base_name(name):
    """A port name without ALSA client:port numbers (``"Desk:Desk MIDI 1 20:0"`` → ``"Desk:Desk MIDI 1"``)."""
    return _CLIENT_NUMBERS.sub("", name).strip()


def match_port(names, wanted):
    """Index of the first port whose name (without client numbers) contains ``wanted``, case-insensitive; or None."""
    wanted = wanted.lower()
    for i, name in enumerate(names):
        if wanted in port_base_name(name).lower():
            return i
    return None


def _rtmidi():
    try:
        import rtmidi
    except ImportError:
        raise RtstageError("MIDI needs python-rtmidi (pip install python-rtmidi)") from None
    return rtmidi


def api_constants():
    """``{name: rtmidi API constant}`` for the APIs of :data:`API_NAMES`."""
    rtmidi = _rtmidi()
    return {"jack": rtmidi.API_UNIX_JACK, "alsa": rtmidi.API_LINUX_ALSA,
            "coremidi": rtmidi.API_MACOSX_CORE, "winmm": rtmidi.API_WINDOWS_MM}


def open_api(api="auto", client_name="rtstage"):
    """Open MIDI input and output clients on ``api`` or, for ``auto``, the first that works.

    Returns
    -------
    (str, rtmidi.MidiIn, rtmidi.MidiOut)
        The API's name and the two clients (no port open yet).

    Raises
    ------
    RtstageError
        Unknown API, not compiled in, or none could be opened (with each reason).
    """
    rtmidi = _rtmidi()
    constants = api_constants()
    compiled = set(rtmidi.get_compiled_api())
    if api == "auto":
        names = [n for n in API_NAMES if constants[n] in compiled]
    elif api in constants:
        if constants[api] not in compiled:
            have = ", ".join(n for n in API_NAMES if constants[n] in compiled) or "none"
            raise RtstageError(f"MIDI API {api} is not compiled into python-rtmidi (have: {have})")
        names = [api]
    else:
        raise RtstageError(f"unknown MIDI API {api!r} (known: auto, {', '.join(API_NAMES)})")
    reasons = []
    for name in names:
        try:
            midi_in = rtmidi.MidiIn(constants[name], name=client_name)
            midi_out = rtmidi.MidiOut(constants[name], name=client_name)
            midi_in.get_ports()
            midi_out.get_ports()
            return name, midi_in, midi_out
        except Exception as exc:  # rtmidi raises SystemError or its own errors per backend
            reasons.append(f"{name}: {exc}")
            if api == "auto":
                _log(f"midi: {name} unavailable ({exc}); trying the next API")
    raise RtstageError("no MIDI API could be opened (" + "; ".join(reasons or ["none compiled in"]) + ")")


IN_POLL_S = 0.001
"""How often the MIDI worker thread takes input messages from RtMidi's queue (JACK delivers MIDI once per period)."""


class MidiControl:
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
        self._stop = threading.Event()
        self._fb_lock = threading.Lock()
        self._thread = threading.Thread(target=self._run, name="rtstage-midi", daemon=True)
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
        self._thread.start()
        _log(f"midi: {self.api} API; in: {self.in_connected or 'waiting for ' + repr(self.in_port)}; "
             f"out: {self.out_connected or ('waiting for ' + repr(self.out_port) if self.out_port else 'none')}")
        return self

    def stop(self):
        """Stop the worker and close the ports."""
        self._stop.set()
        self._queue.put(None)
        if self._thread.is_alive():
            self._thread.join()
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

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()

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
        while not self._stop.is_set():
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
