"""A DAC's steps as the amplifier's anti-aliasing low-pass passes them to its samples.

Every amplifier filters what it records below half its sampling rate before
the sampler (an analog low-pass, often a few kHz to 7.5 kHz at 30 kHz). A
stimulator's DAC holds each value for a tick and steps at the next; behind
the filter a step no longer reaches the samples at once: the samples after
an edge read ``T[k-1] + (T[k] - T[k-1]) S(d)``, ``S`` the filter's step
response at the sample's delay ``d`` after the edge (a fraction of a sample
that moves from edge to edge as the two clocks slide past each other), with
the filter's overshoot and ringing. A template that holds one level a tick
leaves ``(T[k] - T[k-1]) (S(d) - [d >= 0])`` beside every edge: in the spike
band, at the stimulation's rate of steps, 0.3-3 x the noise of a 1 kHz DAC at
5-40 Hz.

:class:`EdgeResponse` is what one step of unit size leaves beside the template's
levels, ``g(d)``, learned per block from the data (:func:`fit_edge_response`),
for every edge alike (the filter does not change within a block): piecewise
linear in the delay on knots a quarter sample apart where the response moves
fast, with a jump at the grid's edge (the levels switch there, the samples do
not). Its reach beyond the edge spans the whole tick, so it also takes up the
share of the filter's transition that the tick levels average in. The
artifact beside the template is then
``sum_j (T[k+j] - T[k+j-1]) g((e - j) L)``, ``e`` the sample's place in its
tick ``k`` (0..1) and ``L`` the samples a tick, over the few edges within
reach (:func:`neighbour_edges`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse

__all__ = ["EdgeResponse", "edge_knots", "fit_edge_response", "neighbour_edges", "shift_columns",
           "step_design"]

#: knot spacing (samples) where the response moves fast: a 7.5 kHz filter at 30 kHz rises within two samples
#: and rings for five or six (this project's choice: an eighth of a sample gave 0.031-0.039 x noise in the spike
#: band against 0.026-0.038, 1 kHz DACs at 20-40 Hz behind 7.5 kHz and at 5 Hz behind 3 kHz, seed 1)
FINE_STEP = 0.25
#: delays (samples) after the edge on the fine knots, then a knot a sample up to :data:`_SETTLED` (a 3 kHz
#: filter at 30 kHz rings for about 20 samples; with 12 a 1 kHz DAC behind it kept 0.21 x noise, see BEFORE)
_FINE_UNTIL = 8.0
_SETTLED = 24.0
#: a knot every this many samples beyond, where the response has settled to the tick's level bias
_COARSE_STEP = 4.0
#: weight of the response's roughness in its fit (:func:`fit_edge_response`; this project's choice: at 1e-4 a 10
#: kHz DAC at 40 Hz behind a 7.5 kHz filter kept 1.8x the neural power within 3 Hz of the harmonics, 9x
#: without; 1e-3 and 1e-2 gave 0.9x and the same spike band, 0.006-0.038 x noise, on the 1, 5 and 10 kHz
#: DACs tried)
SMOOTHNESS = 1e-3
#: how far before the grid's edge the response is modelled (samples): a grid placed from filtered steps puts its
#: edges about at their middles, up to 3 samples after the true edges behind a 3 kHz filter at 30 kHz (with 2
#: and knots a sample apart only up to 12, a 1 kHz DAC at 20 Hz behind it kept 0.21 x noise and 11x the neural
#: power within 3 Hz of the harmonics; with 6 and 24, 0.038 and 0.49x; 7.5-12 kHz filters the same either way)
BEFORE = 6.0


def edge_knots(samples_per_tick: float) -> tuple[np.ndarray, np.ndarray]:
    """Knots (delays in samples) before and after an edge, each side ending at 0 (the jump is between them)."""
    before = np.arange(-BEFORE, 0.0, FINE_STEP)
    hi = max(samples_per_tick + BEFORE, _SETTLED)
    after = np.concatenate((np.arange(0.0, _FINE_UNTIL, FINE_STEP), np.arange(_FINE_UNTIL, _SETTLED, 1.0),
                            np.arange(_SETTLED, hi, _COARSE_STEP)))
    return np.append(before, 0.0), np.append(after, hi)


def neighbour_edges(samples_per_tick: float, reach: tuple[float, float]) -> list[int]:
    """Edges ``j`` (of ticks ``k + j``) within ``reach = (lo, hi)`` samples of some sample of tick ``k``."""
    lo, hi = reach
    first = -int(np.floor(hi / samples_per_tick))
    last = int(np.ceil(1.0 - lo / samples_per_tick)) - 1
    return list(range(first, last + 1))


def _hats(d: np.ndarray, before: np.ndarray, after: np.ndarray):
    """Rows within reach, their two knots (column indices) and the second knot's weight."""
    ok = (d >= before[0]) & (d <= after[-1])
    dd = d[ok]
    left = dd < 0
    nb = before.size
    col = np.where(left, np.clip(np.searchsorted(before, dd, side="right") - 1, 0, nb - 2),
                   nb + np.clip(np.searchsorted(after, dd, side="right") - 1, 0, after.size - 2))
    knots = np.concatenate((before, after))
    t = (dd - knots[col]) / (knots[col + 1] - knots[col])
    return np.flatnonzero(ok), col, t


@dataclass(frozen=True)
class EdgeResponse:
    """What a unit DAC step leaves beside a template of held tick levels, ``g(d)``.

    Attributes
    ----------
    samples_per_tick : float
        Samples a DAC tick (``L``).
    values : ndarray
        ``g`` at the knots of :func:`edge_knots` (before the edge, then after).
    """

    samples_per_tick: float
    values: np.ndarray

    @classmethod
    def flat(cls, samples_per_tick: float) -> EdgeResponse:
        """The response that adds nothing (every knot 0): the levels alone, every sample in its grid tick."""
        return cls(samples_per_tick, np.zeros(sum(k.size for k in edge_knots(samples_per_tick))))

    @property
    def knots(self) -> tuple[np.ndarray, np.ndarray]:
        return edge_knots(self.samples_per_tick)

    @property
    def reach(self) -> tuple[float, float]:
        before, after = self.knots
        return float(before[0]), float(after[-1])

    @property
    def edges(self) -> list[int]:
        """The neighbour edges ``j`` a sample's artifact depends on (:func:`neighbour_edges`)."""
        return neighbour_edges(self.samples_per_tick, self.reach)

    def __call__(self, d: np.ndarray) -> np.ndarray:
        """``g`` at delays ``d`` (samples after the edge; 0 beyond the knots)."""
        before, after = self.knots
        d = np.asarray(d, dtype=np.float64)
        out = np.zeros(d.shape)
        rows, col, t = _hats(d.ravel(), before, after)
        out.ravel()[rows] = self.values[col] * (1.0 - t) + self.values[col + 1] * t
        return out

    def weights(self, place: np.ndarray) -> list[np.ndarray]:
        """``g((place - j) L)`` for each neighbour edge ``j`` (:attr:`edges`), ``place`` a sample's place in its tick."""
        return [self((place - j) * self.samples_per_tick) for j in self.edges]


def step_design(place: np.ndarray, steps: list[np.ndarray], samples_per_tick: float) -> sparse.csr_matrix:
    """The samples' artifact beside the levels as a linear function of ``g``'s knot values.

    ``steps[i]`` is each sample's step at its neighbour edge ``j`` (the
    ``i``-th of :func:`neighbour_edges`), ``T[k+j] - T[k+j-1]`` in the data's
    unit; the result has a row per sample and a column per knot.
    """
    before, after = edge_knots(samples_per_tick)
    n = place.size
    js = neighbour_edges(samples_per_tick, (before[0], after[-1]))
    rows, cols, vals = [], [], []
    for j, step in zip(js, steps):
        r, c, t = _hats((place - j) * samples_per_tick, before, after)
        s = step[r]
        rows += [r, r]
        cols += [c, c + 1]
        vals += [s * (1.0 - t), s * t]
    return sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                             shape=(n, before.size + after.size))


def shift_columns(place: np.ndarray, steps: list[np.ndarray], response: EdgeResponse) -> np.ndarray:
    """``d/d(shift)`` of the artifact beside the levels, ``sum_j step_j g'((place - j) L)``, per sample.

    ``g'`` from central differences at the knots (one-sided beside the jump),
    read linearly between them: a grid whose edges sit ``s`` samples after
    the true ones reads the response at ``d + s``.
    """
    before, after = response.knots
    knots = np.concatenate((before, after))
    v = response.values
    slope = np.empty_like(v)
    nb = before.size
    for lo, hi in ((0, nb), (nb, v.size)):
        slope[lo:hi] = np.gradient(v[lo:hi], knots[lo:hi]) if hi - lo > 1 else 0.0
    deriv = EdgeResponse(response.samples_per_tick, slope)
    return sum(step * w for step, w in zip(steps, deriv.weights(place)))


def fit_edge_response(residual: np.ndarray, usable: np.ndarray, place: np.ndarray, steps: list[np.ndarray],
                      samples_per_tick: float, current: EdgeResponse | None = None,
                      ridge: float = 1e-6, smoothness: float = SMOOTHNESS) -> tuple[EdgeResponse, np.ndarray]:
    """Learn ``g`` and a drift of the grid's edges from one channel's residual.

    Parameters
    ----------
    residual : ndarray, shape (n,)
        Data minus the template's levels (and ``current``'s terms).
    usable : ndarray of bool, shape (n,)
        Samples the fit may use (not at a rail, not a spike).
    place, steps
        Each sample's place in its tick and its steps at the neighbour edges
        (see :func:`step_design`).
    samples_per_tick : float
        ``L``.
    current : EdgeResponse, optional
        The response the residual was taken with: what the residual adds to
        it is fitted with the drift, read from its slope. Without it, ``g``
        is fitted first and the drift then from its slope (on the same
        design).
    ridge : float
        Tikhonov weight relative to the normal matrix's mean diagonal (knots
        no delay reaches stay at 0).
    smoothness : float
        Weight of the squared second differences of ``g``'s knot values on
        either side of the jump, relative to the same diagonal (a P-spline
        penalty; Eilers and Marx 1996, Stat Sci 11:89).

    Returns
    -------
    response : EdgeResponse
        ``current`` plus what the residual adds.
    shift : ndarray, shape (2,)
        How far the grid's edges are to move (samples, later positive) at
        the first and the last sample, linearly in between and by as much
        the other way: a grid whose edges drift from the true ones over the
        stretch. A constant offset is not a shift: ``g`` takes it up (its
        smooth part is the filter's response at ``d + s``; the jump stays
        where the levels switch).

    Notes
    -----
    Fitted on first differences (rows where both samples are usable): the
    LFP, hundreds of times the spike band's power below 300 Hz and slow, has
    little of it left there, and the residue at the edges is all steps.
    The drift is the Gauss-Newton step of ``g(d + s(t))`` about ``s = 0``,
    ``s`` linear in time with zero mean (Nocedal and Wright 2006, Numerical
    Optimization, ch. 10).
    """
    n = residual.size
    ok = usable[1:] & usable[:-1]
    x = step_design(place, steps, samples_per_tick)
    xd = (x[1:] - x[:-1])[ok]
    yd = np.diff(residual)[ok]
    gram = (xd.T @ xd).toarray()
    p = gram.shape[0]
    scale = max(np.trace(gram) / p, np.finfo(float).tiny)
    gram[np.diag_indices_from(gram)] += ridge * scale
    # a rough response is penalised, each side of the jump apart: a DAC of a few samples a tick steps by
    # nearly the same at neighbouring edges, so the data hold little of how g splits between d and d + L
    nb = edge_knots(samples_per_tick)[0].size
    for lo, hi in ((0, nb), (nb, p)):
        d2 = np.diff(np.eye(hi - lo), 2, axis=0)
        gram[lo:hi, lo:hi] += smoothness * scale * (d2.T @ d2)
    if current is None:
        current = EdgeResponse(samples_per_tick, np.linalg.solve(gram, xd.T @ yd))
        yd = yd - xd @ current.values
    if not np.any(current.values):
        return current, np.zeros(2)
    drift = np.diff(shift_columns(place, steps, current) * np.linspace(-1.0, 1.0, n))[ok]
    cross = xd.T @ drift
    joint = np.block([[gram, cross[:, None]], [cross[None, :], np.array([[drift @ drift + ridge * scale]])]])
    sol = np.linalg.solve(joint, np.append(xd.T @ yd, drift @ yd))
    # the residual reads g(d + s): the grid's edges lie s samples after the true ones, so they move by -s
    return EdgeResponse(samples_per_tick, current.values + sol[:p]), -sol[p] * np.array([-1.0, 1.0])
