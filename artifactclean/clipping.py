"""Amplifier clipping: find the samples that sat at the rails.

Clipped samples are unrecoverable (common practice: detect samples at the
rails and mask them). They are excluded from every fit, blanked in the
cleaned output and reported, never filled with invented values.
"""

from __future__ import annotations

import numpy as np

__all__ = ["find_clipped", "mask_runs"]


def find_clipped(
    data: np.ndarray,
    *,
    clip_level: float | None = None,
    min_run: int = 2,
    dilate: int = 1,
) -> np.ndarray:
    """Boolean mask of samples at the amplifier rails.

    Parameters
    ----------
    data : ndarray, shape (n_channels, n_samples)
    clip_level : float, optional
        Known rail (same unit as ``data``): samples with ``|x| >= clip_level``
        are clipped. Without it, a channel counts as clipped at its maximum
        (minimum) when that exact value recurs in runs of at least
        ``min_run`` consecutive samples, which a continuous signal plus noise
        practically never does.
    min_run : int
        Shortest run of identical extreme values taken as a rail.
    dilate : int
        Samples on each side of a clipped run also masked (the amplifier's
        recovery from saturation).

    Returns
    -------
    ndarray of bool, same shape as ``data``
    """
    x = np.atleast_2d(data)
    mask = np.zeros(x.shape, dtype=bool)
    for ch in range(x.shape[0]):
        row = x[ch]
        if clip_level is not None:
            m = np.abs(row) >= clip_level
        else:
            m = np.zeros(row.size, dtype=bool)
            for rail in (row.max(), row.min()):
                at = row == rail
                if at.sum() >= min_run:
                    # runs of identical values at the extreme: a rail, not a peak
                    runs = [(a, b) for a, b in mask_runs(at) if b - a >= min_run]
                    if runs:
                        m |= at
        if dilate and m.any():
            c = np.cumsum(np.concatenate(([0], m.astype(np.int32))))
            lo = np.clip(np.arange(row.size) - dilate, 0, row.size)
            hi = np.clip(np.arange(row.size) + dilate + 1, 0, row.size)
            m = (c[hi] - c[lo]) > 0
        mask[ch] = m
    return mask.reshape(np.shape(data))


def mask_runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Half-open ``(start, stop)`` index pairs of the True runs in a 1-D mask."""
    d = np.diff(np.concatenate(([0], np.asarray(mask, dtype=np.int8), [0])))
    return list(zip(np.flatnonzero(d == 1).tolist(), np.flatnonzero(d == -1).tolist()))
