"""Spike-band filtering, threshold detection and matching to a truth.

The noise level is the median absolute deviation scaled to a Gaussian
standard deviation, ``sigma = median(|x|) / 0.6745`` (Quiroga, Nadasdy &
Ben-Shaul 2004, Neural Comput 16:1661-1687); thresholds of 4-5 sigma are
common practice.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

__all__ = ["SPIKE_BAND_TOP_HZ", "check_spike_rate", "spike_band", "noise_sigma", "detect_spikes", "match_spikes"]

#: the spike band must reach at least this far below 0.45 fs (where :func:`spike_band` stops) for spikes to be
#: injected and detected: common practice for spike sorting is a band-pass of 300-3000 Hz or wider
SPIKE_BAND_TOP_HZ = 3000.0


def check_spike_rate(fs: float, what: str = "spikes") -> None:
    """Raise ValueError naming the rate when ``fs`` leaves no spike band (300 Hz to :data:`SPIKE_BAND_TOP_HZ`).

    Scalp and LFP systems (0.5-5 kHz) record no spikes: a spike lasts about
    a millisecond, one or two samples there, and recall or phase bias measured
    on injected spikes would be figures of the interpolation, not of the cleaning.
    """
    if not 0.45 * fs >= SPIKE_BAND_TOP_HZ:
        raise ValueError(
            f"{what} need a spike band from 300 Hz to at least {SPIKE_BAND_TOP_HZ:g} Hz, a sampling rate of "
            f"{SPIKE_BAND_TOP_HZ / 0.45:.0f} Hz or more; this recording is sampled at {fs:g} Hz. At such rates only "
            "the LFP can be judged: clean it and look at its spectrum, or measure the methods on synthetic traces "
            "of that rate (benchmarks/low_rates.py)")


def spike_band(x: np.ndarray, fs: float, *, band: tuple[float, float] = (300.0, 6000.0), axis: int = -1) -> np.ndarray:
    """Zero-phase 3rd-order Butterworth band-pass (default 300-6000 Hz)."""
    lo, hi = band
    hi = min(hi, 0.45 * fs)
    if not 0 < lo < hi:
        raise ValueError(f"spike band {band} does not fit below fs/2 = {fs / 2} Hz")
    sos = signal.butter(3, [lo, hi], btype="bandpass", fs=fs, output="sos")
    return signal.sosfiltfilt(sos, x, axis=axis)


def noise_sigma(x: np.ndarray, axis: int = -1) -> np.ndarray:
    """Robust noise SD, ``median(|x|) / 0.6745`` (Quiroga et al. 2004)."""
    return np.median(np.abs(x), axis=axis) / 0.6745


def detect_spikes(
    x: np.ndarray,
    fs: float,
    *,
    threshold: float = 4.5,
    polarity: str = "negative",
    dead_time: float = 1e-3,
    sigma: float | None = None,
    exclude: np.ndarray | None = None,
) -> np.ndarray:
    """Threshold crossings of one spike-band channel.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Spike-band filtered signal.
    threshold : float
        In units of the robust noise SD.
    polarity : {"negative", "positive", "both"}
    dead_time : float
        Seconds after a detection during which no other is taken.
    sigma : float, optional
        Noise SD; estimated from ``x`` if None.
    exclude : ndarray of bool, optional
        Samples where nothing is detected (lost, clipped).

    Returns
    -------
    ndarray of int
        Sample index of each detected spike's extremum.
    """
    x = np.asarray(x, dtype=np.float64)
    if polarity not in ("negative", "positive", "both"):
        raise ValueError(f"polarity must be 'negative', 'positive' or 'both', got {polarity!r}")
    s = noise_sigma(x) if sigma is None else sigma
    y = {"negative": -x, "positive": x, "both": np.abs(x)}[polarity]
    above = y > threshold * s
    if exclude is not None:
        above &= ~exclude
    d = np.diff(np.concatenate(([0], above.astype(np.int8), [0])))
    starts, stops = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    peaks = np.array([a + int(np.argmax(y[a:b])) for a, b in zip(starts, stops)], dtype=np.int64)
    if peaks.size == 0:
        return peaks
    dead = int(round(dead_time * fs))
    keep = [peaks[0]]
    for p in peaks[1:]:
        if p - keep[-1] > dead:
            keep.append(p)
    return np.asarray(keep, dtype=np.int64)


def match_spikes(detected: np.ndarray, truth: np.ndarray, tolerance: int) -> np.ndarray:
    """Boolean array over ``truth``: a detection lies within ``tolerance`` samples.

    Each detection serves one true spike at most (nearest first, in order).
    """
    detected = np.sort(np.asarray(detected, dtype=np.int64))
    truth = np.asarray(truth, dtype=np.int64)
    hit = np.zeros(truth.size, dtype=bool)
    if detected.size == 0 or truth.size == 0:
        return hit
    used = np.zeros(detected.size, dtype=bool)
    order = np.argsort(truth)
    for i in order:
        j = np.searchsorted(detected, truth[i])
        best, best_d = -1, tolerance + 1
        for k in (j - 1, j):
            if 0 <= k < detected.size and not used[k]:
                dd = abs(detected[k] - truth[i])
                if dd < best_d:
                    best, best_d = k, dd
        if best >= 0:
            used[best] = True
            hit[i] = True
    return hit
