"""The meter report: JSON-ready values and an atomic writer.

Keys are documented in ``docs/meters.md``; ``REPORT_VERSION`` changes when a
key changes meaning.  Undefined figures (no signal, too few samples) are
``null``, never ``NaN`` or ``Infinity``, so the file is strict JSON.
"""

import json
import math
import os

import numpy as np


REPORT_VERSION = 1
"""Version of the report's layout."""

CHANNEL_KEYS = (
    "added_noise_dbfs",
    "predicted_noise_dbfs",
    "noise_modulation_db",
    "sample_peak_dbfs",
    "true_peak_dbtp",
    "clipped_samples",
    "nonfinite_samples",
    "active_bits",
)
"""Keys every per-channel entry carries (extras are listed in docs/meters.md)."""


def json_ready(value):
    """Plain Python data from numpy scalars/arrays; non-finite floats become None."""
    if isinstance(value, dict):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if isinstance(value, np.ndarray):
        return [json_ready(v) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    return value


def write_report(path, report, plan=None):
    """Write ``report`` as JSON to ``path`` through the output policy (atomic, umask mode).

    Parameters
    ----------
    path : str or os.PathLike
        Destination; its folder must exist.
    report : dict
        A report from :meth:`rtstage.meters.MeterBank.report`.
    plan : OutputPlan or None
        A checked plan in which ``path`` is declared (the caller commits it);
        None writes through a plan of its own that replaces an existing file.
    """
    from ..files.policy import OutputPlan

    path = os.fspath(path)
    text = json.dumps(json_ready(report), indent=2, allow_nan=False) + "\n"
    if plan is not None:
        plan.write_text(path, text)
        return
    own = OutputPlan(f"writing the report {path}", overwrite=True)
    own.add_file(path, "report")
    with own:
        own.write_text(path, text)
