"""The embedded demo programme: a small station's overnight feed, generated.

The scenario: an unattended overnight stream from a community station.  The
programme is quiet ambient music followed by a long fade into station silence,
under which a line-up tone far below one 16-bit LSB is still present.  It is
the kind of material on which the choice of dither is audible: low-level tonal
sound, a fade through the last few LSBs, and a tone that plain rounding
erases.

Nothing here is recorded audio; every sample is computed, so the demo runs
anywhere and gives the same programme every time.
"""

import numpy as np

CHORD_HZ = (220.0, 277.18, 329.63)
"""A quiet A-major triad."""
CHORD_LEVEL_DBFS = -42.0
"""Peak level of each chord tone."""
FADE_FLOOR_DBFS = -110.0
"""The fade reaches this level, then exact digital silence."""
DEEP_TONE_HZ = 1000.0
DEEP_TONE_DBFS = -100.0
"""Peak level of the deep tone: about a third of a 16-bit LSB (1 LSB = -90.3 dBFS)."""


def db_to_amplitude(level_db):
    """Linear amplitude of a level in dB (full scale = 1.0)."""
    return 10.0 ** (np.asarray(level_db, dtype=np.float64) / 20.0)


def overnight_programme(samplerate=48000, seconds=20.0, channels=2):
    """Generate the demo programme, float64 of shape (frames, channels).

    The first 40 % is the quiet chord (with a slow swell), the next 35 % a
    fade in dB down to ``FADE_FLOOR_DBFS`` and then silence, the last 25 % the
    deep tone alone.  Channel c is detuned by c·0.3 Hz so channels differ.
    """
    n = int(round(seconds * samplerate))
    t = np.arange(n) / samplerate
    x = np.zeros((n, channels))
    n_chord = int(0.40 * n)
    n_fade = int(0.35 * n)
    envelope = np.zeros(n)
    swell = 0.75 + 0.25 * np.sin(2 * np.pi * t[:n_chord] / (0.4 * seconds))
    envelope[:n_chord] = swell * db_to_amplitude(CHORD_LEVEL_DBFS)
    fade_db = np.linspace(CHORD_LEVEL_DBFS, FADE_FLOOR_DBFS, n_fade)
    envelope[n_chord : n_chord + n_fade] = swell[-1] * db_to_amplitude(fade_db)
    for c in range(channels):
        chord = sum(np.sin(2 * np.pi * (f + 0.3 * c) * t) for f in CHORD_HZ) / len(CHORD_HZ)
        x[:, c] = envelope * chord
        deep = np.arange(n) >= n_chord + n_fade
        x[deep, c] = db_to_amplitude(DEEP_TONE_DBFS) * np.sin(2 * np.pi * DEEP_TONE_HZ * t[deep])
    return x
