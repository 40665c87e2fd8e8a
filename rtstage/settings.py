"""Engine settings: the value object every driver, preset and control path shares.

:class:`EngineSettings` holds what decides the output words (word length,
dither, shaper, seed, gain, monitor, mute); :meth:`EngineSettings.validate`
names the first setting that cannot be used and :meth:`EngineSettings.resolved`
draws a missing seed and loads the shaper.  The limits below are the one
source of the parameter table (:mod:`rtstage.params`) and of the engine
(:mod:`rtstage.engine`), which turns resolved settings into the kernel's
encoded parameters.
"""

import math
import secrets
from dataclasses import dataclass, asdict, replace

import numpy as np

from .dither import DITHER_KINDS
from .errors import RtstageError
from .shapers import MAX_TAPS, Shaper, fit_shaper_to_rate, get_shaper

MIN_BITS = 2
MAX_BITS = 24
MIN_SAMPLERATE = 8000
MAX_SAMPLERATE = 384000
MAX_CHANNELS = 64
MIN_GAIN_DB = -120.0
MAX_GAIN_DB = 40.0
MAX_DITHER_SCALE = 4.0
GAIN_RAMP_SECONDS = 0.010
"""Duration of a gain (or mute) ramp: 10 ms, long enough to avoid zipper noise."""

SEED_MAX = 2**64 - 1

MONITOR_MODES = ("requantized", "error", "input")
"""Values of ``monitor``, in kernel code order (``rtstage.kernel.MON_*``)."""
MAX_ERROR_GAIN_DB = 90.0
"""Largest make-up gain for the error monitor (the error of a 16-bit word sits near -101 dBFS)."""
ERROR_CEILING_DBFS = -20.0
"""Peak ceiling of the error monitor's safety limiter (a hard limit, not a setting)."""
MAX_AUTO_MUTE_HOLD_S = 60.0
"""Longest auto-mute hold time."""


UNSAFE_REASONS = {
    "without dither": "undithered error feedback turns low-level signals into distortion and idle tones "
                      "(Lipshitz, Wannamaker & Vanderkooy, JAES 2004)",
    "non-i.i.d.": "correlated dither in a feedback loop no longer makes the error's moments signal-independent "
                  "(Lipshitz, Wannamaker & Vanderkooy, JAES 2004)",
}
"""Why each combination :meth:`EngineSettings.validate` refuses is unsafe, keyed by words of the risk's description."""


def _unsafe_reason(risk):
    return UNSAFE_REASONS["without dither" if "without dither" in risk else "non-i.i.d."]


def unsafe_warning(settings, source):
    """The warning line for settings accepted although unsafe, naming the risk, its reference and ``source``; or None."""
    risks = settings.unsafe_risks() if settings.accept_unsafe else []
    if not risks:
        return None
    return (f"warning: accepting {risks[0]} (from {source}, --accept-unsafe-shaping): "
            f"{_unsafe_reason(risks[0])}")


def new_seed():
    """A random 64-bit seed (from the operating system's generator)."""
    return secrets.randbits(64)


@dataclass(frozen=True)
class EngineSettings:
    """Everything that decides the engine's output words.

    Parameters
    ----------
    bits : int
        Target word length, 2..24.
    dither : str
        Dither kind id: ``none``, ``rpdf``, ``tpdf``, ``tpdf-hp``, ``gaussian``.
    shaper : str or Shaper
        Shaper id (built-in or preset), a path to a shaper file, or a Shaper.
    seed : int or None
        Dither seed, 0..2^64-1; None picks a random one at :meth:`resolved`.
    gain_db : float
        Gain before the quantizer, in dB.
    dither_scale : float
        Expert setting: dither amplitude relative to the textbook amplitude.
    accept_unsafe : bool
        Accept combinations that theory marks unsafe (see :meth:`validate`);
        every use should be reported with :func:`unsafe_warning`
        (``--accept-unsafe-shaping`` on the command line).
    monitor : str
        What the output carries: ``requantized`` (the words), ``error`` (the
        added error with ``error_gain_db`` of make-up gain, hard-limited at
        :data:`ERROR_CEILING_DBFS`) or ``input`` (the gained input at the
        container's full resolution).  Changes crossfade over 10 ms.
    error_gain_db : float
        Make-up gain of the error monitor, 0..90 dB.  Caution: the error of a
        short word with make-up gain can be loud; protect your hearing and
        follow local codes and licensed practice for listening levels.
    mute : bool
        Ramp the output to exactly 0 (and back) over 10 ms.
    auto_mute : bool
        Mute a channel whose input has been exact digital zero for
        ``auto_mute_hold_s``; ramped, per channel, shaper history cleared.
    auto_mute_hold_s : float
        Hold time of auto-mute, 0..60 s (at least one frame).
    """

    bits: int = 16
    dither: str = "tpdf"
    shaper: object = "flat"
    seed: object = None
    gain_db: float = 0.0
    dither_scale: float = 1.0
    accept_unsafe: bool = False
    monitor: str = "requantized"
    error_gain_db: float = 0.0
    mute: bool = False
    auto_mute: bool = False
    auto_mute_hold_s: float = 0.5

    def resolved(self, samplerate=None):
        """A copy with a concrete seed and a :class:`Shaper` object, validated.

        With ``samplerate``, a shaper asked for by family (``thr9``) becomes
        the family's design for that rate.
        """
        s = self
        if s.seed is None:
            s = replace(s, seed=new_seed())
        if not isinstance(s.shaper, Shaper):
            s = replace(s, shaper=get_shaper(s.shaper))
        if samplerate is not None:
            s = replace(s, shaper=fit_shaper_to_rate(s.shaper, samplerate))
        s.validate()
        return s

    @property
    def shaper_id(self):
        """The shaper's id whether ``shaper`` holds an id or a Shaper."""
        return self.shaper.id if isinstance(self.shaper, Shaper) else str(self.shaper)

    def validate(self):
        """Raise :class:`RtstageError` naming the first setting that cannot be used.

        Refused unless ``accept_unsafe``:

        * noise shaping without dither: the fed-back error is then a
          deterministic function of the signal, so the loop turns low-level
          signals into distortion and idle tones instead of noise;
        * a dither that is not i.i.d. (``tpdf-hp``) inside a feedback shaper:
          the proof that TPDF makes the total error's first two moments
          independent of the signal needs independent dither values, and
          correlated dither inside the loop loses it (Lipshitz, Wannamaker &
          Vanderkooy, "Dithered noise shapers and recursive digital filters",
          JAES 52(11), 2004).
        """
        if isinstance(self.bits, bool) or not isinstance(self.bits, (int, np.integer)):
            raise RtstageError(f"bits must be an integer, got {self.bits!r}")
        if not MIN_BITS <= self.bits <= MAX_BITS:
            raise RtstageError(f"bits must be between {MIN_BITS} and {MAX_BITS}, got {self.bits}")
        if self.dither not in DITHER_KINDS:
            raise RtstageError(f"unknown dither '{self.dither}' (known: {', '.join(DITHER_KINDS)})")
        if self.seed is not None:
            if isinstance(self.seed, bool) or not isinstance(self.seed, (int, np.integer)) or not 0 <= self.seed <= SEED_MAX:
                raise RtstageError(f"seed must be an integer from 0 to 2^64-1, got {self.seed!r}")
        if self.monitor not in MONITOR_MODES:
            raise RtstageError(f"unknown monitor {self.monitor!r} (known: {', '.join(MONITOR_MODES)})")
        for name in ("mute", "auto_mute"):
            if not isinstance(getattr(self, name), (bool, np.bool_)):
                raise RtstageError(f"{name} must be true or false, got {getattr(self, name)!r}")
        for name in ("gain_db", "dither_scale", "error_gain_db", "auto_mute_hold_s"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise RtstageError(f"{name} must be a finite number, got {value!r}")
        if not MIN_GAIN_DB <= self.gain_db <= MAX_GAIN_DB:
            raise RtstageError(f"gain_db must be between {MIN_GAIN_DB:g} and +{MAX_GAIN_DB:g} dB, got {self.gain_db}")
        if not 0.0 <= self.dither_scale <= MAX_DITHER_SCALE:
            raise RtstageError(f"dither_scale must be between 0 and {MAX_DITHER_SCALE:g}, got {self.dither_scale}")
        if not 0.0 <= self.error_gain_db <= MAX_ERROR_GAIN_DB:
            raise RtstageError(f"error_gain_db must be between 0 and {MAX_ERROR_GAIN_DB:g} dB, got {self.error_gain_db}")
        if not 0.0 <= self.auto_mute_hold_s <= MAX_AUTO_MUTE_HOLD_S:
            raise RtstageError(f"auto_mute_hold_s must be between 0 and {MAX_AUTO_MUTE_HOLD_S:g} s, "
                               f"got {self.auto_mute_hold_s}")
        shaper = self.shaper if isinstance(self.shaper, Shaper) else get_shaper(self.shaper)
        if shaper.ntaps > MAX_TAPS:
            raise RtstageError(f"shaper '{shaper.id}' has {shaper.ntaps} taps; at most {MAX_TAPS}")
        if not self.accept_unsafe:
            risks = self.unsafe_risks(shaper)
            if risks:
                raise RtstageError(f"{risks[0]} refused: {_unsafe_reason(risks[0])}; "
                                   "use --dither tpdf, or --accept-unsafe-shaping to accept it")

    def unsafe_risks(self, shaper=None):
        """What theory marks unsafe in these settings: a list of short descriptions (empty when safe).

        :data:`UNSAFE_REASONS` says why each is unsafe.

        References
        ----------
        .. [1] S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Dithered noise
           shapers and recursive digital filters", JAES 52(11), 2004.
        """
        shaper = shaper or (self.shaper if isinstance(self.shaper, Shaper) else get_shaper(self.shaper))
        if not shaper.ntaps:
            return []
        if self.dither == "none" or self.dither_scale == 0.0:
            return [f"shaper '{shaper.id}' without dither"]
        if not DITHER_KINDS[self.dither].iid:
            return [f"dither '{self.dither}' (not i.i.d.) inside shaper '{shaper.id}'"]
        return []

    def to_dict(self):
        """Plain-data form (for status, logs and presets)."""
        d = asdict(self)
        d["shaper"] = self.shaper_id
        return d
