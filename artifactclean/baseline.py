"""The slow level under a stimulation artifact: an electrode's drift, followed and taken off before the fits.

A DC-coupled amplifier holds the electrode's offset, and the offset drifts:
millivolts over tens of seconds as an electrode settles, or with movement
and temperature. The cycle estimators are blind to a constant level once it
is taken off (:func:`artifactclean.estimators.cycles.level_off`), but not to
one that moves: the template's bins hold the drift's local mean and its
gain multiplies it (2 mV at 0.02 Hz on a 40 Hz artifact: 0.11 x noise in
the spike band), and the row estimators divide it by the envelope at the
ramps' feet and let it sway their per-block choices (1.8 and 0.7 x noise).
A high-pass filter before cleaning would follow the drift, but also moves
a clipped channel's rails, which the clipping fits find as recurring values.

:func:`slow_baseline` reads the level at every sample from the data
itself: a mean over exactly one stimulation cycle, twice, whole cycles only
(every harmonic of the cycle falls on its zeros, however many samples a
cycle holds, and the sidebands the heartbeat and breathing put beside them
fall on its skirts), then a moving mean over :data:`SMOOTH_S` seconds,
twice, twiced (applied again to what it left, and that added: Tukey's
twicing), with a straight line wherever a window is cut short. Where the
artifact's envelope bends within a cycle or two (a step, a short ramp) no
cycle's mean averages it away: those stretches are left out and bridged
(:func:`bent_corners`). The fits see the data less the level; what they
return is the artifact alone, so the cleaned output keeps the drift, the
slow LFP and the level, as recorded.

A block's plan reads the level once, over the whole block, a part at a
time (:func:`level_track`), and keeps it at :data:`TRACK_POINTS_PER_S`
points a second per channel (:class:`LevelTrack`): the pieces a file is
cleaned in then need no context for it, and it is computed once, not again
for each read the plan makes and each piece's overlap.

What it cannot do: the artifact's own mean over a cycle (a stimulator's DC
offset, or the rectification of an amplifier's even-order distortion) is,
within a block, the same thing as the electrode's level to any single
channel; it is followed as level and stays in the output, a slow step at
the ramps of its size.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from ._numeric import interp_sorted
from .clipping import find_clipped

__all__ = ["SMOOTH_S", "SHORT_RAMP_CYCLES", "POINTS_PER_CYCLE", "moving_mean", "slow_baseline", "without_corners",
           "bent_corners", "baseline_reach_s", "TRACK_POINTS_PER_S", "LevelTrack", "level_track", "level_off_reader"]

#: seconds of each of the two moving means that smooth the per-cycle level (this project's choice). Together a
#: triangle of 2 s, twiced: response 2H - H**2 with H = sinc(F)**2, down 6 dB at 0.57 Hz, at most 9% between 1
#: and 2 Hz and 3% beyond; a drift at 0.05 / 0.1 / 0.2 Hz is followed to 0.007 / 0.1 / 1.6%. What passes of the
#: artifact are its sidebands within about a hertz of DC (a heartbeat's harmonic beside a slow stimulation's
#: harmonic), which stay in the output
SMOOTH_S = 1.0
#: ramps shorter than this many cycles, and steps, are left out of the level with a cycle on either side (see
#: bent_corners; this project's choice, from a 5 Hz artifact's level through steps and 0.1-1 s ramps)
SHORT_RAMP_CYCLES = 2.0
#: points a cycle at which the one-cycle means are read and the smoothing runs, the level interpolated between
#: them (this project's choice: 64 gave the same figures on the drifting traces of level_drift.py)
POINTS_PER_CYCLE = 16


def moving_mean(x: np.ndarray, width: float, *, weights: np.ndarray | None = None,
                axis: int = -1) -> tuple[np.ndarray, np.ndarray]:
    """Centred moving mean over ``width`` samples (any positive real number), weighted.

    Each sample stands for the unit interval around it; the window of
    ``width`` samples centred on each sample covers whole samples and a
    share of the two at its ends, so a sinusoid whose period is ``width``
    samples averages to (nearly) nothing although the period is not a whole
    number of samples. At the array's ends the window is cut short and the
    mean taken over what it holds.

    Parameters
    ----------
    x : ndarray
        Data.
    width : float
        Window length in samples, > 0.
    weights : ndarray, optional
        Non-negative weight of each sample (the shape of ``x``); 0 leaves a
        sample out, whatever its value (NaN included).
    axis : int
        Axis along which to average.

    Returns
    -------
    mean : ndarray
        The weighted mean in each window (0 where the window holds no
        weight).
    share : ndarray
        The weight in each window over ``width``: 1 where every sample of a
        full window counts.
    """
    if not width > 0:
        raise ValueError(f"width must be positive, got {width!r}")
    x = np.moveaxis(np.asarray(x, dtype=np.float64), axis, -1)
    w = np.ones_like(x) if weights is None else np.moveaxis(np.asarray(weights, dtype=np.float64), axis, -1)
    if w.shape != x.shape:
        raise ValueError(f"weights must have the shape of x {x.shape}, got {w.shape}")
    n = x.shape[-1]
    xw = np.where(w > 0, x, 0.0) * w
    # the cumulative sums are the integral of the samples as steps, exact between sample edges: read at the
    # window's two ends by linear interpolation, the same fraction for every sample
    zero = np.zeros(x.shape[:-1] + (1,))
    sums = np.concatenate((zero, np.cumsum(xw, axis=-1)), axis=-1)
    counts = np.concatenate((zero, np.cumsum(w, axis=-1)), axis=-1)
    ends = [_at_offset(c, n, width / 2) - _at_offset(c, n, -width / 2) for c in (sums, counts)]
    total, weight = ends
    mean = np.where(weight > 0, total / np.where(weight > 0, weight, 1.0), 0.0)
    return np.moveaxis(mean, -1, axis), np.moveaxis(weight / width, -1, axis)


def _at_offset(cum: np.ndarray, n: int, offset: float) -> np.ndarray:
    """``cum`` (n + 1 cumulative sums along the last axis) at ``i + offset + 0.5`` for each sample ``i``,
    linearly interpolated and held at its ends beyond them."""
    lo = int(np.floor(offset + 0.5))
    frac = offset + 0.5 - lo
    out = np.empty(cum.shape[:-1] + (n,))
    # the samples that read between two sums, i + lo in 0..n-1; before them the first sum, after them the last
    a = min(n, max(0, -lo))
    b = max(a, min(n, n - lo))
    out[..., :a] = cum[..., :1]
    out[..., b:] = cum[..., n:]
    out[..., a:b] = cum[..., a + lo:b + lo] * (1.0 - frac) + cum[..., a + lo + 1:b + lo + 1] * frac
    return out


def _line_where_uneven(level: np.ndarray, share: np.ndarray, width: float, mean: np.ndarray,
                       window_share: np.ndarray) -> np.ndarray:
    """``mean`` (:func:`moving_mean` of ``level`` over ``width`` points, weighted by ``share``) with each point
    whose window is not fully weighted (``window_share`` under 1: the array's ends, or a gap of left-out
    points) given the value there of a straight line fitted to what the window holds, with the same weights.

    Within a full window the line's value at the centre is the mean; where a window is cut short or holed
    the mean lags a trend toward what it holds (a drift of 250 uV/s: 7-26 uV within two seconds of the
    ends, where a work range's ramps are), the line does not (the boundary correction of local linear
    smoothing, e.g. Fan & Gijbels 1996, Local Polynomial Modelling and Its Applications, ch. 3).
    """
    n = level.shape[0]
    half = width / 2
    uneven = np.flatnonzero(window_share < 1.0 - 1e-9)
    out = mean.copy()
    if not uneven.size:
        return out
    # each run of neighbouring points from running sums over the points its windows reach, positions counted
    # from the stretch's middle (sums of squared positions over a whole array would lose digits)
    for run in np.split(uneven, np.flatnonzero(np.diff(uneven) > 1) + 1):
        lo, hi = max(0, int(np.floor(run[0] - half)) - 1), min(n, int(np.ceil(run[-1] + half)) + 2)
        m = hi - lo
        pos = np.arange(m) - (m - 1) / 2.0
        w, y = share[lo:hi], level[lo:hi]
        sums = []
        for v in (w, w * pos, w * pos * pos, w * y, w * pos * y):
            cum = np.concatenate(([0.0], np.cumsum(v)))
            sums.append((_at_offset(cum, m, half) - _at_offset(cum, m, -half))[run - lo])
        s0, sp, spp, t0, tp = sums
        at = pos[run - lo]
        s1, s2, t1 = sp - at * s0, spp - 2.0 * at * sp + at * at * s0, tp - at * t0
        det = s0 * s2 - s1 * s1
        line = det > 1e-9 * np.maximum(s0 * s2, 1e-300)
        flat = np.where(s0 > 0, t0 / np.where(s0 > 0, s0, 1.0), 0.0)
        out[run] = np.where(line, (s2 * t0 - s1 * t1) / np.where(line, det, 1.0), flat)
    return out


def _smoothed(level: np.ndarray, share: np.ndarray, width: float) -> tuple[np.ndarray, np.ndarray]:
    """:func:`moving_mean` of ``level`` weighted by ``share``, lines where a window is uneven
    (:func:`_line_where_uneven`)."""
    mean, window_share = moving_mean(level, width, weights=share)
    return _line_where_uneven(level, share, width, mean, window_share), window_share


#: samples a running sum or an interpolation handles at once (memory: a few of these per worker, whatever the
#: length of the data)
_CHUNK = 1 << 18


def _running_sums_at(values: np.ndarray, pos: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """The sums of ``values`` (times ``weights``, a value of weight 0 left out whatever it is) up to real
    positions ``pos`` (the sum of the first ``k`` at ``k``, linearly interpolated between, held at ``0`` and
    ``n``), the running sum taken a chunk at a time (numpy.interp on ``arange(n + 1)`` and the whole
    cumulative sum give the same, in memory the length of the data)."""
    n = values.shape[0]
    pos = np.clip(pos, 0.0, float(n))
    k = np.minimum(pos.astype(np.int64), max(n - 1, 0))
    frac = pos - k
    need = np.concatenate((k, k + 1))
    order = np.argsort(need, kind="stable")
    wanted = need[order]
    got = np.zeros(wanted.shape)
    carry = 0.0
    for c0 in range(0, n, _CHUNK):
        c1 = min(n, c0 + _CHUNK)
        part = values[c0:c1] if weights is None else np.where(weights[c0:c1] > 0, values[c0:c1], 0.0) * weights[c0:c1]
        run = np.cumsum(part)
        run += carry
        a, b = np.searchsorted(wanted, c0, "left"), np.searchsorted(wanted, c1, "right")
        at = wanted[a:b]
        got[a:b] = np.where(at == c0, carry, run[np.maximum(at - c0 - 1, 0)])
        carry = float(run[-1])
    sums = np.empty(need.shape)
    sums[order] = got
    return sums[:k.size] * (1.0 - frac) + sums[k.size:] * frac


def _point_step(fs: float, freq_hz: float) -> int:
    """Samples between the points :func:`slow_baseline` reads the level at (:data:`POINTS_PER_CYCLE` a cycle)."""
    return max(1, int((fs / freq_hz) // POINTS_PER_CYCLE))


def _level_points(row: np.ndarray, fs: float, freq_hz: float, w: np.ndarray | None, smooth_s: float,
                  origin: int) -> tuple[np.ndarray, np.ndarray]:
    """The level of one row (see :func:`slow_baseline`) at its points: ``(positions, level)``, positions in
    samples of ``row`` on multiples of :func:`_point_step` counted from ``-origin``, from at or before its first
    sample to at or after its last."""
    n = row.shape[0]
    period = fs / freq_hz
    step = _point_step(fs, freq_hz)
    points = np.arange(-(int(origin) % step), n - 1 + step, step).astype(np.float64)
    hi, lo = points + period / 2 + 0.5, points - period / 2 + 0.5
    ends = np.concatenate((hi, lo))
    # the running sums are the integral of the samples as steps: one cycle's sum between any two points,
    # read by linear interpolation (held at the ends: the window cut short)
    sums = _running_sums_at(row, ends, w)
    total = sums[:hi.size] - sums[hi.size:]
    if w is None:
        weight = np.clip(hi, 0, n) - np.clip(lo, 0, n)
    else:
        counts = _running_sums_at(w, ends)
        weight = counts[:hi.size] - counts[hi.size:]
    # only whole cycles: a cycle cut by the array's ends or by left-out samples does not average the
    # artifact away (a step's half cycle leaves a quarter of its amplitude); the lines below fill in
    whole = weight >= period * (1.0 - 1e-9)
    level = np.where(whole, total / np.where(whole, weight, 1.0), 0.0)
    if whole.any() and not whole.all():
        # a gap between whole cycles is bridged by a straight line: the smoothing's zeros, which the
        # heartbeat's sidebands fall near, hold across it (a line fitted to a holed window does not)
        inner = np.arange(np.argmax(whole), whole.size - np.argmax(whole[::-1]))
        level[inner] = np.interp(inner, np.flatnonzero(whole), level[whole])
        whole = whole.copy()
        whole[inner] = True
    level, share = moving_mean(level, period / step, weights=whole.astype(np.float64))
    # and whole cycles of those at the ends: the means along a ramp (an oscillation at the fundamental,
    # the ramp's slope over the angular frequency) average away only in whole cycles
    whole = share >= 1.0 - 1e-9
    level, share = np.where(whole, level, 0.0), whole.astype(np.float64)
    # each mean weighs the previous one's values by the weight they held, so a stretch of left-out
    # samples counts by what it had
    for width in (smooth_s * fs, smooth_s * fs):
        level, share = _smoothed(level, share, width / step)
    # twicing (Tukey 1977, Exploratory Data Analysis): the smoothing applied once more to what it left,
    # response 2H - H**2, so a drift's curvature is followed (2 mV at 0.05 Hz: 16 -> 0.1 uV off)
    once = level
    for width in (smooth_s * fs, smooth_s * fs):
        level, share = _smoothed(level, share, width / step)
    return points, 2.0 * once - level


def slow_baseline(x: np.ndarray, fs: float, freq_hz: float, *, weights: np.ndarray | None = None,
                  smooth_s: float = SMOOTH_S, axis: int = -1, origin: int = 0) -> np.ndarray:
    """The level of ``x`` under a periodic artifact at ``freq_hz``, at every sample.

    Two moving means over one cycle (``fs / freq_hz`` samples) put every
    harmonic of the cycle on a zero, and two over ``smooth_s`` seconds,
    twiced, keep what moves slower than about ``0.57 / smooth_s`` Hz (see
    :data:`SMOOTH_S` and the module's docstring for what that removes and
    what it cannot). The first mean is read from the data's cumulative sums
    at :data:`POINTS_PER_CYCLE` points a cycle (exact there, whatever the
    samples between), the rest run on those points, and the level is
    interpolated back to every sample: what is left after one cycle's mean
    moves slowly, and the cost is two passes over the data. Only whole
    cycles count: a gap between them (left-out samples) is bridged by a
    straight line, and where a smoothing window is cut short by the ends a
    line is fitted to what it holds.

    Parameters
    ----------
    x : ndarray
        Data, any unit.
    fs : float
        Sampling rate (Hz).
    freq_hz : float
        The artifact's fundamental (Hz), the block's fitted frequency (a
        nominal one a few ppm off leaves a few ppm of each harmonic).
    weights : ndarray, optional
        Weight of each sample, 0 or 1 (0: left out, e.g. clipped or beside
        a step, :func:`without_corners`).
    smooth_s : float
        Length of each of the two smoothing means (s).
    axis : int
        Time axis.
    origin : int
        Index of the first sample of ``x`` in a longer recording: the points
        are placed on multiples of their spacing counted from the
        recording's start, so that pieces of it with
        :func:`baseline_reach_s` of context on each side give the whole
        array's level.

    Returns
    -------
    ndarray
        The level, the shape of ``x``; where the whole reach of a sample
        holds no weight, 0.
    """
    if not fs > 0 or not freq_hz > 0 or not freq_hz < fs / 2:
        raise ValueError(f"need 0 < freq_hz < fs / 2, got freq_hz={freq_hz!r}, fs={fs!r}")
    if not smooth_s > 0:
        raise ValueError(f"smooth_s must be positive, got {smooth_s!r}")
    x = np.moveaxis(np.asarray(x, dtype=np.float64), axis, -1)
    shape, n = x.shape, x.shape[-1]
    rows = x.reshape(-1, n)
    w_rows = None if weights is None else np.moveaxis(np.asarray(weights, dtype=np.float64), axis, -1).reshape(-1, n)
    if w_rows is not None and w_rows.shape != rows.shape:
        raise ValueError(f"weights must have the shape of x {shape}, got {np.shape(weights)}")
    out = np.empty((rows.shape[0], n))
    for r, row in enumerate(rows):
        w = None if w_rows is None or np.all(w_rows[r] == 1.0) else w_rows[r]
        points, level = _level_points(row, fs, freq_hz, w, smooth_s, origin)
        for c0 in range(0, n, _CHUNK):
            out[r, c0:c0 + _CHUNK] = np.interp(np.arange(c0, min(n, c0 + _CHUNK), dtype=np.float64), points, level)
    return np.moveaxis(out.reshape(shape), -1, axis)


def without_corners(n: int, corners, half_width: float) -> np.ndarray:
    """Weights for :func:`slow_baseline` over ``n`` samples: 1, but 0 within ``half_width`` samples of each of
    ``corners`` (sample positions; those outside ``0..n`` leave out what of their reach lies inside).

    Where the artifact's envelope bends (a block's start and stop, its ramps' ends) one cycle's mean does not
    average it away: a 5 Hz, 4 mV artifact's level read through a 0.1 s ramp was 100 uV off, through a step
    12 uV, which the fits would not see and the output would keep. Left out there, the level is filled from
    either side (a straight line through a drift).
    """
    w = np.ones(n)
    for c in np.atleast_1d(np.asarray(corners, dtype=np.float64)):
        a, b = int(np.floor(c - half_width)), int(np.ceil(c + half_width)) + 1
        w[max(0, a):max(0, min(n, b))] = 0.0
    return w


def bent_corners(geometry, cycle: float) -> list[float]:
    """The corners of a block's envelope (``geometry``: start, end of the ramp up, start of the ramp down,
    stop, in samples) that bend it within :data:`SHORT_RAMP_CYCLES` cycles of ``cycle`` samples: a step's,
    or a short ramp's two ends.

    A longer ramp's ends stay in: one cycle's means along it oscillate at the fundamental and the second
    mean averages that away, except across a cut (a 1 s ramp at 5 Hz: 7 uV of level at its ends left in,
    17 uV left out), while a half-cycle ramp left in put 100 uV into the level.
    """
    start, up, down, stop = (float(v) for v in geometry)
    out = []
    if up - start < SHORT_RAMP_CYCLES * cycle:
        out += [start, up]
    if stop - down < SHORT_RAMP_CYCLES * cycle:
        out += [down, stop]
    return out


def baseline_reach_s(freq_hz: float, smooth_s: float = SMOOTH_S) -> float:
    """Seconds of data on each side :func:`slow_baseline` reads for one sample (context for pieces)."""
    # one cycle's mean twice, two smoothing means twice, and the points' spacing (at most 1/16 cycle) on each
    return 1.25 / freq_hz + 2.0 * smooth_s


#: points a second a block's :class:`LevelTrack` keeps of each channel's level (this project's choice: the level
#: moves slower than about 2 Hz, see :data:`SMOOTH_S`, and a line between points 1/16 s apart is within 0.1 uV of
#: a 2 mV drift at 0.05 Hz, 1% of a 1 Hz wave; 384 channels over an hour keep 88 MB)
TRACK_POINTS_PER_S = 16.0
#: seconds of a block a track's part reads at once, and channels a part reads together (memory: about
#: 4 x 34 s of float64 at 30 kHz, 33 MB, whatever the block's length; this project's choice)
TRACK_PART_S = 30.0
TRACK_GROUP = 4


class LevelTrack(NamedTuple):
    """Each channel's slow level over a block's work range, a few points a second (:func:`level_track`).

    Attributes
    ----------
    positions : ndarray
        Positions of the points in samples from the block's reference
        sample (so that a window of the recording, a file piece, reads the
        same track), increasing: the range's first and last samples and the
        multiples of a spacing of about ``1 / TRACK_POINTS_PER_S`` s between
        them.
    values : ndarray, shape (n_channels, n_points), float32
        The level at those points (the data's unit).
    """

    positions: np.ndarray
    values: np.ndarray

    def rows(self, rows) -> "LevelTrack":
        """The track of the channels ``rows`` (indices)."""
        return LevelTrack(self.positions, self.values[list(rows)])

    def subtract(self, x: np.ndarray, offset: int, rows, track_rows=None) -> None:
        """Take the level off rows ``rows`` of ``x`` (2-D; its first sample ``offset`` samples from the block's
        reference sample), in place; ``track_rows`` (default ``rows``) are the track's channels they are."""
        rows = list(rows)
        if not rows:
            return
        n = x.shape[-1]
        # a chunk at a time: no array of the piece's length beside ``x`` (memory)
        for c0 in range(0, n, _CHUNK):
            t = np.arange(offset + c0, offset + min(n, c0 + _CHUNK), dtype=np.float64)
            for r, k in zip(rows, rows if track_rows is None else list(track_rows)):
                interp_sorted(t, self.positions, self.values[k], x[r, c0:c0 + t.size], mode="subtract")


def level_track(read, fs: float, freq_hz: float, bounds: tuple[int, int], n_channels: int, *, origin: int = 0,
                corners=(), mapper=map) -> LevelTrack:
    """Each channel's :func:`slow_baseline` over the work range ``bounds``, kept at a few points a second.

    A block's plan reads it once, a part of :data:`TRACK_PART_S` s and
    :data:`TRACK_GROUP` channels at a time with :func:`baseline_reach_s` of
    context on each side, so a piece of the block needs no more context
    than its fits, and memory follows the part, not the block. Between its
    points (:data:`TRACK_POINTS_PER_S` a second, on multiples of a whole
    number of the level's own points counted from ``origin``, and the range's
    first and last samples) the level is a straight line: within 0.1 uV of
    :func:`slow_baseline` on a 2 mV drift at 0.05 Hz.

    Parameters
    ----------
    read : callable
        ``read(a, b, rows)``: samples ``a..b`` of the channels ``rows``.
    fs, freq_hz : float
        Sampling rate and the block's stimulation frequency (Hz).
    bounds : (int, int)
        The work range.
    n_channels : int
        Channels ``read`` gives.
    origin : int
        The sample the level's points are counted from (a block's reference sample).
    corners : sequence of float
        Samples left out with a cycle on each side (:func:`bent_corners`).
        Clipped samples (:func:`artifactclean.clipping.find_clipped` of
        each part) and non-finite ones are left out too.
    mapper : callable
        ``map``-like; the parts and groups are independent jobs.

    Returns
    -------
    LevelTrack
    """
    s, e = (int(v) for v in bounds)
    if e - s < 1:
        raise ValueError(f"empty work range {bounds!r}")
    step = _point_step(fs, freq_hz)
    spacing = step * max(1, int((fs / TRACK_POINTS_PER_S) // step))
    first = origin + spacing * int(np.floor((s - origin) / spacing)) + spacing
    positions = np.unique(np.concatenate(([s], np.arange(first, e - 1, spacing), [e - 1]))).astype(np.float64)
    core = max(1, int(TRACK_PART_S * fs))
    starts = list(range(s, e, core))
    if len(starts) > 1 and e - starts[-1] < core // 2:
        starts.pop()  # a short last part joins the one before
    parts = [(a, e if j == len(starts) - 1 else starts[j + 1]) for j, a in enumerate(starts)]
    reach = int(np.ceil(baseline_reach_s(freq_hz) * fs)) + 1
    corners = np.asarray(corners, dtype=np.float64)

    def job(item):
        (a, b), rows = item
        lo, hi = max(s, a - reach), min(e, b + reach)
        x = np.array(read(lo, hi, rows), dtype=np.float64).reshape(len(rows), hi - lo)
        bad = ~np.isfinite(x)
        x[bad] = 0.0
        lost = find_clipped(x) | bad
        gaps = without_corners(hi - lo, corners - lo, fs / freq_hz) if corners.size else None
        at = positions[(positions >= a) & (positions < b)] - lo
        out = np.empty((len(rows), at.size), dtype=np.float32)
        for r in range(len(rows)):
            w = gaps if not lost[r].any() else (~lost[r]).astype(np.float64) * (1.0 if gaps is None else gaps)
            points, level = _level_points(x[r], fs, freq_hz, w, SMOOTH_S, lo - origin)
            out[r] = np.interp(at, points, level)
        return out

    groups = [list(range(c, min(n_channels, c + TRACK_GROUP))) for c in range(0, n_channels, TRACK_GROUP)]
    jobs = [(ab, rows) for ab in parts for rows in groups]
    done = iter(list(mapper(job, jobs)))
    values = np.empty((n_channels, positions.size), dtype=np.float32)
    for a, b in parts:
        keep = (positions >= a) & (positions < b)
        for rows in groups:
            values[rows[0]:rows[-1] + 1, keep] = next(done)
    return LevelTrack(positions - origin, values)


def level_off_reader(read, track: LevelTrack, bounds: tuple[int, int], *, origin: int = 0, follow=None):
    """``read(a, b, rows=None)`` with the level of ``track`` taken off each row read within ``bounds`` (the work
    range the track covers; ``origin``: the block's reference sample in the reader's samples).

    ``follow(x)``, given the rows read (2-D), says which to take the level off (default all; a clipped
    channel's rails must stay where they are). Reads reaching outside ``bounds`` are returned as read.
    """
    s, e = bounds

    def seen(a: int, b: int, rows=None):
        x = read(a, b) if rows is None else read(a, b, rows)
        if not s <= a < b <= e:
            return x
        x = np.array(x, dtype=np.float64)
        flat = x.reshape(-1, x.shape[-1])
        which = np.ones(flat.shape[0], dtype=bool) if follow is None else np.asarray(follow(flat), dtype=bool)
        chans = np.arange(flat.shape[0]) if rows is None else np.asarray(list(rows))
        track.subtract(flat, a - origin, np.flatnonzero(which), chans[which])
        return x

    return seen
