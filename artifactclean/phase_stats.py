"""Circular statistics of spike phases.

Formulas: phase-locking value ``R = |mean(exp(i theta))|``; pairwise phase
consistency ``PPC = (N R^2 - 1) / (N - 1)``, the unbiased estimator of
``R^2`` (Vinck et al. 2010, NeuroImage 51:112-122); its across-trial
variant, which pairs only spikes of different trials (blocks) so that a
unit's own rhythm within a trial does not count (PPC1 of Vinck et al. 2012,
J Comput Neurosci 33:53-75); the Rayleigh test with Zar's p-value
approximation (Zar 1999, Biostatistical Analysis, 4th ed., eq. 27.4); a
confidence interval of the mean direction (Zar 1999, eqs. 26.24-26.25, from
memory); Benjamini-Hochberg false-discovery control (Benjamini & Hochberg
1995, J R Stat Soc B 57:289); two one-sided t-tests for equivalence
(Schuirmann 1987, J Pharmacokinet Biopharm 15:657).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

__all__ = ["plv", "ppc", "ppc_across", "preferred_phase", "rayleigh", "mean_direction_ci", "fdr_bh", "tost_ind"]


def _clean_phases(phases) -> np.ndarray:
    p = np.asarray(phases, dtype=np.float64).ravel()
    return p[np.isfinite(p)]


def plv(phases) -> float:
    """Phase-locking value (mean resultant length) of ``phases`` (rad); NaN if empty."""
    p = _clean_phases(phases)
    if p.size == 0:
        return float("nan")
    return float(np.abs(np.mean(np.exp(1j * p))))


def ppc(phases) -> float:
    """Pairwise phase consistency (Vinck et al. 2010); NaN for fewer than 2 phases."""
    p = _clean_phases(phases)
    n = p.size
    if n < 2:
        return float("nan")
    s = np.abs(np.sum(np.exp(1j * p))) ** 2
    return float((s - n) / (n * (n - 1)))


def preferred_phase(phases) -> float:
    """Circular mean direction in [0, 2 pi); NaN if empty."""
    p = _clean_phases(phases)
    if p.size == 0:
        return float("nan")
    return float(np.mod(np.angle(np.mean(np.exp(1j * p))), 2 * np.pi))


def ppc_across(phases, groups) -> float:
    """PPC over pairs of spikes from different groups (trials, blocks) only; NaN if none.

    ``(|sum_all|^2 - sum_g |sum_g|^2) / (N^2 - sum_g N_g^2)`` with ``sum`` of
    ``exp(i theta)``: the mean of ``cos(theta_j - theta_k)`` over pairs in
    different groups (Vinck et al. 2012, PPC1).
    """
    p = np.asarray(phases, dtype=np.float64).ravel()
    g = np.asarray(groups).ravel()
    if g.size != p.size:
        raise ValueError(f"groups has {g.size} labels for {p.size} phases")
    ok = np.isfinite(p)
    p, g = p[ok], g[ok]
    z = np.exp(1j * p)
    total = np.abs(z.sum()) ** 2
    within = 0.0
    pairs = float(p.size) ** 2
    for lab in np.unique(g):
        zg = z[g == lab]
        within += np.abs(zg.sum()) ** 2
        pairs -= float(zg.size) ** 2
    return float((total - within) / pairs) if pairs > 0 else float("nan")


def rayleigh(phases) -> dict:
    """Rayleigh test of uniformity: ``R`` (mean resultant length), ``z = n R^2`` and ``p`` (Zar)."""
    p = _clean_phases(phases)
    n = p.size
    if n == 0:
        return dict(n=0, R=float("nan"), z=float("nan"), p=float("nan"))
    r = plv(p)
    z = n * r * r
    big_r = n * r
    pval = np.exp(np.sqrt(1 + 4 * n + 4 * (n * n - big_r * big_r)) - (1 + 2 * n))
    return dict(n=int(n), R=float(r), z=float(z), p=float(min(max(pval, 0.0), 1.0)))


def mean_direction_ci(phases, alpha: float = 0.05) -> tuple[float, float]:
    """Confidence interval (rad, ends in [0, 2 pi)) of the mean direction; NaNs if too weakly locked.

    Zar's formulas for the half-width ``d`` (chi-square with one degree of
    freedom); no interval exists when the resultant is too short for the
    sample size (the mean direction is not determined).
    """
    p = _clean_phases(phases)
    n = p.size
    if n < 2:
        return float("nan"), float("nan")
    r_bar = plv(p)
    big_r = n * r_bar
    chi = stats.chi2.ppf(1 - alpha, 1)
    if r_bar <= 0.9:
        if r_bar <= np.sqrt(chi / (2 * n)):
            return float("nan"), float("nan")
        arg = np.sqrt(2 * n * (2 * big_r ** 2 - n * chi) / (4 * n - chi)) / big_r
    else:
        arg = np.sqrt(n * n - (n * n - big_r ** 2) * np.exp(chi / n)) / big_r
    d = float(np.arccos(np.clip(arg, -1.0, 1.0)))
    m = preferred_phase(p)
    return float(np.mod(m - d, 2 * np.pi)), float(np.mod(m + d, 2 * np.pi))


def fdr_bh(pvalues) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (q-values); NaNs stay NaN."""
    p = np.asarray(pvalues, dtype=np.float64)
    q = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    m = int(ok.sum())
    if m == 0:
        return q
    order = np.argsort(p[ok])
    ranked = p[ok][order] * m / np.arange(1, m + 1)
    adj = np.minimum.accumulate(ranked[::-1])[::-1]
    out = np.empty(m)
    out[order] = np.minimum(adj, 1.0)
    q[ok] = out
    return q


def tost_ind(x1, x2, low: float, upp: float) -> dict:
    """Two one-sided t-tests that ``mean(x1) - mean(x2)`` lies within ``(low, upp)`` (pooled variance).

    Returns ``p`` (the larger one-sided p-value: equivalence is claimed when
    it is below alpha), ``p_lower``, ``p_upper``, ``diff``.
    """
    a = np.asarray(x1, dtype=np.float64)
    b = np.asarray(x2, dtype=np.float64)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size < 2 or b.size < 2:
        raise ValueError(f"equivalence test needs at least 2 values per condition, got {a.size} and {b.size}")
    if not low < upp:
        raise ValueError(f"equivalence bounds must satisfy low < upp, got ({low}, {upp})")
    n1, n2 = a.size, b.size
    df = n1 + n2 - 2
    sp2 = ((n1 - 1) * a.var(ddof=1) + (n2 - 1) * b.var(ddof=1)) / df
    se = np.sqrt(sp2 * (1 / n1 + 1 / n2))
    diff = a.mean() - b.mean()
    p_lower = stats.t.sf((diff - low) / se, df)   # H0: diff <= low
    p_upper = stats.t.cdf((diff - upp) / se, df)  # H0: diff >= upp
    return dict(p=float(max(p_lower, p_upper)), p_lower=float(p_lower), p_upper=float(p_upper), diff=float(diff))
