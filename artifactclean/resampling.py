"""Band-limited upsampling for estimators that need many samples per stimulation cycle.

The cycle estimators place every sample on a grid of phase bins and read
the grid back by linear interpolation, first between samples, then between
bin centres. With hundreds of samples per cycle (spike-band rigs: 750 at
40 Hz from 30 kHz) that costs nothing; at the rates of scalp and many
intracranial LFP systems it does: 40 Hz from 1 kHz is 25 samples a cycle,
and each interpolation loses about ``(pi h / 25)**2 / 6`` of harmonic ``h``
(1% of the second), which stays in the data as a line 50-650x the neural
power within 3 Hz of the harmonics (40 Hz from 500 Hz: the search also took
the repeating samples for a DAC staircase).

So a block with fewer than :data:`MIN_SAMPLES_PER_CYCLE` samples a cycle
(:data:`ROW_SAMPLES_PER_CYCLE` for regression and PCA) is
cleaned on an upsampled copy: a windowed-sinc interpolator (Kaiser window)
that passes through every original sample exactly and fills between them
with the band-limited signal the amplifier's anti-aliasing filter left. The
artifact is then read at the original samples. A staircase recorded at such
rates is seen through that filter: its images on the cycle's harmonics are
part of the periodic waveform the estimators follow, and no DAC grid is
searched on the upsampled copy (its ticks could not be resolved anyway).
Harmonics above the Nyquist frequency that the amplifier let through fold
back as lines the copy does not hold as harmonics, and stay (40 Hz from
500 Hz with harmonics to the 8th and no anti-aliasing filter: 120-150x the
neural power at 180 and 220 Hz).
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy import signal

__all__ = ["MIN_SAMPLES_PER_CYCLE", "ROW_SAMPLES_PER_CYCLE", "upsampling_factor", "upsample", "upsample_railed",
           "upsampled_reader", "upsampled_block"]

#: a block with fewer samples per stimulation cycle than this is cleaned on an upsampled copy. The
#: interpolations lose about (pi h / samples a cycle)**2 / 6 of harmonic h each, so what matters is the highest
#: harmonic against the samples a cycle: the same trace at 30 kHz and decimated (benchmarks/low_rates.py) left
#: within 3 Hz of the harmonics 0.45 / 0.82x the neural power at 20 Hz from 30 / 2 kHz (100 samples a cycle,
#: regression 0.64 / 1.25x), 0.62 / 1.58x at 10 Hz from 1 kHz with regression, 0.78 / 48x at 40 Hz from
#: 1 kHz (25 samples) with the template. This project's choice: under 200, so that 5 Hz from 1 kHz, measured
#: a few ppm fast, stays as it is (0.62 / 0.64x)
MIN_SAMPLES_PER_CYCLE = 190
#: samples per cycle the upsampled copy reaches at least (this project's choice: 200 at 40 Hz from 1 kHz gave
#: the harmonics' bands of a 30 kHz recording, 0.9x; 400 no better)
TARGET_SAMPLES_PER_CYCLE = 200
#: the same for the row estimators (regression, PCA), which fit every harmonic of a row and need twice as many:
#: 10 Hz from 2 kHz (200 samples a cycle) left 1.07 (regression) and 0.72x (PCA) where 30 kHz left 0.62 and
#: 0.28x, upsampled to 400 0.62 and 0.28x (this project's choice)
ROW_SAMPLES_PER_CYCLE = (390, 400)
#: original samples on each side the interpolator reads, and its Kaiser window's beta: within 2e-5 of the
#: exact band-limited interpolation up to 0.9 of the Nyquist frequency (checked against scipy.signal.resample)
_HALF_TAPS = 32
_KAISER_BETA = 9.0


def upsampling_factor(freq_hz: float, fs: float, *, least: float = MIN_SAMPLES_PER_CYCLE,
                      target: float = TARGET_SAMPLES_PER_CYCLE) -> int:
    """Integer factor a block at ``freq_hz`` sampled at ``fs`` is upsampled by (1: not upsampled).

    Parameters
    ----------
    freq_hz : float
        Stimulation frequency (Hz).
    fs : float
        Sampling rate (Hz).
    least, target : float
        Samples per cycle under which a block is upsampled, and how many the
        copy reaches at least (the estimator's own; the template's by default).

    Returns
    -------
    int
        1 at ``least`` samples per cycle or more, else the smallest factor
        that gives ``target``.
    """
    per_cycle = fs / freq_hz
    if per_cycle >= least:
        return 1
    return int(np.ceil(target / per_cycle))


def _kernel(factor: int) -> np.ndarray:
    n = np.arange(-_HALF_TAPS * factor, _HALF_TAPS * factor + 1)
    # sinc(n / L) is 1 at 0 and 0 at every other multiple of L: the original samples pass unchanged
    h = np.sinc(n / factor) * signal.windows.kaiser(n.size, _KAISER_BETA)
    # each of the L interpolating phases sums to 1: a constant (a channel held at a rail) stays constant
    for r in range(factor):
        h[r::factor] /= h[r::factor].sum()
    return h


def upsample(x: np.ndarray, factor: int, *, axis: int = -1) -> np.ndarray:
    """``x`` at ``factor`` times its rate: sample ``i * factor`` of the result is sample ``i`` of ``x``.

    Windowed-sinc interpolation (:data:`_HALF_TAPS` original samples on each
    side, Kaiser window) with ``scipy.signal.upfirdn``; beyond the ends of
    ``x`` the signal is taken as zero, so the first and last
    :data:`_HALF_TAPS` samples' neighbourhoods are approximate.

    Parameters
    ----------
    x : ndarray
    factor : int
        Upsampling factor (>= 1).
    axis : int
        Time axis.

    Returns
    -------
    ndarray
        Length ``x.shape[axis] * factor`` along ``axis`` (the last original
        sample is followed by ``factor - 1`` interpolated ones).
    """
    factor = int(factor)
    if factor < 1:
        raise ValueError(f"factor must be a positive integer, got {factor}")
    x = np.asarray(x, dtype=np.float64)
    if factor == 1:
        return x.copy()
    n = x.shape[axis]
    y = signal.upfirdn(_kernel(factor), x, up=factor, axis=axis)
    delay = _HALF_TAPS * factor
    return np.take(y, np.arange(delay, delay + n * factor), axis=axis)


def upsample_railed(x: np.ndarray, factor: int, rails: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """:func:`upsample` of a recording (n_channels, n) whose channels may clip, the rails kept.

    Between samples at an amplifier's rail the interpolation rings beyond
    it and dips below it; the amplifier held that stretch at the rail. So
    each channel's upsampled values are limited to its rails
    (:func:`artifactclean.clipping.find_rails` of ``x``), and the samples
    between two originals at the same rail take the rail's value (the
    clipping fits find them there). ``rails``: ``find_rails(x)`` if the caller has it.
    """
    from .clipping import find_rails

    x = np.atleast_2d(np.asarray(x, dtype=np.float64))
    y = upsample(x, factor)
    factor = int(factor)
    top, bottom = find_rails(x) if rails is None else rails
    for ch in np.flatnonzero(np.isfinite(top) | np.isfinite(bottom)):
        row = y[ch]
        np.clip(row, bottom[ch], top[ch], out=row)
        for rail in (top[ch], bottom[ch]):
            if np.isfinite(rail):
                at = x[ch] == rail
                both = np.repeat(at & np.append(at[1:], False), factor)
                row[both] = rail
    return y


def upsampled_reader(read, factor: int, n_samples: int):
    """``read(a, b, rows=None)`` on the upsampled time axis, from one on the original samples.

    Each call reads :data:`_HALF_TAPS` original samples more on each side
    (within ``0..n_samples``), so a stretch equals the same stretch of the
    whole recording upsampled at once, except within that reach of the
    recording's ends.
    """
    factor = int(factor)

    def read_up(a: int, b: int, rows=None) -> np.ndarray:
        lo = max(0, a // factor - _HALF_TAPS)
        hi = min(n_samples, -(-b // factor) + _HALF_TAPS + 1)
        y = upsample_railed(read(lo, hi, rows), factor)
        return y[..., a - lo * factor:b - lo * factor]

    return read_up


def upsampled_block(blk, factor: int):
    """A copy of stimulation block ``blk`` with every sample position on the upsampled axis.

    The frequency and the phase at the reference sample are the block's own,
    so :func:`artifactclean.estimators.cycles.block_key` names both alike;
    the copy carries ``upsampled_by`` (the factor).
    """
    factor = int(factor)
    edges = None if blk.edges is None else tuple(int(v) * factor for v in blk.edges)
    out = dataclasses.replace(blk, start=blk.start * factor, stop=blk.stop * factor,
                              ramp_up_stop=blk.ramp_up_stop * factor, ramp_down_start=blk.ramp_down_start * factor,
                              ref_sample=blk.ref_sample * factor, edges=edges)
    out.upsampled_by = factor
    return out
