"""The validation suite: what a cleaning method does to known spikes and to their phases.

:func:`evaluate_cleaner` injects known spikes (uniform over the cycle and
locked to it) into a recording, cleans it with a method (any callable), and
scores, per channel and per bin of the stimulation cycle:

* ``recall`` (also ``recall_per_channel``), ``precision`` of the injected spikes (detections that the same
  cleaning finds without the injection are the recording's own events, and
  a second detection within 2 ms after an injected spike is the detector's
  echo of it: neither counts against precision);
* detection efficiency against phase (``recall_per_phase_bin``) and its dip,
  ``phase_recall_dip = 1 - worst bin / best bin``, with a noise floor from
  the binomial spread of the bins;
* ``delta_ppc_phase``: PPC of the detected uniform injections minus that of
  the same injections detected on the artifact-free reference (synthetic)
  or minus that of all of them (a hybrid recording: they were uniform), with
  its noise floor (three standard deviations of the PPC of uniform phases,
  ``3 sqrt(2 / (n (n - 1)))``);
* ``plv_error_phase`` and ``preferred_phase_error_deg`` for the locked
  injections;
* waveform fidelity: correlation and trough ratio of the mean recovered
  injected spike (cleaned with minus cleaned without the injection) against
  the injected waveform, both spike-band filtered;
* residuals: spike-band residual over the noise, ``lfp_band_ratio`` and
  ``lfp_error_away`` (:mod:`artifactclean.evaluation`) against the truth when
  synthetic; for a recording of one's own, ``harmonic_excess``: power within
  1 Hz of the harmonics below 300 Hz during stimulation over that in the
  stimulation-free stretches of the same channel (ranked by its distance from
  1 on a log scale), and ``sideband_excess`` the same 1-3 Hz either side (the
  heartbeat and respiration sidebands);
* ``seconds`` of compute.

A method is ``phase_biased`` when its ``delta_ppc_phase`` or its phase dip
exceeds its reported noise floor (``phase_bins_low`` lists the bins where
detection falls short); on synthetic data, where the oracle (true artifact
subtracted) shows what clipping and the detector impose by themselves, the
flag is taken beyond the oracle's figures (:func:`relative_to_oracle`). The ranking rule: unbiased before
biased, then higher recall (to 0.005), then lower residual.
"""

from __future__ import annotations

import time

import numpy as np
from scipy import signal

from .evaluation import _lfp_figures
from .injection import cleaned_noise, inject_spikes
from .phase_stats import plv, ppc, preferred_phase
from .spikes import detect_spikes, match_spikes, spike_band

__all__ = ["evaluate_cleaner", "make_hybrid", "relative_to_oracle", "score_sorting", "method_cleaner", "oracle_cleaner", "rank_rows", "RANKING_RULE"]

RANKING_RULE = ("phase bias first (unbiased methods rank above biased ones), then recall of injected spikes "
                "(higher first, to 0.005), then residual (spike-band residual when the truth is known, else the "
                "harmonic excess; lower first)")


def method_cleaner(method: str, **params):
    """A cleaner ``f(data, fs, model) -> (cleaned, lost)`` from a registered method."""
    from .estimators import make_estimator

    def clean(data, fs, model):
        est = make_estimator(method, **params)
        return est.fit_transform(data, fs=fs, stim_model=model), est.lost_

    clean.__name__ = method
    return clean


def oracle_cleaner(artifact: np.ndarray):
    """The reference cleaner: subtracts the true artifact (synthetic recordings only)."""

    def clean(data, fs, model):
        return data - artifact, np.zeros(data.shape, dtype=bool)

    clean.__name__ = "oracle"
    return clean


def _detect_all(x, fs, threshold, lost=None):
    sb = spike_band(np.where(lost, 0.0, x) if lost is not None else x, fs)
    return [detect_spikes(sb[ch], fs, threshold=threshold) for ch in range(x.shape[0])], sb


def _harmonic_excess(x, fs, stim, f0, lost, offsets=(0.0, 1.0)):
    """Worst channel's power within ``offsets`` (Hz, inner and outer) of the harmonics below 300 Hz,
    during stimulation over the stimulation-free stretches of the same channel."""
    if f0 is None or stim.all() or not stim.any():
        return float("nan")
    out = []
    for ch in range(x.shape[0]):
        segs = []
        for mask in (stim, ~stim):
            idx = np.flatnonzero(mask & ~lost[ch])
            if idx.size < fs:
                return float("nan")
            segs.append(x[ch, idx])
        pw = []
        for seg in segs:
            f, p = signal.welch(seg, fs=fs, nperseg=int(min(seg.size, 2 * fs)))
            sel = np.zeros(f.size, dtype=bool)
            for k in range(1, int(300 // f0) + 1):
                d = np.abs(f - k * f0)
                sel |= (d >= offsets[0]) & (d <= offsets[1])
            pw.append(p[sel].sum())
        out.append(pw[0] / pw[1] if pw[1] > 0 else np.nan)
    return float(np.nanmax(out))


def make_hybrid(data, fs, phase, *, amplitude: float = 7.0, rate_hz: float = 25.0, kappa: float = 1.0,
                preferred_phase_rad: float = np.pi / 2, noise_uv=None, avoid_in=None, seed: int = 0):
    """The recording with one uniform and one locked injected unit per channel: ``(hybrid, uniform, locked)``.

    ``noise_uv``, ``avoid_in``: the spike-band noise per channel the amplitude refers to, and the
    (cleaned) array in which the recording's own large events are avoided (see
    :func:`~artifactclean.injection.inject_spikes`).
    """
    hyb, uni = inject_spikes(data, fs, phase=phase, rate_hz=rate_hz, amplitude=amplitude,
                             waveforms=("narrow", "broad"), noise_uv=noise_uv, avoid_in=avoid_in, seed=seed)
    hyb, lck = inject_spikes(hyb, fs, phase=phase, rate_hz=rate_hz, amplitude=amplitude,
                             waveforms=("broad", "narrow"), kappa=kappa, preferred_phase=preferred_phase_rad,
                             noise_uv=noise_uv, avoid_in=None if avoid_in is None else avoid_in + (hyb - data),
                             seed=seed + 1)
    # the locked units are numbered after the uniform ones
    lck.units = lck.units + data.shape[0]
    lck.waveforms = {u + data.shape[0]: w for u, w in lck.waveforms.items()}
    return hyb, uni, lck


def evaluate_cleaner(cleaner, data: np.ndarray, fs: float, model, *, truth_neural: np.ndarray | None = None,
                     noise_uv: float | None = None, amplitude: float = 7.0, rate_hz: float = 25.0,
                     kappa: float = 1.0, preferred_phase_rad: float = np.pi / 2, n_bins: int = 6,
                     threshold: float = 4.5, injection_reference: np.ndarray | None = None, seed: int = 0,
                     name: str | None = None) -> dict:
    """Inject known spikes into ``data``, clean with ``cleaner`` and score (see module docstring).

    Parameters
    ----------
    cleaner : callable
        ``cleaner(data, fs, model) -> (cleaned, lost)``, e.g. :func:`method_cleaner`.
    data : ndarray, shape (n_channels, n_samples)
        The contaminated recording (synthetic or the user's own).
    fs : float
    model : StimulationModel
    truth_neural : ndarray, optional
        The artifact-free signal (synthetic recordings): enables the residual
        figures and the artifact-free reference for the phase bias.
    noise_uv : float, optional
        White-noise level of the truth, for the spike-band residual.
    amplitude, rate_hz : float
        Injected trough amplitude (multiples of the spike-band noise) and rate per unit.
    kappa, preferred_phase_rad : float
        Locking of the second injected unit on each channel.
    n_bins : int
        Bins of the stimulation cycle.
    injection_reference : ndarray, optional
        Artifact-free (or cleaned) version of ``data`` that sets the injected
        amplitudes (its spike-band noise) and the places to avoid (its large
        events), the same for every method: default ``truth_neural``.
    seed : int

    Returns
    -------
    dict
        One result row.
    """
    phase = model.phase()
    stim = np.isfinite(phase)
    n_ch = data.shape[0]
    # the cleaning without injected spikes: the recording's own events
    base, lost_base = cleaner(data, fs, model)
    # the injections must not depend on the method judged: their amplitudes refer to, and the
    # recording's own large events are avoided in, a reference shared by all methods (the truth when
    # synthetic, else one cleaning the caller chose; this cleaner's own result only as a last resort)
    ref = truth_neural if injection_reference is None else injection_reference
    ref_lost = np.zeros(data.shape, dtype=bool) if ref is not None else lost_base
    ref = base if ref is None else ref
    sb_noise = cleaned_noise(ref, ref_lost, fs)
    hyb, uni, lck = make_hybrid(data, fs, phase, amplitude=amplitude, rate_hz=rate_hz, kappa=kappa,
                                preferred_phase_rad=preferred_phase_rad, noise_uv=sb_noise, avoid_in=ref, seed=seed)
    t0 = time.perf_counter()
    cleaned, lost = cleaner(hyb, fs, model)
    seconds = time.perf_counter() - t0
    det, sb = _detect_all(cleaned, fs, threshold, lost)
    det_base, sb_base = _detect_all(base, fs, threshold, lost)
    tol = int(round(0.5e-3 * fs))
    row = dict(method=name or getattr(cleaner, "__name__", "cleaner"), seconds=seconds, n_injected=0)
    hits = {}
    for label, tr in (("uniform", uni), ("locked", lck)):
        h = np.zeros(tr.samples.size, dtype=bool)
        for ch in range(n_ch):
            sel = tr.channels == ch
            h[sel] = match_spikes(det[ch], tr.samples[sel], tol)
        # spikes injected into lost samples count as missed
        h &= ~lost[tr.channels, tr.samples]
        hits[label] = h
    all_hits = np.concatenate([hits["uniform"], hits["locked"]])
    all_ch = np.concatenate([uni.channels, lck.channels])
    row["recall_per_channel"] = [float(all_hits[all_ch == ch].mean()) if np.any(all_ch == ch) else np.nan
                                 for ch in range(n_ch)]
    row["n_injected"] = int(all_hits.size)
    row["recall"] = float(all_hits.mean()) if all_hits.size else np.nan
    # precision: detections not explained by the recording's own events
    n_det = n_own = n_match = 0
    for ch in range(n_ch):
        d = det[ch][stim[det[ch]]] if det[ch].size else det[ch]
        own = match_spikes(det_base[ch], d, tol)
        inj = np.concatenate([uni.samples[uni.channels == ch], lck.samples[lck.channels == ch]])
        matched = match_spikes(inj, d, tol)
        # a second detection on the same injected spike (its later lobes, within 2 ms) is the
        # detector's echo of a true event, not a false one
        inj_s = np.sort(inj)
        j = np.searchsorted(inj_s, d, side="right") - 1
        echo = (j >= 0) & (d - inj_s[np.maximum(j, 0)] <= int(round(2e-3 * fs)))
        n_det += d.size
        n_own += int((~matched & (own | echo)).sum())
        n_match += int(matched.sum())
    row["precision"] = float(n_match / max(n_det - n_own, 1))
    # detection efficiency against phase (uniform injections)
    ph_u = np.mod(uni.phases, 2 * np.pi)
    b = np.floor(ph_u / (2 * np.pi) * n_bins).astype(int) % n_bins
    n_b = np.bincount(b, minlength=n_bins)
    k_b = np.bincount(b, hits["uniform"].astype(float), minlength=n_bins)
    rec_b = np.where(n_b > 0, k_b / np.maximum(n_b, 1), np.nan)
    row["recall_per_phase_bin"] = rec_b.tolist()
    row["phase_bin_edges_deg"] = np.linspace(0, 360, n_bins + 1).tolist()
    best = np.nanmax(rec_b)
    row["phase_recall_dip"] = float(1 - np.nanmin(rec_b) / best) if best > 0 else np.nan
    # noise floor of the dip: five binomial standard errors of a bin (Laplace-smoothed, so a bin of
    # perfect recall still has one), relative to the mean recall; the range of a few bins of pure
    # noise stays below it (common practice for a detection limit)
    k_all, n_all = float(k_b.sum()), float(n_b.sum())
    p_s = (k_all + 1) / (n_all + 2)
    se = np.sqrt(p_s * (1 - p_s) / max(n_b.mean(), 1))
    row["phase_recall_dip_floor"] = float(5 * se / max(p_s, 1e-3))
    # phase bias: PPC of detected uniform injections against the artifact-free reference (or uniform)
    det_ph = uni.phases[hits["uniform"]]
    if truth_neural is not None:
        ref_det, _ = _detect_all(truth_neural + (hyb - data), fs, threshold)
        ref_hit = np.zeros(uni.samples.size, dtype=bool)
        for ch in range(n_ch):
            sel = uni.channels == ch
            ref_hit[sel] = match_spikes(ref_det[ch], uni.samples[sel], tol)
        ref_ppc = ppc(uni.phases[ref_hit])
    else:
        ref_ppc = ppc(uni.phases)
    row["delta_ppc_phase"] = float(ppc(det_ph) - ref_ppc)
    n_u = max(int(det_ph.size), 2)
    # three standard deviations of the PPC of n uniform phases (each pair's cosine has variance 1/2)
    row["delta_ppc_phase_floor"] = float(3 * np.sqrt(2.0 / (n_u * (n_u - 1))))
    # the bins where detection falls short of the best by more than the floor: where the bias is
    row["phase_bins_low"] = [int(i) for i in np.flatnonzero(rec_b < best * (1 - row["phase_recall_dip_floor"]))]
    row["phase_biased"] = bool(abs(row["delta_ppc_phase"]) > row["delta_ppc_phase_floor"]
                               or row["phase_recall_dip"] > row["phase_recall_dip_floor"])
    # locked injections: PLV and preferred phase of the detected ones against all of them
    lp = lck.phases
    lh = hits["locked"]
    row["plv_error_phase"] = float(plv(lp[lh]) - plv(lp)) if lh.sum() > 1 else np.nan
    row["preferred_phase_error_deg"] = (float(np.degrees(np.angle(np.exp(1j * (preferred_phase(lp[lh]) - preferred_phase(lp))))))
                                        if lh.sum() > 1 else np.nan)
    # waveform fidelity: the injected spike as the cleaning returns it
    diff = sb - sb_base
    corr, ratio = [], []
    waves = {}
    for tr in (uni, lck):
        for u in np.unique(tr.units):
            sel = (tr.units == u) & ~lost[tr.channels, tr.samples]
            if sel.sum() < 5:
                continue
            lags, w = tr.waveforms[int(u)]
            ch = int(tr.channels[sel][0])
            s = tr.samples[sel]
            s = s[(s + lags[0] >= 0) & (s + lags[-1] < diff.shape[1])]
            got = diff[ch][s[:, None] + lags[None, :]].mean(axis=0)
            imp = np.zeros(lags.size + 2000)
            imp[1000 + lags] = tr.amplitudes_uv[sel][0] * w
            want = spike_band(imp[None], fs)[0][1000 + lags]
            corr.append(float(np.corrcoef(got, want)[0, 1]))
            ratio.append(float(got.min() / want.min()) if want.min() < 0 else float(got.max() / want.max()))
            waves.setdefault(ch, (lags.tolist(), got.tolist(), want.tolist()))
    row["waveform_correlation"] = float(np.min(corr)) if corr else np.nan
    row["waveform_amplitude_ratio"] = float(np.median(ratio)) if ratio else np.nan
    row["_waveforms"] = waves
    # residuals
    blocks = [b for b in model.blocks if b.kind == "active"]
    f0 = max(blocks, key=lambda b: b.stop - b.start).freq_hz if blocks else None
    if truth_neural is not None:
        resid = np.where(lost, 0.0, base - truth_neural)
        sbr = spike_band(resid, fs)
        ok = stim[None, :] & ~lost
        row["spikeband_residual"] = float(max(np.sqrt(np.mean(sbr[ch, ok[ch]] ** 2)) for ch in range(n_ch))
                                          / (noise_uv or 1.0))
        if f0 is not None:
            seg = np.flatnonzero(stim)
            sl = slice(seg[0], seg[-1] + 1)
            figs = [_lfp_figures(resid[ch, sl], np.where(lost[ch, sl], 0.0, truth_neural[ch, sl]), fs, f0)
                    for ch in range(n_ch)]
            row["lfp_band_ratio"] = float(max(f[0] for f in figs))
            row["lfp_error_away"] = float(max(f[1] for f in figs))
        row["residual_for_ranking"] = row["spikeband_residual"]
    row["harmonic_excess"] = _harmonic_excess(base, fs, stim, f0, lost)
    # the heartbeat and respiration sidebands: 1-3 Hz either side of each harmonic
    row["sideband_excess"] = _harmonic_excess(base, fs, stim, f0, lost, offsets=(1.0, 3.0))
    # without the truth: how far the harmonic bands are from the stimulation-free level, either way
    # (below it means neural signal was removed with the artifact)
    row.setdefault("residual_for_ranking", float(abs(np.log10(row["harmonic_excess"])))
                   if row["harmonic_excess"] > 0 else np.nan)
    row["lost_fraction"] = float(lost[:, stim].mean()) if stim.any() else 0.0
    row["_spectrum_source"] = base
    return row


def relative_to_oracle(row: dict, oracle: dict) -> dict:
    """Phase figures of ``row`` beyond those of the oracle on the same data and injections.

    Clipping and the detector itself make detection depend on the phase even
    for the oracle (the true artifact subtracted); what matters in a
    synthetic comparison is the bias the cleaning adds. Sets
    ``phase_biased_absolute`` (the flag against uniform), and recomputes
    ``phase_biased`` from ``delta_ppc_vs_oracle`` and
    ``phase_recall_dip_vs_oracle`` (per-bin recall over the oracle's) against
    the same floors.
    """
    r = np.asarray(row["recall_per_phase_bin"], dtype=float)
    o = np.asarray(oracle["recall_per_phase_bin"], dtype=float)
    ok = o > 0
    ratio = r[ok] / o[ok]
    row["phase_biased_absolute"] = row["phase_biased"]
    row["delta_ppc_vs_oracle"] = float(row["delta_ppc_phase"] - oracle["delta_ppc_phase"])
    row["phase_recall_dip_vs_oracle"] = float(1 - ratio.min() / ratio.max()) if ratio.size and ratio.max() > 0 else np.nan
    row["phase_biased"] = bool(abs(row["delta_ppc_vs_oracle"]) > row["delta_ppc_phase_floor"]
                               or row["phase_recall_dip_vs_oracle"] > row["phase_recall_dip_floor"])
    return row


def rank_rows(rows: list[dict]) -> list[dict]:
    """Mean figures per (method, params) over scenarios and seeds, ordered by :data:`RANKING_RULE`."""
    groups: dict = {}
    for r in rows:
        groups.setdefault((r["method"], r.get("params_label", "")), []).append(r)
    out = []
    for (m, p), rs in groups.items():
        out.append(dict(
            method=m, params_label=p, params=rs[0].get("params", {}),
            phase_biased=any(r["phase_biased"] for r in rs),
            recall=float(np.nanmean([r["recall"] for r in rs])),
            delta_ppc_phase=float(np.nanmax(np.abs([r["delta_ppc_phase"] for r in rs]))),
            phase_recall_dip=float(np.nanmax([r["phase_recall_dip"] for r in rs])),
            residual=float(np.nanmean([r["residual_for_ranking"] for r in rs])),
            seconds=float(np.nanmean([r["seconds"] for r in rs])),
            n_rows=len(rs)))
    out.sort(key=lambda g: (g["phase_biased"], -round(g["recall"] / 0.005), g["residual"]))
    for i, g in enumerate(out):
        g["rank"] = i + 1
    return out


def score_sorting(truth_times, truth_units, sorted_times, sorted_units, *, tolerance_s: float = 0.5e-3) -> list[dict]:
    """Score a spike sorter's output against a hybrid truth table.

    Each injected unit is paired with the sorted unit that holds most of its
    spikes (within ``tolerance_s``); recall is the fraction of the injected
    spikes found in that unit, precision the fraction of that unit's spikes
    that are injected ones (a sorted unit that also holds the recording's
    own spikes has a lower precision, as it should).

    Returns
    -------
    list of dict
        ``injected_unit, sorted_unit, n_injected, n_sorted, n_matched, recall, precision``.
    """
    tt = np.asarray(truth_times, dtype=np.float64)
    tu = np.asarray(truth_units).astype(str)
    st = np.asarray(sorted_times, dtype=np.float64)
    su = np.asarray(sorted_units).astype(str)
    tol = int(round(tolerance_s * 1e6))
    rows = []
    for u in np.unique(tu):
        t = np.round(tt[tu == u] * 1e6).astype(np.int64)  # microseconds: integer matching
        best = None
        for v in np.unique(su):
            s = np.round(st[su == v] * 1e6).astype(np.int64)
            k = int(match_spikes(s, t, tol).sum())
            if best is None or k > best[1]:
                best = (v, k, s.size)
        v, k, n_s = best if best is not None else ("", 0, 0)
        rows.append(dict(injected_unit=u, sorted_unit=v, n_injected=int(t.size), n_sorted=int(n_s), n_matched=k,
                         recall=k / t.size if t.size else float("nan"),
                         precision=k / n_s if n_s else float("nan")))
    return rows
