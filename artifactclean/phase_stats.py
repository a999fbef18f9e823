"""Circular statistics of spike phases.

Formulas: phase-locking value ``R = |mean(exp(i theta))|``; pairwise phase
consistency ``PPC = (N R^2 - 1) / (N - 1)``, the unbiased estimator of
``R^2`` (Vinck et al. 2010, NeuroImage 51:112-122).
"""

from __future__ import annotations

import numpy as np

__all__ = ["plv", "ppc", "preferred_phase"]


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
