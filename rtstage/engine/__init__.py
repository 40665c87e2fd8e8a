"""The engine layer: settings in, validated and encoded kernel parameters out, state owned.

Three phases, as in any real-time processor: construct an :class:`Engine`
for a channel count and sample rate (everything is sized there), call
:meth:`Engine.process` on blocks of any size (zero included), and read its
counters.  The offline renderer, the pipe and the live callback all drive the
same compiled :func:`rtstage.kernel.process_block`.

Examples
--------
>>> import numpy as np
>>> from rtstage import Engine, EngineSettings
>>> engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper="wannamaker-f9", seed=7),
...                 channels=2, samplerate=44100)
>>> words = engine.process(np.zeros((512, 2)))
>>> words.dtype, words.shape
(dtype('int16'), (512, 2))
"""

from ..settings import (  # noqa: F401  (the settings value object and its limits, re-exported)
    ERROR_CEILING_DBFS, GAIN_RAMP_SECONDS, MAX_AUTO_MUTE_HOLD_S, MAX_BITS, MAX_CHANNELS, MAX_DITHER_SCALE,
    MAX_ERROR_GAIN_DB, MAX_GAIN_DB, MAX_SAMPLERATE, MIN_BITS, MIN_GAIN_DB, MIN_SAMPLERATE, MONITOR_MODES, SEED_MAX,
    EngineSettings, new_seed, unsafe_warning,
)
from .automation import AutomationPlayer, process_with_automation  # noqa: F401
from .core import (  # noqa: F401
    FORMAT_BITS, Engine, StateView, check_word_fits, smallest_format_bits, container_bits_of, encode_params, word_dtype,
)
