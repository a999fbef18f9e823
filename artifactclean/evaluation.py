"""Score a cleaned trace against the truth of a synthetic recording.

Figures (all within stimulation blocks, lost samples left out):

* ``spikeband_residual``: RMS of the spike-band (300-6000 Hz) residual
  ``cleaned - neural``, divided by the white-noise RMS;
* ``harmonic_residual``: residual power within +-1 Hz of each harmonic
  below 300 Hz, divided by the neural power in the same bands (Welch
  periodograms, ``scipy.signal.welch``);
* ``lfp_band_ratio``: per harmonic below 80 Hz, residual power within
  +-3 Hz of it over the neural power in the same band; the worst harmonic;
* ``lfp_error_away``: relative error (RMS of the residual over RMS of the
  neural signal) of the LFP 1-80 Hz away from those +-3 Hz bands, from the
  same periodograms;
* ``recall_ratio``: spike recall on the cleaned trace divided by recall on the
  artifact-free trace with the same detector;
* ``sixth_recall_min_over_max``: recall in the worst sixth of the stimulation
  cycle over recall in the best sixth;
* ``locked_units``: for each unit locked to the stimulation, PLV of its
  detected spikes minus PLV of all its spikes, and the preferred-phase error;
* ``delta_ppc``: PPC (Vinck et al. 2010) of the detected spikes' stimulation
  phases, cleaned minus artifact-free.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from .clipping import mask_runs
from .phase_stats import plv, ppc, preferred_phase
from .spikes import detect_spikes, match_spikes, spike_band

__all__ = ["score_cleaning"]


def _band_power(x: np.ndarray, fs: float, bands: list[tuple[float, float]]) -> float:
    f, p = signal.welch(x, fs=fs, nperseg=int(min(x.size, 4 * fs)))
    sel = np.zeros(f.size, dtype=bool)
    for lo, hi in bands:
        sel |= (f >= lo) & (f <= hi)
    return float(p[..., sel].sum())


def _lfp_figures(resid: np.ndarray, neural: np.ndarray, fs: float, f0: float,
                 half_band: float = 3.0, top: float = 80.0) -> tuple[float, float]:
    """Worst harmonic-band power ratio and the relative LFP error away from the harmonic bands."""
    nper = int(min(resid.size, 4 * fs))
    f, pr = signal.welch(resid, fs=fs, nperseg=nper)
    _, pn = signal.welch(neural, fs=fs, nperseg=nper)
    ratios = []
    near = np.zeros(f.size, dtype=bool)
    for k in range(1, int(top // f0) + 1):
        sel = np.abs(f - k * f0) <= half_band
        near |= sel
        if pn[sel].sum() > 0:
            ratios.append(pr[sel].sum() / pn[sel].sum())
    away = (f >= 1.0) & (f <= top) & ~near
    err = float(np.sqrt(pr[away].sum() / pn[away].sum())) if pn[away].sum() > 0 else np.nan
    return (float(max(ratios)) if ratios else np.nan), err


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
    out = dict(spikeband_residual=[], harmonic_residual=[], lfp_band_ratio=[], lfp_error_away=[])
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
            band, away = _lfp_figures(resid[ch, seg], np.where(lost[ch, seg], 0.0, neural[ch, seg]), fs, f0)
        else:
            out["harmonic_residual"].append(np.nan)
            band = away = np.nan
        out["lfp_band_ratio"].append(band)
        out["lfp_error_away"].append(away)
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
    # locked units: phase locking of the detected spikes against that of all true spikes
    locked = []
    units = rec.spec.get("neural", {}).get("units", [])
    for u, (hit, ph_u) in enumerate(zip(hits_c, ph_true)):
        if u < len(units) and units[u].get("kappa", 0) > 0 and hit.sum() > 1:
            d = np.angle(np.exp(1j * (preferred_phase(ph_u[hit]) - preferred_phase(ph_u))))
            locked.append(dict(unit=u, plv_true=plv(ph_u), plv_detected=plv(ph_u[hit]),
                               plv_error=plv(ph_u[hit]) - plv(ph_u), preferred_phase_error_deg=float(np.degrees(d))))
    out["locked_units"] = locked
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
