"""Sample-rate checks: the shipped design for a rate, and what to say about a shaper used off its design rate.

Part of :mod:`rtstage.design` (its notes describe the method, the weightings and the caps).
"""

import re

from ..shapers import PRESET_SHAPER_DIR, preset_shapers
from .curves import WEIGHTING_TAGS


SHIPPED_RATES_HZ = (44100, 48000, 88200, 96000, 176400, 192000)
"""Sample rates the shipped presets are designed for."""
RATE_TOLERANCE_HZ = 0.5
"""A shaper counts as designed for a rate within this distance of it."""


_ID_PATTERN = re.compile(r"^([a-z]+[a-z0-9]*?)(\d+)-(\d+)k(\d?)$")


def _parse_id(sid):
    m = _ID_PATTERN.match(sid)
    if not m:
        return None
    return m.group(1), int(m.group(2))


def _same_rate(a_hz, b_hz):
    return abs(float(a_hz) - float(b_hz)) <= RATE_TOLERANCE_HZ


def preset_for_rate(shaper, samplerate, presets=None):
    """The shipped preset that best replaces ``shaper`` at ``samplerate``, or None.

    Candidates are the presets designed for ``samplerate``; the best has the
    same weighting tag as ``shaper`` (the published psychoacoustic sets count
    as threshold designs, ``thr``) and the tap count nearest to it.
    """
    presets = preset_shapers(PRESET_SHAPER_DIR) if presets is None else presets
    candidates = [p for p in presets.values() if p.design_samplerate_hz and _same_rate(p.design_samplerate_hz, samplerate)]
    if not candidates:
        return None
    parsed = _parse_id(shaper.id)
    family = parsed[0] if parsed and parsed[0] in WEIGHTING_TAGS.values() else WEIGHTING_TAGS["threshold"]

    def rank(p):
        q = _parse_id(p.id)
        return (0 if q and q[0] == family else 1, abs(p.ntaps - shaper.ntaps), p.ntaps, p.id)

    return min(candidates, key=rank)


def rate_warning(shaper, samplerate, presets=None):
    """A warning when ``shaper`` runs at a rate it was not designed for, else None.

    Parameters
    ----------
    shaper : Shaper
        The shaper in use.
    samplerate : float
        The rate the engine runs at, Hz.
    presets : dict, optional
        Presets to choose from (default: the shipped ones).

    Returns
    -------
    str or None
        None when the shaper is rate-independent (no design rate) or was
        designed for this rate; otherwise one line naming the shipped preset
        for this rate, or the design command when none is shipped.
    """
    design = shaper.design_samplerate_hz
    if design is None or _same_rate(design, samplerate):
        return None
    msg = (
        f"shaper '{shaper.id}' was designed for {design / 1000:g} kHz; at {samplerate / 1000:g} kHz its "
        "noise curve lands at the wrong frequencies"
    )
    best = preset_for_rate(shaper, samplerate, presets)
    if best is not None:
        return f"{msg}; use --shaper {best.id} (designed for {samplerate / 1000:g} kHz)"
    return (
        f"{msg}; no shipped preset fits this rate: design one with "
        f"'rtstage shaper design --samplerate {samplerate:g} --taps {max(shaper.ntaps, 1)} --weighting threshold --save FILE'"
    )
