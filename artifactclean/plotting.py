"""Figures: traces before and after cleaning, and spectra."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy import signal


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plot_traces(path: Path, fs: float, raw: np.ndarray, cleaned: dict, truth: np.ndarray | None = None,
                start_s: float = 0.0, span_s: float = 0.25, channel: int = 0) -> Path:
    """Raw, cleaned (one line per method) and, when known, artifact-free trace of one channel."""
    plt = _plt()
    i0, i1 = int(start_s * fs), int((start_s + span_s) * fs)
    t = np.arange(i0, i1) / fs
    fig, axes = plt.subplots(2, 1, figsize=(9, 5.5), sharex=True)
    axes[0].plot(t, raw[channel, i0:i1], lw=0.6, color="0.3")
    axes[0].set_ylabel("recorded (uV)")
    axes[0].set_title(f"channel {channel}: before and after cleaning")
    if truth is not None:
        axes[1].plot(t, truth[channel, i0:i1], lw=1.2, color="k", label="artifact-free truth")
    for name, y in cleaned.items():
        axes[1].plot(t, y[channel, i0:i1], lw=0.6, label=name)
    axes[1].set_ylabel("cleaned (uV)")
    axes[1].set_xlabel("time (s)")
    axes[1].legend(loc="upper right", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_spectra(path: Path, fs: float, raw: np.ndarray, cleaned: dict, truth: np.ndarray | None = None,
                 channel: int = 0, fmax: float = 200.0) -> Path:
    """Welch power spectra (scipy.signal.welch, 0.25 Hz resolution) up to ``fmax``."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(9, 4.5))
    nper = int(min(raw.shape[1], 4 * fs))
    for name, y, kw in [("recorded", raw, dict(color="0.6", lw=0.8))] + [(k, v, dict(lw=0.8)) for k, v in cleaned.items()] + (
            [("artifact-free truth", truth, dict(color="k", lw=1.2))] if truth is not None else []):
        f, p = signal.welch(y[channel], fs=fs, nperseg=nper)
        sel = f <= fmax
        ax.semilogy(f[sel], p[sel], label=name, **kw)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("PSD (uV^2/Hz)")
    ax.set_title(f"channel {channel}: spectra")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
