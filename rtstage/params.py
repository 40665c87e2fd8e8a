"""The parameter table: every control rtstage accepts, in one place.

The command line, presets, the control socket, MIDI maps and automation files
all name parameters from :data:`PARAMS` and check values with
:func:`validate` / :func:`validate_values`, so a value that passes here is one
the engine can use, whatever path it came by.

Public API
----------
ParamSpec
    Name, type, range or choices, unit, default, one-line description.
PARAMS
    The table, by name, in display order.
validate(name, value)
    The canonical value, or :class:`~rtstage.errors.RtstageError` with the reason.
validate_values(values, current=None)
    Validate a set of changes together (atomic: all or nothing).
spec_table()
    Plain-data form of the table (the socket's ``list`` operation).
defaults()
    The default value of every parameter.
settings_with(settings, values)
    :class:`~rtstage.engine.EngineSettings` with the engine fields of ``values`` applied.

Ranges come from :mod:`rtstage.engine` (``MIN_BITS``, ``MAX_BITS`` …); the
combination rules (no shaper without dither, and so on) are those of
:meth:`rtstage.engine.EngineSettings.validate`, which :func:`validate_values`
calls on the merged result.

Monitor values
--------------
``requantized``
    The output words (the normal case).
``error``
    The added error alone (output minus gained input), raised by
    ``error_gain_db`` of make-up gain so that it can be heard.  Caution: with
    make-up gain the error of a short word can be loud; start with the
    monitor level down, protect your hearing, and follow local codes and
    licensed practice for listening levels.
``input``
    The unquantized input at the same level (after ``gain_db``), for A/B
    comparison.
"""

import math
import os
from dataclasses import dataclass, field, replace

import numpy as np

from . import settings as _settings
from .dither import DITHER_KINDS
from .errors import RtstageError
from .shapers import PRESET_SHAPER_DIR, all_shapers, shaper_families

MONITOR_MODES = _settings.MONITOR_MODES
"""Values of ``monitor``: what the output carries (see the module docstring)."""

# Ranges that EngineSettings.validate checks inline; read from the engine when it
# exports them, so that there is one source of truth (tests/test_params.py checks
# these bounds against EngineSettings.validate itself).
MIN_GAIN_DB = _settings.MIN_GAIN_DB
MAX_GAIN_DB = _settings.MAX_GAIN_DB
MAX_DITHER_SCALE = _settings.MAX_DITHER_SCALE

MAX_ERROR_GAIN_DB = _settings.MAX_ERROR_GAIN_DB
MAX_AUTO_MUTE_HOLD_S = _settings.MAX_AUTO_MUTE_HOLD_S

ENGINE_FIELDS = ("bits", "dither", "shaper", "seed", "gain_db", "dither_scale", "monitor", "error_gain_db", "mute",
                 "auto_mute", "auto_mute_hold_s")
"""Parameters that are fields of :class:`rtstage.engine.EngineSettings`."""


@dataclass(frozen=True)
class ParamSpec:
    """One parameter.

    Attributes
    ----------
    name : str
        Name used everywhere (CLI, presets, socket, MIDI maps, automation).
    kind : str
        ``int``, ``float``, ``bool``, ``enum`` or ``seed`` (an integer from 0 to
        2^64-1, or None for a random one).
    default : object
        Value at start.
    minimum, maximum : float or None
        Inclusive range of ``int`` and ``float`` parameters.
    choices : tuple of str
        Allowed values of an ``enum`` (empty: resolved when asked, see ``dynamic``).
    unit : str
        Unit of the value ("" when it has none).
    description : str
        One line for listings.
    when : str
        ``block``: applied at the next block boundary; ``ramped``: applied at
        the next block boundary through the 10 ms gain ramp; ``start``: takes
        effect at the next start only.
    dynamic : bool
        True when the choices are looked up at validation (shapers can be added
        as preset files).
    """

    name: str
    kind: str
    default: object
    description: str
    unit: str = ""
    minimum: float = None
    maximum: float = None
    choices: tuple = field(default=())
    when: str = "block"
    dynamic: bool = False

    def allowed(self):
        """The allowed values of an enum parameter."""
        if self.name == "shaper":
            return _shaper_ids()
        return self.choices

    def to_dict(self):
        """Plain-data form (JSON-ready)."""
        d = {"name": self.name, "type": self.kind, "default": self.default, "unit": self.unit,
             "description": self.description, "when": self.when}
        if self.kind in ("int", "float"):
            d["min"] = self.minimum
            d["max"] = self.maximum
        if self.kind == "seed":
            d["min"] = 0
            d["max"] = _settings.SEED_MAX
        if self.kind == "enum":
            d["choices"] = list(self.allowed())
        return d


_SHAPER_CACHE = {}


def _shapers():
    """Built-in and preset shapers by id, re-read only when the preset directory changes."""
    try:
        stamp = os.stat(PRESET_SHAPER_DIR).st_mtime_ns
    except OSError:
        stamp = None
    shapers = _SHAPER_CACHE.get(stamp)
    if shapers is None:
        shapers = all_shapers()
        _SHAPER_CACHE.clear()
        _SHAPER_CACHE[stamp] = shapers
    return shapers


def _shaper_ids():
    # Families (thr9, gentle9) are accepted too: the engine takes the member for its rate.
    return tuple(_shapers()) + shaper_families(_shapers())


_TABLE = (
    ParamSpec("bits", "int", 16, "target word length", "bits", _settings.MIN_BITS, _settings.MAX_BITS),
    ParamSpec("dither", "enum", "tpdf", "dither kind", choices=tuple(DITHER_KINDS)),
    ParamSpec("shaper", "enum", "flat", "noise shaper id (built-in or preset file)", dynamic=True),
    ParamSpec("gain_db", "float", 0.0, "gain before the quantizer", "dB", MIN_GAIN_DB, MAX_GAIN_DB, when="ramped"),
    ParamSpec("dither_scale", "float", 1.0, "dither amplitude relative to the textbook amplitude (expert)", "",
              0.0, MAX_DITHER_SCALE),
    ParamSpec("monitor", "enum", "requantized", "what the output carries: requantized, error (with make-up gain) "
              "or input at matched level", choices=MONITOR_MODES),
    ParamSpec("error_gain_db", "float", 0.0, "make-up gain of the error monitor (caution: can be loud)", "dB",
              0.0, MAX_ERROR_GAIN_DB, when="ramped"),
    ParamSpec("mute", "bool", False, "silence the output", when="ramped"),
    ParamSpec("auto_mute", "bool", False, "mute a channel whose input is exact digital zero for auto_mute_hold_s",
              when="ramped"),
    ParamSpec("auto_mute_hold_s", "float", 0.5, "time of exact digital zero input before auto-mute", "s",
              0.0, MAX_AUTO_MUTE_HOLD_S),
    ParamSpec("seed", "seed", None, "dither seed (null: random)", when="start"),
)

PARAMS = {p.name: p for p in _TABLE}
"""The parameter table, by name, in display order."""


def _number_name(kind):
    return "an integer" if kind == "int" else "a number"


def validate(name, value):
    """Check one value and return its canonical form.

    Parameters
    ----------
    name : str
        Parameter name.
    value : object
        Value as it arrived (JSON types: int, float, bool, str, None).

    Returns
    -------
    object
        The value as the engine takes it (``int`` for integers, ``float`` for
        numbers, the choice string for enums).

    Raises
    ------
    RtstageError
        Unknown name, wrong type, out of range or unknown choice, with the reason.
    """
    spec = PARAMS.get(name) if isinstance(name, str) else None
    if spec is None:
        raise RtstageError(f"unknown parameter {name!r} (known: {', '.join(PARAMS)})")
    kind = spec.kind
    if kind == "bool":
        if not isinstance(value, (bool, np.bool_)):
            raise RtstageError(f"{name} must be true or false, got {value!r}")
        return bool(value)
    if kind == "enum":
        if not isinstance(value, str):
            raise RtstageError(f"{name} must be a string, got {value!r}")
        allowed = spec.allowed()
        if value not in allowed:
            raise RtstageError(f"unknown {name} {value!r} (known: {', '.join(allowed)})")
        return value
    if kind == "seed":
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not 0 <= value <= _settings.SEED_MAX:
            raise RtstageError(f"seed must be an integer from 0 to 2^64-1 or null, got {value!r}")
        return int(value)
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise RtstageError(f"{name} must be {_number_name(kind)}, got {value!r}")
    if kind == "int":
        if isinstance(value, (float, np.floating)):
            if not math.isfinite(value) or value != int(value):
                raise RtstageError(f"{name} must be an integer, got {value!r}")
        value = int(value)
    else:
        value = float(value)
        if not math.isfinite(value):
            raise RtstageError(f"{name} must be a finite number, got {value!r}")
    if not spec.minimum <= value <= spec.maximum:
        unit = f" {spec.unit}" if spec.unit else ""
        raise RtstageError(f"{name} must be between {spec.minimum:g} and {spec.maximum:g}{unit}, got {value:g}")
    return value


def validate_values(values, current=None, accept_unsafe=False, warn=None, source="a control request"):
    """Validate several changes together; nothing is accepted unless all are.

    Parameters
    ----------
    values : dict
        Parameter name to new value.
    current : dict or None
        Current values of all parameters; the merged result is checked
        against the engine's combination rules.  None: the defaults.
    accept_unsafe : bool
        Accept combinations that :meth:`EngineSettings.validate` refuses as unsafe.
    warn : callable or None
        Called with one warning line (naming the risk, its reference and
        ``source``) whenever an unsafe combination is accepted.
    source : str
        Where the values came from, for that warning.

    Returns
    -------
    dict
        The changes in canonical form, in table order.

    Raises
    ------
    RtstageError
        With the reason for the first value or combination that cannot be used.
    """
    if not isinstance(values, dict):
        raise RtstageError(f"values must be an object of parameter names to values, got {type(values).__name__}")
    if not values:
        raise RtstageError("values is empty")
    checked = {}
    for name, value in values.items():
        checked[name] = validate(name, value)
    merged = dict(defaults() if current is None else current)
    merged.update(checked)
    # The Shaper object, not its id, so that validation reads no file (it runs on the server's loop).
    shaper = _shapers().get(merged["shaper"], merged["shaper"])
    settings = _settings.EngineSettings(
        bits=merged["bits"], dither=merged["dither"], shaper=shaper, seed=merged["seed"],
        gain_db=merged["gain_db"], dither_scale=merged["dither_scale"], accept_unsafe=bool(accept_unsafe),
        monitor=merged["monitor"], error_gain_db=merged["error_gain_db"], mute=merged["mute"],
        auto_mute=merged["auto_mute"], auto_mute_hold_s=merged["auto_mute_hold_s"],
    )
    settings.validate()
    if warn is not None:
        message = _settings.unsafe_warning(settings, source)
        if message:
            warn(message)
    return {name: checked[name] for name in PARAMS if name in checked}


def spec_table():
    """The table as a list of plain dicts (for the socket's ``list`` operation)."""
    return [p.to_dict() for p in PARAMS.values()]


def defaults():
    """Default value of every parameter, by name."""
    return {p.name: p.default for p in PARAMS.values()}


def values_from_settings(settings):
    """Parameter values of the engine fields of ``settings``."""
    return {name: (settings.shaper_id if name == "shaper" else getattr(settings, name)) for name in ENGINE_FIELDS}


def settings_with(settings, values):
    """``settings`` with the engine fields among ``values`` replaced.

    The seed is left as it is: it takes effect at the next start only.
    """
    changes = {k: v for k, v in values.items() if k in ENGINE_FIELDS and k != "seed"}
    return replace(settings, **changes) if changes else settings
