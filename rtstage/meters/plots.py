"""Plots of a meter report and of a measured file (matplotlib, the optional ``plot`` extra).

Four figures per report, one PNG each, channel 1 (the report's first
channel) unless asked otherwise:

* ``error-spectrum.png``: the added noise per third-octave band against the
  level the settings predict, σ²·|NTF|² in the same bands; the legend carries
  the unweighted, A-weighted and ITU-R 468 totals of both;
* ``error-histogram.png``: the distribution of the added error in LSB with
  the density theory gives drawn over it: for flat dither the dither's PDF
  convolved with the quantizer's (uniform over one step), for a shaper the
  normal density of the same variance, σ²·Σn_k²;
* ``noise-modulation.png``: the mean added-noise power in each bin of the
  input's position within one LSB, with ±2 standard errors, against theory
  (for TPDF the constant Q²/4 times the shaper's noise gain);
* ``shaper-ntf.png``: the shaper's |NTF| from its coefficients, in the same
  style as ``rtstage shaper plot --png``.

Every figure is titled in words ("16-bit, TPDF dither, shaper thr9-48k,
48 kHz, channel 1"); spectra of rates above 44.1 kHz mark 20 kHz.

:func:`write_measure_plots` draws ``rtstage measure``'s figures: loudness
over time and the level of each 100 ms window.
"""

import math
import contextlib
import os
import threading

import numpy as np

from ..errors import RtstageError

AUDIBLE_LIMIT_HZ = 20000.0
FIGSIZE = (8, 4.5)
DPI = 110
DITHER_WORDS = {"none": "no", "rpdf": "RPDF", "tpdf": "TPDF", "tpdf-hp": "high-pass TPDF", "gaussian": "Gaussian"}


def _pyplot():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise RtstageError("plots need matplotlib: pip install 'rtstage[plot]'") from None
    return plt


def _floats(values):
    return np.asarray([np.nan if v is None else v for v in values], dtype=float)


def rate_text(samplerate):
    """``48 kHz``, ``44.1 kHz``: a rate in words, never ``48000.0``."""
    khz = float(samplerate) / 1000.0
    return f"{khz:g} kHz" if abs(khz * 10 - round(khz * 10)) < 1e-9 else f"{int(round(float(samplerate)))} Hz"


def title_text(report, channel=0):
    """``16-bit, TPDF dither, shaper thr9-48k, 48 kHz, channel 1``."""
    dither = DITHER_WORDS.get(report.get("dither"), str(report.get("dither")))
    shaper = report.get("shaper") or ("custom" if report.get("shaper_coefs") else "flat")
    shaping = "no shaping" if not report.get("shaper_coefs") else f"shaper {shaper}"
    return f"{report.get('bits')}-bit, {dither} dither, {shaping}, {rate_text(report['samplerate'])}, channel {channel + 1}"


def _style(ax, title):
    ax.set_title(title, fontsize=10)
    ax.grid(True, which="both", alpha=0.3)


def _mark_audible_limit(ax, samplerate, scale=1.0):
    """A dashed line at 20 kHz on spectra of rates above 44.1 kHz."""
    if samplerate > 44100.5:
        ax.axvline(AUDIBLE_LIMIT_HZ * scale, color="0.4", lw=0.9, ls="--")
        ax.annotate("20 kHz", xy=(AUDIBLE_LIMIT_HZ * scale, 1.0), xycoords=("data", "axes fraction"),
                    xytext=(3, -12), textcoords="offset points", fontsize=8, color="0.3")


def _totals(readings):
    def f(key):
        v = (readings or {}).get(key)
        return "n/a" if v is None else f"{v:.1f}"

    return f"unweighted {f('unweighted')}, A {f('a_weighted')}, 468 {f('itu468')} dBFS"


# ------------------------------------------------------------------------------ theory

def dither_variance_lsb2(dither_id, scale=1.0):
    """Variance of the dither alone, LSB² (RPDF s²/12, TPDF s²/6, Gaussian s²/4, none 0)."""
    return {"none": 0.0, "rpdf": scale**2 / 12.0, "tpdf": scale**2 / 6.0, "tpdf-hp": scale**2 / 6.0,
            "gaussian": scale**2 / 4.0}.get(dither_id, 0.0)


def shaped_error_variance_lsb2(dither_id, scale, coefs):
    """Variance of the added error with the shaper's NTF, LSB²: rounding and dither through n_k.

    The rounding error (variance 1/12) and white dither pass through the NTF
    (gain Σ n_k²); high-pass TPDF is ``(1 - z^-1)`` times RPDF of variance s²/12
    before it (Lipshitz, Wannamaker & Vanderkooy 1992; Gerzon & Craven 1989).
    """
    n = np.concatenate(([1.0], -np.asarray(coefs, dtype=float)))
    gain = float(np.sum(n * n))
    if dither_id == "tpdf-hp":
        hp = np.convolve(n, [1.0, -1.0])
        return gain / 12.0 + scale**2 / 12.0 * float(np.sum(hp * hp))
    return gain * (1.0 / 12.0 + dither_variance_lsb2(dither_id, scale))


def error_density(x_lsb, dither_id, scale=1.0, coefs=()):
    """Theoretical density of the added error at ``x_lsb`` (1/LSB).

    Flat (no shaper): the dither's PDF convolved with the uniform rounding
    error over one step (exact on average over the input; for no dither only
    for signals spanning many steps).  Shaped: the normal density of the same
    variance (:func:`shaped_error_variance_lsb2`).
    """
    x = np.asarray(x_lsb, dtype=float)
    if len(coefs):
        var = shaped_error_variance_lsb2(dither_id, scale, coefs)
        return np.exp(-x * x / (2 * var)) / math.sqrt(2 * math.pi * var)
    h = 1e-3
    grid = np.arange(-8.0, 8.0 + h / 2, h)
    rect = (np.abs(grid) <= 0.5).astype(float)
    rect /= rect.sum() * h
    if dither_id == "rpdf":
        d = (np.abs(grid) <= 0.5 * scale).astype(float)
    elif dither_id in ("tpdf", "tpdf-hp"):
        d = np.maximum(1.0 - np.abs(grid) / max(scale, 1e-9), 0.0)
    elif dither_id == "gaussian":
        sigma = 0.5 * max(scale, 1e-9)
        d = np.exp(-grid**2 / (2 * sigma * sigma))
    else:
        d = None
    if d is None or d.sum() == 0:
        pdf = rect
    else:
        d /= d.sum() * h
        pdf = np.convolve(rect, d, mode="same") * h
    return np.interp(x, grid, pdf, left=0.0, right=0.0)


def modulation_theory_lsb2(a, dither_id, scale=1.0, coefs=()):
    """E[e² | input position a within the step], LSB² (flat); shaped: the average σ²·Σn_k².

    TPDF: 1/4 for every a; RPDF: a(1 - a); none: min(a, 1 - a)²; Gaussian:
    summed over the words the dither can reach (Lipshitz, Wannamaker &
    Vanderkooy 1992).
    """
    a = np.asarray(a, dtype=float)
    if len(coefs):
        return np.full(a.shape, shaped_error_variance_lsb2(dither_id, scale, coefs))
    if dither_id in ("tpdf", "tpdf-hp") and abs(scale - 1.0) < 1e-12:
        return np.full(a.shape, 0.25)
    if dither_id == "rpdf" and abs(scale - 1.0) < 1e-12:
        return a * (1.0 - a)
    if dither_id == "none":
        return np.minimum(a, 1.0 - a) ** 2
    # General case: sum over reachable words k of (k - a)^2 P(round(a + d) = k), d drawn on a grid.
    grid = np.linspace(-4 * max(scale, 1e-9), 4 * max(scale, 1e-9), 4001)
    if dither_id == "rpdf":
        pdf = (np.abs(grid) <= 0.5 * scale).astype(float)
    elif dither_id in ("tpdf", "tpdf-hp"):
        pdf = np.maximum(1.0 - np.abs(grid) / scale, 0.0)
    else:
        sigma = 0.5 * scale
        pdf = np.exp(-grid**2 / (2 * sigma * sigma))
    pdf /= pdf.sum()
    out = np.empty(a.shape)
    for i, ai in enumerate(a.flat):
        k = np.round(ai + grid)
        out.flat[i] = float(np.sum(pdf * (k - ai) ** 2))
    return out


# ------------------------------------------------------------------------------ figures

def draw_ntf(ax, coefs, samplerate, label=None, points=2048):
    """Draw |NTF| in dB over 0..fs/2 (kHz) with the 0 dB line and, above 44.1 kHz, the 20 kHz marker."""
    freqs_hz = np.linspace(0.0, samplerate / 2, points + 1)
    b = np.concatenate(([1.0], -np.asarray(coefs, dtype=float)))
    w = 2 * np.pi * freqs_hz / samplerate
    ntf = np.abs(np.exp(-1j * np.outer(w, np.arange(b.size))) @ b)
    gain_db = 20 * np.log10(np.maximum(ntf, 1e-12))
    noise_gain_db = 10 * math.log10(float(np.sum(b * b)))
    ax.plot(freqs_hz / 1000.0, gain_db, lw=1.5,
            label=f"{label + ': ' if label else ''}|NTF|, total noise gain {noise_gain_db:+.1f} dB")
    ax.axhline(0.0, color="0.3", lw=0.9, label="0 dB (no shaping)")
    _mark_audible_limit(ax, samplerate, scale=1e-3)
    ax.set_xlim(0, samplerate / 2000.0)
    lo = max(float(np.min(gain_db)), -80.0)
    ax.set_ylim(min(lo, -6.0) - 3.0, max(float(np.max(gain_db)), 6.0) + 3.0)
    ax.set_xlabel("frequency, kHz")
    ax.set_ylabel("noise transfer |NTF|, dB")
    ax.legend(loc="lower right", fontsize=8)
    return freqs_hz, gain_db


def ntf_title(shaper_id, samplerate, design_samplerate_hz=None):
    """``Noise transfer function of shaper thr9-48k, 48 kHz`` (and the design rate when it differs)."""
    text = f"Noise transfer function of shaper {shaper_id}, {rate_text(samplerate)}"
    if design_samplerate_hz and abs(design_samplerate_hz - samplerate) > 0.5:
        text += f" (designed for {rate_text(design_samplerate_hz)})"
    return text


def write_ntf_png(shaper_id, coefs, samplerate, path, design_samplerate_hz=None, plan=None):
    """The NTF figure of ``rtstage shaper plot --png``, the same as the report's ``shaper-ntf.png``.

    ``plan``: a checked :class:`rtstage.files.policy.OutputPlan` declaring
    ``path`` (the caller commits); None writes through a plan of its own.
    """
    plt = _pyplot()
    with _through(plan, None, "", path, None, f"drawing {path}"):
        fig, ax = plt.subplots(figsize=FIGSIZE)
        try:
            draw_ntf(ax, coefs, samplerate, label=shaper_id)
            _style(ax, ntf_title(shaper_id, samplerate, design_samplerate_hz))
            return _save(fig, path)
        finally:
            plt.close(fig)


PLOT_NAMES = ("error-spectrum.png", "error-histogram.png", "noise-modulation.png", "shaper-ntf.png")
"""The files :func:`write_plots` may write (declare them in an output plan)."""

MEASURE_PLOT_NAMES = ("loudness.png", "levels.png")
"""The files :func:`write_measure_plots` may write."""

_target = threading.local()


@contextlib.contextmanager
def _through(plan, folder, prefix, path, names, what):
    """Route every figure saved inside through the output policy: ``plan`` (the caller's) or one of our own.

    Without a plan, ``path`` is a folder declared with ``names`` (or, when
    ``names`` is None, a single file), created when missing, with existing
    figures replaced; the plan is committed on success and discarded on failure.
    """
    from ..files.policy import OutputPlan

    own = None
    if plan is None:
        own = plan = OutputPlan(what, overwrite=True)
        if names is None:
            plan.add_file(path, "figure")
        else:
            folder = plan.add_folder(path, "plot folder", names)
        plan.check()
    previous = getattr(_target, "value", None)
    _target.value = (plan, folder, prefix)
    try:
        yield
        if own is not None:
            own.commit()
    except BaseException:
        if own is not None:
            own.discard()
        raise
    finally:
        _target.value = previous


def write_plots(report, directory, channel=0, plan=None, folder=None, prefix=""):
    """Write the four PNG figures of ``report`` into ``directory``; returns their paths.

    With ``plan`` (a checked :class:`rtstage.files.policy.OutputPlan`) and
    ``folder`` (the output folder declared in it with :data:`PLOT_NAMES`,
    each under ``prefix`` when given), every figure goes through the output
    policy and the caller commits the plan; without, a plan of this call
    alone is used (the folder is created when missing, figures replaced).
    """
    with _through(plan, folder, prefix, directory, PLOT_NAMES, f"writing figures into {directory}"):
        return _write_plots(report, directory, channel)


def _write_plots(report, directory, channel):
    if "measure_version" in report:
        raise RtstageError("a measure report holds no added-noise figures; draw its plots with "
                           "'rtstage measure FILE --plot DIR'")
    if "error_spectrum_bands_hz" not in report or not report.get("channels"):
        raise RtstageError("not a meter report (no error spectrum or channels)")
    plt = _pyplot()
    ch = report["channels"][channel]
    title = title_text(report, channel)
    rate = float(report["samplerate"])
    coefs = list(report.get("shaper_coefs") or [])
    dither = report.get("dither")
    scale = float(report.get("dither_scale") or 1.0)
    paths = []

    # Error spectrum with totals in the legend.
    fig, ax = plt.subplots(figsize=FIGSIZE)
    f = _floats(report["error_spectrum_bands_hz"])
    ax.semilogx(f, _floats(ch["error_spectrum_dbfs"]), marker="o", ms=3,
                label=f"measured: {_totals(ch.get('added_noise_dbfs'))}")
    ax.semilogx(f, _floats(report["predicted_spectrum_dbfs"]), ls="--",
                label=f"theory σ²·|NTF|²: {_totals(ch.get('predicted_noise_dbfs'))}")
    _mark_audible_limit(ax, rate)
    ax.set_xlabel("frequency, Hz (third-octave bands)")
    ax.set_ylabel("added noise per band, dBFS")
    _style(ax, f"Added noise spectrum: {title}")
    ax.legend(fontsize=8, loc="upper left")
    paths.append(_save_close(fig, plt, directory, "error-spectrum.png"))

    hist = ch.get("error_histogram")
    if hist:
        paths.append(_histogram(plt, hist, dither, scale, coefs, title, directory))

    bins = ch.get("noise_modulation_bins_lsb2")
    if bins:
        paths.append(_modulation(plt, report, ch, dither, scale, coefs, title, directory))

    paths.append(write_ntf_png(report.get("shaper") or "flat", coefs, rate, os.path.join(directory, "shaper-ntf.png")))
    return paths


def _histogram(plt, hist, dither, scale, coefs, title, directory):
    edges = np.asarray(hist["edges_lsb"], dtype=float)
    counts = np.asarray(hist["counts"], dtype=float)
    width = np.diff(edges)
    total = counts.sum() + hist.get("outside", 0)
    density = counts / max(total, 1.0) / width
    fig, ax = plt.subplots(figsize=FIGSIZE)
    ax.bar(edges[:-1], density, width=width, align="edge", alpha=0.55, color="C0",
           label=f"measured ({int(total):,} samples)")
    # Fitted to the data: the range holding all but 1 in 10 000 of the errors.
    if counts.sum() > 0:
        cum = np.cumsum(counts) / counts.sum()
        lo = int(np.searchsorted(cum, 5e-5))
        hi = int(np.searchsorted(cum, 1.0 - 5e-5))
        reach = max(abs(edges[lo]), abs(edges[min(hi + 1, edges.size - 1)]))
    else:
        reach = 2.0
    if coefs:
        reach = max(reach, 3.5 * math.sqrt(shaped_error_variance_lsb2(dither, scale, coefs)))
    reach = min(max(reach * 1.1, 1.5), abs(edges[0]))
    x = np.linspace(-reach, reach, 801)
    theory = error_density(x, dither, scale, coefs)
    kind = (f"normal of the shaped error's variance, σ = {math.sqrt(shaped_error_variance_lsb2(dither, scale, coefs)):.2f} LSB"
            if coefs else f"{DITHER_WORDS.get(dither, dither)} dither ⊛ rounding")
    ax.plot(x, theory, color="C3", lw=1.8, label=f"theory: {kind}")
    ax.set_xlim(-reach, reach)
    ax.set_ylim(0, 1.3 * max(float(np.max(theory)), float(np.max(density)) if density.size else 0.0))
    ax.set_xlabel("added error, LSB")
    ax.set_ylabel("probability density, 1/LSB")
    _style(ax, f"Added error distribution: {title}")
    ax.legend(fontsize=8, loc="upper right")
    return _save_close(fig, plt, directory, "error-histogram.png")


def _modulation(plt, report, ch, dither, scale, coefs, title, directory):
    means = _floats(ch["noise_modulation_bins_lsb2"])
    stderr = _floats(ch.get("noise_modulation_bin_stderr_lsb2") or [None] * means.size)
    counts = np.asarray(ch.get("noise_modulation_bin_counts") or [0] * means.size, dtype=float)
    nbins = means.size
    centres = (np.arange(nbins) + 0.5) / nbins
    min_samples = int((report.get("noise_modulation") or {}).get("min_samples_per_bin", 10000))
    fig, ax = plt.subplots(figsize=FIGSIZE)
    a = np.linspace(0.0, 1.0, 401)
    theory = modulation_theory_lsb2(a, dither, scale, coefs)
    with np.errstate(divide="ignore"):
        theory_db = 10 * np.log10(theory)
    name = DITHER_WORDS.get(dither, dither)
    if dither in ("tpdf", "tpdf-hp") and abs(scale - 1.0) < 1e-12:
        label = "theory: Q²/4" + (" × shaper noise gain" if coefs else "") + " for every input"
    elif coefs:
        label = f"theory: average for {name} dither × shaper noise gain"
    elif dither == "rpdf" and abs(scale - 1.0) < 1e-12:
        label = "theory for RPDF dither: a(1 − a)·Q² at input position a"
    elif dither == "none":
        label = "theory without dither: min(a, 1 − a)²·Q² at input position a"
    else:
        label = f"theory for {name} dither"
    ax.plot(a, theory_db, color="C3", lw=1.6, label=label)
    ok = np.isfinite(means)
    mod = ch.get("noise_modulation_db")
    if ok.any():
        lo = means - 2 * np.nan_to_num(stderr)
        hi = means + 2 * np.nan_to_num(stderr)
        with np.errstate(divide="ignore", invalid="ignore"):
            ax.fill_between(centres, 10 * np.log10(np.where(ok, np.maximum(lo, 1e-12), np.nan)),
                            10 * np.log10(np.where(ok, hi, np.nan)), color="C0", alpha=0.25, step="mid",
                            label="±2 standard errors")
            ax.plot(centres[ok], 10 * np.log10(means[ok]), marker="o", ms=3, color="C0", ls="",
                    label=f"measured bin means; modulation {'n/a' if mod is None else f'{mod:.2f} dB'}")
    # A fixed minimum span (6 dB) so estimator noise does not look like modulation.
    values = [v for v in (10 * np.log10(means[ok]) if ok.any() else [])] + [
        float(v) for v in theory_db[np.isfinite(theory_db)]]
    values = [v for v in values if np.isfinite(v)]
    if values:
        mid = 0.5 * (max(values) + min(values))
        half = max(3.0, 0.5 * (max(values) - min(values)) + 1.5)
        ax.set_ylim(mid - half, mid + half)
    lacking = counts < min_samples
    if lacking.any():
        have = counts.sum()
        duration = float(report.get("duration_s") or 0.0)
        per_bin_rate = have / duration / nbins if duration > 0 and have > 0 else 0.0
        deficit = float((min_samples - counts[lacking]).max())
        more = f"; about {deficit / per_bin_rate:,.0f} s more material at this level would fill them" if per_bin_rate > 0 else ""
        ax.text(0.5, 0.96, f"{int(lacking.sum())} of {nbins} bins hold fewer than {min_samples:,} samples and are "
                f"left out{more}.", transform=ax.transAxes, ha="center", va="top", fontsize=8, wrap=True,
                bbox=dict(boxstyle="round", fc="white", ec="0.6"))
    ax.set_xlim(0, 1)
    ax.set_xlabel("input position within one step, fraction of an LSB")
    ax.set_ylabel("mean added-noise power, dB re 1 LSB²")
    _style(ax, f"Noise modulation: {title}")
    ax.legend(fontsize=8, loc="lower center")
    return _save_close(fig, plt, directory, "noise-modulation.png")


def write_measure_plots(report, series, directory, plan=None, folder=None):
    """``rtstage measure --plot``: ``loudness.png`` and ``levels.png``; returns their paths.

    ``plan`` and ``folder`` as for :func:`write_plots` (names :data:`MEASURE_PLOT_NAMES`).
    """
    with _through(plan, folder, "", directory, MEASURE_PLOT_NAMES, f"writing figures into {directory}"):
        return _write_measure_plots(report, series, directory)


def _write_measure_plots(report, series, directory):
    plt = _pyplot()
    paths = []
    name = os.path.basename(report.get("file", ""))
    rate = rate_text(report["samplerate"])
    loud = report.get("loudness")
    if loud and series is not None and len(series.get("momentary_lufs", [])):
        fig, ax = plt.subplots(figsize=FIGSIZE)
        m = np.asarray(series["momentary_lufs"], dtype=float)
        s = np.asarray(series["short_term_lufs"], dtype=float)
        hop = 0.1
        ax.plot(0.4 + hop * np.arange(m.size), np.where(np.isfinite(m), m, np.nan), lw=0.8, color="0.55",
                label="momentary (400 ms)")
        if s.size:
            ax.plot(3.0 + hop * np.arange(s.size), np.where(np.isfinite(s), s, np.nan), lw=1.6, color="C0",
                    label="short-term (3 s)")
        integrated = loud.get("integrated_lufs")
        if integrated is not None:
            lra = loud.get("loudness_range_lu")
            ax.axhline(integrated, color="C3", lw=1.4,
                       label=f"integrated {integrated:.1f} LUFS" + ("" if lra is None else f", range {lra:.1f} LU"))
        verdict = loud.get("target")
        if verdict:
            t = verdict["target"]
            ax.axhspan(t["integrated_lufs"] - t["tolerance_lu"], t["integrated_lufs"] + t["tolerance_lu"], color="C2",
                       alpha=0.2, label=f"target {t['name']}: {'pass' if verdict['pass'] else 'FAIL' if verdict['pass'] is False else 'n/a'}")
        finite = np.concatenate((m[np.isfinite(m)], s[np.isfinite(s)]))
        if finite.size:
            top = float(finite.max())
            ax.set_ylim(max(float(finite.min()), top - 40.0) - 2.0, top + 3.0)
        ax.set_xlabel("time, s")
        ax.set_ylabel("loudness, LUFS")
        _style(ax, f"Loudness (ITU-R BS.1770-4) of {name}, {rate}")
        ax.legend(fontsize=8, loc="lower right")
        paths.append(_save_close(fig, plt, directory, "loudness.png"))
    if series is not None and series.get("rms_dbfs"):
        fig, ax = plt.subplots(figsize=FIGSIZE)
        window = float(series["window_s"])
        lows = []
        for c, rms in enumerate(series["rms_dbfs"]):
            rms = np.asarray(rms, dtype=float)
            t = window * (np.arange(rms.size) + 0.5)
            ax.plot(t, np.where(np.isfinite(rms), rms, np.nan), lw=1.0, label=f"channel {c + 1}")
            floor = report["channels"][c].get("noise_floor_dbfs")
            if floor is not None:
                ax.axhline(floor, color=f"C{c}", ls=":", lw=1.0, label=f"channel {c + 1} noise floor {floor:.1f} dBFS")
                lows.append(floor)
            if np.isfinite(rms).any():
                lows.append(float(np.nanmin(np.where(np.isfinite(rms), rms, np.nan))))
        ax.set_ylim(max(min(lows) - 6.0, -160.0) if lows else -120.0, 3.0)
        ax.set_xlabel("time, s")
        ax.set_ylabel("RMS per 100 ms, dBFS (AES17)")
        _style(ax, f"Level over time of {name}, {rate} (gaps: digital silence)")
        ax.legend(fontsize=8, loc="lower right")
        paths.append(_save_close(fig, plt, directory, "levels.png"))
    return paths


def _save(fig, path, name=None):
    """Save through the output plan set by :func:`_through` (atomic, checked up front)."""
    fig.tight_layout()
    plan, folder, prefix = _target.value
    target = plan.file_in(folder, os.path.join(prefix, name) if prefix else name) if folder is not None else path
    with plan.atomic(target) as tmp:
        fig.savefig(tmp, dpi=DPI, format="png")
    return path


def _save_close(fig, plt, directory, name):
    try:
        return _save(fig, os.path.join(directory, name), name)
    finally:
        plt.close(fig)
