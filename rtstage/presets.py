"""Engine presets: small TOML files of settings.

A preset holds a one-line ``description`` and any of the engine settings
``bits``, ``dither``, ``shaper``, ``gain_db``, ``dither_scale`` (the seed is
deliberately not a preset field: a preset describes a sound, a seed one
render).  Settings given on the command line override the preset's.

Example (``presets/encoder16.toml``)::

    description = "16-bit feed into a lossy streaming encoder: flat TPDF, no shaping"
    bits = 16
    dither = "tpdf"
    shaper = "flat"
"""

import os

from .errors import RtstageError
from .files.tomlread import load_toml

PRESET_DIR = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "presets")

PRESET_FIELDS = {
    "description": str,
    "bits": int,
    "dither": str,
    "shaper": str,
    "gain_db": float,
    "dither_scale": float,
}


def preset_path(name):
    """Path of preset ``name``: an id in ``presets/`` or a path to a .toml file."""
    if name.endswith(".toml") or os.sep in name:
        return name
    return os.path.join(PRESET_DIR, f"{name}.toml")


def list_presets():
    """Ids of the presets shipped in ``presets/``."""
    if not os.path.isdir(PRESET_DIR):
        return []
    return sorted(f[:-5] for f in os.listdir(PRESET_DIR) if f.endswith(".toml"))


def load_preset(name):
    """Read and check a preset; returns a dict of engine settings (without ``description``).

    Raises
    ------
    RtstageError
        Naming the file and the field when the preset cannot be used.
    """
    path = preset_path(name)
    if not os.path.exists(path):
        raise RtstageError(f"unknown preset '{name}' (no file {path}; shipped: {', '.join(list_presets())})")
    data = load_toml(path, f"preset {path}")
    values = {}
    for key, value in data.items():
        if key not in PRESET_FIELDS:
            raise RtstageError(f"preset {path}: unknown field '{key}' (fields: {', '.join(PRESET_FIELDS)})")
        want = PRESET_FIELDS[key]
        ok = isinstance(value, want) and not isinstance(value, bool)
        if want is float and isinstance(value, int) and not isinstance(value, bool):
            value, ok = float(value), True
        if not ok:
            raise RtstageError(f"preset {path}: field '{key}' must be of type {want.__name__}, got {value!r}")
        if key != "description":
            values[key] = value
    return values


def settings_from(preset=None, **overrides):
    """EngineSettings from an optional preset and explicit overrides (None means "not given").

    Every value is checked by :meth:`EngineSettings.validate`; a bad value that
    came from the preset is reported with the preset's path and field.
    """
    from .settings import EngineSettings

    values = {}
    if preset:
        values.update(load_preset(preset))
        try:
            EngineSettings(**values, accept_unsafe=bool(overrides.get("accept_unsafe"))).validate()
        except RtstageError as exc:
            field = next((k for k in values if f"{k}" in str(exc)), None)
            where = f", field '{field}'" if field else ""
            raise RtstageError(f"preset {preset_path(preset)}{where}: {exc}") from None
    values.update({k: v for k, v in overrides.items() if v is not None})
    return EngineSettings(**values)
