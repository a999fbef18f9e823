"""Figures: traces before and after cleaning, and spectra."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy import signal

from .stimulation import ramp_level


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


def plot_survey(path: Path, survey: dict) -> Path:
    """Blocks on a time line (amplitude per block) and the artifact amplitude per channel."""
    plt = _plt()
    fig, (ax0, ax1) = plt.subplots(2, 1, figsize=(9, 5.5))
    colours = {"active": "tab:red", "sham": "tab:orange"}
    for b in survey["stimulation"]["blocks"]:
        if b["kind"] == "off":
            continue
        # the ramps drawn in their shape (straight or raised cosine), 32 points each
        tau = np.linspace(0.0, 1.0, 32)
        level = ramp_level(tau, b.get("ramp_shape", "linear"))
        t = np.concatenate((b["start_s"] + tau * b["ramp_up_s"], b["stop_s"] - tau[::-1] * b["ramp_down_s"]))
        a = b["amplitude"] * np.concatenate((level, level[::-1]))
        ax0.fill_between(t, a, color=colours.get(b["kind"], "0.5"), alpha=0.5, label=b["kind"])
        ax0.text(0.5 * (t[0] + t[-1]), b["amplitude"] * 1.02, f"{b['freq_hz']:.4f} Hz", ha="center", fontsize=8)
    for e in survey.get("events", []):
        ax0.axvline(e["time_s"], color="k", lw=0.6, ls=":")
    ax0.set_xlim(0, survey["duration_s"])
    tops = [b["amplitude"] for b in survey["stimulation"]["blocks"] if b["kind"] != "off"]
    if tops:
        ax0.set_ylim(0, 1.15 * max(tops))
    ax0.set_xlabel("time (s)")
    ax0.set_ylabel("artifact amplitude (uV)")
    handles, labels = ax0.get_legend_handles_labels()
    if handles:
        uniq = dict(zip(labels, handles))
        ax0.legend(uniq.values(), uniq.keys(), fontsize=8)
    ax0.set_title("stimulation blocks (dotted: events in the file)")
    names = [c["name"] for c in survey["channels"]]
    amps = [c["artifact_amplitude_uv"] for c in survey["channels"]]
    clipped = [c["clipped_fraction"] > 0 for c in survey["channels"]]
    ax1.bar(range(len(names)), amps, color=["tab:red" if c else "tab:blue" for c in clipped])
    ax1.set_xticks(range(len(names)))
    ax1.set_xticklabels(names, rotation=90 if len(names) > 16 else 0, fontsize=7 if len(names) > 16 else 9)
    ax1.set_ylabel("artifact (uV, fundamental)")
    ax1.set_title("per channel (red: clipped samples found)")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
