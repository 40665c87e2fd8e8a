"""Writing a design as a shaper preset (TOML) that ``render`` and ``run`` accept.

Part of :mod:`rtstage.design` (its notes describe the method, the weightings and the caps).
"""

import math

import numpy as np

from ..errors import RtstageError
from .curves import AUDIBLE_LIMIT_HZ


def _toml_value(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {type(value).__name__} to TOML")


def design_command(design):
    """The ``rtstage shaper design`` command line that reproduces ``design``."""
    parts = [
        "rtstage shaper design",
        f"--samplerate {design.samplerate:g}",
        f"--taps {design.shaper.ntaps}",
        "--table FILE" if design.weighting == "table" else f"--weighting {design.weighting}",
        f"--range-db {design.requested_range_db:g}",
    ]
    if design.max_gain_db is not None:
        parts.append(f"--max-gain-db {design.max_gain_db:g}")
    if design.max_noise_gain_db is not None:
        parts.append(f"--max-noise-gain-db {design.max_noise_gain_db:g}")
    if design.audible_limit_hz != AUDIBLE_LIMIT_HZ:
        parts.append(f"--audible-limit-hz {design.audible_limit_hz:g}")
    parts.append(f"--id {design.shaper.id}")
    return " ".join(parts)


def design_to_toml(design):
    """A design as a shaper preset file (TOML text) for :func:`rtstage.shapers.shaper_from_toml`.

    Besides ``id``, ``coefs``, ``design_samplerate_hz``, ``source`` and
    ``description``, the file records the design's settings (``[design]``)
    and figures (``[figures]``); readers ignore those tables.
    """
    s = design.shaper
    lines = [
        "# Noise shaper designed by 'rtstage shaper design'.",
        "# NTF(z) = 1 - sum_k coefs[k-1] z^-k (sign convention of rtstage.shapers).",
        f"# Made with: {design_command(design)}",
        f"id = {_toml_value(s.id)}",
        f"description = {_toml_value(s.description)}",
        f"source = {_toml_value(s.source)}",
        f"design_samplerate_hz = {_toml_value(float(design.samplerate))}",
        "coefs = [",
    ]
    lines += [f"    {_toml_value(c)}," for c in s.coefs]
    lines += ["]", "", "[design]"]
    settings = {
        "weighting": design.weighting,
        "taps": s.ntaps,
        "range_db": design.range_db,
        "requested_range_db": design.requested_range_db,
        "audible_limit_hz": design.audible_limit_hz,
    }
    if design.max_gain_db is not None:
        settings["max_gain_db"] = float(design.max_gain_db)
    if design.max_noise_gain_db is not None:
        settings["max_noise_gain_db"] = float(design.max_noise_gain_db)
    if design.table is not None:
        settings["table_hz"] = [float(v) for v in design.table[0]]
        settings["table_db"] = [float(v) for v in design.table[1]]
    lines += [f"{k} = {_toml_value(v)}" for k, v in settings.items()]
    lines += ["", "[figures]"]
    lines += [f"{k} = {_toml_value(v)}" for k, v in design.figures.items()]
    return "\n".join(lines) + "\n"


def save_design(design, path, plan=None, overwrite=False):
    """Write :func:`design_to_toml` to ``path`` through the output policy.

    With ``plan`` (checked, ``path`` declared in it) the caller commits;
    without, a plan of its own refuses an existing file unless ``overwrite``.
    """
    from ..files.policy import OutputPlan

    text = design_to_toml(design)
    if plan is not None:
        plan.write_text(path, text)
        return
    own = OutputPlan(f"saving the shaper design {path}", overwrite=overwrite)
    own.add_file(path, "shaper file")
    with own:
        own.write_text(path, text)
