"""Plots of a meter report (matplotlib, the optional ``plot`` extra).

Four figures per report, one PNG each, channel 1 (the report's first
channel) unless asked otherwise:

* ``error-spectrum.png``: the added noise per third-octave band against the
  level the settings predict, σ²·|NTF|² in the same bands;
* ``error-histogram.png``: the distribution of the added error in LSB,
  against the density theory gives for flat dither (rounding error convolved
  with the dither's PDF; for a shaper the total error is what the loop feeds
  back, the output error is its filtered version, so the histogram is wider);
* ``noise-modulation.png``: the mean added-noise power in each bin of the
  input's position within one LSB (docs/meters.md), with the spread that
  defines the noise-modulation reading;
* ``shaper-ntf.png``: the shaper's |NTF| from its coefficients.
"""

import os

import numpy as np

from ..errors import RtstageError


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


def write_plots(report, directory, channel=0):
    """Write the four PNG figures of ``report`` into ``directory``; returns their paths."""
    plt = _pyplot()
    os.makedirs(directory, exist_ok=True)
    ch = report["channels"][channel]
    title = f"{report.get('bits')}-bit {report.get('dither')} / {report.get('shaper')} at {report.get('samplerate')} Hz, channel {channel + 1}"
    paths = []

    fig, ax = plt.subplots(figsize=(8, 4.5))
    f = _floats(report["error_spectrum_bands_hz"])
    ax.semilogx(f, _floats(ch["error_spectrum_dbfs"]), marker="o", ms=3, label="measured")
    ax.semilogx(f, _floats(report["predicted_spectrum_dbfs"]), ls="--", label="predicted (σ²·|NTF|²)")
    ax.set_xlabel("frequency, Hz (third-octave bands)")
    ax.set_ylabel("added noise per band, dBFS")
    ax.set_title(title, fontsize=9)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend()
    paths.append(_save(fig, plt, directory, "error-spectrum.png"))

    hist = ch.get("error_histogram")
    if hist:
        fig, ax = plt.subplots(figsize=(8, 4.5))
        edges = np.asarray(hist["edges_lsb"], dtype=float)
        counts = np.asarray(hist["counts"], dtype=float)
        width = np.diff(edges)
        density = counts / max(counts.sum(), 1.0) / width
        ax.bar(edges[:-1], density, width=width, align="edge", alpha=0.6, label="measured")
        ax.set_xlabel("added error, LSB")
        ax.set_ylabel("probability density, 1/LSB")
        ax.set_title(title, fontsize=9)
        ax.grid(True, alpha=0.3)
        ax.legend()
        paths.append(_save(fig, plt, directory, "error-histogram.png"))

    bins = ch.get("noise_modulation_bins_lsb2")
    if bins:
        fig, ax = plt.subplots(figsize=(8, 4.5))
        means = _floats(bins)
        centres = (np.arange(means.size) + 0.5) / means.size
        ax.plot(centres, 10 * np.log10(means), marker="o", ms=3)
        mod = ch.get("noise_modulation_db")
        ax.set_xlabel("input position within one LSB")
        ax.set_ylabel("mean added-noise power, dB re 1 LSB²")
        ax.set_title(f"{title}; noise modulation {'n/a' if mod is None else f'{mod:.2f} dB'}", fontsize=9)
        ax.grid(True, alpha=0.3)
        paths.append(_save(fig, plt, directory, "noise-modulation.png"))

    coefs = np.asarray(report.get("shaper_coefs") or [], dtype=float)
    rate = report["samplerate"]
    freqs = np.linspace(0.0, rate / 2, 1024)
    b = np.concatenate(([1.0], -coefs))
    w = 2 * np.pi * freqs / rate
    ntf = np.abs(np.exp(-1j * np.outer(w, np.arange(b.size))) @ b)
    fig, ax = plt.subplots(figsize=(8, 4.5))
    ax.plot(freqs / 1000.0, 20 * np.log10(np.maximum(ntf, 1e-12)))
    ax.set_xlabel("frequency, kHz")
    ax.set_ylabel("|NTF|, dB")
    ax.set_title(f"shaper {report.get('shaper')} at {rate} Hz", fontsize=9)
    ax.grid(True, alpha=0.3)
    paths.append(_save(fig, plt, directory, "shaper-ntf.png"))
    return paths


def _save(fig, plt, directory, name):
    path = os.path.join(directory, name)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
