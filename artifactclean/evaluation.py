"""Score a cleaned trace against the truth of a synthetic recording.

Figures (all within stimulation blocks, lost samples left out):

* ``spikeband_residual``: RMS of the spike-band (300-6000 Hz) residual
  ``cleaned - neural``, divided by the white-noise RMS;
* ``harmonic_residual``: residual power within +-1 Hz of each harmonic
  below 300 Hz, divided by the neural power in the same bands (Welch
  periodograms, ``scipy.signal.welch``);
* ``recall_ratio``: spike recall on the cleaned trace divided by recall on the
  artifact-free trace with the same detector;
* ``sixth_recall_min_over_max``: recall in the worst sixth of the stimulation
  cycle over recall in the best sixth;
* ``delta_ppc``: PPC (Vinck et al. 2010) of the detected spikes' stimulation
  phases, cleaned minus artifact-free.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from .clipping import mask_runs
from .phase_stats import ppc
from .spikes import detect_spikes, match_spikes, spike_band

__all__ = ["score_cleaning"]


def _band_power(x: np.ndarray, fs: float, bands: list[tuple[float, float]]) -> float:
    f, p = signal.welch(x, fs=fs, nperseg=int(min(x.size, 4 * fs)))
    sel = np.zeros(f.size, dtype=bool)
    for lo, hi in bands:
        sel |= (f >= lo) & (f <= hi)
    return float(p[..., sel].sum())


def score_cleaning(rec, cleaned: np.ndarray, *, lost: np.ndarray | None = None,
                   threshold: float = 4.5, n_phase_bins: int = 6) -> dict:
    """Figures of merit of ``cleaned`` against synthetic ``rec`` (a SyntheticRecording).

    Returns
    -------
    dict
        Per-channel lists and channel-pooled spike figures (see module docstring).
    """
    fs = rec.fs
    neural = rec.neural
    stim = ~np.isnan(rec.stim_phase)
    if lost is None:
        lost = rec.clipped
    # lost samples are scored as lost, not as residual: zero them before filtering
    resid = np.where(lost, 0.0, cleaned - neural)
    noise = rec.spec["neural"]["noise_uv"]
    # keep filter edge effects of block edges out: score inside blocks only
    sb_res = spike_band(resid, fs)
    sb_clean = spike_band(cleaned, fs)
    sb_true = spike_band(neural, fs)
    out = dict(spikeband_residual=[], harmonic_residual=[])
    f0 = max((b["freq_hz"] for b in rec.blocks if b["kind"] == "active"), default=None)
    for ch in range(neural.shape[0]):
        ok = stim & ~lost[ch]
        # exclude 2 ms around lost samples: the filter spreads them
        if lost[ch].any():
            spread = np.convolve(lost[ch].astype(float), np.ones(int(4e-3 * fs) + 1), mode="same") > 0
            ok &= ~spread
        out["spikeband_residual"].append(float(np.sqrt(np.mean(sb_res[ch, ok] ** 2)) / noise) if ok.any() else np.nan)
        seg = _longest_run(stim)
        if f0 is not None and seg.stop - seg.start > 4 * fs:
            bands = [(k * f0 - 1.0, k * f0 + 1.0) for k in range(1, int(300 // f0) + 1)]
            # lost samples count as zero in both, so a blanked stretch is neither residual nor signal
            ref = _band_power(np.where(lost[ch, seg], 0.0, neural[ch, seg]), fs, bands)
            out["harmonic_residual"].append(_band_power(resid[ch, seg], fs, bands) / ref if ref > 0 else np.nan)
        else:
            out["harmonic_residual"].append(np.nan)
    # spikes: detect on each unit's channel in the cleaned and the artifact-free trace
    tol = int(round(0.5e-3 * fs))
    hits_c, hits_t, ph_true, det_c_ph, det_t_ph = [], [], [], [], []
    for times, ch in zip(rec.spike_times, rec.unit_channels):
        idx = np.round(times * fs).astype(np.int64)
        ok = stim & ~lost[ch]
        idx = idx[ok[np.clip(idx, 0, ok.size - 1)]]
        dc = detect_spikes(sb_clean[ch], fs, threshold=threshold, exclude=~ok)
        dt = detect_spikes(sb_true[ch], fs, threshold=threshold, exclude=~ok)
        hits_c.append(match_spikes(dc, idx, tol))
        hits_t.append(match_spikes(dt, idx, tol))
        ph_true.append(rec.stim_phase[idx])
        det_c_ph.append(rec.stim_phase[dc])
        det_t_ph.append(rec.stim_phase[dt])
    hc, ht, ph = (np.concatenate(a) if a else np.zeros(0) for a in (hits_c, hits_t, ph_true))
    rc = hc.mean() if hc.size else np.nan
    rt = ht.mean() if ht.size else np.nan
    bins = np.floor(np.mod(ph, 2 * np.pi) / (2 * np.pi) * n_phase_bins).astype(int)
    per_bin = [hc[bins == k].mean() if np.any(bins == k) else np.nan for k in range(n_phase_bins)]
    out.update(
        recall=float(rc),
        recall_artifact_free=float(rt),
        recall_ratio=float(rc / rt) if rt > 0 else np.nan,
        recall_per_phase_bin=[float(v) for v in per_bin],
        sixth_recall_min_over_max=float(np.nanmin(per_bin) / np.nanmax(per_bin)) if np.nanmax(per_bin) > 0 else np.nan,
        ppc_cleaned=ppc(np.concatenate(det_c_ph)) if det_c_ph else np.nan,
        ppc_artifact_free=ppc(np.concatenate(det_t_ph)) if det_t_ph else np.nan,
    )
    out["delta_ppc"] = out["ppc_cleaned"] - out["ppc_artifact_free"]
    return out


def _longest_run(mask: np.ndarray) -> slice:
    runs = mask_runs(mask)
    if not runs:
        return slice(0, 0)
    a, b = max(runs, key=lambda r: r[1] - r[0])
    return slice(a, b)
