"""Inject known spikes into a recording and measure how well they come back.

The recording may be synthetic or the user's own (a hybrid recording): the
injected spikes are the ground truth. Waveforms come from a built-in set or
are learned from the data outside stimulation; amplitudes are multiples of
each channel's spike-band noise; times are uniform over the stimulation
cycle or locked to it (von Mises), with a refractory period and away from
large events already in the data.

:func:`detection_efficiency` runs the whole chain a user runs (inject into
the raw data, clean, detect, match) and returns recall per stimulation-phase
bin: the detection efficiency against phase, which the entrainment check
uses as its null (:mod:`artifactclean.entrainment`).
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import special

from .clipping import find_rails
from .spikes import check_spike_rate, detect_spikes, match_spikes, noise_sigma, spike_band
from .synthetic import spike_waveform

__all__ = ["BUILTIN_WAVEFORMS", "cleaned_noise", "InjectedSpikes", "inject_spikes", "learn_waveform", "detection_efficiency",
           "write_truth_csv"]

#: built-in waveforms: name -> (shape, polarity); trough-normalised
BUILTIN_WAVEFORMS = {
    "narrow": ("narrow", 1.0),
    "broad": ("broad", 1.0),
    "narrow_positive": ("narrow", -1.0),
    "broad_positive": ("broad", -1.0),
}


@dataclass
class InjectedSpikes:
    """Ground truth of an injection.

    Attributes
    ----------
    samples : ndarray of int
        Sample index of each spike's trough.
    channels, units : ndarray of int
    amplitudes_uv : ndarray
        Trough amplitude in the data's unit (microvolts for recordings read here).
    phases : ndarray
        Stimulation phase (rad) at each spike; NaN off stimulation.
    waveforms : dict
        unit -> (lags, trough-normalised values).
    fs : float
    """

    samples: np.ndarray
    channels: np.ndarray
    units: np.ndarray
    amplitudes_uv: np.ndarray
    phases: np.ndarray
    waveforms: dict
    fs: float

    @property
    def times_s(self) -> np.ndarray:
        return self.samples / self.fs


def learn_waveform(x: np.ndarray, fs: float, *, mask: np.ndarray | None = None, threshold: float = 5.0,
                   max_events: int = 2000) -> tuple[np.ndarray, np.ndarray] | None:
    """Average aligned threshold crossings of one channel, trough-normalised; None if too few.

    ``mask`` selects the samples to learn from (e.g. outside stimulation).
    """
    sb = spike_band(np.asarray(x, dtype=np.float64)[None], fs)[0]
    excl = None if mask is None else ~mask
    peaks = detect_spikes(sb, fs, threshold=threshold, exclude=excl)
    lags = np.arange(int(-1.0e-3 * fs), int(2.0e-3 * fs) + 1)
    peaks = peaks[(peaks + lags[0] >= 0) & (peaks + lags[-1] < sb.size)][:max_events]
    if peaks.size < 20:
        return None
    mean = sb[peaks[:, None] + lags[None, :]].mean(axis=0)
    return lags, mean / abs(mean[lags == 0][0])


def inject_spikes(data: np.ndarray, fs: float, *, phase: np.ndarray, channels=None, rate_hz: float = 10.0,
                  amplitude: float = 8.0, waveforms=("narrow", "broad"), kappa: float = 0.0,
                  preferred_phase: float = 0.0, refractory_s: float = 3e-3, stim_only: bool = True,
                  avoid_threshold: float = 6.0, noise_uv=None, avoid_in=None,
                  seed: int = 0) -> tuple[np.ndarray, InjectedSpikes]:
    """Add spikes of known times, channels and amplitudes to ``data``.

    Parameters
    ----------
    data : ndarray, shape (n_channels, n_samples)
        Not modified; a copy with the spikes is returned.
    fs : float
    phase : ndarray, shape (n_samples,)
        Stimulation phase (rad) of every sample, NaN off stimulation (from a
        :class:`~artifactclean.stimulation.StimulationModel` or a synthetic truth).
    channels : sequence of int, optional
        Channels to inject into (default all); one unit per channel.
    rate_hz : float
        Mean rate of each injected unit.
    amplitude : float
        Trough amplitude in multiples of the channel's spike-band noise
        (median absolute deviation, Quiroga et al. 2004).
    waveforms : sequence of str or of (lags, values)
        Built-in names (:data:`BUILTIN_WAVEFORMS`) or learned waveforms, used in turn.
    kappa, preferred_phase : float
        von Mises locking of the times to the stimulation phase (0: uniform).
    refractory_s : float
        Minimum interval between spikes of a unit.
    stim_only : bool
        Inject only where stimulation runs.
    avoid_threshold : float
        Keep 2 ms away from spike-band events above this many noise SDs
        already in the data (existing spikes, steps).
    noise_uv : float or array, optional
        Spike-band noise per channel that ``amplitude`` multiplies. Default:
        measured on ``data``; for raw contaminated data pass the noise of the
        cleaned data (what a sorter sees), as the artifact inflates the raw one.
    avoid_in : ndarray, optional
        The array in which existing large events are looked for (default
        ``data``); pass the cleaned recording, where the artifact's own steps
        are gone and only the recording's spikes remain.
    seed : int

    Returns
    -------
    hybrid : ndarray
    truth : InjectedSpikes
    """
    check_spike_rate(fs, "known spikes")
    x = np.array(data, dtype=np.float64, ndmin=2, copy=True)
    n_ch, n = x.shape
    phase = np.asarray(phase, dtype=np.float64)
    if phase.shape != (n,):
        raise ValueError(f"phase has shape {phase.shape}, the data have {n} samples")
    if not amplitude > 0:
        raise ValueError(f"amplitude must be positive (multiples of the noise), got {amplitude!r}")
    if not rate_hz > 0:
        raise ValueError(f"rate_hz must be positive, got {rate_hz!r}")
    rng = np.random.default_rng(seed)
    channels = list(range(n_ch)) if channels is None else [int(c) for c in channels]
    bad = [c for c in channels if not 0 <= c < n_ch]
    if bad:
        raise ValueError(f"channels {bad} outside 0..{n_ch - 1}")
    allowed = np.isfinite(phase) if stim_only else np.ones(n, dtype=bool)
    if not allowed.any():
        raise ValueError("no stimulation in the data to inject into (stim_only=True)")
    sb = spike_band(x if avoid_in is None else np.asarray(avoid_in, dtype=np.float64).reshape(n_ch, n), fs)
    sigma = noise_sigma(sb) if noise_uv is None else np.broadcast_to(np.asarray(noise_uv, dtype=np.float64), (n_ch,))
    guard = int(round(2e-3 * fs))
    lags_max = int(2.0e-3 * fs) + 1
    rows = []
    shapes = {}
    for u, ch in enumerate(channels):
        wf = waveforms[u % len(waveforms)]
        if isinstance(wf, str):
            if wf not in BUILTIN_WAVEFORMS:
                raise ValueError(f"unknown waveform {wf!r}; built-in: {sorted(BUILTIN_WAVEFORMS)}")
            shape, sign = BUILTIN_WAVEFORMS[wf]
            lags, vals = spike_waveform(shape, fs)
            vals = sign * vals
        else:
            lags, vals = (np.asarray(a) for a in wf)
        shapes[u] = (lags, vals)
        ok = allowed.copy()
        big = np.flatnonzero(np.abs(sb[ch]) > avoid_threshold * sigma[ch])
        if big.size:
            d = np.zeros(n + 1, dtype=np.int32)
            np.add.at(d, np.maximum(big - guard, 0), 1)
            np.add.at(d, np.minimum(big + guard + 1, n), -1)
            ok &= np.cumsum(d[:n]) == 0
        ok[:lags_max] = ok[n - lags_max:] = False
        cand = np.flatnonzero(ok)
        if cand.size == 0:
            continue
        # Poisson count over the usable time, thinned by the von Mises profile if locked
        # (exp(kappa) / I0(kappa) candidates, accepted with exp(kappa (cos - 1)), keep the mean rate)
        n_draw = rng.poisson(rate_hz * cand.size / fs * (np.exp(abs(kappa)) / special.i0(kappa) if kappa else 1.0))
        pick = np.sort(rng.choice(cand, size=min(n_draw, cand.size), replace=False))
        if kappa:
            accept = np.exp(kappa * (np.cos(phase[pick] - preferred_phase) - 1.0))
            pick = pick[rng.random(pick.size) < accept]
        keep = [pick[0]] if pick.size else []
        for p in pick[1:]:
            if p - keep[-1] >= refractory_s * fs:
                keep.append(p)
        pick = np.asarray(keep, dtype=np.int64)
        amp = amplitude * sigma[ch]
        idx = pick[:, None] + lags[None, :]
        np.add.at(x[ch], idx.ravel(), np.tile(amp * vals, pick.size))
        rows.append((pick, np.full(pick.size, ch), np.full(pick.size, u), np.full(pick.size, amp)))
    if rows:
        s, c, u, a = (np.concatenate(r) for r in zip(*rows))
    else:
        s = c = u = np.zeros(0, dtype=np.int64)
        a = np.zeros(0)
    # the amplifier saturates the sum: where the data sat at a rail, the hybrid stays at the rail
    hi, lo = find_rails(np.asarray(data, dtype=np.float64).reshape(n_ch, n))
    np.clip(x, lo[:, None], hi[:, None], out=x)
    order = np.argsort(s, kind="stable")
    truth = InjectedSpikes(s[order], c[order], u[order], a[order], phase[s[order]], shapes, fs)
    return x, truth


def cleaned_noise(cleaned: np.ndarray, lost: np.ndarray, fs: float) -> np.ndarray:
    """Spike-band noise (MAD, Quiroga et al. 2004) per channel of cleaned data, lost samples left out.

    This is the noise a sorter sees, to which injected amplitudes refer; the
    raw spike band is inflated by the artifact, and blanked samples would
    deflate the median.
    """
    sb = spike_band(np.where(lost, 0.0, cleaned), fs)
    # 4 ms around lost samples carry the filter's edges
    width = int(4e-3 * fs) + 1
    out = np.empty(sb.shape[0])
    for ch in range(sb.shape[0]):
        near = np.convolve(lost[ch].astype(float), np.ones(width), mode="same") > 0 if lost[ch].any() else lost[ch]
        use = sb[ch, ~near]
        out[ch] = noise_sigma(use) if use.size else noise_sigma(sb[ch])
    return out


def write_truth_csv(path, truth: InjectedSpikes) -> Path:
    """Write the truth table: ``time_s, channel, unit, amplitude_uv, phase_deg``."""
    path = Path(path)
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time_s", "channel", "unit", "amplitude_uv", "phase_deg"])
        for t, c, u, a, p in zip(truth.times_s, truth.channels, truth.units, truth.amplitudes_uv, truth.phases):
            w.writerow([f"{t:.6f}", int(c), int(u), f"{a:.3f}", "" if not np.isfinite(p) else f"{np.degrees(p):.2f}"])
    return path


def detection_efficiency(truth: InjectedSpikes, cleaned: np.ndarray, fs: float, *, lost: np.ndarray | None = None,
                         n_bins: int = 12, threshold: float = 4.5, tolerance_s: float = 0.5e-3) -> dict:
    """Recall of injected spikes per stimulation-phase bin, from a cleaned hybrid recording.

    Spikes injected into lost samples (clipping) count as missed: they are
    what a sorter would miss too.

    Returns
    -------
    dict
        ``bin_edges_deg``, ``recall`` (per bin), ``n`` (spikes per bin),
        ``recall_overall``.
    """
    sb = spike_band(np.where(lost, 0.0, cleaned) if lost is not None else cleaned, fs)
    tol = int(round(tolerance_s * fs))
    hit = np.zeros(truth.samples.size, dtype=bool)
    for ch in np.unique(truth.channels):
        sel = truth.channels == ch
        det = detect_spikes(sb[ch], fs, threshold=threshold)
        hit[sel] = match_spikes(det, truth.samples[sel], tol)
    ph = np.mod(truth.phases, 2 * np.pi)
    fin = np.isfinite(ph)
    b = np.floor(ph[fin] / (2 * np.pi) * n_bins).astype(int) % n_bins
    n = np.bincount(b, minlength=n_bins)
    k = np.bincount(b, hit[fin].astype(float), minlength=n_bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        recall = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    return dict(bin_edges_deg=np.linspace(0, 360, n_bins + 1).tolist(), recall=recall.tolist(), n=n.tolist(),
                recall_overall=float(hit[fin].mean()) if fin.any() else float("nan"))
