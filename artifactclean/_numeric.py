"""Small numeric helpers shared by the phase arithmetic of several modules."""

from __future__ import annotations

import numpy as np

try:  # as in estimators/_kernels.py: compiled where numba is installed, numpy otherwise
    import numba
except ImportError:  # pragma: no cover - exercised where numba is absent
    numba = None

__all__ = ["floor_runs", "fractional_part", "interp_sorted"]


def fractional_part(u):
    """``u - floor(u)``: the position within the cycle of phases ``u`` counted in cycles.

    The same numbers as ``numpy.mod(u, 1.0)``, to the bit and with the same
    dtype (both round the exact fraction once: ``fmod`` is exact and numpy's
    ``mod`` adds 1 to a negative remainder, which rounds as this subtraction
    does), at an eighth of the cost: ``numpy.mod`` keeps the sign rules of a
    general divisor, 15 ms against 1.8 ms for a million float64 samples here,
    and the estimators take it of every sample several times.
    """
    return u - np.floor(u)


def _interp_sorted_loop(x, xp, fp, out, mode):
    # numpy.interp's value at each x, operation for operation (numpy/_core/src/multiarray/compiled_base.c,
    # arr_interp, as recalled from memory and checked to the bit against numpy.interp in tests/test_kernels.py:
    # the slope times the distance from the knot below, plus the knot's value; on a knot its value; a nan
    # tried from the knot above), walked interval by interval because x is sorted
    m = xp.size
    n = x.size
    for k in range(1, n):
        if not x[k] >= x[k - 1]:  # unsorted or nan: the caller's numpy path
            return False
    if n and x[0] != x[0]:
        return False
    i = 0
    while i < n and x[i] < xp[0]:
        i += 1
    for r in range(fp.shape[0]):
        _put(out, r, 0, i, fp[r, 0], mode)
    j = 0
    while i < n:
        while j < m - 1 and xp[j + 1] <= x[i]:
            j += 1
        if j >= m - 1:
            break
        a = xp[j]
        hi = xp[j + 1]
        i1 = i
        while i1 < n and x[i1] < hi:
            i1 += 1
        for r in range(fp.shape[0]):
            f0 = fp[r, j]
            f1 = fp[r, j + 1]
            s = (f1 - f0) / (hi - a)
            k0 = i
            while k0 < i1 and x[k0] == a:
                k0 += 1
            _put(out, r, i, k0, f0, mode)
            if np.isfinite(s) and np.isfinite(f0):  # no nan can arise: no branch in the loop
                if mode == 0:
                    for k in range(k0, i1):
                        out[r, k] = s * (x[k] - a) + f0
                elif mode > 0:
                    for k in range(k0, i1):
                        out[r, k] += s * (x[k] - a) + f0
                else:
                    for k in range(k0, i1):
                        out[r, k] -= s * (x[k] - a) + f0
                continue
            for k in range(k0, i1):
                v = s * (x[k] - a) + f0
                if v != v:
                    v = s * (x[k] - hi) + f1
                    if v != v and f0 == f1:
                        v = f0
                _put(out, r, k, k + 1, v, mode)
        i = i1
    for r in range(fp.shape[0]):
        _put(out, r, i, n, fp[r, m - 1], mode)
    return True


def _put(out, r, a, b, v, mode):
    if mode == 0:
        for k in range(a, b):
            out[r, k] = v
    elif mode > 0:
        for k in range(a, b):
            out[r, k] += v
    else:
        for k in range(a, b):
            out[r, k] -= v


if numba is not None:
    _put = numba.njit(cache=True, nogil=True, inline="always")(_put)
    _interp_sorted_c = numba.njit(cache=True, nogil=True)(_interp_sorted_loop)
else:  # pragma: no cover
    _interp_sorted_c = None


def interp_sorted(x: np.ndarray, xp: np.ndarray, fp: np.ndarray, out: np.ndarray | None = None, *,
                  mode: str = "put", compiled: bool = True) -> np.ndarray:
    """:func:`numpy.interp` of each row of ``fp`` at sorted ``x``, put into, added to or subtracted from ``out``.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Points, ascending (float64). A scalar or an array of another shape
        is passed to :func:`numpy.interp` as it is (a 1-D ``fp``, no ``out``).
    xp : ndarray, shape (m,)
        Knots, ascending and finite.
    fp : ndarray, shape (n_rows, m) or (m,)
        Values at the knots, a row per output row.
    out : ndarray, shape (n_rows, n) or (n,), optional
        Where the values go; required for ``mode`` "add" and "subtract".
    mode : {"put", "add", "subtract"}
    compiled : bool
        Use the compiled loop where numba is installed.

    Returns
    -------
    ndarray
        ``out``: the same numbers, to the bit, as ``numpy.interp(x, xp,
        fp[r])`` put, added or subtracted row by row, with the defaults
        outside the knots (the end values). The compiled loop walks the
        knots with the sorted points (twice as fast here, with no array
        of the points' size beside ``out``); unsorted points, nan points
        or knots that are not finite and ascending go through numpy.
    """
    signs = {"put": 0, "add": 1, "subtract": -1}
    if mode not in signs:
        raise ValueError(f"mode must be one of {sorted(signs)}, got {mode!r}")
    if np.ndim(x) != 1:
        if out is not None or np.ndim(fp) != 1 or mode != "put":
            raise ValueError(f"points of shape {np.shape(x)} need a 1-D fp and no out (numpy.interp's own shapes)")
        return np.interp(x, xp, fp)
    if out is None:
        if mode != "put":
            raise ValueError(f"mode {mode!r} needs out")
        out = np.empty(np.shape(fp)[:-1] + (np.size(x),))
    one = np.ndim(fp) == 1
    fp2 = np.atleast_2d(np.asarray(fp, dtype=np.float64))
    out2 = out[None, :] if one else out
    x = np.asarray(x, dtype=np.float64)
    xp = np.asarray(xp, dtype=np.float64)
    done = False
    if compiled and _interp_sorted_c is not None and xp.size >= 2 and x.ndim == 1 and out2.dtype == np.float64:
        if np.all(np.isfinite(xp)) and np.all(xp[1:] >= xp[:-1]):
            done = _interp_sorted_c(x, xp, np.ascontiguousarray(fp2), out2, signs[mode])
    if not done:
        for r in range(fp2.shape[0]):
            v = np.interp(x, xp, fp2[r])
            if mode == "put":
                out2[r] = v
            elif mode == "add":
                out2[r] += v
            else:
                out2[r] -= v
    return out


def _floor_runs_loop(u, scale, starts, values):
    # called twice: with empty starts the runs are only counted, then written; -1 on a nan
    m = 0
    prev = np.int64(0)
    for i in range(u.size):
        v = u[i] * scale
        if v != v:
            return -1
        k = np.int64(np.floor(v))
        if i == 0 or k != prev:
            if m < starts.size:
                starts[m] = i
                values[m] = k
            m += 1
            prev = k
    return m


_floor_runs_c = None if numba is None else numba.njit(cache=True, nogil=True)(_floor_runs_loop)


def floor_runs(u: np.ndarray, scale: float, *, compiled: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Runs of equal ``floor(u * scale)`` along ``u`` (1-D, not empty): each run's first index and its value.

    The same integers as ``seg = numpy.floor(u * scale).astype(numpy.int64)``,
    ``starts = numpy.concatenate(([0], numpy.flatnonzero(numpy.diff(seg)) + 1))``
    and ``seg[starts]``, without their three arrays of ``u``'s size (the
    template's gain segments, from every sample's phase).
    """
    u = np.asarray(u, dtype=np.float64)
    if compiled and _floor_runs_c is not None and u.ndim == 1 and u.size:
        empty = np.zeros(0, dtype=np.int64)
        m = _floor_runs_c(u, float(scale), empty, empty)
        if m >= 0:
            starts = np.empty(m, dtype=np.int64)
            values = np.empty(m, dtype=np.int64)
            _floor_runs_c(u, float(scale), starts, values)
            return starts, values
    seg = np.floor(u * scale).astype(np.int64)
    starts = np.concatenate(([0], np.flatnonzero(np.diff(seg)) + 1))
    return starts, seg[starts]
