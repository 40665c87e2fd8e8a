"""Headroom: the excursion the shaped error adds, the programme peak that leaves room for it, the warning.

Used at run time by the renderer, the live engine and the meters (the one authority for these figures).

Part of :mod:`rtstage.design` (its notes describe the method, the weightings and the caps).
"""

import math

from ..dither import DITHER_KINDS, DitherKind, feedback_peak_lsb
from ..errors import RtstageError
from ..shapers import error_bound_lsb


def _dither_kind(dither_id):
    if isinstance(dither_id, DitherKind):
        return dither_id
    if dither_id not in DITHER_KINDS:
        raise RtstageError(f"unknown dither '{dither_id}' (known: {', '.join(DITHER_KINDS)})")
    return DITHER_KINDS[dither_id]


def headroom_lsb(shaper, dither_id, dither_scale=1.0):
    """Worst-case excursion, in LSB, that the shaped error adds to the programme.

    The output word is ``y = v + NTF·e`` (``v`` the programme in LSB), and every
    unclipped sample's total error ``e`` (rounding plus dither) lies within
    ``±(1/2 + dither peak)``.  The added term ``e[n] - Σ h_k e[n-k]`` is
    therefore bounded by ``(1/2 + peak)·(1 + Σ|h_k|)``, the error bound times
    the L1 norm of the NTF's impulse response; the bound is reached when the
    past errors line up in sign with the taps.  This function is the one
    authority for that figure (the engine's warning and the meter use it).

    Parameters
    ----------
    shaper : Shaper
        The shaper (``flat`` gives the plain requantizer's bound).
    dither_id : str or DitherKind
        Dither kind id.
    dither_scale : float
        Dither amplitude relative to the textbook amplitude.

    Returns
    -------
    float
        Excursion in LSB.

    Notes
    -----
    Gaussian dither has no peak; its bound uses four sigma, the same bound the
    kernel's clip rule feeds back (:func:`rtstage.dither.feedback_peak_lsb`), so
    for Gaussian dither the figure is exceeded with a very small probability.
    """
    kind = _dither_kind(dither_id)
    error_peak = feedback_peak_lsb(kind, dither_scale)  # 1/2 + dither peak
    return float(error_bound_lsb(shaper.coefs, error_peak - 0.5))


def headroom_dbfs(shaper, dither_id, bits, dither_scale=1.0):
    """Largest programme peak, in dBFS, that leaves room for :func:`headroom_lsb`.

    A programme sample of ``v`` LSB cannot clip while ``|v| + X < 2^(B-1)``,
    with ``X`` the excursion and ``B = bits`` (the word's range is
    ``[-2^(B-1), 2^(B-1) - 1]`` and the output is an integer), so the peak
    allowed is ``20·log10(1 - X/2^(B-1))`` dBFS.

    Parameters
    ----------
    shaper : Shaper
        The shaper.
    dither_id : str or DitherKind
        Dither kind id.
    bits : int
        Target word length.
    dither_scale : float
        Dither amplitude relative to the textbook amplitude.

    Returns
    -------
    float
        Peak in dBFS (negative); ``-inf`` when the excursion alone fills the
        word (short words with strong shapers), so no programme is safe.
    """
    excursion = headroom_lsb(shaper, dither_id, dither_scale)
    full_lsb = math.ldexp(1.0, int(bits) - 1)
    room = 1.0 - excursion / full_lsb
    return 20.0 * math.log10(room) if room > 0.0 else float("-inf")


def headroom_warning(shaper, dither_id, bits, peak_dbfs, dither_scale=1.0):
    """A warning when a programme peak leaves less room than the shaped error needs, else None.

    Parameters
    ----------
    shaper : Shaper
        The shaper.
    dither_id : str or DitherKind
        Dither kind id.
    bits : int
        Target word length.
    peak_dbfs : float
        The programme's peak after the engine's gain, dBFS.
    dither_scale : float
        Dither amplitude relative to the textbook amplitude.

    Returns
    -------
    str or None
        One line naming the peak, the limit from :func:`headroom_dbfs` and the
        excursion from :func:`headroom_lsb`; None when the peak is at or below the limit.
    """
    limit = headroom_dbfs(shaper, dither_id, bits, dither_scale)
    if peak_dbfs <= limit:
        return None
    excursion = headroom_lsb(shaper, dither_id, dither_scale)
    if limit == float("-inf"):
        return (
            f"shaper '{shaper.id}' with {_dither_kind(dither_id).id} dither can add {excursion:.1f} LSB, more than a "
            f"{bits}-bit word holds: any programme may clip; use a gentler shaper or a longer word"
        )
    return (
        f"programme peak {peak_dbfs:.2f} dBFS leaves less headroom than shaper '{shaper.id}' with "
        f"{_dither_kind(dither_id).id} dither needs ({excursion:.1f} LSB at {bits} bits): keep peaks at or below "
        f"{limit:.2f} dBFS (lower the gain) or expect clipped samples"
    )
