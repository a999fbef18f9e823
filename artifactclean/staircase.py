"""Stimulator DAC staircase: find the update ticks in the recording.

A stimulator's DAC updates its output at a fixed rate and holds it in
between, so the artifact is a staircase whose steps reach into the spike
band. When the DAC is clocked with the waveform (an integer number ``M`` of
updates per stimulation cycle, as for 5, 10, 20 or 40 Hz from a 1 kHz DAC),
every sample belongs to one tick ``floor(M * u - c)`` of the unwrapped
stimulation phase ``u`` (cycles), and all samples of a tick share one held
value. A template indexed by tick is then exact for the staircase.

The DAC and the waveform run on the stimulator's one clock, so even when a
cycle is not a whole number of updates (13 Hz or 6 Hz from a 1 kHz DAC:
76.9 and 166.7 updates per cycle) the ticks fall on the same phases every
``q`` cycles (13 and 3), ``M`` updates per period of ``q`` cycles (1000 and
500): the same grid, on the period instead of the cycle
(:func:`find_dac_period`). A DAC on a clock of its own ticks at any rate
(:func:`find_dac_clock`); a few ppm from a whole number per cycle, that is a
grid whose offset moves along a line (:func:`clock_as_grid`).

Steps are found with a four-sample step detector, and ``M`` and ``c`` by
folding the step positions on the stimulation phase. A fast DAC's steps
(a few samples a tick) are each too small to find; its update rate shows
in the power of the first differences, and its edges where that power
falls between two samples (:func:`find_fast_dac`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import signal

from .clipping import find_clipped
from ._numeric import fractional_part, interp_sorted

__all__ = ["DacClock", "DacGrid", "clock_as_grid", "find_dac_clock", "find_dac_grid", "find_dac_period", "find_fast_dac", "step_rate"]


@dataclass(frozen=True)
class DacGrid:
    """DAC update grid locked to the stimulation phase.

    Attributes
    ----------
    ticks_per_cycle : int
        Updates per period (``M``): per stimulation cycle, or per
        ``cycles_per_period`` cycles.
    offset : float
        Tick phase ``c`` in [0, 1): ticks fall at ``u / q = (k + c) / M``.
    offset_track : tuple of (ndarray, ndarray)
        Two phases (cycles) and the offsets there: a straight line through
        offsets located window by window from the steps themselves, which
        absorbs a residual error of the frequency estimate.
    concentration : float
        Mean resultant length of the step positions folded on the tick
        period (1 = every step exactly on the grid).
    n_steps : int
        Number of steps used.
    cycles_per_period : int
        Stimulation cycles (``q``) after which the ticks fall on the same
        phases again: 1 when a cycle is a whole number of updates.
    settle_width : float
        Samples closer than this (in samples) to a tick edge are assigned
        to a tick by the data rather than by the grid: a grid from a few
        thousand steps places its edges to about a quarter of a sample; one
        from every sample's difference (:func:`find_fast_dac`) far better.
    """

    ticks_per_cycle: int
    offset: float
    concentration: float
    n_steps: int
    offset_track: tuple = ()
    cycles_per_period: int = 1
    settle_width: float = 0.25

    def _position(self, cycles: np.ndarray) -> np.ndarray:
        periods = cycles / self.cycles_per_period if self.cycles_per_period != 1 else cycles
        if self.offset_track:
            at, off = self.offset_track
            c = interp_sorted(periods, at, off)
        else:
            c = self.offset
        return self.ticks_per_cycle * periods - c

    def tick_index(self, cycles: np.ndarray) -> np.ndarray:
        """Global tick number of each sample with unwrapped phase ``cycles``."""
        return np.floor(self._position(cycles)).astype(np.int64)

    def edge_distance(self, cycles: np.ndarray) -> np.ndarray:
        """Position within the tick, in [0, 1): near 0 or 1 means next to an edge."""
        return fractional_part(self._position(cycles))

    def ticks_and_edges(self, cycles: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`tick_index` and :meth:`edge_distance` from one evaluation of the position (the same numbers)."""
        return _ticks_and_edges(self._position(cycles))

    def moved(self, cycles: np.ndarray, ticks: np.ndarray) -> DacGrid:
        """The grid with its edges later by ``ticks`` (a line through two phases ``cycles``, extended).

        The offset track gains knots at ``cycles`` and keeps its own: within
        them, the new edges are the old ones plus the line exactly (the track
        is linear between knots and constant beyond the outer ones).
        """
        periods = np.asarray(cycles, dtype=np.float64) / self.cycles_per_period
        slope = (ticks[1] - ticks[0]) / (periods[1] - periods[0])
        at = np.unique(np.concatenate((periods, self.offset_track[0] if self.offset_track else [])))
        old = interp_sorted(at, *self.offset_track) if self.offset_track else np.full(at.size, self.offset)
        # position = M p - c: edges later by t ticks where c grows by t
        return replace(self, offset_track=(at, old + ticks[0] + slope * (at - periods[0])))


@dataclass(frozen=True)
class DacClock:
    """DAC update ticks at any whole or fractional number per cycle (a free-running grid).

    Ticks fall at ``u = (k + offset) / ticks_per_cycle`` of the unwrapped
    stimulation phase ``u``; a sample holds the waveform at the phase of its
    tick (:meth:`held_cycles`), which a template over the cycle, read there,
    reproduces.

    Attributes
    ----------
    ticks_per_cycle : float
        Updates per cycle (``rho``, not a whole number).
    offset : float
        Tick phase in ticks.
    concentration : float
        Mean resultant length of the step positions folded on the ticks.
    n_steps : int
        Number of steps used.
    """

    ticks_per_cycle: float
    offset: float
    concentration: float
    n_steps: int

    #: the template's rows are cycles
    cycles_per_period = 1
    #: samples within a quarter sample of a tick edge are assigned by the data (see DacGrid)
    settle_width = 0.25

    def tick_index(self, cycles: np.ndarray) -> np.ndarray:
        """Global tick number of each sample with unwrapped phase ``cycles``."""
        return np.floor(self.ticks_per_cycle * cycles - self.offset).astype(np.int64)

    def edge_distance(self, cycles: np.ndarray) -> np.ndarray:
        """Position within the tick, in [0, 1): near 0 or 1 means next to an edge."""
        return fractional_part(self.ticks_per_cycle * cycles - self.offset)

    def ticks_and_edges(self, cycles: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`tick_index` and :meth:`edge_distance` from one evaluation of the position (the same numbers)."""
        return _ticks_and_edges(self.ticks_per_cycle * cycles - self.offset)

    def held_cycles(self, ticks: np.ndarray) -> np.ndarray:
        """Stimulation phase (unwrapped cycles) at which each tick sampled the waveform."""
        return (np.asarray(ticks, dtype=np.float64) + self.offset) / self.ticks_per_cycle

    def moved(self, cycles: np.ndarray, ticks: np.ndarray) -> DacClock:
        """The clock with its edges later by ``ticks``, a line through two phases ``cycles``: a rate and offset."""
        slope = (ticks[1] - ticks[0]) / (cycles[1] - cycles[0])
        # position rho u - offset, less the line t0 + slope (u - u0)
        return replace(self, ticks_per_cycle=self.ticks_per_cycle - slope,
                       offset=self.offset + ticks[0] - slope * cycles[0])


def _ticks_and_edges(pos: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    # floor(pos) as the tick and pos - floor(pos) (fractional_part's own arithmetic) as the edge distance
    fl = np.floor(pos)
    return fl.astype(np.int64), np.subtract(pos, fl, out=fl)


def find_dac_clock(x: np.ndarray, cycles: np.ndarray, fs: float, freq: float, *, z_threshold: float = 6.0,
                   min_concentration: float = 0.85) -> DacClock | None:
    """A DAC staircase at any number of updates per cycle, from the steps' own spacing.

    ``x`` is one channel or several (rows), whose steps are pooled.

    The update period comes from the steps (:func:`find_dac_period` does the
    same); the tick phase from a line through step times against tick
    numbers, converted to the stimulation phase of ``cycles`` (linear in
    samples). Accepted when the steps fold on the ticks with at least
    ``min_concentration``.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.shape[-1] < 64:
        return None
    fit = _tick_line(x, z_threshold)
    if fit is None:
        return None
    period, t0, t = fit
    rho = fs / (period * freq)
    slope = (cycles[-1] - cycles[0]) / max(cycles.size - 1, 1)
    # tick k at sample t0 + k * period, i.e. at phase cycles[0] + (t0 + k * period) * slope
    offset = float(rho * (cycles[0] + t0 * slope))
    frac = fractional_part(rho * (cycles[0] + t * slope) - offset)
    conc = float(np.abs(np.mean(np.exp(2j * np.pi * frac))))
    if conc < min_concentration:
        return None
    return DacClock(float(rho), offset, conc, int(t.size))


def clock_as_grid(clock: DacClock, *, max_period: int = 24, tolerance: float = 0.03) -> DacGrid | None:
    """A free-running DAC clock as a period grid whose offset moves along a line, where that is close.

    A DAC clocked apart from the waveform (a stimulator whose frequency is
    set with finite resolution, or ticks on another clock) gives ``rho``
    updates per cycle a few ppm from a whole number ``M / q``. Binned by the
    phase each tick held (:class:`DacClock`), those phases cluster within
    the template's window and most bins stay empty. The same ticks are,
    exactly, ``M`` slots per ``q`` cycles whose offset moves by
    ``M - q * rho`` ticks a period: a :class:`DacGrid` with a straight
    ``offset_track``, on which each slot holds one tick of every period and
    its held phase moves only a little from one period to the next.

    Parameters
    ----------
    clock : DacClock
    max_period : int
        Longest period tried, in cycles (the smallest ``q`` that fits wins).
    tolerance : float
        Largest ``|q * rho - M|``, in ticks a period.

    Returns
    -------
    DacGrid or None
        None when no ``q <= max_period`` brings ``q * rho`` that close to a whole number.
    """
    rho = float(clock.ticks_per_cycle)
    for q in range(1, max_period + 1):
        m = int(round(q * rho))
        drift = m - q * rho
        if m >= 3 and abs(drift) <= tolerance:
            # M p - c(p) = rho u - offset with p = u / q: c(p) = (M - q rho) p + offset, a line; its ends lie far
            # beyond any recording (1e9 periods) so that interpolation never clamps
            at = np.array([-1e9, 1e9])
            return DacGrid(m, float(clock.offset), clock.concentration, clock.n_steps,
                           (at, drift * at + clock.offset), q)
    return None


def find_dac_grid(
    x: np.ndarray,
    cycles: np.ndarray,
    fs: float,
    freq: float,
    *,
    min_rate_hz: float = 200.0,
    z_threshold: float = 4.5,
    min_concentration: float = 0.85,
    max_steps: int = 2000,
    ticks: int | None = None,
    cycles_per_period: int = 1,
) -> DacGrid | None:
    """Look for a DAC staircase locked to the stimulation phase.

    Parameters
    ----------
    x : ndarray, shape (n,)
        One channel during stimulation (the strongest).
    cycles : ndarray, shape (n,)
        Unwrapped stimulation phase of each sample, in cycles.
    fs, freq : float
        Sampling rate and stimulation frequency (Hz).
    min_rate_hz : float
        Slowest DAC update rate considered.
    z_threshold : float
        A step must exceed this many robust standard deviations of the step
        statistic.
    min_concentration : float
        Folded step positions must be at least this concentrated.
    max_steps : int
        Steps used for the search (evenly subsampled).
    ticks : int, optional
        Only this number of updates per period is tried.
    cycles_per_period : int
        Fold on periods of this many cycles (see :func:`find_dac_period`).

    Returns
    -------
    DacGrid or None
        None when no staircase is found.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.size < 16:
        return None
    cycles = cycles / cycles_per_period if cycles_per_period != 1 else cycles
    freq = freq / cycles_per_period
    q, sigma = _step_statistic(x)
    if sigma <= 0:
        return None
    big = _step_positions(q, z_threshold * sigma)
    if big.size < 20:
        return None
    if big.size > max_steps:
        big = big[np.linspace(0, big.size - 1, max_steps).astype(int)]
    # the step lies between samples i+1 and i+2 of x (q[i] spans x[i..i+3])
    u_lo = cycles[big + 1]
    u_hi = cycles[big + 2]
    u_mid = 0.5 * (u_lo + u_hi)
    samples_per_cycle = fs / freq
    m_lo = max(3, int(np.ceil(min_rate_hz / freq)))
    m_hi = int(samples_per_cycle // 3)
    if m_hi < m_lo:
        return None
    ms = np.arange(m_lo, m_hi + 1) if ticks is None else np.array([int(ticks)])
    # fold step positions on each candidate tick period
    r = _fold_concentration(u_mid, ms)
    best = int(np.argmax(r))
    if r[best] < min_concentration:
        return None
    m = int(ms[best])
    if ticks is None and cycles_per_period == 1:
        # a grid of M slots per cycle also holds ticks that fall every few slots, their phases
        # turning from cycle to cycle (6 Hz from a 1 kHz DAC fits 500 slots per cycle): the
        # ticks' own spacing must give M per cycle
        period = _tick_period(x, max(z_threshold, 6.0))
        if period is not None and abs(fs / (period * freq) - m) > 0.03:
            return None
    all_steps = _step_positions(q, z_threshold * sigma)
    c = _vote_offset(m, cycles[all_steps + 1], cycles[all_steps + 2])
    # refine the offset locally, about every half second (>= 50 steps per window)
    u_all = cycles[all_steps + 1]
    span = max(0.5 * freq, 50.0 * (u_all[-1] - u_all[0] + 1e-12) / max(all_steps.size, 1))
    edges = np.arange(u_all[0], u_all[-1] + span, span)
    centres, offs = [], []
    for lo, hi in zip(edges[:-1], edges[1:]):
        sel = (u_all >= lo) & (u_all < hi)
        if sel.sum() < 20:
            continue
        cw = _vote_offset(m, cycles[all_steps[sel] + 1], cycles[all_steps[sel] + 2])
        centres.append(0.5 * (lo + hi))
        # keep each local offset within half a tick of the global one
        offs.append(c + (np.mod(cw - c + 0.5, 1.0) - 0.5))
    track = _offset_line(centres, offs, u_all[0], u_all[-1])
    grid = DacGrid(m, c, float(r[best]), int(big.size), track, int(cycles_per_period))
    if ticks is None and cycles_per_period == 1 and period is None:
        # steps too faint for their spacing (a 1 kHz DAC of a 3 Hz, 2 mV sine: 333.3 ticks a cycle, steps of
        # 20-40 uV) leave the check above open, and 1000 slots a cycle fit every third one's ticks: the pairs'
        # power at the slots' edges must fall on every slot, not on one in a few (as in find_fast_dac)
        w, level = _pair_power(x)
        if _edges_skip_ticks(np.minimum(w, _PAIR_CAP * level), cycles, grid, int(m * freq // _SLOWEST_DAC_HZ)):
            return None
    return grid


#: a pair's power counts at most this many times the pairs' median: a spike's edges are a few pairs, not a
#: rhythm (this project's choice)
_PAIR_CAP = 25.0


def _pair_power(x: np.ndarray, lost: np.ndarray | None = None) -> tuple[np.ndarray, float]:
    """The power of each pair of consecutive samples' difference, ``d**2`` (0 where a pair touches a ``lost``
    sample: a rail's edges are steps of its own), and its median over every 7th pair."""
    d = np.diff(x)
    w = d * d
    if lost is not None:
        w[lost[:-1] | lost[1:]] = 0.0
    return w, float(np.median(w[::7]))


def _offset_line(centres: list, offs: list, first: float, last: float) -> tuple:
    """A straight line through local offsets (it absorbs a residual frequency error), or () for fewer than 3."""
    if len(centres) < 3:
        return ()
    centres, offs = np.asarray(centres), np.asarray(offs)
    coef = np.polyfit(centres - centres.mean(), offs, 1)
    ends = np.array([first - 1e6, last + 1e6])
    return ends, np.polyval(coef, ends - centres.mean())


def find_dac_period(
    x: np.ndarray,
    cycles: np.ndarray,
    fs: float,
    freq: float,
    *,
    max_period: int = 24,
    z_threshold: float = 6.0,
) -> DacGrid | None:
    """Look for a DAC staircase whose ticks repeat every few stimulation cycles.

    ``x`` is one channel or several (rows, the first checked for the grid);
    their steps are pooled for the update period.

    The update period is measured from the steps themselves (the spacing of
    consecutive steps, refined by a least-squares line through the step
    times against their tick numbers), which gives the updates per cycle
    ``rho = fs / (period * freq)``; the first ``q <= max_period`` with
    ``q * rho`` a whole number ``M`` (within 0.03) is checked with
    :func:`find_dac_grid` folding on periods of ``q`` cycles.

    Returns
    -------
    DacGrid or None
        With ``cycles_per_period = q``; None when no such staircase is found.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.shape[-1] < 64:
        return None
    period = _tick_period(x, z_threshold)
    if period is None:
        return None
    rho = fs / (period * freq)
    for q in range(2, max_period + 1):
        m = round(q * rho)
        if m >= 3 and abs(q * rho - m) < 0.03:
            grid = find_dac_grid(np.atleast_2d(x)[0], cycles, fs, freq, ticks=m, cycles_per_period=q,
                                 min_rate_hz=0.0)
            if grid is not None:
                return grid
    return None


def find_fast_dac(
    x: np.ndarray,
    cycles: np.ndarray,
    fs: float,
    freq: float,
    *,
    max_samples_per_tick: float = 8.0,
    max_period: int = 24,
    min_z: float = 10.0,
    min_prominence: float = 10.0,
    min_edge_power: float = 2.0,
    window_s: float = 2.0,
    ticks: tuple | None = None,
) -> DacGrid | None:
    """Look for a DAC too fast for its single steps to show (a few samples a tick).

    A 10 kHz DAC sampled at 30 kHz holds each value for three samples; at
    40 Hz and 4 mV its steps are 0-100 uV, under the step statistic's noise
    (every window of it holds a step), so :func:`find_dac_grid` finds none.
    Pooled, they show: within a tick the staircase is flat, so the power of
    the first differences ``d[n] = x[n+1] - x[n]`` is the noise's except
    where a tick edge falls between the two samples.

    - The update rate ``R`` is the strongest line of ``d**2`` between
      ``fs / max_samples_per_tick`` and ``fs / 2`` (a Hann-windowed FFT of
      2**16 pairs), at least ``min_prominence`` times the band's median,
      placed by a zoom FFT of up to 2**18 pairs; it gives ``rho = R /
      freq`` updates per cycle. Its alias ``fs - R`` (a DAC faster than
      ``fs / 2``) is tried too when ticks at ``R`` do not hold the power or
      ``R`` is next to ``fs / 2``, and the grid that folds better is kept.
    - Each ``q <= max_period`` with ``q * rho`` within 0.05 of a whole number
      ``M`` is scored by folding the pairs' power on ``M`` ticks per ``q``
      cycles: ``|sum(w exp(2 pi i M u / q))| / sqrt(sum(w**2))``, whose
      square is about exponentially distributed with mean 1 when the power
      is not locked to the ticks. The best (the shortest period among
      equals) must reach ``min_z``: on the middle 2**17 pairs the DACs
      here give 19-142, smooth waveforms and noise at most 2.5.
    - The pairs the grid puts a tick edge between must hold on average
      ``min_edge_power`` times the power of the others (a DAC faster than
      ``fs / 2`` aliases into the band, and its grid fails this).
    - The tick offset is where most of that power lies between two samples:
      each pair votes with its power for the phases between its two
      samples, in windows of about ``window_s`` seconds (at least eight,
      none under a quarter second), and a line through the windows' offsets follows
      a residual error of the frequency; ticks that drift more than 0.005 of
      a tick per period, and more than such an error (:data:`_FREQ_ERROR`)
      moves them, only nearly repeat (a free-running DAC), and are refused.

    The edges are placed to about 1e-4 of a tick here (synthetic 40 Hz, 10
    kHz DAC), so only the samples within a few thousandths of a sample of
    an edge are left for the data to assign (``settle_width``; a quarter of
    a sample for a grid from single steps; here a quarter sample's
    ambiguous samples, misassigned by the noise, left 0.04-0.1 x the noise
    in the spike band).

    Parameters
    ----------
    x : ndarray, shape (n,)
        One channel during stimulation (the strongest).
    cycles : ndarray, shape (n,)
        Unwrapped stimulation phase of each sample, in cycles.
    fs, freq : float
        Sampling and stimulation frequency (Hz).
    max_samples_per_tick : float
        Slowest DAC looked for, in samples per tick (slower ones show
        single steps).
    max_period : int
        Longest period of cycles after which the ticks fall on the same
        phases again.
    min_z, min_prominence, min_edge_power : float
        Acceptance thresholds (above).
    window_s : float
        Length of the windows whose offsets the line goes through (s).
    ticks : (int, int), optional
        ``(M, q)`` when the ticks are known (from :func:`find_dac_grid`): the
        search is skipped, and only their edges are placed and checked.

    Returns
    -------
    DacGrid or None
        None when no such staircase is found.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.size < 4096:
        return None
    lost = find_clipped(x[None, :])[0]
    w, level = _pair_power(x, lost)
    # clear steps, whatever else the pairs hold: where the grid's edges do not separate them, it misplaces
    # them (_missed_edges); the noise's differences pass 100 times their median once in ~1e11
    steps = np.flatnonzero(w >= _STEP_POWER * level)
    w = np.minimum(w, _PAIR_CAP * level)
    if not np.any(w > 0):
        return None
    if ticks is not None:
        return _grid_at_rate(w, cycles, fs, freq, None, max_period=max_period, min_z=min_z,
                             min_edge_power=min_edge_power, window_s=window_s, ticks=ticks, steps=steps)
    # the rate from the middle of the stretch (clear of ramps), 2**16 pairs: bins of 0.5 Hz at 30 kHz
    n_fft = min(w.size, 1 << 16)
    mid = w[(w.size - n_fft) // 2:][:n_fft]
    nfft = 4 * (1 << int(np.ceil(np.log2(n_fft))))
    spec = np.abs(np.fft.rfft((mid - mid.mean()) * np.hanning(n_fft), nfft))
    lo = int(np.ceil(fs / max_samples_per_tick * nfft / fs))
    hi = nfft // 2 - 2
    if hi <= lo + 2:
        return None
    k = lo + 1 + int(np.argmax(spec[lo + 1:hi]))
    # a line, not the largest of ~10**5 noise bins (about 4-5 times their median); the DACs here stand
    # 19-390 times above it. Spares the folds below on every recording without a DAC
    if spec[k] < min_prominence * np.median(spec[lo:hi]):
        return None
    rate = _refine_line(w, fs, (k + _between_bins(spec, k)) * fs / nfft, 4.0 * fs / n_fft)
    # A DAC faster than fs / 2 shows at its alias fs - R (25 kHz sampled at 30 kHz: a line at 5 kHz; a
    # tick still spans a sample or more, so its grid holds). A DAC in the band, locked or not, explains
    # the pairs' power by ticks at R in time, and then the alias is not tried: that of a free-running
    # 10 kHz DAC (13.37 Hz) folds as well as its line, and came within 0.05 of 7479 ticks every 5
    # cycles. Next to fs / 2 both are tried and the better fold kept (15 kHz with 40 ppm shows at
    # 14999.4 Hz, whose 1499.88 ticks a 10 Hz cycle fit 25498 per 17 cycles; 15000.6 Hz fits 1500)
    # Nor where the line is a slower DAC's harmonic, whose rate's lines stand at its fractions too: behind an
    # amplifier's low-pass a 1 kHz DAC's steps spread over two or three pairs, its 4th harmonic was the band's
    # strongest line (13.37 Hz), and the alias of that a 26 kHz grid on which nearly every pair holds an edge
    rates = (rate, fs - rate)
    if (abs(rate - 0.5 * fs) > 0.01 * fs and _edge_power(mid, np.arange(n_fft) * (rate / fs), 1) >= min_edge_power) \
            or _has_subharmonic(spec, k, int(rate // _SLOWEST_DAC_HZ)):
        rates = (rate,)
    found = [_grid_at_rate(w, cycles, fs, freq, r, max_period=max_period, min_z=min_z,
                           min_edge_power=min_edge_power, window_s=window_s, steps=steps) for r in rates]
    # a slower DAC the step search missed shows its rate's harmonics in the band, and a grid on them must
    # find an edge at every tick (7.3 Hz from 1 kHz: the line at 4 kHz folded as 9863 ticks every 18
    # cycles, which only nearly repeat, one in four of them with an edge; the ticks repeat every 73
    # cycles, which the step search's clock models)
    found = [g for g in found if g is not None and not _edges_skip_ticks(w, cycles, g, int(rate // _SLOWEST_DAC_HZ))]
    return max(found, key=lambda g: g.concentration) if found else None


#: the slowest DAC (Hz) whose harmonics :func:`find_fast_dac` checks a line against (this project's choice; the
#: rate's bound of the edge check beside it)
_SLOWEST_DAC_HZ = 200.0
#: a line at ``k / j`` holding this share of the line's amplitude makes it a harmonic (this project's choice: a
#: 1 kHz DAC behind a 7.5 kHz low-pass has its 1st-3rd harmonics at 0.6-1.5 of the 4th; a DAC faster than
#: fs / 2 has nothing at its alias's fractions beyond the noise)
_SUBHARMONIC_SHARE = 0.3


def _has_subharmonic(spec: np.ndarray, k: int, max_j: int) -> bool:
    """Whether the spectrum ``spec`` has a line at ``k / j`` (``2 <= j <= max_j``) of :data:`_SUBHARMONIC_SHARE`
    of its line at bin ``k``: the line is a harmonic of a slower rate (within two bins of each fraction)."""
    for j in range(2, max_j + 1):
        at = int(round(k / j))
        if at < 3:
            break
        if spec[at - 2:at + 3].max() >= _SUBHARMONIC_SHARE * spec[k]:
            return True
    return False


def _edges_skip_ticks(w: np.ndarray, cycles: np.ndarray, grid: DacGrid, max_j: int) -> bool:
    """Whether the power of the pairs ``w`` at ``grid``'s edges falls at one tick in ``j`` (``2 <= j <= max_j``).

    Each pair with an edge between its samples gives its power beyond the median to that tick; a DAC
    ``j`` times slower than the grid puts it on one residue of the tick number modulo ``j`` (the rest
    near none), a DAC at the grid's rate on all of them alike.
    """
    k = np.floor(grid._position(cycles)).astype(np.int64)
    at = np.flatnonzero(k[1:] != k[:-1])
    excess = np.maximum(w[at] - np.median(w), 0.0)
    total = excess.sum()
    if total <= 0:
        return False
    for j in range(2, max(2, max_j) + 1):
        share = np.bincount(np.mod(k[at + 1], j), excess, j).max() / total
        if share >= min(0.9, 2.0 / j):
            return True
    return False


def _refine_line(w: np.ndarray, fs: float, rate: float, span: float) -> float:
    """The frequency of the line near ``rate`` (within ``span`` Hz) in the middle of ``w``, to ~1/8 of its resolution.

    The 2**16 pairs of the search place a line to ~0.05 Hz, too coarse to tell a period of 24 cycles
    at 5 Hz; and next to fs / 2 its mirror image pulls the peak (15 kHz sampled at 30 kHz read 1.2 Hz
    low). A zoom FFT (``scipy.signal.zoom_fft``) of up to 2**18 Hann-windowed pairs does neither.
    """
    first = max(0, (w.size - (1 << 18)) // 2)  # the middle 8.7 s at 30 kHz: ~2 mHz here
    w = w[first:first + (1 << 18)]
    lo, hi = max(rate - span, 1.0), min(rate + span, 0.5 * fs)
    step = fs / w.size / 8.0
    n_pts = max(3, int((hi - lo) / step))
    spec = np.abs(signal.zoom_fft((w - w.mean()) * np.hanning(w.size), [lo, hi], n_pts, fs=fs))
    k = int(np.clip(np.argmax(spec), 1, n_pts - 2))
    return float(lo + (k + _between_bins(spec, k)) * (hi - lo) / n_pts)


def _between_bins(spec: np.ndarray, k: int) -> float:
    """Offset (bins, within +-0.5) of the peak near bin ``k`` from a parabola through the log magnitudes (common practice)."""
    a, b, c = np.log(spec[k - 1:k + 2] + 1e-300)
    curv = a - 2 * b + c
    return float(0.5 * (a - c) / curv) if curv < 0 else 0.0


def _grid_at_rate(w: np.ndarray, cycles: np.ndarray, fs: float, freq: float, rate: float | None, *,
                  max_period: int, min_z: float, min_edge_power: float, window_s: float, max_drift: float = 0.005,
                  ticks: tuple | None = None, steps: np.ndarray | None = None) -> DacGrid | None:
    """The grid of ticks at about ``rate`` per second from the pairs' power ``w`` (see :func:`find_fast_dac`), or None.

    With ``ticks`` (``M``, ``q``) the ticks are known, and only their edges are placed and checked.
    ``steps``: the pairs that hold a clear step (indices), which the grid's edges must separate.
    """
    # folds on the middle 2**17 pairs (4.4 s at 30 kHz; the DACs here score 19-142 there): a fold is an
    # exponential per pair, and a block's search tries up to a dozen
    first = max(0, (w.size - (1 << 17)) // 2)
    w_fold = w[first:first + (1 << 17)]
    u_mid = 0.5 * (cycles[first:first + w_fold.size] + cycles[first + 1:first + w_fold.size + 1])
    norm = float(np.sqrt(np.sum(w_fold * w_fold)))

    def fold(m, q):
        return float(np.abs(np.sum(w_fold * np.exp(2j * np.pi * (m / q) * u_mid)))) / norm

    if ticks is not None:
        m, q = (int(v) for v in ticks)
    else:
        m, q = _ticks_of_rate(fold, rate, freq, max_period, min_z)
        if m is None:
            return None
    u = cycles / q if q != 1 else cycles
    conc = fold(m, q) * norm / w_fold.sum()
    c0 = _vote_offset(m, u[:-1], u[1:], w)
    # at least eight windows (their scatter about the line sets the settle width), none under a quarter second
    n_win = max(8, int(w.size // (window_s * fs)))
    bounds = np.linspace(0, w.size, n_win + 1).astype(np.int64) if w.size >= n_win * 0.25 * fs else []
    centres, offs = [], []
    for i, j in zip(bounds[:-1], bounds[1:]):
        cw = _vote_offset(m, u[i:j], u[i + 1:j + 1], w[i:j])
        centres.append(float(u[i:j].mean()))
        offs.append(c0 + (np.mod(cw - c0 + 0.5, 1.0) - 0.5))
    track = _offset_line(centres, offs, u[0], u[-1])
    per_tick = fs * q / (m * freq)
    line_settle = None
    if track and steps is not None and _edge_gap(per_tick, w.size / max(len(bounds) - 1, 1) / per_tick) > _EDGE_GAP:
        # the edges of a window sit at a few places within a sample: its vote is biased (_edge_line); a DAC
        # whose steps do not stand out one by one places its line by the pairs that stand a little out
        faint = steps.size < _MISSED_MIN
        track, run = _edge_line(_soft_steps(w) if faint else steps, u, m, track, per_tick)
        line_settle = 2.0 * run * per_tick if faint and run is not None else None
    drift_limit = max(max_drift, min(_LOCKED_DRIFT_MAX, m * _FREQ_ERROR))
    if track and abs(np.diff(track[1])[0] / np.diff(track[0])[0]) > drift_limit:
        # ticks that only nearly repeat every q cycles (13.37 Hz from 1 kHz: 373.97 every 5 cycles;
        # they repeat every 1337) fold well over seconds, the line taking up their drift of 0.03 ticks
        # a period (a free-running DAC: find_dac_clock); an error of the frequency moves m ticks by m
        # times it (_FREQ_ERROR)
        return None
    # the data assign the samples closer to an edge than the offsets scatter (four SDs about their
    # line), and never fewer than those within 0.003 samples: the edges are placed to about 1e-4
    # ticks here, and a sample that close to one, misassigned, leaves a whole step (130 uV) as a spike
    settle = 0.25
    if track:
        scatter = float(np.std(np.asarray(offs) - np.interp(centres, *track)))
        settle = 4.0 * scatter * per_tick
        if line_settle is not None:
            # a faint DAC's line from its pairs (above): the windows' offsets scatter by their bias, not the
            # line's error, and the data, judging steps of 2-4 SDs, misassign the samples they are given
            # (5 Hz from 2 kHz at 3 mV: 0.12 x noise in the spike band with the windows' 0.25 samples, 0.018
            # with twice what the pairs leave open)
            settle = line_settle
        # a bias the windows share does not scatter them: where steps fall between samples the grid puts in
        # one tick, the data show how far off its edges are
        missed = np.empty(0) if steps is None else _missed_edges(steps, u, m, track, per_tick)
        if missed.size >= _MISSED_MIN:
            settle = max(settle, 1.25 * float(np.quantile(missed, 0.99)))
        settle = float(np.clip(settle, 0.003, 0.25))
    # the staircase is flat within a tick: the pairs the grid puts an edge between must hold more power
    # than the rest. A DAC faster than fs / 2 aliases to a line in the band whose grid does not (20 and
    # 25 kHz sampled at 30 kHz, taken at their alias: 1.1-1.5 times; the DACs found here 2.6-19)
    if _edge_power(w, u, m, (track, c0)) < min_edge_power:
        return None
    return DacGrid(int(m), c0, conc, int(w.size), track, int(q), settle_width=settle)


#: the stimulation frequency's error a locked DAC's ticks may show as a drift (relative): a line through the
#: windows' offsets takes it up. At 5 Hz the fit is 2-13 ppm off on 12-16 s blocks (the LFP beside the
#: fundamental), which moves 400 ticks a cycle (2 kHz) by up to 0.0052 of a tick a cycle; a free-running
#: DAC's ticks drift by the fraction its period leaves (13.37 Hz from 1 kHz: 0.03 of a tick every 5
#: cycles). This project's choice, 2.5 times the worst seen
_FREQ_ERROR = 30e-6
#: ... but never more than this a period, whatever the ticks' number: within a template's window of up to
#: ~20 periods the slots then stay within 0.4 of a tick of where the line puts them
_LOCKED_DRIFT_MAX = 0.02


#: a window's vote is unbiased where its tick edges fall at every tenth of a sample or closer
#: (:func:`_edge_gap`); this project's choice
_EDGE_GAP = 0.1


def _edge_gap(per_tick: float, ticks: float) -> float:
    """The largest gap (samples, circular) between the places within a sample where ``ticks`` edges fall,
    ``per_tick`` samples apart.

    At 1 kHz sampled at 30 kHz every edge falls at one place (30 samples a tick) and only the stimulator's
    drift moves it, by 0.2 samples a second at 6.7 ppm; at 24.414 kHz (12.207 samples a tick) the edges of a
    few dozen ticks fill the sample whatever the drift.
    """
    n = int(min(max(ticks, 1), 1 << 16))
    frac = np.sort(fractional_part(np.arange(n) * per_tick))
    gaps = np.diff(np.concatenate((frac, [frac[0] + 1.0])))
    return float(gaps.max())


def _edge_line(steps: np.ndarray, u: np.ndarray, m: int, track: tuple, per_tick: float,
               n_slopes: int = 161) -> tuple:
    """The offset line that puts the most steps' tick edges between their two samples.

    A window's vote (:func:`_vote_offset`) places its offset at the middle of the offsets its steps
    allow. Where the edges sweep across the samples by less than a sample over the window (a whole
    number of samples a tick and a drift under ~10 ppm: :func:`_edge_gap`), that middle is biased
    toward the middle of the pair by up to half a sample, the bias turning with the edges' position,
    and a line through the windows took a slope from it (20 Hz from 1 kHz at -6.7 ppm: edges 0.5
    samples off at the block's end). Here every step's pair (the clear steps, or a faint DAC's
    :func:`_soft_steps`) bounds the line itself: with the tick ``k`` nearest the pair, ``m u_lo - k < c(u) <=
    m u_hi - k``, an interval one sample wide. For each slope on a grid about ``track``'s the offset
    lying in the most intervals is found (a sweep over their sorted starts); among the slopes reaching
    the most, no slope (the frequency's own grid) if they allow it, else the middle of those they allow,
    at the middle of its run of offsets. Steps not a DAC's (a spike's pairs, or the noise's pairs among a
    faint DAC's: :func:`_soft_steps`) fall outside and are outvoted.
    Returns the line and the half-width (ticks) of the run of offsets whose lines explain as many steps,
    at the chosen slope: how far the steps leave the edges open (``(track, None)`` where the windows'
    line is kept).
    """
    steps = steps[steps + 1 < u.size]
    if steps.size < _MISSED_MIN:
        return track, None
    at, off = track
    b0 = float((off[1] - off[0]) / (at[1] - at[0]))
    u_lo, u_hi = u[steps], u[steps + 1]
    mid = 0.5 * (u_lo + u_hi)
    centre = float(mid.mean())
    d = mid - centre
    half = float(np.abs(d).max())
    if half <= 0:
        return track, None
    k = np.round(m * mid - np.interp(mid, at, off))  # the edge each step belongs to
    low = m * u_lo - k  # the offset interval (low, low + width]
    width = float(np.median(m * (u_hi - u_lo)))  # one sample, in ticks
    # the windows' line is off by at most about a sample at the ends: slopes within two either way
    span = 2.0 * width / half

    def best_at(b):
        # the most intervals an offset lies in, the middle of that run of offsets and its half-width
        starts = np.sort(low - b * d)
        ends = np.searchsorted(starts, starts + width, side="left")
        count = ends - np.arange(starts.size)
        j = int(np.argmax(count))
        lo_c, hi_c = starts[j + count[j] - 1], starts[j] + width
        return int(count[j]), 0.5 * (lo_c + hi_c), 0.5 * (hi_c - lo_c)

    slopes = b0 + np.linspace(-span, span, n_slopes)
    for _ in range(2):  # a coarse grid, then a fine one about the best slopes
        counts = np.array([best_at(b)[0] for b in slopes])
        top = np.flatnonzero(counts == counts.max())
        lo_b, hi_b = slopes[top[0]], slopes[top[-1]]
        step = slopes[1] - slopes[0]
        slopes = np.linspace(lo_b - step, hi_b + step, n_slopes)
    # where the steps leave the slope open (a short stretch, edges that barely cross the samples) the
    # frequency's own grid, no slope, is the likeliest (a 2 s sham on the session's clock: the middle of
    # the open range put its ramp's foot 0.44 samples off); where they rule it out the frequency is off
    # (5 Hz, 12 ppm: the LFP beside the fundamental), and the middle of what they allow is the likeliest
    # (its nearest end left the block's last second half a sample off)
    b = 0.0 if lo_b <= 0.0 <= hi_b else 0.5 * (lo_b + hi_b)
    count, a, run = best_at(b)
    if count < 0.5 * steps.size:
        return track, None  # no line explains most steps: keep the windows' line
    ends = np.asarray(at, dtype=np.float64)
    return (ends, a + b * (ends - centre)), run


#: pairs whose power stands this many times the median's out are a faint DAC's edges for its line
#: (:func:`_soft_steps`): their differences beyond about 2.7 SDs of the noise's, which 0.7% of the noise's
#: pairs reach (this project's choice)
_SOFT_STEP_POWER = 16.0


def _soft_steps(w: np.ndarray) -> np.ndarray:
    """The pairs whose power ``w`` stands :data:`_SOFT_STEP_POWER` times its median out (indices).

    A 2 kHz DAC of a 3 mV, 5 Hz waveform steps by at most 52 uV, 2-4 SDs of the noise's differences: no
    step is clear (:data:`_STEP_POWER`), but about half of its edges pass this, and outnumber the noise's
    pairs that do by about eight to one; those fall at any offset and :func:`_edge_line` outvotes them.
    """
    return np.flatnonzero(w >= _SOFT_STEP_POWER * np.median(w[::7]))


#: steps the grid misplaces before its settle width is set from them (:func:`_missed_edges`): fewer are a
#: spike's or the noise's (this project's choice)
_MISSED_MIN = 20


def _missed_edges(steps: np.ndarray, u: np.ndarray, m: int, track: tuple, per_tick: float) -> np.ndarray:
    """Distances (samples) to the grid's nearest edge of the steps it puts within one tick.

    ``steps`` are the pairs of samples (index of the first) that hold a clear step, ``u`` the phase of
    each sample in periods, ``m`` ticks a period, ``track`` the offset line. A step the grid's edges do
    not separate is one it places late or early; those within a quarter sample of an edge are counted
    (a spike's pairs are elsewhere).
    """
    steps = steps[steps + 1 < u.size]
    at = u[np.concatenate((steps, steps + 1))]
    pos = m * at - np.interp(at, *track)
    lo, hi = pos[:steps.size], pos[steps.size:]
    inside = np.floor(lo) == np.floor(hi)
    lo, hi = lo[inside], hi[inside]
    # the grid's edge after the pair's second sample, or before its first
    dist = np.minimum(np.floor(hi) + 1 - hi, lo - np.floor(lo)) * per_tick
    return dist[dist < 0.25]


#: a pair of samples holds a clear step where its difference's power is this many times the median's
#: (:func:`find_fast_dac`; chi-square of one degree: the noise alone passes once in ~1e11)
_STEP_POWER = 100.0


def _ticks_of_rate(fold, rate: float, freq: float, max_period: int, min_z: float) -> tuple:
    """``(M, q)``: ``M`` ticks every ``q`` cycles at about ``rate`` per second, the best ``fold``; ``(None, None)``."""
    rho = rate / freq
    # each period of q cycles holding about a whole number of ticks is scored by the fold of the pairs
    # on it (the rate alone cannot tell q at 5 Hz). A fold on 2q cycles is the same fold (the ticks
    # repeat every q), so a longer period must score higher
    best, tried = None, []
    for q in range(1, max_period + 1):
        m = round(q * rho)
        if m < 3 or abs(q * rho - m) > 0.05 or any(q % p == 0 and m * p == mp * q for p, mp in tried):
            continue  # (a period of 2q cycles on the ticks of q is the same fold)
        tried.append((q, m))
        score = fold(m, q)
        if best is None or score > 1.05 * best[0]:
            best = (score, q, m)
    if best is None or best[0] < min_z:
        return None, None
    score, q, m = best
    # a slower DAC's steps the single-step search missed put their rate's harmonics in the band (a
    # 1 kHz DAC: lines at 4, 5, ... kHz), whose folds hold every tick too: the slowest rate (down to
    # 200 Hz) whose fold keeps half the score is the DAC's (every other tick's power cancels in a
    # fold on half the true rate)
    for j in range(min(64, int(rate // 200.0)), 1, -1):
        if m % j == 0 and m // j >= 3 and fold(m // j, q) >= 0.5 * score:
            m //= j
            break
    return m, q


def _edge_power(w: np.ndarray, u: np.ndarray, m: int, offset=None) -> float:
    """Mean power of the pairs a grid of ``m`` ticks per unit of ``u`` puts an edge between, over the rest's.

    ``offset`` is ``(track, c)`` as a grid has them; by default the pairs' weighted vote. 0 when
    every pair or none straddles an edge.
    """
    if offset is None:
        c = _vote_offset(m, u[:-1], u[1:], w[: u.size - 1])
        pos = m * u - c
    else:
        track, c = offset
        pos = m * u - (np.interp(u, *track) if track else c)
    edge = np.diff(np.floor(pos)) != 0
    w = w[: edge.size]
    if edge.all() or not edge.any():
        return 0.0
    return float(w[edge].mean() / max(w[~edge].mean(), 1e-300))


def _tick_period(x: np.ndarray, z_threshold: float) -> float | None:
    """The DAC update period (samples) from the times of large steps, or None."""
    fit = _tick_line(x, z_threshold)
    return None if fit is None else fit[0]


def _tick_line(x: np.ndarray, z_threshold: float):
    """``(period, t0, step times)``: ticks at samples ``t0 + k period``, from large steps; or None.

    ``x`` is one channel, or several (rows) whose steps are pooled: one DAC drives them all, and a
    weak channel shows few steps above the noise (and a clipped one none at its peaks).
    """
    pos = []
    rows = np.atleast_2d(x)
    lost = find_clipped(rows)
    for row, at_rail in zip(rows, lost):
        qs, sigma = _step_statistic(row, at_rail if at_rail.any() else None)
        if sigma > 0:
            pos.append(_strongest_within(qs, _step_positions(qs, z_threshold * sigma), _STEP_REACH))
    if not pos:
        return None
    t = np.unique(np.concatenate(pos)) + 1.5  # the step lies between samples i+1 and i+2
    if t.size < 50:
        return None
    d = np.diff(t)
    # consecutive ticks: the shortest common spacing (steps are found wherever the waveform is steep)
    p0 = float(np.median(d[d <= np.percentile(d, 25)]))
    if p0 <= _STEP_REACH:
        return None
    # fold the first 500 ticks' steps on periods around it (a fold over many more has peaks too
    # narrow for the grid, and the waveform's own rhythm in the steps puts side peaks at R +- f),
    # then a line through times against tick numbers
    first = t[t - t[0] <= 500 * p0]
    cand = p0 * (1 + np.linspace(-0.04, 0.04, 801))
    r = np.abs(np.exp(2j * np.pi * np.outer(1.0 / cand, first - first[0])).mean(axis=1))
    p = float(cand[np.argmax(r)])
    # over spans growing fourfold, each short enough that the period so far counts ticks right
    # (a 1e-4 error miscounts by a tick over 10,000 ticks)
    span = 1000.0 * p
    t0 = t[0]
    while True:
        sel = t - t[0] <= span
        k = np.round((t[sel] - t0) / p)
        # steps off the grid (a spike's edge) are left out of the line
        on = np.abs(t[sel] - t0 - k * p) < 0.25 * p
        if np.unique(k[on]).size < 3:
            return None
        p, t0 = (float(v) for v in np.polyfit(k[on], t[sel][on], 1))
        if sel.all() or p <= 0:
            break
        span *= 4
    if p <= 0:
        return None
    on = np.abs(t - t0 - np.round((t - t0) / p) * p) < 0.25 * p
    # a step detected between samples i+1 and i+2 is at i + 1.5 on average: the tick edge
    return p, t0, t[on]


def step_rate(x: np.ndarray, fs: float, *, z_threshold: float = 8.0) -> float:
    """Steps per second in ``x`` far above the noise (a DAC staircase, locked or not).

    Uses the step statistic of :func:`find_dac_grid` at a threshold no noise
    sample and no spike reaches (``z_threshold`` robust SDs).
    """
    x = np.asarray(x, dtype=np.float64)
    if x.size < 16:
        return 0.0
    q, sigma = _step_statistic(x)
    if sigma <= 0:
        return 0.0
    return float(_step_positions(q, z_threshold * sigma).size / (x.size / fs))


def _step_statistic(x: np.ndarray, lost: np.ndarray | None = None) -> tuple[np.ndarray, float]:
    """The four-sample step statistic and its robust SD.

    Between samples i and i+1, ``(-x[i-1] + 3 x[i] - 3 x[i+1] + x[i+2]) / 2``
    is ~0 to third order for a smooth waveform and ``-s`` for a step ``s``.
    Windows touching a ``lost`` sample (a rail) are set to 0 and left out of
    the SD: a rail's flat stretches would make it 0, and its edges look like steps.
    """
    q = 0.5 * (-x[:-3] + 3 * x[1:-2] - 3 * x[2:-1] + x[3:])
    d = np.diff(x)
    if lost is not None:
        ok = ~(lost[:-3] | lost[1:-2] | lost[2:-1] | lost[3:])
        q = np.where(ok, q, 0.0)
        if ok.sum() < 16:
            return q, 0.0
        return q, _noise_sd(q[ok], d[~(lost[:-1] | lost[1:])])
    return q, _noise_sd(q, d)


def _mad_sd(v: np.ndarray) -> float:
    return float(1.4826 * np.median(np.abs(v - np.median(v))))


#: SD of the step statistic over SD of a first difference, for white noise: sqrt(5) / sqrt(2) (the
#: variances of linear combinations of independent samples, (1 + 9 + 9 + 1) / 4 and 1 + 1)
_Q_PER_DIFF = float(np.sqrt(5.0 / 2.0))


def _noise_sd(q: np.ndarray, d: np.ndarray) -> float:
    """Robust SD of the step statistic's noise: its MAD, or the first differences' where steps crowd.

    A step touches three consecutive windows of the statistic. With ticks a
    few samples apart (a 5 kHz DAC sampled at 30 kHz: six samples a tick)
    half the windows hold one, and their MAD is the steps' size rather than
    the noise's (51 against 22 uV at 40 Hz): only the steepest steps stood
    out, no grid was found and the staircase stayed in the spike band (0.6x
    the noise). Within a tick the staircase is flat, so most
    first differences are noise alone; where the statistic's MAD exceeds
    1.5 times what they give, theirs is taken. Sparse steps (a 1 kHz DAC, or
    a smooth waveform whose slope fills the differences) keep the MAD.
    """
    mad = _mad_sd(q)
    if d.size < 16:
        return mad
    from_d = _Q_PER_DIFF * _mad_sd(d)
    return from_d if mad > 1.5 * from_d else mad


def _fold_concentration(u: np.ndarray, ms: np.ndarray, width: int = 64) -> np.ndarray:
    """``|mean(exp(2 pi i m u))|`` for each of the consecutive integers ``ms``.

    ``exp(2 pi i (m0 + k) u)`` is ``exp(2 pi i m0 u)`` times ``exp(2 pi i k u)``:
    a table of the second for ``k < width`` and one matrix-vector product per
    ``width`` candidates take the place of an exponential per candidate and step.
    """
    u = fractional_part(u)
    table = np.exp(2j * np.pi * np.outer(np.arange(width), u))
    r = np.empty(ms.size)
    for c0 in range(0, ms.size, width):
        k = min(width, ms.size - c0)
        r[c0:c0 + k] = np.abs(table[:k] @ np.exp(2j * np.pi * ms[c0] * u)) / u.size
    return r


#: samples within which one step of the statistic is kept (:func:`_strongest_within`): an amplifier's anti-aliasing
#: low-pass spreads a DAC's step over the samples after its edge and rings, and the statistic peaks at several of
#: them (a 7.5 kHz filter at 30 kHz: 2 samples apart, which a clock search took for a 15 kHz DAC)
_STEP_REACH = 2


def _strongest_within(q: np.ndarray, pos: np.ndarray, reach: int) -> np.ndarray:
    """The positions ``pos`` (ascending) of ``|q|`` with none larger within ``reach`` samples."""
    if pos.size < 2:
        return pos
    qa = np.abs(q[pos])
    keep = np.ones(pos.size, dtype=bool)
    for k in range(1, reach + 1):
        # the k-th neighbours in the list, where within reach: the larger one stays (the earlier on a tie)
        near = pos[k:] - pos[:-k] <= reach
        keep[k:] &= ~(near & (qa[:-k] >= qa[k:]))
        keep[:-k] &= ~(near & (qa[k:] > qa[:-k]))
    return pos[keep]


def _step_positions(q: np.ndarray, level: float) -> np.ndarray:
    """Indices of isolated local maxima of ``|q|`` above ``level``."""
    qa = np.abs(q)
    big = np.flatnonzero(qa > level)
    left = np.concatenate(([0.0], qa[:-1]))[big]
    right = np.concatenate((qa[1:], [0.0]))[big]
    return big[(qa[big] >= left) & (qa[big] > right)]


def _vote_offset(m: int, u_lo: np.ndarray, u_hi: np.ndarray, weights: np.ndarray | None = None,
                 nb: int = 65536) -> float:
    """Tick offset consistent with most steps: each lies in ``(M u_lo, M u_hi]`` mod 1.

    With ``weights`` each interval votes with its weight (a pair of samples
    with the power of its difference).
    """
    a = fractional_part(m * u_lo)
    w = m * (u_hi - u_lo)
    start = np.floor(a * nb).astype(int)
    width = np.maximum(1, np.round(w * nb).astype(int))
    stop = np.minimum(start + width, 2 * nb)
    votes = np.bincount(start, weights, minlength=2 * nb + 1) - np.bincount(stop, weights, minlength=2 * nb + 1)
    votes = np.cumsum(votes)[: 2 * nb]
    votes = votes[:nb] + votes[nb:]
    top = np.flatnonzero(votes >= votes.max() - (0.5 if weights is None else 1e-9 * abs(votes.max())))
    # centre of the densest run on the circle
    ang = np.angle(np.mean(np.exp(2j * np.pi * (top + 0.5) / nb)))
    return float(np.mod(ang / (2 * np.pi), 1.0))
