"""Sinusoid (harmonic) regression with amplitude tracking.

The artifact is modelled as a sum of harmonics of the stimulation phase,
``sum_h a_h(t) cos(2 pi h u) + b_h(t) sin(2 pi h u)``, whose in-phase and
quadrature amplitudes change slowly in time.

How the amplitudes are fitted, and why this way
-----------------------------------------------
Each cycle is put on a grid of phase bins (exact sub-sample phase, or the
DAC ticks; :class:`~artifactclean.estimators.cycles.CycleGrid`) and its
discrete Fourier transform gives the least-squares ``a_h, b_h`` of that
cycle for every harmonic at once (the harmonics are orthogonal over a whole
cycle, so per-cycle regression is an FFT). The per-cycle amplitudes are
then smoothed across cycles by zero-phase FIR filters: a windowed basis
whose frequency response is explicit, which a spline or state-space
smoother would only give implicitly. Two filters per channel:

* *fast*: the gain filter designed per block from the data
  (:mod:`artifactclean.modulation`): it passes the heartbeat and
  respiration lines that stand out of the neural floor, up to
  ``tracking_hz`` (and below ``f / 2``, the rate of cycles);
* *slow*: a low-pass at 1 Hz (respiration and slow drifts only).

For each harmonic the data choose: the fast filter when the modulation it
follows exceeds the extra noise it lets through (both measured: noise from
consecutive-cycle differences, modulation from the difference between the
two filtered sequences), and the harmonic is kept at all only when its
fitted power stands well above the noise it would add. The number of
harmonics therefore follows the data; ``n_harmonics`` caps it. These
choices, and the sequences' plateau levels, are made once per block, on
the whole block up to 20 s long and on the middle 20 s of a longer one's
plateau, so a block cleaned in pieces gives the whole block's result. Ramps are
followed exactly through the block envelope (see
:func:`artifactclean.modulation.filter_sequences`).

What it removes and what it cannot
----------------------------------
It removes, for each kept harmonic, everything within the fast filter's
passband (the modulation lines and 1 Hz around the harmonic) or the slow
filter's (1 Hz): neural signal there, oscillations locked to the
stimulation included, cannot be told from the artifact by any
single-channel method and goes with it. Modulation faster than half the
stimulation frequency cannot be followed per harmonic (the cycles sample
it too slowly): below ~10 Hz stimulation the heartbeat's harmonics stay as
sidebands, where the template's gain per part of a cycle does better. A
DAC staircase not locked to the cycle is not modelled.
"""

from __future__ import annotations

import numpy as np

from ..pulse import HEART_HZ
from .cycles import RowModelEstimator, fill_rows, noise_of_sequences
from ..modulation import filter_sequences, plateau_level

__all__ = ["HarmonicRegression"]


class HarmonicRegression(RowModelEstimator):
    """Harmonic regression of the artifact with per-harmonic amplitude tracking.

    Parameters
    ----------
    n_harmonics : int or None
        Most harmonics modelled; None lets the data decide (up to the
        grid's Nyquist harmonic).
    tracking_hz : float
        Highest modulation frequency followed (see
        :class:`~artifactclean.estimators.TemplateSubtraction`).
    robust : bool
        Refit with spike-band outliers (spikes) left out.
    dac : {"auto", "off"}
        Model a DAC staircase locked to the cycle on its ticks.
    margin_cycles : float
        Cycles beyond each block edge that are also cleaned.
    outlier_z : float
        Robust z-score of a spike-band outlier.
    keep_factor : float
        A harmonic is kept when its fitted power exceeds this many times the
        noise power its estimate carries (4: common practice for a detection
        on a chi-square statistic).
    model_pulse : bool
        Model a pulsatile heartbeat's harmonics in the rows' envelope from
        its fundamental's phase instead of filtering them (see
        :class:`~artifactclean.estimators.TemplateSubtraction`).
    heart_band_hz : (float, float)
        Heart rates (Hz) the pulse model looks for (see
        :class:`~artifactclean.estimators.TemplateSubtraction`).

    Attributes
    ----------
    report_ : dict
        Per block and channel: harmonics kept, how many tracked fast.
    """

    _method_name = "regression"
    # tracemalloc peaks of fit_transform, 20 Hz, 1 and 4 channels x 20 s (session 17); without a DAC
    # the grid's positions come from the phase since session 18 (10.9 -> 8.6 and 20.4 -> 12.7 at 30 s)
    memory_per_sample = (7.7, 12.8)
    _memory_with_dac = (6.7, 10.8)

    def __init__(self, n_harmonics: int | None = None, tracking_hz: float = 10.0, robust: bool = True,
                 dac: str = "auto", margin_cycles: float = 2.0, outlier_z: float = 5.0,
                 keep_factor: float = 4.0, model_pulse: bool = True,
                 heart_band_hz: tuple[float, float] = HEART_HZ):
        self.n_harmonics = n_harmonics
        self.tracking_hz = tracking_hz
        self.robust = robust
        self.dac = dac
        self.margin_cycles = margin_cycles
        self.outlier_z = outlier_z
        self.keep_factor = keep_factor
        self.model_pulse = model_pulse
        self.heart_band_hz = heart_band_hz

    def _validate_params(self) -> None:
        super()._validate_params()
        if self.n_harmonics is not None and (int(self.n_harmonics) != self.n_harmonics or self.n_harmonics < 1):
            raise ValueError(f"n_harmonics must be a positive integer or None, got {self.n_harmonics!r}")
        if not self.keep_factor > 0:
            raise ValueError(f"keep_factor must be positive, got {self.keep_factor!r}")

    def _fit_rows(self, v, w, env, taps_fast, taps_slow, rate, censor=None, decided=None):
        n_rows, n_bins = v.shape
        rows = fill_rows(v, w, env, censor=censor)
        # a cycle's own mean is the slow LFP under it, not artifact
        coef = np.fft.rfft(rows - rows.mean(axis=1, keepdims=True), axis=1)[:, 1:]
        n_h = coef.shape[1] if self.n_harmonics is None else min(int(self.n_harmonics), coef.shape[1])
        coef = coef[:, :n_h]
        seq = np.concatenate([coef.real.T, coef.imag.T])
        # the plateau levels and the choices below are the block's (see RowModelEstimator._decide)
        scale = plateau_level(seq, env) if decided is None else decided["scale"]
        # env is the envelope of the rows as the data show it (see RowModelEstimator._demodulate)
        fast = filter_sequences(seq, taps_fast, rate, env, scale=scale)
        slow = filter_sequences(seq, taps_slow, rate, env, scale=scale)
        fast = fast[:n_h] + 1j * fast[n_h:]
        slow = slow[:n_h] + 1j * slow[n_h:]
        if decided is None:
            # the Nyquist harmonic of an even grid is real: its noise follows the real rule
            real_last = n_bins % 2 == 0 and n_h == n_bins // 2
            use_fast, keep = self._choose(coef, env, fast, slow, taps_fast, taps_slow, real_last)
        else:
            use_fast, keep = decided["use_fast"], decided["keep"]
        est = np.where(use_fast[:, None], fast, slow)
        full = np.zeros((n_rows, n_bins // 2 + 1), dtype=complex)
        full[:, 1:n_h + 1] = (est * keep[:, None]).T
        out = np.fft.irfft(full, n=n_bins, axis=1)
        return out, dict(harmonics_kept=int(keep.sum()), harmonics_tracked=int((keep & use_fast).sum()),
                         decided=dict(scale=scale, use_fast=use_fast, keep=keep))

    def _choose(self, coef, env, fast, slow, taps_fast, taps_slow, real_last):
        """Which harmonics are tracked fast, and which are kept at all (both bool, one per harmonic)."""
        n_rows, n_h = coef.shape
        plateau = np.abs(env - 1.0) < 0.1
        rows_used = plateau if plateau.sum() > 8 else None
        sigma2 = noise_of_sequences(coef, rows_used)
        if real_last:
            sigma2[-1] = noise_of_sequences(coef[:, -1:].real, rows_used)[0]
        nu_f, nu_s = float(np.sum(taps_fast ** 2)), float(np.sum(taps_slow ** 2))
        nu_fs = float(np.sum((taps_fast - taps_slow) ** 2))
        # the fast filter follows modulation the slow one misses; worth it when that exceeds its noise
        use_fast = np.sum(np.abs(fast - slow) ** 2, axis=1) > 2 * n_rows * sigma2 * nu_fs
        est = np.where(use_fast[:, None], fast, slow)
        nu = np.where(use_fast, nu_f, nu_s) + 1.0 / max(plateau.sum(), 1)
        keep = np.sum(np.abs(est) ** 2, axis=1) > self.keep_factor * n_rows * sigma2 * nu
        return use_fast, keep
