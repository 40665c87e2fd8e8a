"""Controller maps: one control per parameter, the map model, and reading maps from TOML.

Part of :mod:`rtstage.control.midi` (its notes describe the map format and the modes).
"""

import glob
import os
from dataclasses import dataclass

from ... import params
from ...errors import RtstageError
from ...files.tomlread import load_toml, TomlFileMissing


MODES = ("absolute", "relative-twos", "relative-offset", "relative-signmag", "14bit", "toggle")
UNDEFINED_CCS = tuple(range(102, 120))
"""MIDI 1.0 undefined controller numbers, used by the default map."""
MAX_CC = 119
"""120..127 are channel mode messages, never mapped."""

PRESET_MIDI_DIR = os.path.join(os.path.dirname(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))),
                               "presets", "midi")


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
        data = load_toml(path, f"MIDI map {path}")
    except TomlFileMissing:
        known = ", ".join(sorted(os.path.basename(p)[:-5] for p in glob.glob(os.path.join(PRESET_MIDI_DIR, "*.toml"))))
        raise RtstageError(f"no MIDI map {name_or_path!r} (known: {known}; or give a path)") from None
    return map_from_dict(data, where=f"MIDI map {path}")
