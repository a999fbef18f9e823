"""Amplifier clipping: find the samples that sat at the rails.

Clipped samples are unrecoverable (common practice: detect samples at the
rails and mask them). They are excluded from every fit, blanked in the
cleaned output and reported, never filled with invented values.
"""

from __future__ import annotations

import numpy as np

__all__ = ["find_clipped", "find_rails", "mask_runs", "rail_rule"]


def find_rails(data: np.ndarray, *, min_run: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Per-channel rails: the maximum (minimum) where that exact value recurs in runs.

    A continuous signal plus noise practically never repeats its extreme
    value on consecutive samples; an amplifier at saturation does, at every
    peak that reaches the rail and for as long as it stays there. A rail
    needs two runs of at least ``min_run`` samples at the extreme, or one of
    ``min_run + 1`` (:func:`rail_rule`): behind an amplifier's low-pass a
    peak's two largest samples can round to one value (a 3 kHz filter at 30
    kHz with a 0.195 uV step: a single pair at the extreme on 2-3 of four
    channels of a 20 s trace, taken for a rail until session 38). Channels
    without a rail get +inf (-inf).
    """
    x = np.atleast_2d(data)
    hi = np.full(x.shape[0], np.inf)
    lo = np.full(x.shape[0], -np.inf)
    top, bottom = (x.max(axis=1), x.min(axis=1)) if x.shape[1] else (np.zeros(x.shape[0]),) * 2
    for ch in range(x.shape[0]):
        row = x[ch]
        if top[ch] == bottom[ch]:
            continue  # flat: constant, not clipped
        for rail, out in ((top[ch], hi), (bottom[ch], lo)):
            at = row == rail
            # two equal neighbours at the extreme make a run; only then look at the runs
            if np.any(at[1:] & at[:-1]):
                long = [b - a for a, b in mask_runs(at) if b - a >= min_run]
                if rail_rule(len(long), max(long, default=0), min_run):
                    out[ch] = rail
    return hi, lo


def rail_rule(n_runs: int, longest: int, min_run: int = 2) -> bool:
    """Whether a channel's extreme is a rail, from its ``n_runs`` runs of at least ``min_run`` samples there and
    the ``longest`` (see :func:`find_rails`; :func:`artifactclean.io.pipeline.scan_recording` reads them chunk by
    chunk)."""
    return n_runs >= 2 or longest > min_run


def find_clipped(
    data: np.ndarray,
    *,
    clip_level=None,
    min_run: int = 2,
    dilate: int = 1,
) -> np.ndarray:
    """Boolean mask of samples at the amplifier rails.

    Parameters
    ----------
    data : ndarray, shape (n_channels, n_samples)
    clip_level : float or (ndarray, ndarray), optional
        Known rail (same unit as ``data``): samples with ``|x| >= clip_level``
        are clipped; or per-channel ``(upper, lower)`` rails. Without it the
        rails come from :func:`find_rails`.
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
    if clip_level is None:
        hi, lo = find_rails(x, min_run=min_run)
    elif np.ndim(clip_level) == 0:
        hi = np.full(x.shape[0], float(clip_level))
        lo = -hi
    else:
        hi, lo = (np.asarray(v, dtype=float).reshape(-1) for v in clip_level)
    mask = np.zeros(x.shape, dtype=bool)
    for ch in np.flatnonzero(np.isfinite(hi) | np.isfinite(lo)):
        # most channels have no rail: they cost nothing here
        mask[ch] = (x[ch] >= hi[ch]) | (x[ch] <= lo[ch])
    if dilate and mask.any():
        for ch in np.flatnonzero(mask.any(axis=1)):
            m = mask[ch]
            c = np.cumsum(np.concatenate(([0], m.astype(np.int32))))
            idx = np.arange(m.size)
            mask[ch] = (c[np.clip(idx + dilate + 1, 0, m.size)] - c[np.clip(idx - dilate, 0, m.size)]) > 0
    return mask.reshape(np.shape(data))


def mask_runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Half-open ``(start, stop)`` index pairs of the True runs in a 1-D mask."""
    edge = np.zeros(1, dtype=np.int8)  # int8 throughout: a mask of a long record is not widened to int64
    d = np.diff(np.concatenate((edge, np.asarray(mask, dtype=np.int8), edge)))
    return list(zip(np.flatnonzero(d == 1).tolist(), np.flatnonzero(d == -1).tolist()))
