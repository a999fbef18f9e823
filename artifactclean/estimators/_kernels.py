"""Compiled inner loops of the template estimator.

Each kernel has a plain-numpy twin; the estimator uses the compiled one when
numba is installed and the numpy one otherwise. ``tests/test_kernels.py``
checks that both give the same numbers. The loops are fused so that each
pass reads the recording once instead of once per numpy operation.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage, signal

from .._numeric import fractional_part

try:  # numba installs from wheels on the common platforms; the library runs without it
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover - exercised where numba is absent
    numba = None
    HAVE_NUMBA = False

__all__ = ["HAVE_NUMBA", "PhaseGrid", "phase_eval", "phase_position", "phase_sums", "tick_sums", "grouped_eval", "tick_eval", "segment_stats", "quadrature_sums", "gain_sums",
           "highpass_residual", "linear_envelope", "outlier_flags", "settled_keys",
           "lerp_positions", "lerp_rows", "SegmentPositions", "widen_flags"]


def _jit(fn):
    if HAVE_NUMBA:
        return numba.njit(cache=True, nogil=True)(fn)
    return None


# ----------------------------------------------------------------------------- numpy twins


def _group(a: np.ndarray, n_bins: int, stride: int, n_groups: int) -> np.ndarray:
    """Sum a (n_ch, n_rows * n_bins) grid over groups of ``stride`` rows -> (n_ch, n_groups, n_bins)."""
    n_ch = a.shape[0]
    rows = a.shape[1] // n_bins
    full = np.zeros((n_ch, n_groups * stride * n_bins))
    full[:, : rows * n_bins] = a
    return full.reshape(n_ch, n_groups, stride, n_bins).sum(axis=2)


def phase_sums_np(x, w, gain, gi, ga, inside, n_bins, stride, n_groups):
    """Weighted sums on the phase grid per group of cycles: S = w g r, G = w g^2, r resampled linearly."""
    r = (1 - ga) * x[:, gi] + ga * x[:, gi + 1]
    # a bin is usable only if both samples it is read from are
    wr = w[:, gi] * w[:, gi + 1] * inside
    gr = np.take(gain, gi, axis=1)
    wgr = wr * gr
    return _group(wgr * r, n_bins, stride, n_groups), _group(wgr * gr, n_bins, stride, n_groups)


def tick_sums_np(x, w, gain, key, n_bins, stride, n_groups):
    """Sums of w g x and w g^2 over the samples of each DAC tick, per group of cycles."""
    n_ch = x.shape[0]
    n_grid = (int(key.max()) // n_bins + 1) * n_bins
    s = np.zeros((n_ch, n_grid))
    g = np.zeros((n_ch, n_grid))
    starts = np.concatenate(([0], np.flatnonzero(np.diff(key)) + 1))
    wg = w * gain
    s[:, key[starts]] = np.add.reduceat(wg * x, starts, axis=-1)
    g[:, key[starts]] = np.add.reduceat(wg * gain, starts, axis=-1)
    return _group(s, n_bins, stride, n_groups), _group(g, n_bins, stride, n_groups)


def grouped_eval_np(t, n_bins, i0, i1, beta, b0, b1, alpha):
    """Template read back at each sample, interpolated between group centres and bins.

    ``t`` has shape (n_ch, n_groups * n_bins); ``i0, i1, beta`` place the sample
    between two group templates, ``b0, b1, alpha`` between two bins.
    """
    i0, i1, b0, b1 = (np.asarray(v, dtype=np.int64) for v in (i0, i1, b0, b1))  # int32 indices: no overflow
    lo = (1 - alpha) * t[:, i0 * n_bins + b0] + alpha * t[:, i0 * n_bins + b1]
    hi = (1 - alpha) * t[:, i1 * n_bins + b0] + alpha * t[:, i1 * n_bins + b1]
    return (1 - beta) * lo + beta * hi


def group_position(cycle_pos: np.ndarray, stride: int, n_groups: int):
    """Two neighbouring group templates and the weight of the second, for cycle positions.

    Group ``i`` holds cycles ``i*stride .. (i+1)*stride - 1``; its centre is at
    cycle position ``(i + 0.5) * stride``.
    """
    q = cycle_pos / stride - 0.5
    # indices of the data's length in the narrowest integer that holds them (memory; the same values)
    i0 = np.clip(np.floor(q).astype(np.int64), 0, n_groups - 1).astype(index_dtype(n_groups))
    beta = np.clip(q - i0, 0.0, 1.0)
    i1 = np.minimum(i0 + 1, n_groups - 1)
    return i0, i1, beta


def index_dtype(n: int):
    """``int32`` for indices below ``n`` when it fits, else ``int64``: arrays of indices as long as the
    data are a large part of a fit's memory (:attr:`ArtifactEstimator.memory_per_sample`)."""
    return np.int32 if n < 2**31 else np.int64


#: samples (or grid positions) per piece where positions are computed from the phase with numpy
PIECE = 1 << 16


def piece_bounds(n: int, piece: int = PIECE):
    """``(lo, hi)`` of consecutive pieces of ``range(n)``, ``piece`` long (the last shorter)."""
    for lo in range(0, n, piece):
        yield lo, min(lo + piece, n)


def phase_position(u, row0, n_bins, stride, n_groups):
    """``(i0, i1, beta, b0, b1, alpha)`` of phases ``u`` (cycles): the two group templates and the two
    bin centres each phase lies between (row ``row0`` starts group 0), for :func:`grouped_eval`."""
    uc = u - row0
    bpos = fractional_part(uc) * n_bins - 0.5
    b0f = np.floor(bpos).astype(np.int64)
    alpha = bpos - b0f
    dt = index_dtype(n_bins)
    return group_position(uc, stride, n_groups) + (np.mod(b0f, n_bins).astype(dt), np.mod(b0f + 1, n_bins).astype(dt),
                                                   alpha)


def phase_eval(t, n_bins, u, row0, stride, n_groups, *, out=None, compiled: bool = True, piece: int = PIECE):
    """Templates ``t`` (n_ch, n_groups * n_bins) read back at phases ``u``: :func:`grouped_eval` at
    :func:`phase_position`, whose arithmetic the compiled loop does inline (no arrays of positions)."""
    if out is None:
        out = np.empty((t.shape[0], u.size))
    if compiled and HAVE_NUMBA:
        _phase_eval_c(np.ascontiguousarray(t, dtype=np.float64), int(n_bins), np.ascontiguousarray(u, dtype=np.float64),
                      int(row0), int(stride), int(n_groups), out)
        return out
    for lo, hi in piece_bounds(u.size, piece):
        out[:, lo:hi] = grouped_eval_np(t, n_bins, *phase_position(u[lo:hi], row0, n_bins, stride, n_groups))
    return out


class PhaseGrid:
    """Where a block's samples meet the template's phase grid, computed from the phase when needed.

    The template resamples each cycle at its bin centres and reads the
    templates back at every sample's phase. Within a block the phase ``u``
    (cycles) is linear in samples, so both placements follow from ``u`` and
    a few numbers: the grid position ``j`` (row ``j // n_bins`` from
    ``row0``) sits at sample ``(row0 + (j + 0.5) / n_bins - u[0]) / slope``.
    The compiled kernels compute them inline; the six index and weight
    arrays of the block's length they replace held 7.5 float64 values per
    sample, most of a one-channel fit's memory. :meth:`sampler` and
    :meth:`reader` give the arrays themselves (the numpy twins, and rare
    paths, use them in pieces); the kernels do the same arithmetic, so the
    results are equal to the bit.

    Parameters
    ----------
    u : ndarray, shape (n,)
        The block's phase in cycles at each sample (linear, n >= 2).
    row0 : int
        The first row (cycle) of the grid.
    n_bins, stride, n_groups : int
        Bins per row, rows per template group, groups.
    n_grid : int
        Grid positions (rows x bins).
    """

    def __init__(self, u: np.ndarray, row0: int, n_bins: int, stride: int, n_groups: int, n_grid: int):
        self.u = u
        self.row0 = int(row0)
        self.n_bins, self.stride, self.n_groups, self.n_grid = int(n_bins), int(stride), int(n_groups), int(n_grid)
        self.slope = (u[-1] - u[0]) / max(u.size - 1, 1)

    @property
    def n(self) -> int:
        return self.u.size

    def sampler(self, lo: int = 0, hi: int | None = None):
        """``(gi, ga, inside)`` of grid positions ``lo..hi``: the sample before each, its weight, and
        whether it lies within the block."""
        hi = self.n_grid if hi is None else hi
        n = self.n
        u_grid = self.row0 + (np.arange(lo, hi) + 0.5) / self.n_bins
        n_g = (u_grid - self.u[0]) / self.slope
        inside = ((n_g >= 0) & (n_g <= n - 1)).astype(np.float64)
        gi = np.clip(np.floor(n_g).astype(np.int64), 0, n - 2).astype(index_dtype(n))
        ga = np.clip(n_g - gi, 0.0, 1.0)
        return gi, ga, inside

    def reader(self, lo: int = 0, hi: int | None = None):
        """``(i0, i1, beta, b0, b1, alpha)`` of samples ``lo..hi`` (see :func:`phase_position`)."""
        return phase_position(self.u[lo:hi], self.row0, self.n_bins, self.stride, self.n_groups)

    def sums(self, x, w, gain, *, compiled: bool = True):
        """:func:`phase_sums` on this grid: (n_ch, n_groups, n_bins) sums of w g r and w g^2."""
        if not (compiled and HAVE_NUMBA):
            return phase_sums_np(x, w, gain, *self.sampler(), self.n_bins, self.stride, self.n_groups)
        s = np.zeros((x.shape[0], self.n_groups * self.n_bins))
        g = np.zeros_like(s)
        _grid_sums_c(x, w, gain, float(self.u[0]), float(self.slope), self.row0, self.n_grid, self.n_bins,
                     self.stride, s, g)
        return s.reshape(-1, self.n_groups, self.n_bins), g.reshape(-1, self.n_groups, self.n_bins)

    def read(self, t, *, out=None, compiled: bool = True):
        """The templates ``t`` read back at every sample (:func:`phase_eval`), into ``out`` if given."""
        return phase_eval(t, self.n_bins, self.u, self.row0, self.stride, self.n_groups, out=out, compiled=compiled)

    def read_any(self, flags, *, compiled: bool = True, piece: int = PIECE) -> np.ndarray:
        """Whether any of the four grid cells each sample is read from is set in ``flags``
        (n_ch, n_groups * n_bins; float64, 1 where set): True where a flagged cell has any weight."""
        out = np.empty((flags.shape[0], self.n), dtype=bool)
        for lo, hi in piece_bounds(self.n, piece):
            i0, i1, _, b0, b1, _ = self.reader(lo, hi)
            half = np.full(hi - lo, 0.5)
            out[:, lo:hi] = grouped_eval(flags, self.n_bins, i0, i1, half, b0, b1, half, compiled=compiled) > 0
        return out


def tick_eval_np(t, key, n_bins, stride, n_groups):
    """Template at DAC tick keys (row * n_bins + tick), interpolated between the two nearest group centres.

    A tick is read at its own bin (no interpolation between bins: its
    samples share one held value), at the cycle position of the tick's centre.
    """
    row, b = np.divmod(key, n_bins)
    i0, i1, beta = group_position(row + (b + 0.5) / n_bins, stride, n_groups)
    return grouped_eval_np(t, n_bins, i0, i1, beta, b, b, np.zeros(key.size))


def segment_stats_np(x, w, t, seg_starts, env=None):
    """Per gain segment, about each segment's own (weighted) means: sum w x t, sum w t^2, sum t^2, and where.

    Centring makes the fitted gain blind to an offset over the segment (the
    slow LFP over part of a cycle, where the template's mean is not zero).
    The fourth output is the sample (from the segment's start) a gain
    fitted this way stands for: a gain ``g(i)`` linear over the segment
    gives ``num / den = g(centre)`` with ``centre = sum w i t (t - mean t) /
    den``, the template-weighted centre, which is not the segment's middle
    and can lie outside the segment where the weights change sign (0 where
    ``den`` is 0). With ``env`` (n,), the template is ``t * env``.
    """
    if env is not None:
        t = t * env
    red = lambda v: np.add.reduceat(v, seg_starts, axis=-1)  # noqa: E731
    sw = np.maximum(red(w), 1e-300)
    sx, st = red(w * x), red(w * t)
    num = red(w * x * t) - sx * st / sw
    den = red(w * t * t) - st * st / sw
    n = np.diff(np.append(seg_starts, x.shape[-1]))
    full = red(t * t) - red(t) ** 2 / n
    pos = np.arange(x.shape[-1]) - np.repeat(seg_starts, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = np.where(den > 0, (red(w * pos * t * t) - st / sw * red(w * pos * t)) / np.where(den > 0, den, 1.0), 0.0)
    return num, den, full, centre


def highpass_residual_np(sos, x, t, gain, w):
    """``|sosfilt(sos, (x - gain t) * (w > 0))|`` along the last axis (``gain`` None means 1)."""
    r = x - (t if gain is None else gain * t)
    return np.abs(signal.sosfilt(sos, r * (w > 0), axis=-1))


def outlier_flags_np(hp, w, bounds, scale):
    """Flags of ``hp > max(scale * median, 99th percentile, 1e-12)`` per stretch, where ``w > 0``, and the thresholds.

    The median and the 99th percentile are :func:`numpy.quantile`'s (linear
    interpolation) of the stretch's samples with ``w > 0``; stretches with
    fewer than 16 such samples flag nothing (threshold nan).
    """
    bad = np.zeros(hp.shape, dtype=bool)
    thresholds = np.full((hp.shape[0], len(bounds) - 1), np.nan)
    for ch in range(hp.shape[0]):
        for s, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
            _stretch_flags_np(hp, w, ch, s, a, b, scale, bad, thresholds)
    return bad, thresholds


def _stretch_flags_np(hp, w, ch, s, a, b, scale, bad, thresholds):
    seg, ok = hp[ch, a:b], w[ch, a:b] > 0
    use = seg[ok]
    if use.size < 16:
        return
    med, q99 = np.quantile(use, [0.5, 0.99])  # one partition for both
    thresholds[ch, s] = thr = max(scale * med, q99, 1e-12)
    bad[ch, a:b] = (seg > thr) & ok


def settled_keys_np(base, chosen):
    """``numpy.maximum.accumulate`` of ``base`` with ``values`` put at ``samples`` for each pair in ``chosen``, in turn."""
    new = base.copy()
    for samples, values in chosen:
        new[samples] = values
    return np.maximum.accumulate(new)


def linear_envelope_np(i, start, up_stop, down_start, stop, floor):
    """A block's envelope with linear ramps at positions ``i``: ``max(clip(min(up, down), 0, 1), floor)``."""
    up = (i - start) / max(up_stop - start, 1)
    down = (stop - i) / max(stop - down_start, 1)
    return np.maximum(np.clip(np.minimum(up, down), 0.0, 1.0), floor)


def widen_flags_np(bad, half):
    """Flags widened by ``half`` samples on either side, along the last axis."""
    return ndimage.maximum_filter1d(bad, 2 * half + 1, axis=-1, mode="constant", cval=False)


def lerp_positions(xp: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Where each of the sorted ``x`` falls between the sorted knots ``xp``: left knot and fraction.

    Outside the knots the fraction is clipped to 0 or 1, so :func:`lerp_rows`
    holds the end values, as :func:`numpy.interp` does.
    """
    j = np.clip(np.searchsorted(xp, x, side="right") - 1, 0, max(xp.size - 2, 0)).astype(index_dtype(xp.size))
    if xp.size < 2:
        return j, np.zeros(x.size)
    frac = np.clip((x - xp[j]) / (xp[j + 1] - xp[j]), 0.0, 1.0)
    return j, frac


class SegmentPositions:
    """Where each of the sorted samples ``x`` falls between the sorted knots ``xp``, found a chunk at a time
    whenever rows of values at the knots are read there (:meth:`read`).

    :func:`lerp_positions` of a whole block held an index and a fraction per sample through every pass
    (1.5 float64 values a sample beside a one-channel task's 11); read a chunk at a time, the same numbers.
    Compiled, one loop walks the samples and the knots together and interpolates as it goes (no search
    per sample, no position arrays), with the same arithmetic: the same bits.
    """

    #: samples placed at once
    chunk = 1 << 16

    def __init__(self, xp: np.ndarray, x: np.ndarray) -> None:
        self.xp, self.x = xp, x

    def read(self, fp: np.ndarray, out: np.ndarray | None = None, *, compiled: bool = True) -> np.ndarray:
        """Each row of ``fp`` (n_rows, n_knots) at every sample (:func:`lerp_rows`), into ``out`` if given."""
        n = self.x.size
        if out is None:
            out = np.empty((fp.shape[0], n))
        if compiled and HAVE_NUMBA and fp.shape[1] >= 2:
            # one walk along samples and knots together: no search per sample (sorted against sorted),
            # no index or fraction arrays; the arithmetic of lerp_positions and lerp_rows, so the same bits
            _lerp_sorted_c(np.ascontiguousarray(self.xp, dtype=np.float64), np.ascontiguousarray(self.x),
                           np.ascontiguousarray(fp, dtype=np.float64), out)
            return out
        for c0 in range(0, n, self.chunk):
            c1 = min(n, c0 + self.chunk)
            out[:, c0:c1] = lerp_rows(fp, *lerp_positions(self.xp, self.x[c0:c1]), compiled=compiled)
        return out


def lerp_rows_np(fp, j, frac, out):
    """Rows of ``fp`` read at positions (``j``, ``frac``) from :func:`lerp_positions`, into ``out``."""
    if fp.shape[1] < 2:
        out[:] = fp[:, :1]
        return out
    lo = fp[:, j]
    np.multiply(fp[:, j + 1] - lo, frac, out=out)
    out += lo
    return out


# ----------------------------------------------------------------------------- compiled


def _phase_sums_loop(x, w, gain, gi, ga, inside, n_bins, stride, s_out, g_out):
    n_ch = x.shape[0]
    for ch in range(n_ch):
        for j in range(gi.size):
            i = gi[j]
            wr = w[ch, i] * w[ch, i + 1] * inside[j]
            if wr == 0.0:
                continue
            a = ga[j]
            r = (1 - a) * x[ch, i] + a * x[ch, i + 1]
            wgr = wr * gain[ch, i]
            row = j // n_bins
            k = (row // stride) * n_bins + (j - row * n_bins)
            s_out[ch, k] += wgr * r
            g_out[ch, k] += wgr * gain[ch, i]


def _grid_sums_loop(x, w, gain, u0, slope, row0, n_grid, n_bins, stride, s_out, g_out):
    # _phase_sums_loop with PhaseGrid.sampler's arithmetic inline, operation for operation
    n_ch, n = x.shape
    # the grid point's bin, its row's place in its group and the group, counted along (no integer
    # division per point): k = (row // stride) * n_bins + bin
    b = 0
    in_group = 0
    k0 = 0
    for j in range(n_grid):
        ng = ((row0 + (j + 0.5) / n_bins) - u0) / slope
        inside = 1.0 if (ng >= 0 and ng <= n - 1) else 0.0
        i = min(max(np.int64(np.floor(ng)), 0), n - 2)
        a = min(max(ng - i, 0.0), 1.0)
        k = k0 + b
        b += 1
        if b == n_bins:
            b = 0
            in_group += 1
            if in_group == stride:
                in_group = 0
                k0 += n_bins
        for ch in range(n_ch):
            wr = w[ch, i] * w[ch, i + 1] * inside
            if wr == 0.0:
                continue
            r = (1 - a) * x[ch, i] + a * x[ch, i + 1]
            wgr = wr * gain[ch, i]
            s_out[ch, k] += wgr * r
            g_out[ch, k] += wgr * gain[ch, i]


def _tick_sums_loop(x, w, gain, key, n_bins, stride, s_out, g_out):
    # a tick's samples share its key: the cell (two integer divisions) is found once per run of them
    n_ch, n = x.shape
    for ch in range(n_ch):
        have = False
        prev = 0
        k = 0
        for i in range(n):
            wg = w[ch, i] * gain[ch, i]
            if wg == 0.0:
                continue
            if not have or key[i] != prev:
                have = True
                prev = key[i]
                row = prev // n_bins
                k = (row // stride) * n_bins + (prev - row * n_bins)
            s_out[ch, k] += wg * x[ch, i]
            g_out[ch, k] += wg * gain[ch, i]


def _grouped_eval_loop(t, n_bins, i0, i1, beta, b0, b1, alpha, out):
    n_ch = t.shape[0]
    for ch in range(n_ch):
        for i in range(i0.size):
            a = alpha[i]
            r0 = i0[i] * n_bins
            r1 = i1[i] * n_bins
            lo = (1 - a) * t[ch, r0 + b0[i]] + a * t[ch, r0 + b1[i]]
            hi = (1 - a) * t[ch, r1 + b0[i]] + a * t[ch, r1 + b1[i]]
            out[ch, i] = (1 - beta[i]) * lo + beta[i] * hi


def _phase_eval_loop(t, n_bins, u, row0, stride, n_groups, out):
    # _grouped_eval_loop at PhaseGrid.reader's positions, computed inline operation for operation
    last = n_groups - 1
    for i in range(u.size):
        uc = u[i] - row0
        q = uc / stride - 0.5
        i0 = min(max(np.int64(np.floor(q)), 0), last)
        beta = min(max(q - i0, 0.0), 1.0)
        i1 = min(i0 + 1, last)
        # np.mod(uc, 1.0) with a floor for its division (exact either way: the same bits), and the bins'
        # wrap-around only where a bin falls outside the cycle
        bpos = (uc - np.floor(uc)) * n_bins - 0.5
        b0f = np.int64(np.floor(bpos))
        a = bpos - b0f
        b0 = b0f if 0 <= b0f < n_bins else b0f % n_bins
        b1 = b0f + 1 if 0 <= b0f + 1 < n_bins else (b0f + 1) % n_bins
        r0 = i0 * n_bins
        r1 = i1 * n_bins
        for ch in range(t.shape[0]):
            lo = (1 - a) * t[ch, r0 + b0] + a * t[ch, r0 + b1]
            hi = (1 - a) * t[ch, r1 + b0] + a * t[ch, r1 + b1]
            out[ch, i] = (1 - beta) * lo + beta * hi


def _tick_eval_loop(t, key, n_bins, stride, n_groups, out):
    # tick_eval_np's arithmetic, operation for operation, without its five index arrays of the data's size;
    # a sample with its predecessor's key takes its values (a tick's samples share one)
    last = n_groups - 1
    for i in range(key.size):
        if i > 0 and key[i] == key[i - 1]:
            for ch in range(t.shape[0]):
                out[ch, i] = out[ch, i - 1]
            continue
        row = key[i] // n_bins
        b = key[i] - row * n_bins
        q = (row + (b + 0.5) / n_bins) / stride - 0.5
        i0 = min(max(np.int64(np.floor(q)), 0), last)
        beta = min(max(q - i0, 0.0), 1.0)
        i1 = min(i0 + 1, last)
        r0 = i0 * n_bins + b
        r1 = i1 * n_bins + b
        for ch in range(t.shape[0]):
            lo = 1.0 * t[ch, r0] + 0.0 * t[ch, r0]
            hi = 1.0 * t[ch, r1] + 0.0 * t[ch, r1]
            out[ch, i] = (1 - beta) * lo + beta * hi


def _segment_stats_loop(x, w, t, env, use_env, seg_starts, num, den, full, centre):
    n_ch, n = x.shape
    n_seg = seg_starts.size
    for ch in range(n_ch):
        for k in range(n_seg):
            a = seg_starts[k]
            b = seg_starts[k + 1] if k + 1 < n_seg else n
            sw = 0.0
            sx = 0.0
            st = 0.0
            sxt = 0.0
            stt = 0.0
            su = 0.0
            sf = 0.0
            spt = 0.0
            sptt = 0.0
            for i in range(a, b):
                tt = t[ch, i] * env[i] if use_env else t[ch, i]
                wi = w[ch, i]
                sw += wi
                sx += wi * x[ch, i]
                st += wi * tt
                sxt += wi * tt * x[ch, i]
                stt += wi * tt * tt
                su += tt
                sf += tt * tt
                spt += wi * (i - a) * tt
                sptt += wi * (i - a) * tt * tt
            sw = max(sw, 1e-300)
            num[ch, k] = sxt - sx * st / sw
            d = stt - st * st / sw
            den[ch, k] = d
            full[ch, k] = sf - su * su / (b - a)
            centre[ch, k] = (sptt - st / sw * spt) / d if d > 0 else 0.0


def _quadrature_sums_loop(x, w, t, d, env, use_env, seg_starts, sxd, std_, sdd):
    n_ch, n = x.shape
    n_seg = seg_starts.size
    for ch in range(n_ch):
        for k in range(n_seg):
            a = seg_starts[k]
            b = seg_starts[k + 1] if k + 1 < n_seg else n
            sw = 0.0
            sx = 0.0
            st = 0.0
            sd = 0.0
            sxd_ = 0.0
            stdd = 0.0
            sddd = 0.0
            for i in range(a, b):
                e = env[i] if use_env else 1.0
                tt = t[ch, i] * e
                dd = d[ch, i] * e
                wi = w[ch, i]
                sw += wi
                sx += wi * x[ch, i]
                st += wi * tt
                sd += wi * dd
                sxd_ += wi * x[ch, i] * dd
                stdd += wi * tt * dd
                sddd += wi * dd * dd
            sw = max(sw, 1e-300)
            sxd[ch, k] = sxd_ - sx * sd / sw
            std_[ch, k] = stdd - st * sd / sw
            sdd[ch, k] = sddd - sd * sd / sw


def _gain_bin_sums_loop(x, w, b, cnt, sbx):
    # the order of the additions is that of numpy.bincount, so the sums agree to the bit
    for ch in range(x.shape[0]):
        for i in range(x.shape[1]):
            cnt[ch, b[i]] += w[ch, i]
            sbx[ch, b[i]] += w[ch, i] * x[ch, i]


def _gain_seg_sums_loop(x, w, b, seg, tmpl, pos, sw, sx, st, sxt, stt, spt, sptt):
    for ch in range(x.shape[0]):
        for i in range(x.shape[1]):
            k = seg[i]
            t = tmpl[ch, b[i]]
            wi = w[ch, i]
            sw[ch, k] += wi
            sx[ch, k] += wi * x[ch, i]
            st[ch, k] += wi * t
            sxt[ch, k] += wi * x[ch, i] * t
            stt[ch, k] += wi * t * t
            spt[ch, k] += wi * pos[i] * t
            sptt[ch, k] += wi * pos[i] * t * t


def _highpass_residual_loop(sos, x, t, gain, use_gain, w, out):
    # direct form II transposed, section by section per sample: the recursion of scipy.signal.sosfilt
    n_sec = sos.shape[0]
    z = np.zeros((n_sec, 2))
    for ch in range(x.shape[0]):
        z[:] = 0.0
        for i in range(x.shape[1]):
            if w[ch, i] > 0:
                v = x[ch, i] - (gain[ch, i] * t[ch, i] if use_gain else t[ch, i])
            else:
                v = 0.0
            for s in range(n_sec):
                y = sos[s, 0] * v + z[s, 0]
                z[s, 0] = sos[s, 1] * v - sos[s, 4] * y + z[s, 1]
                z[s, 1] = sos[s, 2] * v - sos[s, 5] * y
                v = y
            out[ch, i] = abs(v)


def _lerp_rows_loop(fp, j, frac, out):
    for ch in range(fp.shape[0]):
        for i in range(j.size):
            lo = fp[ch, j[i]]
            out[ch, i] = (fp[ch, j[i] + 1] - lo) * frac[i] + lo


def _lerp_sorted_loop(xp, x, fp, out):
    # j = clip(searchsorted(xp, x, "right") - 1, 0, m - 2) by walking the knots with the samples
    # (forwards for sorted samples, either way for any), then lerp_positions' fraction and lerp_rows' sum
    m = xp.size
    cnt = 0  # knots at or below the sample: xp[cnt - 1] <= x[i] < xp[cnt]
    for i in range(x.size):
        xi = x[i]
        while cnt < m and xp[cnt] <= xi:
            cnt += 1
        while cnt > 0 and xp[cnt - 1] > xi:
            cnt -= 1
        j = min(max(cnt - 1, 0), m - 2)
        frac = (xi - xp[j]) / (xp[j + 1] - xp[j])
        frac = min(max(frac, 0.0), 1.0)
        for ch in range(fp.shape[0]):
            lo = fp[ch, j]
            out[ch, i] = (fp[ch, j + 1] - lo) * frac + lo


#: top bits of a non-negative float64 counted to place order statistics: sign, exponent, 4 mantissa bits
_KEY_SHIFT = 48
_N_KEYS = 1 << 16
#: keys of inf and nan: their stretches go to numpy
_KEY_NONFINITE = 0x7FF0


def _quantile_lerp(a, b, g):
    # numpy.quantile's linear interpolation (numpy/lib/_function_base_impl.py, _lerp), operation for operation
    d = b - a
    if g >= 0.5:
        return b - d * (1.0 - g)
    return a + d * g


def _outlier_flags_loop(hp, bits, w, bounds, scale, q_mid, q_top, hist, slot, buf, bad, thresholds, to_numpy):
    # hp >= 0, so its bit patterns sort as its values do: the order statistics' bins are found by counting
    # keys (the patterns' top bits), and only those bins' samples are gathered and sorted
    ranks = np.empty(4, dtype=np.int64)
    bins = np.empty(4, dtype=np.int64)
    before = np.empty(4, dtype=np.int64)
    vals = np.empty(4)
    sizes = np.empty(4, dtype=np.int64)
    cursor = np.empty(4, dtype=np.int64)
    start = np.empty(4, dtype=np.int64)
    for ch in range(hp.shape[0]):
        for s in range(bounds.size - 1):
            a = bounds[s]
            b = bounds[s + 1]
            n = 0
            kmin = _N_KEYS
            kmax = -1
            for i in range(a, b):
                if w[ch, i] > 0:
                    k = np.int64(bits[ch, i] >> _KEY_SHIFT)
                    hist[k] += 1
                    n += 1
                    if k < kmin:
                        kmin = k
                    if k > kmax:
                        kmax = k
            if n < 16 or kmax >= _KEY_NONFINITE:
                if n >= 16:
                    to_numpy[ch, s] = True
                for k in range(kmin, kmax + 1):
                    hist[k] = 0
                continue
            # numpy's virtual indices (n - 1) * q; both fall below n - 1 from 16 samples on
            v0 = (n - 1) * q_mid
            v1 = (n - 1) * q_top
            p0 = np.floor(v0)
            p1 = np.floor(v1)
            ranks[0] = np.int64(p0)
            ranks[1] = ranks[0] + 1
            ranks[2] = np.int64(p1)
            ranks[3] = ranks[2] + 1
            # the bin of each rank, the count below that bin and the bin's own count
            r = 0
            cum = 0
            for k in range(kmin, kmax + 1):
                c = hist[k]
                while r < 4 and ranks[r] < cum + c:
                    bins[r] = k
                    before[r] = cum
                    sizes[r] = c
                    r += 1
                cum += c
                hist[k] = 0
            # the distinct bins' samples go to consecutive stretches of buf
            used = 0
            for r in range(4):
                if slot[bins[r]] < 0:
                    slot[bins[r]] = r
                    start[r] = used
                    cursor[r] = used
                    used += sizes[r]
            for i in range(a, b):
                if w[ch, i] > 0:
                    t = slot[np.int64(bits[ch, i] >> _KEY_SHIFT)]
                    if t >= 0:
                        buf[cursor[t]] = hp[ch, i]
                        cursor[t] += 1
            for r in range(4):
                t = slot[bins[r]]
                if t == r:
                    buf[start[r]:cursor[r]].sort()
            for r in range(4):
                t = slot[bins[r]]
                vals[r] = buf[start[t] + ranks[r] - before[r]]
            for r in range(4):
                slot[bins[r]] = -1
            med = _quantile_lerp_c(vals[0], vals[1], v0 - p0)
            q99 = _quantile_lerp_c(vals[2], vals[3], v1 - p1)
            thr = scale * med  # Python's max(scale * med, q99, 1e-12)
            if q99 > thr:
                thr = q99
            if 1e-12 > thr:
                thr = 1e-12
            thresholds[ch, s] = thr
            for i in range(a, b):
                bad[ch, i] = hp[ch, i] > thr and w[ch, i] > 0


def _settled_keys_loop(base, samples, values, out):
    # the copy, the choices and the running maximum in one place: numpy's accumulate is a scalar loop
    for i in range(base.size):
        out[i] = base[i]
    for j in range(samples.size):
        out[samples[j]] = values[j]
    for i in range(1, out.size):
        if out[i] < out[i - 1]:
            out[i] = out[i - 1]


def _linear_envelope_loop(i, start, d_up, stop, d_down, floor, out):
    # linear_envelope_np's operations per sample (np.clip is maximum then minimum; no nan here)
    for k in range(i.size):
        up = (i[k] - start) / d_up
        down = (stop - i[k]) / d_down
        v = up if up < down else down
        v = v if v > 0.0 else 0.0
        v = v if v < 1.0 else 1.0
        out[k] = v if v > floor else floor


def _widen_flags_loop(bad, half, out):
    n = bad.shape[1]
    for ch in range(bad.shape[0]):
        last = -half - 1  # the latest flag at or before i
        for i in range(n):
            if bad[ch, i]:
                last = i
            out[ch, i] = i - last <= half
        nxt = n + half  # the next flag at or after i
        for i in range(n - 1, -1, -1):
            if bad[ch, i]:
                nxt = i
            if nxt - i <= half:
                out[ch, i] = True


_widen_flags_c = _jit(_widen_flags_loop)
_linear_envelope_c = _jit(_linear_envelope_loop)
_settled_keys_c = _jit(_settled_keys_loop)
_quantile_lerp_c = _jit(_quantile_lerp)
_outlier_flags_c = _jit(_outlier_flags_loop)
_highpass_residual_c = _jit(_highpass_residual_loop)
_lerp_rows_c = _jit(_lerp_rows_loop)
_lerp_sorted_c = _jit(_lerp_sorted_loop)
_gain_bin_sums_c = _jit(_gain_bin_sums_loop)
_gain_seg_sums_c = _jit(_gain_seg_sums_loop)


def gain_sums(x, w, b, seg, n_bins, n_seg, pos, *, compiled: bool = True, return_cycle: bool = False):
    """Sums behind :func:`artifactclean.modulation.segment_gain`, for all channels.

    Returns ``sw, sx, st, sxt, stt, spt, sptt`` (n_ch, n_seg): per segment the
    sums of ``w``, ``w x``, ``w t``, ``w x t``, ``w t t``, ``w pos t`` and
    ``w pos t t``, with ``t`` the weighted mean cycle of each channel
    (``n_bins`` phase bins ``b``) less its mean and ``pos`` each sample's
    position; with ``return_cycle``, that mean cycle (n_ch, n_bins) last.
    The numpy twin is ``numpy.bincount``, which the compiled loops follow
    addition by addition.
    """
    n_ch = x.shape[0]
    if compiled and HAVE_NUMBA:
        cnt, sbx = np.zeros((n_ch, n_bins)), np.zeros((n_ch, n_bins))
        _gain_bin_sums_c(x, w, b, cnt, sbx)
    else:
        cnt = np.stack([np.bincount(b, w[ch], n_bins) for ch in range(n_ch)])
        sbx = np.stack([np.bincount(b, w[ch] * x[ch], n_bins) for ch in range(n_ch)])
    tmpl = sbx / np.maximum(cnt, 1e-12)
    tmpl -= tmpl.mean(axis=1, keepdims=True)
    if compiled and HAVE_NUMBA:
        out = [np.zeros((n_ch, n_seg)) for _ in range(7)]
        _gain_seg_sums_c(x, w, b, seg, tmpl, np.asarray(pos, dtype=np.float64), *out)
        return tuple(out) + ((tmpl,) if return_cycle else ())
    out = [np.empty((n_ch, n_seg)) for _ in range(7)]
    for ch in range(n_ch):
        t = tmpl[ch][b]
        out[0][ch] = np.bincount(seg, w[ch], n_seg)
        out[1][ch] = np.bincount(seg, w[ch] * x[ch], n_seg)
        out[2][ch] = np.bincount(seg, w[ch] * t, n_seg)
        out[3][ch] = np.bincount(seg, w[ch] * x[ch] * t, n_seg)
        out[4][ch] = np.bincount(seg, w[ch] * t * t, n_seg)
        out[5][ch] = np.bincount(seg, w[ch] * pos * t, n_seg)
        out[6][ch] = np.bincount(seg, w[ch] * pos * t * t, n_seg)
    return tuple(out) + ((tmpl,) if return_cycle else ())


_phase_sums_c = _jit(_phase_sums_loop)
_tick_sums_c = _jit(_tick_sums_loop)
_segment_stats_c = _jit(_segment_stats_loop)
_quadrature_sums_c = _jit(_quadrature_sums_loop)
_grouped_eval_c = _jit(_grouped_eval_loop)
_tick_eval_c = _jit(_tick_eval_loop)
_grid_sums_c = _jit(_grid_sums_loop)
_phase_eval_c = _jit(_phase_eval_loop)


def _into(res: np.ndarray, out: np.ndarray | None) -> np.ndarray:
    """``res``, or ``res`` copied into the buffer ``out`` when one is given (the numpy twins' ``out=``)."""
    if out is None:
        return res
    out[:] = res
    return out


def grouped_eval(t, n_bins, i0, i1, beta, b0, b1, alpha, *, out=None, compiled: bool = True):
    """Template read back at each sample (see :func:`grouped_eval_np`), into ``out`` if given."""
    if not (compiled and HAVE_NUMBA):
        return _into(grouped_eval_np(t, n_bins, i0, i1, beta, b0, b1, alpha), out)
    if out is None:
        out = np.empty((t.shape[0], i0.size))
    _grouped_eval_c(t, n_bins, i0, i1, beta, b0, b1, alpha, out)
    return out


def tick_eval(t, key, n_bins, stride, n_groups, *, out=None, compiled: bool = True):
    """Template at DAC tick keys (see :func:`tick_eval_np`), into ``out`` if given."""
    if not (compiled and HAVE_NUMBA):
        return _into(tick_eval_np(t, key, n_bins, stride, n_groups), out)
    if out is None:
        out = np.empty((t.shape[0], key.size))
    _tick_eval_c(np.ascontiguousarray(t, dtype=np.float64), np.ascontiguousarray(key, dtype=np.int64), int(n_bins),
                 int(stride), int(n_groups), out)
    return out


def phase_sums(x, w, gain, gi, ga, inside, n_bins, stride, n_groups, *, compiled: bool = True):
    """Grouped phase-grid sums (n_ch, n_groups, n_bins): see :func:`phase_sums_np`.

    On explicit position arrays; the estimators use :meth:`PhaseGrid.sums`, which computes them
    inline, and the tests hold it to this one to the bit."""
    if not (compiled and HAVE_NUMBA):
        return phase_sums_np(x, w, gain, gi, ga, inside, n_bins, stride, n_groups)
    s = np.zeros((x.shape[0], n_groups * n_bins))
    g = np.zeros_like(s)
    _phase_sums_c(x, w, gain, gi, ga, np.asarray(inside, dtype=np.float64), n_bins, stride, s, g)
    return s.reshape(-1, n_groups, n_bins), g.reshape(-1, n_groups, n_bins)


def tick_sums(x, w, gain, key, n_bins, stride, n_groups, *, compiled: bool = True):
    """Grouped DAC-tick sums (n_ch, n_groups, n_bins): see :func:`tick_sums_np`."""
    if not (compiled and HAVE_NUMBA):
        return tick_sums_np(x, w, gain, key, n_bins, stride, n_groups)
    s = np.zeros((x.shape[0], n_groups * n_bins))
    g = np.zeros_like(s)
    _tick_sums_c(x, w, gain, key, n_bins, stride, s, g)
    return s.reshape(-1, n_groups, n_bins), g.reshape(-1, n_groups, n_bins)


def quadrature_sums_np(x, w, t, d, seg_starts, env=None):
    """Per gain segment, about each segment's own (weighted) means: sum w x d, sum w t d, sum w d^2.

    With :func:`segment_stats`, the normal equations of ``x = g t + h d +
    offset`` per segment (``d`` the template's phase derivative: ``h / g`` is
    the artifact's phase shift there). With ``env`` (n,), ``t`` and ``d`` are
    multiplied by it.
    """
    if env is not None:
        t, d = t * env, d * env
    red = lambda v: np.add.reduceat(v, seg_starts, axis=-1)  # noqa: E731
    sw = np.maximum(red(w), 1e-300)
    sx, st, sd = red(w * x), red(w * t), red(w * d)
    return red(w * x * d) - sx * sd / sw, red(w * t * d) - st * sd / sw, red(w * d * d) - sd * sd / sw


def quadrature_sums(x, w, t, d, seg_starts, env=None, *, compiled: bool = True):
    if not (compiled and HAVE_NUMBA):
        return quadrature_sums_np(x, w, t, d, seg_starts, env)
    shape = (x.shape[0], seg_starts.size)
    out = np.empty(shape), np.empty(shape), np.empty(shape)
    use_env = env is not None
    _quadrature_sums_c(x, w, t, d, np.asarray(env, dtype=np.float64) if use_env else np.ones(1), use_env, seg_starts,
                       *out)
    return out


def segment_stats(x, w, t, seg_starts, env=None, *, compiled: bool = True):
    if not (compiled and HAVE_NUMBA):
        return segment_stats_np(x, w, t, seg_starts, env)
    shape = (x.shape[0], seg_starts.size)
    num, den, full, centre = np.empty(shape), np.empty(shape), np.empty(shape), np.empty(shape)
    use_env = env is not None
    _segment_stats_c(x, w, t, np.asarray(env, dtype=np.float64) if use_env else np.ones(1), use_env, seg_starts,
                     num, den, full, centre)
    return num, den, full, centre


def highpass_residual(sos, x, t, gain=None, w=None, *, compiled: bool = True) -> np.ndarray:
    """Rectified high-pass (``sos`` sections, zero initial state) of the residual ``x - gain t``.

    Samples with ``w == 0`` (lost) enter as 0, so their edges do not ring.
    One pass and one output array, where numpy needs four arrays of the data's size.
    """
    if not (compiled and HAVE_NUMBA):
        return highpass_residual_np(sos, x, t, gain, w)
    sos = np.ascontiguousarray(sos, dtype=np.float64)
    if not np.allclose(sos[:, 3], 1.0):
        raise ValueError("sos sections must be normalised (a0 == 1)")
    out = np.empty(x.shape)
    use_gain = gain is not None
    _highpass_residual_c(sos, x, t, gain if use_gain else t, use_gain, w, out)
    return out


def lerp_rows(fp, j, frac, out=None, *, compiled: bool = True) -> np.ndarray:
    """Linear interpolation of each row of ``fp`` (n_rows, n_knots) at precomputed positions.

    ``j, frac`` come from :func:`lerp_positions` (shared by every row and
    every pass over a block); equal to :func:`numpy.interp` row by row to
    rounding.
    """
    if out is None:
        out = np.empty((fp.shape[0], j.size))
    if not (compiled and HAVE_NUMBA) or fp.shape[1] < 2:
        return lerp_rows_np(fp, j, frac, out)
    _lerp_rows_c(np.ascontiguousarray(fp, dtype=np.float64), j, frac, out)
    return out


def outlier_flags(hp, w, bounds, scale: float, *, compiled: bool = True,
                  return_thresholds: bool = False):
    """Spike-band outlier flags: ``hp > max(scale * median, 99th percentile, 1e-12)`` stretch by stretch.

    Parameters
    ----------
    hp : ndarray, shape (n_rows, n)
        Rectified (non-negative) high-passed residual.
    w : ndarray, shape (n_rows, n)
        Weights; only samples with ``w > 0`` are counted and flagged.
    bounds : ndarray of int
        Stretch starts and the end (:func:`~artifactclean.estimators.cycles.stretch_bounds`).
    scale : float
        Multiplier of the median (the threshold in robust SDs times 1.4826).
    compiled : bool
        Use the compiled loop where numba is installed.
    return_thresholds : bool
        Also return each row's and stretch's threshold (nan where a stretch
        has fewer than 16 counted samples).

    Returns
    -------
    bad : ndarray of bool, shape (n_rows, n)
    thresholds : ndarray, shape (n_rows, len(bounds) - 1)
        Only if ``return_thresholds``.

    Notes
    -----
    The same flags and thresholds, to the bit, as :func:`outlier_flags_np`,
    whose quantiles are :func:`numpy.quantile`'s: the compiled loop finds the
    same order statistics by counting the samples' bit patterns (no
    partition of a copy) and interpolates between them as numpy does.
    """
    bounds = np.asarray(bounds, dtype=np.int64)
    if not (compiled and HAVE_NUMBA):
        bad, thresholds = outlier_flags_np(hp, w, bounds, scale)
        return (bad, thresholds) if return_thresholds else bad
    hp = np.ascontiguousarray(hp, dtype=np.float64)
    bad = np.zeros(hp.shape, dtype=bool)
    thresholds = np.full((hp.shape[0], max(bounds.size - 1, 0)), np.nan)
    to_numpy = np.zeros(thresholds.shape, dtype=bool)
    longest = int(np.diff(bounds).max()) if bounds.size > 1 else 0
    # 0.5 and 0.99 as numpy holds them: float64 of the Python floats
    _outlier_flags_c(hp, hp.view(np.uint64), w, bounds, float(scale), 0.5, 0.99,
                     np.zeros(_N_KEYS, dtype=np.int64), np.full(_N_KEYS, -1, dtype=np.int64), np.empty(longest),
                     bad, thresholds, to_numpy)
    for ch, s in zip(*np.nonzero(to_numpy)):
        _stretch_flags_np(hp, w, ch, s, bounds[s], bounds[s + 1], scale, bad, thresholds)
    return (bad, thresholds) if return_thresholds else bad


def settled_keys(base: np.ndarray, chosen, *, compiled: bool = True) -> np.ndarray:
    """Tick keys after the choices next to edges: ``base`` with each ``(samples, values)`` of ``chosen`` put in turn
    (a later pair wins where they share a sample), then made non-decreasing (``numpy.maximum.accumulate``).

    Integer keys: the compiled loop gives numpy's result exactly.
    """
    chosen = [(np.asarray(s, dtype=np.int64), np.asarray(v)) for s, v in chosen]
    if not (compiled and HAVE_NUMBA) or base.size == 0 or base.dtype.kind not in "iu":
        return settled_keys_np(base, chosen)
    samples = np.concatenate([s for s, _ in chosen] + [np.zeros(0, dtype=np.int64)])
    values = np.concatenate([v for _, v in chosen] + [np.zeros(0, dtype=base.dtype)]).astype(base.dtype, copy=False)
    out = np.empty_like(base)
    _settled_keys_c(np.ascontiguousarray(base), samples, values, out)
    return out


def linear_envelope(i: np.ndarray, start: int, up_stop: int, down_start: int, stop: int, floor: float, *,
                    compiled: bool = True) -> np.ndarray:
    """A block's envelope with linear ramps (``start..up_stop`` up, ``down_start..stop`` down) at positions ``i``.

    ``max(clip(min((i - start) / max(up_stop - start, 1), (stop - i) / max(stop - down_start, 1)), 0, 1),
    floor)``: the same numbers as :func:`linear_envelope_np` in one pass, without its five arrays of
    ``i``'s size (nan positions take the numpy path).
    """
    if not (compiled and HAVE_NUMBA) or np.ndim(i) != 1 or np.isnan(i).any():
        return linear_envelope_np(i, start, up_stop, down_start, stop, floor)
    out = np.empty(i.shape)
    _linear_envelope_c(np.ascontiguousarray(i, dtype=np.float64), float(start), float(max(up_stop - start, 1)),
                       float(stop), float(max(stop - down_start, 1)), float(floor), out)
    return out


def widen_flags(bad, half: int, *, compiled: bool = True) -> np.ndarray:
    """Boolean flags (n_rows, n) widened by ``half`` samples on either side of each flag."""
    if not (compiled and HAVE_NUMBA):
        return widen_flags_np(bad, half)
    out = np.empty(bad.shape, dtype=bool)
    _widen_flags_c(np.ascontiguousarray(bad), int(half), out)
    return out

