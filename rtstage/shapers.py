"""Error-feedback noise shapers: the built-in coefficient sets and their analysis.

Sign convention
---------------
A shaper is the FIR error filter ``h = (h_1 … h_N)``.  The quantizer input is
``u[n] = x[n] - Σ_k h_k e[n-k]`` and ``e[n] = y[n] - u[n]`` is the total error of
the quantizer (rounding plus dither).  The output is therefore
``y = x + (1 - Σ_k h_k z^-k) e``: the noise transfer function is

    NTF(z) = 1 - Σ_{k=1..N} h_k z^-k,

the polynomial with coefficients ``b = [1, -h_1, …, -h_N]`` used with
:func:`scipy.signal.freqz`.  With white error of variance σ² the added noise
has the power spectral density σ²·|NTF|² and the total power σ²·(1 + Σ h_k²).

References
----------
.. [1] M. A. Gerzon, P. G. Craven, "Optimal noise shaping and dither of digital
   signals", 87th AES Convention, preprint 2822, 1989.
.. [2] R. A. Wannamaker, "Psychoacoustically optimal noise shaping",
   J. Audio Eng. Soc. 40(7/8), 1992.
.. [3] S. P. Lipshitz, J. Vanderkooy, R. A. Wannamaker, "Minimally audible noise
   shaping", J. Audio Eng. Soc. 39(11), 1991.
"""

import math
import os
from dataclasses import dataclass, field, replace

import numpy as np

from .errors import RtstageError
from .files.tomlread import load_toml
from .kernel_layout import MAX_TAPS  # the kernel owns its array sizes: at most MAX_TAPS error-filter taps


@dataclass(frozen=True)
class Shaper:
    """An error-feedback shaper.

    Attributes
    ----------
    id : str
        Name used on the command line, in presets and over the socket.
    coefs : tuple of float
        Error-filter taps ``h_1 … h_N`` (see the module's sign convention).
    design_samplerate_hz : float or None
        Sample rate the set was designed for; None for rate-independent sets.
    source : str
        Where the coefficients come from.
    description : str
        One line for listings.
    """

    id: str
    coefs: tuple
    design_samplerate_hz: float = None
    source: str = ""
    description: str = ""
    path: str = field(default=None, compare=False)
    family: str = field(default=None, compare=False)
    """Set when the shaper was asked for by family (``thr9``): the engine picks the member for its rate."""

    @property
    def ntaps(self):
        """Number of error-filter taps."""
        return len(self.coefs)

    @property
    def ntf_b(self):
        """NTF numerator ``[1, -h_1, …, -h_N]`` for :func:`scipy.signal.freqz`."""
        return np.concatenate(([1.0], -np.asarray(self.coefs, dtype=np.float64)))


# The published 44.1 kHz sets.  The values are those printed in the papers,
# written here from memory of the tables; tests/test_shaper_spectra.py checks each one
# for minimum phase and a 0 dB log-mean (Gerzon & Craven), which a mistyped
# coefficient would almost surely break.
_BUILTIN = (
    Shaper("flat", (), None, "", "no shaping: white added noise"),
    Shaper("diff1", (1.0,), None, "NTF = 1 - z^-1", "first-order highpass error shaping"),
    Shaper("diff2", (2.0, -1.0), None, "NTF = (1 - z^-1)^2", "second-order highpass error shaping"),
    Shaper(
        "wannamaker-f3",
        (1.623, -0.982, 0.109),
        44100.0,
        "Wannamaker, JAES 40(7/8), 1992: F-weighted, 3 taps",
        "F-weighted psychoacoustic shaping, 3 taps",
    ),
    Shaper(
        "wannamaker-f9",
        (2.412, -3.370, 3.937, -4.174, 3.353, -2.205, 1.281, -0.569, 0.0847),
        44100.0,
        "Wannamaker, JAES 40(7/8), 1992: F-weighted, 9 taps",
        "F-weighted psychoacoustic shaping, 9 taps",
    ),
    Shaper(
        "lvw-e5",
        (2.033, -2.165, 1.959, -1.590, 0.6149),
        44100.0,
        "Lipshitz, Vanderkooy & Wannamaker, JAES 39(11), 1991: E-weighted, 5 taps",
        "E-weighted minimally audible shaping, 5 taps",
    ),
    Shaper(
        "lvw-me9",
        (1.662, -1.263, 0.4827, -0.2913, 0.1268, -0.1124, 0.03252, -0.01265, -0.03524),
        44100.0,
        "Lipshitz, Vanderkooy & Wannamaker, JAES 39(11), 1991: modified E-weighted, 9 taps",
        "modified E-weighted shaping, 9 taps (gentle high-frequency rise)",
    ),
    Shaper(
        "lvw-ie9",
        (2.847, -4.685, 6.214, -7.184, 6.639, -5.032, 3.263, -1.632, 0.4191),
        44100.0,
        "Lipshitz, Vanderkooy & Wannamaker, JAES 39(11), 1991: improved E-weighted, 9 taps",
        "improved E-weighted shaping, 9 taps (deep notch, strong rise)",
    ),
)

BUILTIN_SHAPERS = {s.id: s for s in _BUILTIN}

PRESET_SHAPER_DIR = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "presets", "shapers")


def shaper_from_toml(path):
    """Read a shaper file (TOML).

    Keys: ``id`` (str), ``coefs`` (list of float, ``h_1 … h_N``), optional
    ``design_samplerate_hz``, ``source``, ``description``.  Extra keys written
    by the designer (its figures and settings) are ignored here.
    """
    data = load_toml(path, f"shaper file {path}")
    coefs = data.get("coefs")
    if not isinstance(coefs, list) or not all(isinstance(c, (int, float)) and not isinstance(c, bool) for c in coefs):
        raise RtstageError(f"shaper file {path}: field 'coefs' must be a list of numbers")
    if len(coefs) > MAX_TAPS:
        raise RtstageError(f"shaper file {path}: field 'coefs' has {len(coefs)} taps; at most {MAX_TAPS}")
    if not all(math.isfinite(c) for c in coefs):
        raise RtstageError(f"shaper file {path}: field 'coefs' holds a non-finite value")
    sid = data.get("id", os.path.splitext(os.path.basename(path))[0])
    if not isinstance(sid, str) or not sid:
        raise RtstageError(f"shaper file {path}: field 'id' must be a non-empty string")
    rate = data.get("design_samplerate_hz")
    if rate is not None and (not isinstance(rate, (int, float)) or rate <= 0):
        raise RtstageError(f"shaper file {path}: field 'design_samplerate_hz' must be a positive number")
    return Shaper(
        sid,
        tuple(float(c) for c in coefs),
        None if rate is None else float(rate),
        str(data.get("source", "")),
        str(data.get("description", "")),
        path,
    )


def preset_shapers(directory=PRESET_SHAPER_DIR):
    """Shapers stored as TOML files in ``directory``, by id."""
    found = {}
    if os.path.isdir(directory):
        for name in sorted(os.listdir(directory)):
            if name.endswith(".toml"):
                s = shaper_from_toml(os.path.join(directory, name))
                found[s.id] = s
    return found


def all_shapers():
    """Built-in shapers followed by the preset shapers, by id."""
    shapers = dict(BUILTIN_SHAPERS)
    for sid, s in preset_shapers().items():
        shapers.setdefault(sid, s)
    return shapers


def get_shaper(name):
    """Resolve a shaper id (built-in or preset) or a path to a shaper TOML file."""
    if isinstance(name, Shaper):
        return name
    if name in BUILTIN_SHAPERS:
        return BUILTIN_SHAPERS[name]
    if name.endswith(".toml") or os.sep in name:
        return shaper_from_toml(name)
    presets = preset_shapers()
    if name in presets:
        return presets[name]
    members = family_members(name, presets)
    if members:
        # A family names one design per rate; until the rate is known, the 48 kHz member stands in.
        rate = 48000.0 if 48000.0 in members else min(members)
        return replace(members[rate], family=name)
    families = shaper_families(presets)
    known = ", ".join(list(BUILTIN_SHAPERS) + list(presets) + [f"{f} (one design per rate)" for f in families])
    raise RtstageError(f"unknown shaper '{name}' (known: {known}; or give a path to a shaper .toml)")


RATE_TAGS = {44100.0: "44k1", 48000.0: "48k", 88200.0: "88k2", 96000.0: "96k", 176400.0: "176k4", 192000.0: "192k"}
"""Suffixes of the shipped per-rate designs (``thr9-44k1``, ``gentle9-48k``)."""


def family_of(shaper_id):
    """``thr9`` for ``thr9-48k``; None for an id without a rate suffix."""
    stem, _, tag = str(shaper_id).rpartition("-")
    return stem if stem and tag in RATE_TAGS.values() else None


def family_members(family, presets=None):
    """The preset shapers of a family, by design rate: ``{44100.0: thr9-44k1, 48000.0: thr9-48k, ...}``."""
    presets = preset_shapers() if presets is None else presets
    found = {}
    for rate, tag in RATE_TAGS.items():
        member = presets.get(f"{family}-{tag}")
        if member is not None and member.design_samplerate_hz and abs(member.design_samplerate_hz - rate) < 0.5:
            found[rate] = member
    return found


def shaper_families(presets=None):
    """Ids of the shaper families among the preset shapers (``gentle9``, ``thr9``, ...), sorted."""
    presets = preset_shapers() if presets is None else presets
    return tuple(sorted({family_of(sid) for sid in presets} - {None}))


def fit_shaper_to_rate(shaper, samplerate):
    """The member of ``shaper``'s family designed for ``samplerate``, or ``shaper`` itself.

    Only a shaper asked for by family (``--shaper thr9``, a preset's
    ``shaper = "gentle9"``) is exchanged; one asked for by its full id is kept
    as given (a rate warning then says which design fits).
    """
    if shaper.family is None or (shaper.design_samplerate_hz and abs(shaper.design_samplerate_hz - samplerate) < 0.5):
        return shaper
    member = family_members(shaper.family).get(float(samplerate))
    return shaper if member is None else replace(member, family=shaper.family)


# ----------------------------------------------------------------------------- analysis


def ntf_response(coefs, freqs_hz, samplerate):
    """Complex NTF at ``freqs_hz`` for a sample rate ``samplerate`` (Hz)."""
    b = np.concatenate(([1.0], -np.asarray(coefs, dtype=np.float64)))
    w = 2.0 * np.pi * np.asarray(freqs_hz, dtype=np.float64) / samplerate
    k = np.arange(b.size)
    return np.exp(-1j * np.outer(w, k)) @ b


def noise_power_gain(coefs):
    """Total noise-power gain of the NTF, Σ n_k² = 1 + Σ h_k² (white error in, added noise out)."""
    return 1.0 + float(np.sum(np.asarray(coefs, dtype=np.float64) ** 2))


def is_minimum_phase(coefs):
    """True when no zero of the NTF lies outside the unit circle (zeros on it, as in (1 - z^-1)^k, count as minimum phase)."""
    if len(coefs) == 0:
        return True
    b = np.concatenate(([1.0], -np.asarray(coefs, dtype=np.float64)))
    return bool(np.all(np.abs(np.roots(b)) <= 1.0 + 1e-9))


def log_mean_db(coefs, npoints=1 << 16):
    """Mean of 20·log10|NTF| over the unit circle, in dB.

    By Jensen's formula this is 0 dB for any NTF with a leading 1 and all zeros
    inside the unit circle (Gerzon & Craven, 1989), and positive otherwise:
    shaping can move added noise between frequencies, never remove it.
    """
    b = np.concatenate(([1.0], -np.asarray(coefs, dtype=np.float64)))
    # Midpoints of (0, pi): the circle's mean by symmetry, never evaluated on a
    # zero at DC or Nyquist such as those of (1 - z^-1)^k.
    w = (np.arange(npoints) + 0.5) * np.pi / npoints
    mag = np.abs(np.exp(-1j * np.outer(w, np.arange(b.size))) @ b)
    return float(np.mean(20.0 * np.log10(np.maximum(mag, 1e-300))))


def error_bound_lsb(coefs, dither_peak_lsb):
    """Worst-case magnitude of the quantizer input's feedback term, in LSB.

    With the total error bounded by ``0.5 + dither_peak_lsb``, the feedback
    ``Σ h_k e[n-k]`` is at most ``(0.5 + peak)·Σ|h_k|``, and the added noise at
    the output at most ``(0.5 + peak)·(1 + Σ|h_k|)``.
    """
    return (0.5 + dither_peak_lsb) * (1.0 + float(np.sum(np.abs(np.asarray(coefs, dtype=np.float64)))))
