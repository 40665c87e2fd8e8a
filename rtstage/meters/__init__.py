"""Output-stage meters: added noise, noise modulation, peaks, bit activity.

Public API
----------
MeterBank
    Every meter of one output stage: ``bank.update(x_quantizer_in, words)``
    per block, ``bank.report()`` for the JSON-ready figures.
write_report
    Write a report atomically as strict JSON.
PeakMeter
    Sample peak and ITU-R BS.1770-4 true peak, streamed.
WelchSpectrum
    Streaming Welch power spectral density.
NoiseModulation
    Binned added-noise power against the input's position within its step.
BitActivity
    Which container bits of the output words toggled.

Every figure is defined in ``docs/meters.md``.  The meters run off the audio
thread: offline in ``rtstage render --report``, live on a meter thread.
"""

from .bank import MeterBank
from .bits import BitActivity
from .modulation import NoiseModulation
from .report import CHANNEL_KEYS, REPORT_VERSION, write_report
from .spectrum import WelchSpectrum
from .truepeak import PeakMeter

__all__ = ["MeterBank", "write_report", "PeakMeter", "WelchSpectrum", "NoiseModulation", "BitActivity", "CHANNEL_KEYS", "REPORT_VERSION"]
