"""Noise shapers designed for any sample rate, and their stability and headroom figures.

Public surface
--------------
design_shaper
    The optimal error-feedback filter for a sample rate, tap count and
    weighting, under caps on the NTF's maximum gain and total noise gain.
weighting_db, iso226_threshold_db, terhardt_threshold_db, read_weighting_table
    The weightings a design can minimise.
weighted_noise_gain_db
    The criterion a design minimises, for any coefficient set.
shaper_figures, ntf_curve
    Gains at DC and Nyquist, the deepest notch, noise-power gain, log-mean,
    minimum phase, headroom; the NTF curve itself.
headroom_lsb, headroom_dbfs, headroom_warning
    The worst-case excursion the shaped error adds, the programme peak that
    leaves room for it, and the warning when a peak exceeds that (the one
    authority the engine and meter use).
rate_warning, preset_for_rate
    What to tell an engineer running a shaper at a rate it was not designed for.
design_to_toml, save_design
    Write a design as a shaper preset that ``render`` and ``run`` accept.

Design method
-------------
The added noise is ``NTF·e`` with ``e`` white, so the weighted noise power is
proportional to ``(1/π)∫₀^π W(ω)|NTF(e^jω)|² dω`` with
``NTF(z) = 1 - Σ_{k=1..N} h_k z^-k`` (the sign convention of
:mod:`rtstage.shapers`).  Writing ``r_k`` for the autocorrelation of ``W``
(its inverse Fourier transform, taken here by an inverse FFT of ``W`` sampled
on a dense grid from 0 to fs/2), the criterion is a quadratic form in ``h``
whose minimum solves the Toeplitz normal equations ``R h = r`` with
``R_ij = r_|i-j|`` (i, j = 1..N) and ``r = (r_1 … r_N)``:
``1 - Σ h_k z^-k`` is the prediction-error filter of a process whose power
spectrum is ``W``.  Such a filter is minimum phase, so the NTF's log-mean is
0 dB, and as N grows ``|NTF|²`` tends to ``c/W``: the noise follows the inverse
of the weighting (Gerzon & Craven, 1989).  The system is solved with
:func:`scipy.linalg.solve_toeplitz` (Levinson recursion).

Weightings
----------
A weighting is the ear's sensitivity to noise as a function of frequency, in
dB (higher = more audible; the design puts less noise there):

* ``threshold``: the inverse of the ISO 226:2003 threshold of hearing
  (its T_f values), ``W_dB = -T_f``;
* ``terhardt``: the inverse of Terhardt's 1979 approximation of the threshold;
* ``inv-a``: the IEC 61672-1 A-weighting's power gain, so the noise follows
  the inverse of A-weighting;
* ``inv-itu468``: the ITU-R BS.468-4 weighting's power gain (``inv-468``, its
  earlier id, is still accepted); the ``inv-`` ids name the curves of
  :mod:`rtstage.weighting` by their ids there (``a``, ``itu468``);
* ``table``: a user table of (Hz, dB) rows, read as a weighting in dB
  (higher = more audible), interpolated linearly in dB over log frequency.

Outside the audible band
------------------------
Below 20 Hz every weighting is held at its 20 Hz value.  Above the audible
limit (20 kHz unless told otherwise) the ear hears nothing, so the weighting
is set to its floor (below): the design is free to push noise there, and the
gain caps keep what it pushes bounded.  At high sample rates most of the band
is ultrasonic, which is what lets a design lower the audible noise far more
than at 44.1 kHz for the same NTF gain.

Dynamic range and gain caps
---------------------------
The weighting, normalised to 0 dB at its in-band peak, is clipped from below
at ``-range_db`` (the floor).  The floor is what keeps the normal equations
well conditioned and the NTF's gain finite; it also is the one knob the caps
turn.  With an infinitely long filter ``NTF_dB = mean(W_dB) - W_dB``, so the
NTF's maximum gain is ``mean(W_dB) - floor`` and falls steadily as the floor
rises; at ``range_db = 0`` the weighting is flat and the NTF is 1 (0 dB
everywhere).  When a cap on the maximum NTF gain or on the total noise gain
``Σ n_k² = 1 + Σ h_k²`` is given, the designer bisects on ``range_db`` for the
largest range whose design meets both caps (each candidate is checked on a
dense grid).  Caps below 0 dB are impossible: a minimum-phase NTF with a
leading 1 has a 0 dB log-mean, so its maximum is at least 0 dB, and
``Σ n_k² ≥ 1``.

References
----------
.. [1] M. A. Gerzon, P. G. Craven, "Optimal noise shaping and dither of digital
   signals", 87th AES Convention, preprint 2822, 1989.
.. [2] R. A. Wannamaker, "Psychoacoustically optimal noise shaping",
   J. Audio Eng. Soc. 40(7/8), 1992.
.. [3] ISO 226:2003, "Acoustics -- Normal equal-loudness-level contours".
.. [4] E. Terhardt, "Calculating virtual pitch", Hearing Research 1, 1979.
.. [5] IEC 61672-1:2013, "Electroacoustics -- Sound level meters -- Part 1".
.. [6] ITU-R BS.468-4, "Measurement of audio-frequency noise voltage level in
   sound broadcasting", 1986.
"""

from .curves import (  # noqa: F401
    AUDIBLE_LIMIT_HZ, AUDIBLE_LOW_HZ, INVERSE_OF, WEIGHTING_ALIASES, WEIGHTING_TAGS, WEIGHTINGS, canonical_weighting,
    check_weighting_table, design_weighting_db, iso226_threshold_db, read_weighting_table, terhardt_threshold_db,
    weighting_db,
)
from .designer import (  # noqa: F401
    DEFAULT_RANGE_DB, MAX_SAMPLERATE_HZ, MIN_SAMPLERATE_HZ, ShaperDesign, default_design_id, design_shaper, weighted_noise_gain_db,
)
from .figures import (  # noqa: F401
    GRID_POINTS, ntf_curve, shaper_figures,
)
from .headroom import (  # noqa: F401
    headroom_dbfs, headroom_lsb, headroom_warning,
)
from .rates import (  # noqa: F401
    RATE_TOLERANCE_HZ, SHIPPED_RATES_HZ, preset_for_rate, rate_warning,
)
from .preset_file import (  # noqa: F401
    design_command, design_to_toml, save_design,
)
