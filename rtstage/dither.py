"""Dither kinds: ids, kernel codes and their textbook statistics.

Amplitudes are in LSB (one quantization step, Q = 1).  Every kind is drawn
from the Philox4x64-10 words of ``(seed, channel, sample index)``; see
:mod:`rtstage.kernel` for the mapping from words to values.

=========  ====  ===========================================  ==============
id         code  what                                         variance (Q²)
=========  ====  ===========================================  ==============
none       0     no dither; plain rounding, ties toward +inf  0
rpdf       1     uniform on (-Q/2, Q/2), 1 LSB peak-to-peak   1/12
tpdf       2     sum of two independent uniforms, 2 LSB p-p   1/6
tpdf-hp    3     r[n] - r[n-1] of one uniform sequence r      1/6
gaussian   4     normal, sigma = Q/2                          1/4
=========  ====  ===========================================  ==============

``tpdf-hp`` has a triangular amplitude distribution like ``tpdf`` but its
spectrum rises as 4 sin²(ω/2): it is not i.i.d., which is why the engine
refuses it inside a feedback shaper unless --accept-unsafe-shaping is given.

References
----------
.. [1] S. P. Lipshitz, R. A. Wannamaker, J. Vanderkooy, "Quantization and
   dither: a theoretical survey", J. Audio Eng. Soc. 40(5), 1992.
.. [2] R. A. Wannamaker, S. P. Lipshitz, J. Vanderkooy, J. N. Wright, "A theory
   of nonsubtractive dither", IEEE Trans. Signal Processing 48(2), 2000.
"""

from dataclasses import dataclass


@dataclass(frozen=True)
class DitherKind:
    """One dither kind as the engine knows it.

    Attributes
    ----------
    id : str
        Name used on the command line, in presets and over the socket.
    code : int
        Integer the compiled kernel switches on.
    variance_lsb2 : float
        Dither variance at amplitude scale 1, in LSB².
    peak_lsb : float
        Largest magnitude at amplitude scale 1, in LSB (``inf`` for Gaussian).
    iid : bool
        True when successive values are independent (white).
    description : str
        One line for listings.
    """

    id: str
    code: int
    variance_lsb2: float
    peak_lsb: float
    iid: bool
    description: str


GAUSSIAN_SIGMA_LSB = 0.5
"""Standard deviation of ``gaussian`` dither at scale 1, in LSB."""

GAUSSIAN_FEEDBACK_PEAK_LSB = 4.0 * GAUSSIAN_SIGMA_LSB
"""Bound used for the fed-back error after a clip with Gaussian dither (4 sigma)."""

DITHER_KINDS = {
    k.id: k
    for k in (
        DitherKind("none", 0, 0.0, 0.0, True, "no dither: plain rounding, ties toward +inf"),
        DitherKind("rpdf", 1, 1.0 / 12.0, 0.5, True, "rectangular PDF, 1 LSB peak-to-peak"),
        DitherKind("tpdf", 2, 1.0 / 6.0, 1.0, True, "triangular PDF, two independent uniforms, 2 LSB p-p"),
        DitherKind("tpdf-hp", 3, 1.0 / 6.0, 1.0, False, "highpass TPDF: backward difference of one uniform sequence"),
        DitherKind("gaussian", 4, GAUSSIAN_SIGMA_LSB**2, float("inf"), True, "Gaussian PDF, sigma 0.5 LSB"),
    )
}

DITHER_BY_CODE = {k.code: k for k in DITHER_KINDS.values()}


def feedback_peak_lsb(kind, amplitude_scale=1.0):
    """Bound on the fed-back error after a clipped sample, in LSB.

    It is the largest total error an unclipped sample can have: half a step of
    rounding plus the dither's peak (four sigma for Gaussian dither).
    """
    peak = GAUSSIAN_FEEDBACK_PEAK_LSB if kind.id == "gaussian" else kind.peak_lsb
    return 0.5 + peak * amplitude_scale
