"""Is a unit entrained by the stimulation, more than in sham, and could its locking be residue?

Spike phases are taken against the stimulation (the stimulation model's
phase: 0 is the positive peak of the fundamental on the reference signal,
radians in [0, 2 pi), reported in degrees) or against an LFP band
(:func:`lfp_phase`: zero-phase band-pass and analytic signal of the cleaned
LFP; 0 is the band's positive peak). Conditions come from the blocks: each
active frequency and amplitude level, sham, and off. Sham and off stretches
take the phase the stimulator's clock would have had (the nearest block's
phase model continued), so that their locking is measured the same way.

The residue-aware null
----------------------
Residual artifact and clipping make spike detection depend on the
stimulation phase. A unit that does not lock at all then shows detected
spikes whose phases follow the detection efficiency ``e(phase)``, and the
ordinary Rayleigh test calls it locked once there are enough spikes. The
null used here is that distribution: phases drawn with density proportional
to ``e(phase)`` (measured by injecting known spikes into the same recording,
:func:`artifactclean.injection.detection_efficiency`). The p-value is the
fraction of null PPC values at or above the observed PPC, from simulated
spike sets of the same size (directly for small sets, from the bivariate
normal limit of the resultant for large ones, with the moments of the
piecewise-constant density computed exactly). It accounts for the bias
of a known efficiency, not for the error of its estimate: measure the
efficiency with enough injected spikes (the command line uses thousands).
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from ._numeric import fractional_part
from .phase_stats import fdr_bh, mean_direction_ci, plv, ppc, ppc_across, preferred_phase, rayleigh, tost_ind
from .stimulation import StimulationModel

__all__ = ["check_spike_times", "condition_stretches", "spike_phases", "lfp_phase", "residue_null_ppc", "residue_p_value", "lock_table"]


def check_spike_times(times_s, duration_s: float) -> None:
    """Raise ValueError when spike times fall outside ``[0, duration_s)``."""
    t = np.asarray(times_s, dtype=np.float64)
    bad = int(np.sum((t < 0) | (t >= duration_s)))
    if bad:
        raise ValueError(f"{bad} spike time(s) fall outside the recording (0 to {duration_s:.3f} s); check that "
                         "the spike table belongs to this recording and that its times are in seconds")


def condition_stretches(model: StimulationModel, level_tolerance: float = 0.2) -> list[dict]:
    """Stretches of the recording with a condition label and the block whose phase model they use.

    Active blocks at the same frequency (to 0.1 Hz) and amplitude level
    (within ``level_tolerance``, relative) share a label such as
    ``"stim 20 Hz"`` (``"stim 20 Hz level 2"`` when a frequency comes at
    several levels); sham blocks are ``"sham"``; stimulation-free stretches
    ``"off"`` (phase from the nearest block).
    """
    rows = []
    blocks = sorted(model.blocks, key=lambda b: b.start)
    if not blocks:
        return rows
    levels: dict = {}
    for b in blocks:
        if b.kind != "active":
            continue
        key = round(b.freq_hz, 1)
        lv = levels.setdefault(key, [])
        if not any(abs(b.amplitude - a) <= level_tolerance * max(a, 1e-12) for a in lv):
            lv.append(b.amplitude)
    for i, b in enumerate(blocks):
        if b.kind == "active":
            key = round(b.freq_hz, 1)
            lv = sorted(levels[key], reverse=True)
            k = int(np.argmin([abs(b.amplitude - a) for a in lv]))
            label = f"stim {b.freq_hz:.3g} Hz" + (f" level {k + 1}" if len(lv) > 1 else "")
        else:
            label = "sham"
        rows.append(dict(condition=label, start=b.start, stop=b.stop, block=b, block_index=i))
    # off stretches between and around blocks, each with its nearer block's clock
    edges = [0] + [x for b in blocks for x in (b.start, b.stop)] + [model.n_samples]
    for k in range(0, len(edges), 2):
        a, c = edges[k], edges[k + 1]
        if c > a:
            j = min(range(len(blocks)), key=lambda i: min(abs(blocks[i].start - c), abs(blocks[i].stop - a)))
            rows.append(dict(condition="off", start=a, stop=c, block=blocks[j], block_index=-1 - k // 2))
    return sorted(rows, key=lambda r: r["start"])


def spike_phases(samples: np.ndarray, model: StimulationModel, stretches: list[dict] | None = None):
    """Stimulation phase (rad), condition label and stretch index of each spike sample."""
    samples = np.asarray(samples, dtype=np.int64)
    stretches = condition_stretches(model) if stretches is None else stretches
    ph = np.full(samples.size, np.nan)
    cond = np.full(samples.size, "", dtype=object)
    grp = np.full(samples.size, 0, dtype=np.int64)
    for st in stretches:
        sel = (samples >= st["start"]) & (samples < st["stop"])
        if sel.any():
            b = st["block"]
            # the block's linear phase model, continued outside it for off stretches
            cyc = b.cycles_at(samples[sel], model.fs)
            ph[sel] = 2 * np.pi * fractional_part(cyc)
            cond[sel] = st["condition"]
            grp[sel] = st["block_index"]
    return ph, cond, grp


def lfp_phase(lfp: np.ndarray, fs: float, band: tuple[float, float], *, axis: int = -1) -> np.ndarray:
    """Phase (rad, [0, 2 pi)) of an LFP band: 4th-order zero-phase Butterworth, then the analytic signal."""
    lo, hi = band
    if not 0 < lo < hi < fs / 2:
        raise ValueError(f"LFP band {band} must satisfy 0 < low < high < fs/2 = {fs / 2}")
    sos = signal.butter(4, [lo, hi], btype="bandpass", fs=fs, output="sos")
    z = signal.hilbert(signal.sosfiltfilt(sos, lfp, axis=axis), axis=axis)
    return np.mod(np.angle(z), 2 * np.pi)


def _moments(eff: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and covariance of (cos, sin) under the piecewise-constant density proportional to ``eff``."""
    e = np.clip(np.nan_to_num(np.asarray(eff, dtype=np.float64), nan=0.0), 0.0, None)
    if e.sum() <= 0:
        raise ValueError("detection efficiency is zero at every phase")
    q = e / e.sum()
    k = e.size
    a = np.arange(k) * 2 * np.pi / k
    b = a + 2 * np.pi / k
    w = b - a
    ec = np.sum(q * (np.sin(b) - np.sin(a)) / w)
    es = np.sum(q * (np.cos(a) - np.cos(b)) / w)
    ecc = np.sum(q * (w / 2 + (np.sin(2 * b) - np.sin(2 * a)) / 4) / w)
    ecs = np.sum(q * ((np.sin(b) ** 2 - np.sin(a) ** 2) / 2) / w)
    mean = np.array([ec, es])
    cov = np.array([[ecc, ecs], [ecs, 1.0 - ecc]]) - np.outer(mean, mean)
    return mean, cov


def residue_null_ppc(efficiency, n_spikes: int, *, n_sim: int = 4000, seed: int = 0) -> np.ndarray:
    """PPC of ``n_spikes`` phases drawn from the density proportional to ``efficiency`` (``n_sim`` sets)."""
    n = int(n_spikes)
    if n < 2:
        return np.full(n_sim, np.nan)
    rng = np.random.default_rng(seed)
    e = np.clip(np.nan_to_num(np.asarray(efficiency, dtype=np.float64), nan=0.0), 0.0, None)
    k = e.size
    if n <= 2000:
        q = e / e.sum()
        bins = rng.choice(k, size=(n_sim, n), p=q)
        ph = (bins + rng.random((n_sim, n))) * 2 * np.pi / k
        s = np.abs(np.exp(1j * ph).sum(axis=1)) ** 2
    else:
        # bivariate normal limit of the resultant (central limit theorem), exact moments
        mean, cov = _moments(e)
        xy = rng.multivariate_normal(n * mean, n * cov, size=n_sim)
        s = np.sum(xy ** 2, axis=1)
    return (s - n) / (n * (n - 1))


def residue_p_value(phases, efficiency, *, n_sim: int = 4000, seed: int = 0) -> float:
    """P-value of the phases' PPC against the residue null (see module docstring)."""
    p = np.asarray(phases, dtype=np.float64)
    p = p[np.isfinite(p)]
    if p.size < 2:
        return float("nan")
    null = residue_null_ppc(efficiency, p.size, n_sim=n_sim, seed=seed)
    return float((1 + np.sum(null >= ppc(p))) / (1 + null.size))


def _perm_difference(ph, grp, in_a, rng, n_perm):
    """PPC(condition A) - PPC(condition B) and its p-value by permuting block labels."""
    blocks = np.unique(grp)
    a_blocks = np.unique(grp[in_a])
    obs = ppc(ph[in_a]) - ppc(ph[~in_a])
    if blocks.size < 2:
        return obs, float("nan")
    count = 0
    for _ in range(n_perm):
        pick = rng.choice(blocks, size=a_blocks.size, replace=False)
        m = np.isin(grp, pick)
        d = ppc(ph[m]) - ppc(ph[~m])
        count += abs(d) >= abs(obs) - 1e-15
    return obs, float((1 + count) / (1 + n_perm))


def lock_table(samples, units, model: StimulationModel, *, efficiency=None, alpha: float = 0.05,
               n_perm: int = 1000, equivalence: tuple[float, float] | None = None, phases=None,
               n_sim: int = 4000, seed: int = 0) -> dict:
    """Locking statistics per unit and condition, stimulation-vs-sham comparisons, FDR control.

    Parameters
    ----------
    samples : array of int
        Spike sample indices (the recording's sampling rate).
    units : array
        Unit label of each spike.
    model : StimulationModel
    efficiency : array, optional
        Detection efficiency per phase bin (bins of equal width from 0) in
        stimulation conditions, for the residue-aware null; sham and off
        use a flat efficiency.
    alpha : float
        Level for ``locked`` (Benjamini-Hochberg q-value of the residue
        p-value, across units within a condition) and ``flagged``.
    n_perm : int
        Block-label permutations for stimulation vs sham.
    equivalence : (low, high), optional
        Bounds on the per-block PPC difference for the TOST equivalence test.
    phases : array, optional
        Phase (rad) of each spike from another source (e.g. :func:`lfp_phase`);
        default the stimulation phase.
    seed : int
        Seeds every random choice (null simulations, permutations).

    Returns
    -------
    dict
        ``units``: one row per unit and condition; ``comparisons``: one row
        per unit and stimulation condition against sham.
    """
    samples = np.asarray(samples, dtype=np.int64)
    units = np.asarray(units)
    if samples.size != units.size:
        raise ValueError(f"{samples.size} spike times but {units.size} unit labels")
    check_spike_times(samples / model.fs, model.n_samples / model.fs)
    stretches = condition_stretches(model)
    stim_ph, cond, grp = spike_phases(samples, model, stretches)
    ph = stim_ph if phases is None else np.asarray(phases, dtype=np.float64)
    durations: dict = {}
    for st in stretches:
        durations[st["condition"]] = durations.get(st["condition"], 0.0) + (st["stop"] - st["start"]) / model.fs
    flat = np.ones(12)
    rng = np.random.default_rng(seed)
    rows = []
    for u in np.unique(units):
        for c in sorted(durations):
            sel = (units == u) & (cond == c)
            p = ph[sel]
            ray = rayleigh(p)
            lo, hi = mean_direction_ci(p, alpha)
            eff = efficiency if (efficiency is not None and c.startswith("stim")) else flat
            rows.append(dict(
                unit=u.item() if hasattr(u, "item") else u, condition=c, n_spikes=int(sel.sum()),
                duration_s=durations[c], rate_hz=float(sel.sum() / durations[c]) if durations[c] > 0 else np.nan,
                plv=plv(p), ppc=ppc(p), ppc_across_blocks=ppc_across(p, grp[sel]),
                preferred_phase_deg=float(np.degrees(preferred_phase(p))),
                preferred_phase_ci_deg=[float(np.degrees(lo)), float(np.degrees(hi))],
                rayleigh_z=ray["z"], p_value=ray["p"],
                p_value_residue=residue_p_value(p, eff, n_sim=n_sim, seed=int(rng.integers(2**31))),
            ))
    for c in set(r["condition"] for r in rows):
        idx = [i for i, r in enumerate(rows) if r["condition"] == c]
        q = fdr_bh([rows[i]["p_value_residue"] for i in idx])
        for i, qi in zip(idx, q):
            r = rows[i]
            r["q_value_residue"] = float(qi)
            r["locked"] = bool(np.isfinite(qi) and qi < alpha)
            # locking an ordinary test sees but the residue null explains
            r["flagged_residue"] = bool(r["p_value"] < alpha and not r["p_value_residue"] < alpha)
    comps = []
    for u in np.unique(units):
        for c in sorted({r["condition"] for r in rows if r["condition"].startswith("stim")}):
            sel = (units == u) & ((cond == c) | (cond == "sham"))
            if not np.any(cond[sel] == "sham") or not np.any(cond[sel] == c):
                continue
            in_a = cond[sel] == c
            diff, p_perm = _perm_difference(ph[sel], grp[sel], in_a, rng, n_perm)
            row = dict(unit=u.item() if hasattr(u, "item") else u, condition=c, versus="sham",
                       ppc_difference=float(diff), p_value_permutation=p_perm)
            if equivalence is not None:
                per_block = {g: ppc(ph[sel][grp[sel] == g]) for g in np.unique(grp[sel])}
                xa = [per_block[g] for g in np.unique(grp[sel][in_a])]
                xb = [per_block[g] for g in np.unique(grp[sel][~in_a])]
                try:
                    t = tost_ind(xa, xb, *equivalence)
                    row.update(equivalence_bounds=list(equivalence), p_value_equivalence=t["p"])
                except ValueError as err:
                    row.update(equivalence_bounds=list(equivalence), p_value_equivalence=None,
                               equivalence_note=str(err))
            comps.append(row)
    return dict(units=rows, comparisons=comps, alpha=alpha, seed=seed,
                phase_convention="degrees in [0, 360); 0 = positive peak of the stimulation fundamental")
