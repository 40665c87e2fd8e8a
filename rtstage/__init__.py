"""rtstage: a real-time output stage that requantizes audio to a shorter word length.

Public API
----------
EngineSettings
    Word length, dither, shaper, seed and gain; validated.
Engine
    Prepared requantizer: ``Engine(settings, channels, samplerate).process(block)``.
render_file
    Requantize one sound file into another (the ``rtstage render`` command).
DITHER_KINDS, BUILTIN_SHAPERS, get_shaper
    The dither kinds and noise shapers the engine knows.
RtstageError
    The error every user-facing failure raises.

Everything whose name begins with an underscore is private.
"""

from .dither import DITHER_KINDS
from .errors import RtstageError
from .shapers import BUILTIN_SHAPERS, get_shaper

__version__ = "0.1.0"

__all__ = ["Engine", "EngineSettings", "render_file", "DITHER_KINDS", "BUILTIN_SHAPERS", "get_shaper", "RtstageError"]


def __getattr__(name):
    # Imported on first use, so that ``import rtstage`` (and ``python -m rtstage.kernel_aot``) stays light.
    if name in ("Engine", "EngineSettings"):
        from . import engine

        return getattr(engine, name)
    if name == "render_file":
        from .render import render_file

        return render_file
    raise AttributeError(name)
