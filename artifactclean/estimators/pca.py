"""PCA over cycles: the artifact as a mean cycle plus a few principal shapes that change slowly.

Each stimulation cycle is put on a grid of phase bins (exact sub-sample
phase, or the DAC ticks; :class:`~artifactclean.estimators.cycles.CycleGrid`)
and rescaled to the block envelope the data show (ramps, the common
modulation of impedance). The rows are then modelled as

``row_k = env_k * mean_cycle + mean_dev + sum_j s_jk * shape_j``

where the shapes are the principal components of the rows' deviations from
``env_k * mean_cycle`` (how the artifact's shape changes: a harmonic whose
phase drifts, a nonlinearity that grows with amplitude), and their scores
``s_jk`` are followed across cycles by the block's gain filter
(:mod:`artifactclean.modulation`). Then the cycles are put back.

How many components: every principal shape whose filtered score carries
more power than ``keep_factor`` times the noise the filter lets through
(the noise of each score measured from consecutive-cycle differences) is
kept, up to ``n_components``; set ``n_components`` and ``keep_factor=0`` to
keep a fixed number. The mean cycle keeps only the harmonics that stand out
of its noise. The principal shapes are those of
``sklearn.decomposition.PCA`` (tested), computed from the smaller Gram
matrix. The mean cycle, the shapes and which are kept are learned once per
block: on the whole block up to 20 s (or 400 cycles, where that is longer),
else on that much of the middle of its plateau, so a block cleaned in
pieces gives the whole block's result; only the scores are followed cycle
by cycle.

What it removes and what it cannot
----------------------------------
It removes the mean cycle (everything locked to the stimulation phase over
the block, neural signal so locked included) and, along each kept shape,
whatever follows the gain filter's lines. Neural signal locked to the
stimulation cannot be told from the artifact by any single-channel method;
with many components the shapes begin to take up neural signal that happens
to look like a cycle, which is why the count is chosen against the noise.
Modulation faster than half the stimulation frequency is not followed per
shape (see :class:`~artifactclean.estimators.HarmonicRegression`).
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

from ..modulation import filter_sequences
from ..pulse import HEART_HZ
from .cycles import RowModelEstimator, fill_rows, noise_of_sequences

__all__ = ["CyclePCA", "principal_shapes"]


def principal_shapes(rows: np.ndarray, n_components: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Principal components of ``rows`` (n_rows, n_bins), as ``sklearn.decomposition.PCA`` gives them.

    Returns
    -------
    mean : ndarray, shape (n_bins,)
    components : ndarray, shape (n_components, n_bins)
        Unit vectors, by decreasing variance.
    explained_variance : ndarray, shape (n_components,)
        Variance along each component (divided by ``n_rows - 1``).
    """
    n_rows, n_bins = rows.shape
    k = int(min(n_components, n_rows - 1, n_bins))
    mean = rows.mean(axis=0)
    dc = rows - mean
    if k < 1:
        return mean, np.zeros((0, n_bins)), np.zeros(0)
    # eigenvectors of the smaller Gram matrix, largest first
    if n_bins <= n_rows:
        vals, vecs = linalg.eigh(dc.T @ dc, subset_by_index=[n_bins - k, n_bins - 1])
        vals, comps = vals[::-1], vecs[:, ::-1].T
    else:
        vals, vecs = linalg.eigh(dc @ dc.T, subset_by_index=[n_rows - k, n_rows - 1])
        vals, vecs = vals[::-1], vecs[:, ::-1]
        comps = (vecs.T @ dc) / np.sqrt(np.maximum(vals, 1e-300))[:, None]
    vals = np.maximum(vals, 0.0)
    return mean, comps, vals / max(n_rows - 1, 1)


class CyclePCA(RowModelEstimator):
    """PCA over stimulation cycles with tracked component scores.

    Parameters
    ----------
    n_components : int
        Most principal shapes modelled.
    keep_factor : float
        A shape (or a harmonic of the mean cycle) is kept when its power
        exceeds this many times the noise power its estimate carries (4:
        common practice for a detection on a chi-square statistic).
    tracking_hz, robust, dac, margin_cycles, outlier_z, model_pulse, heart_band_hz
        As for :class:`~artifactclean.estimators.HarmonicRegression`.

    Attributes
    ----------
    report_ : dict
        Per block and channel: components kept, harmonics of the mean cycle kept.
    """

    _method_name = "pca"
    # tracemalloc peaks of fit_transform, 20 Hz, 1 and 4 channels x 20 s (session 17); without a DAC
    # the grid's positions come from the phase since session 18 (11.1 -> 8.8 and 19.5 -> 11.8 at 30 s)
    memory_per_sample = (7.7, 12.3)
    _memory_with_dac = (6.7, 10.8)

    def __init__(self, n_components: int = 10, keep_factor: float = 4.0, tracking_hz: float = 10.0,
                 robust: bool = True, dac: str = "auto", margin_cycles: float = 2.0, outlier_z: float = 5.0,
                 model_pulse: bool = True,
                 heart_band_hz: tuple[float, float] = HEART_HZ):
        self.n_components = n_components
        self.keep_factor = keep_factor
        self.tracking_hz = tracking_hz
        self.robust = robust
        self.dac = dac
        self.margin_cycles = margin_cycles
        self.outlier_z = outlier_z
        self.model_pulse = model_pulse
        self.heart_band_hz = heart_band_hz

    def _validate_params(self) -> None:
        super()._validate_params()
        if int(self.n_components) != self.n_components or self.n_components < 0:
            raise ValueError(f"n_components must be a non-negative integer, got {self.n_components!r}")
        if not self.keep_factor >= 0:
            raise ValueError(f"keep_factor must be >= 0, got {self.keep_factor!r}")

    def _decide_span(self, freq_hz: float) -> float:
        # the mean cycle is learned here: 400 cycles keep its noise at 0.05 of the data's
        return max(super()._decide_span(freq_hz), 400.0 / freq_hz)

    def _fit_rows(self, v, w, env, taps_fast, taps_slow, rate, censor=None, decided=None):
        rows = fill_rows(v, w, env, censor=censor)
        rows = rows - rows.mean(axis=1, keepdims=True)
        # the shapes are the block's (see RowModelEstimator._decide), or learned from these rows
        shapes = self._learn(rows, env, taps_fast, rate) if decided is None else decided
        out = env[:, None] * shapes["mean_cycle"] + shapes["mean_dev"][None, :]
        comps = shapes["components"]
        if comps.shape[0]:
            scores = (rows - env[:, None] * shapes["mean_cycle_raw"] - shapes["mean_dev"]) @ comps.T
            out += filter_sequences(scores.T, taps_fast, rate).T @ comps
        keep = ("mean_cycle_raw", "mean_cycle", "mean_dev", "components", "harmonics")
        return out, dict(components_kept=int(comps.shape[0]), mean_cycle_harmonics=int(shapes["harmonics"]),
                         decided={k: shapes[k] for k in keep})

    def _learn(self, rows, env, taps_fast, rate):
        """Mean cycle (raw, and its harmonics that stand out of the noise), mean deviation, kept shapes."""
        n_rows, n_bins = rows.shape
        plateau = np.abs(env - 1.0) < 0.1
        use = plateau if plateau.sum() > 8 else np.ones(n_rows, dtype=bool)
        mean_raw = (env[:, None] * rows).sum(axis=0) / max(float(np.sum(env ** 2)), 1e-300)
        dev = rows - env[:, None] * mean_raw
        mean_dev, comps, _ = principal_shapes(dev[use], int(self.n_components))
        # the mean cycle and mean deviation keep the harmonics that stand out of their noise
        sigma2 = noise_of_sequences(np.fft.rfft(rows, axis=1), use)
        n_eff = float(np.sum(env[use] ** 2))
        spec = np.fft.rfft(mean_raw)
        keep_h = np.abs(spec) ** 2 > self.keep_factor * sigma2 / max(n_eff, 1.0)
        keep_h[0] = False
        mean_cycle = np.fft.irfft(spec * keep_h, n=n_bins)
        mean_dev = np.fft.irfft(np.fft.rfft(mean_dev) * keep_h, n=n_bins)
        if comps.shape[0]:
            scores = (dev - mean_dev) @ comps.T
            s2 = noise_of_sequences(scores, use)
            tracked = filter_sequences(scores.T, taps_fast, rate)
            nu = float(np.sum(taps_fast ** 2))
            comps = comps[np.sum(tracked ** 2, axis=1) > self.keep_factor * n_rows * s2 * nu]
        return dict(mean_cycle_raw=mean_raw, mean_cycle=mean_cycle, mean_dev=mean_dev, components=comps,
                    harmonics=int(keep_h.sum()))
