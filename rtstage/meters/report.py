"""The meter report: JSON-ready values and an atomic writer.

Keys are documented in ``docs/meters.md``; ``REPORT_VERSION`` changes when a
key changes meaning.  Undefined figures (no signal, too few samples) are
``null``, never ``NaN`` or ``Infinity``, so the file is strict JSON.
"""

import json
import math
import os
import tempfile

import numpy as np

from ..errors import RtstageError

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


def write_report(path, report):
    """Write ``report`` as JSON to ``path`` atomically (temporary file, then rename).

    Parameters
    ----------
    path : str or os.PathLike
        Destination; its directory must exist.
    report : dict
        A report from :meth:`rtstage.meters.MeterBank.report`.
    """
    path = os.fspath(path)
    directory = os.path.dirname(os.path.abspath(path))
    text = json.dumps(json_ready(report), indent=2, allow_nan=False) + "\n"
    try:
        fd, tmp = tempfile.mkstemp(prefix=".report-", suffix=".json.tmp", dir=directory)
    except OSError as exc:
        raise RtstageError(f"cannot write report {path}: {exc.strerror}") from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise RtstageError(f"cannot write report {path}: {exc.strerror}") from None
