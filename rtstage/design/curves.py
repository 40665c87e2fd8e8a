"""The weightings a shaper design minimises: hearing thresholds, the inverse of the meters' curves, user tables.

Part of :mod:`rtstage.design` (its notes describe the method, the weightings and the caps).
"""

import math

import numpy as np

from .. import weighting as ear_weighting
from ..errors import RtstageError


INVERSE_OF = {"inv-a": "a", "inv-itu468": "itu468"}
"""Designs whose noise follows the inverse of a meter weighting, by that weighting's id in
:data:`rtstage.weighting.WEIGHTINGS` (the one place the curves live): ``inv-`` + the id."""

WEIGHTINGS = {
    "threshold": "inverse of the ISO 226:2003 threshold of hearing",
    "terhardt": "inverse of Terhardt's 1979 threshold approximation",
    "inv-a": "noise follows the inverse of IEC 61672-1 A-weighting",
    "inv-itu468": "noise follows the inverse of ITU-R BS.468-4 weighting",
    "table": "a user table of (Hz, dB) weighting rows",
}
"""Weighting ids the designer knows, with one line each."""

WEIGHTING_ALIASES = {"inv-468": "inv-itu468"}
"""Earlier ids, still accepted (designs made with them keep their names)."""

WEIGHTING_TAGS = {"threshold": "thr", "terhardt": "ter", "inv-a": "ia", "inv-itu468": "i468", "table": "tab"}
"""Short tags used in designed preset ids (``thr9-48k``)."""


def canonical_weighting(weighting):
    """The current id of a design weighting (an earlier alias becomes its current id)."""
    return WEIGHTING_ALIASES.get(weighting, weighting)


AUDIBLE_LOW_HZ = 20.0
"""Below this the weighting is held at its value here."""
AUDIBLE_LIMIT_HZ = 20000.0
"""Default audible limit: above it the weighting sits at its floor."""

# ISO 226:2003, Table 1, column T_f: threshold of hearing in dB SPL at the
# preferred one-third-octave frequencies 20 Hz .. 12.5 kHz.  Values written
# from memory of the standard's table.
_ISO226_FREQS_HZ = np.array(
    [20, 25, 31.5, 40, 50, 63, 80, 100, 125, 160, 200, 250, 315, 400, 500, 630, 800, 1000,
     1250, 1600, 2000, 2500, 3150, 4000, 5000, 6300, 8000, 10000, 12500],
    dtype=np.float64,
)
_ISO226_TF_DB = np.array(
    [78.5, 68.7, 59.5, 51.1, 44.0, 37.5, 31.5, 26.5, 22.1, 17.9, 14.4, 11.4, 8.6, 6.2, 4.4, 3.0, 2.2, 2.4,
     3.5, 1.7, -1.3, -4.2, -6.0, -5.4, -1.5, 6.0, 12.6, 13.9, 12.3],
    dtype=np.float64,
)


def terhardt_threshold_db(freqs_hz):
    """Terhardt's approximation of the threshold of hearing, in dB SPL.

    ``T(f) = 3.64 (f/kHz)^-0.8 - 6.5 exp(-0.6 (f/kHz - 3.3)^2) + 1e-3 (f/kHz)^4``.

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies in Hz, > 0.

    Returns
    -------
    ndarray
        Threshold in dB SPL.

    References
    ----------
    .. [1] E. Terhardt, "Calculating virtual pitch", Hearing Research 1, 1979
       (formula from memory).
    """
    f_khz = np.asarray(freqs_hz, dtype=np.float64) / 1000.0
    return 3.64 * f_khz**-0.8 - 6.5 * np.exp(-0.6 * (f_khz - 3.3) ** 2) + 1e-3 * f_khz**4


def iso226_threshold_db(freqs_hz):
    """The ISO 226:2003 threshold of hearing T_f, in dB SPL.

    Interpolated linearly in dB over log frequency between the standard's
    one-third-octave values (20 Hz .. 12.5 kHz).  Below 20 Hz the 20 Hz value
    is held.  The standard stops at 12.5 kHz; above it Terhardt's curve is
    used, shifted to join the table continuously at 12.5 kHz (it gives the
    steep rise of the threshold towards 20 kHz).

    Parameters
    ----------
    freqs_hz : array_like
        Frequencies in Hz.

    Returns
    -------
    ndarray
        Threshold in dB SPL.

    References
    ----------
    .. [1] ISO 226:2003, Table 1 (T_f column; values from memory).
    .. [2] E. Terhardt, Hearing Research 1, 1979 (above 12.5 kHz).
    """
    f = np.maximum(np.asarray(freqs_hz, dtype=np.float64), _ISO226_FREQS_HZ[0])
    out = np.interp(np.log(f), np.log(_ISO226_FREQS_HZ), _ISO226_TF_DB)
    top = _ISO226_FREQS_HZ[-1]
    above = f > top
    if np.any(above):
        join = _ISO226_TF_DB[-1] - terhardt_threshold_db(top)
        out = np.where(above, terhardt_threshold_db(np.where(above, f, top)) + join, out)
    return out


def read_weighting_table(path):
    """Read a weighting table: rows of ``Hz dB`` (comma or white space), ``#`` comments.

    Parameters
    ----------
    path : str
        File name.

    Returns
    -------
    freqs_hz, gain_db : ndarray
        Increasing frequencies (Hz, > 0) and the weighting in dB (higher =
        more audible).
    """
    try:
        with open(path, encoding="utf-8") as f:
            lines = f.read().splitlines()
    except OSError as exc:
        raise RtstageError(f"cannot read weighting table {path}: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise RtstageError(f"weighting table {path}: not UTF-8 text (byte {exc.start})") from None
    rows = []
    for number, line in enumerate(lines, 1):
        text = line.split("#", 1)[0].replace(",", " ").split()
        if not text:
            continue
        try:
            if len(text) != 2:
                raise ValueError
            row = (float(text[0]), float(text[1]))
        except ValueError:
            raise RtstageError(f"weighting table {path}, line {number}: expected two numbers 'Hz dB'") from None
        if not (math.isfinite(row[0]) and math.isfinite(row[1])) or row[0] <= 0:
            raise RtstageError(f"weighting table {path}, line {number}: frequency must be > 0 and values finite")
        rows.append(row)
    return check_weighting_table(rows, path)


def check_weighting_table(rows, name="weighting table"):
    """Validate (Hz, dB) rows; returns ``(freqs_hz, gain_db)`` arrays."""
    if len(rows) < 2:
        raise RtstageError(f"{name}: needs at least two (Hz, dB) rows")
    table = np.asarray(rows, dtype=np.float64)
    if table.ndim != 2 or table.shape[1] != 2 or not np.all(np.isfinite(table)):
        raise RtstageError(f"{name}: rows must be pairs of finite numbers (Hz, dB)")
    if np.any(table[:, 0] <= 0) or np.any(np.diff(table[:, 0]) <= 0):
        raise RtstageError(f"{name}: frequencies must be positive and strictly increasing")
    return table[:, 0].copy(), table[:, 1].copy()


def weighting_db(weighting, freqs_hz, table=None):
    """A weighting's raw value in dB at ``freqs_hz`` (higher = more audible).

    Parameters
    ----------
    weighting : str
        One of :data:`WEIGHTINGS`.
    freqs_hz : array_like
        Frequencies in Hz.
    table : tuple of ndarray, optional
        ``(freqs_hz, gain_db)`` for ``weighting="table"``; held constant
        beyond its first and last rows.

    Returns
    -------
    ndarray
        Weighting in dB, with an arbitrary offset.  Below
        :data:`AUDIBLE_LOW_HZ` the value there is held; the audible limit and
        the floor are applied by :func:`design_weighting_db`.
    """
    f = np.maximum(np.asarray(freqs_hz, dtype=np.float64), AUDIBLE_LOW_HZ)
    if weighting == "threshold":
        return -iso226_threshold_db(f)
    if weighting == "terhardt":
        return -terhardt_threshold_db(f)
    weighting = canonical_weighting(weighting)
    if weighting in INVERSE_OF:
        return np.asarray(ear_weighting.weighting_db(INVERSE_OF[weighting], f), dtype=np.float64)
    if weighting == "table":
        if table is None:
            raise RtstageError("weighting 'table' needs a table of (Hz, dB) rows (--table FILE)")
        tf, tdb = table
        return np.interp(np.log(f), np.log(tf), tdb)
    raise RtstageError(f"unknown weighting '{weighting}' (known: {', '.join(WEIGHTINGS)})")


def design_weighting_db(weighting, freqs_hz, range_db, table=None, audible_limit_hz=AUDIBLE_LIMIT_HZ):
    """The weighting a design minimises, in dB: 0 dB at its in-band peak, floored at ``-range_db``.

    Frequencies above ``audible_limit_hz`` sit at the floor (the ear does not
    hear there, so noise may go there, as far as the floor allows).

    Parameters
    ----------
    weighting : str
        One of :data:`WEIGHTINGS`.
    freqs_hz : array_like
        Frequencies in Hz.
    range_db : float
        Dynamic range kept below the peak, >= 0.
    table : tuple of ndarray, optional
        For ``weighting="table"``.
    audible_limit_hz : float
        Upper edge of the audible band.

    Returns
    -------
    ndarray
        Weighting in dB, in ``[-range_db, 0]``.
    """
    f = np.asarray(freqs_hz, dtype=np.float64)
    raw = weighting_db(weighting, f, table)
    audible = f <= audible_limit_hz
    if not np.any(audible):
        raise RtstageError(f"no grid frequency lies below the audible limit {audible_limit_hz:g} Hz")
    peak = float(np.max(raw[audible]))
    rel = np.where(audible, np.maximum(raw - peak, -range_db), -range_db)
    return rel
