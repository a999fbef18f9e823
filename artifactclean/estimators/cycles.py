"""What every estimator that works cycle by cycle shares.

* :class:`CycleEstimator`: cleans each stimulation block (plus margins) on
  its own, and decides once per block, from the middle of its plateau, what
  must not depend on how a recording is cut (the channel the DAC is read
  from, the DAC grid, the gain filter): :meth:`CycleEstimator.prepare`;
* :class:`CycleGrid`: a block's samples on a grid of phase bins, one row per
  stimulation cycle (exact sub-sample phase: a cycle is not a whole number
  of samples), or on the DAC ticks when a staircase is locked to the cycle;
  and back from the grid to the samples;
* helpers: the block's ramp envelope, spike-band outliers, DAC edge samples.
"""

from __future__ import annotations

import functools
import warnings
from typing import NamedTuple

import numpy as np
from scipy import ndimage, signal
from sklearn.base import clone

from .._blas import one_blas_thread
from .._numeric import fractional_part
from ..baseline import LevelTrack, bent_corners, level_off_reader, level_track
from ..clipping import find_clipped, find_rails
from ..parallel import channel_groups
from ..resampling import MIN_SAMPLES_PER_CYCLE, ROW_SAMPLES_PER_CYCLE, TARGET_SAMPLES_PER_CYCLE, \
    upsample_railed, upsampled_block, upsampled_reader, upsampling_factor
from ..resampling import _HALF_TAPS as _UP_REACH
from ..stimulation import ramp_level
from ..pulse import HEART_HZ, PULSE_HALF_S, fit_pulse, fundamental_of_rows, harmonic_phase, join_tracks, \
    relative_deviation
from ..modulation import _FOOT, FOLLOW_HZ, HALF_S, GainResponse, KEEP_HZ, design_gain_response, filter_sequences, \
    follow_below, lowpass_taps, phase_helps, plateau_level, ramp_cutoff, seen_by_segments, segment_gain, \
    segment_phase, segments_per_cycle, sideband_support
from ..step_response import EdgeResponse
from ..staircase import DacGrid, clock_as_grid, find_dac_clock, find_dac_grid, find_dac_period, find_fast_dac, step_rate
from ._kernels import group_position, grouped_eval, highpass_residual, linear_envelope, outlier_flags, phase_eval, \
    piece_bounds, settled_keys, widen_flags
from .base import ArtifactEstimator

__all__ = ["BlockPlan", "CycleEstimator", "CycleGrid", "RowModelEstimator", "array_reader", "block_key", "fill_rows",
           "noise_of_sequences", "plan_stretch", "settle_edges", "spike_outliers", "trapezoid"]

#: seconds of plateau the DAC grid is searched in
_PLAN_S = 20.0
#: seconds of the reference channel read at a time for the heartbeat's track over a block (plus its band-pass
#: context): memory follows this, not the block
_TRACK_S = 30.0

#: groups of channels a block plan's per-channel work is spread over (fixed, so that the plan does not depend
#: on the workers; each group pays the stretch's phase arithmetic once: single channels cost a 16-channel
#: plan 0.25 s more)
_PLAN_GROUPS = 4

#: steps per second (far above noise) that reveal a staircase no locked grid explains
_UNLOCKED_STEPS = 50.0
#: robust SDs a step must exceed for the search of ticks that repeat every few cycles to start when
#: the count at :func:`artifactclean.staircase.step_rate`'s 8 finds too few (this project's choice: the
#: built-in scenarios' neural data give none at 6)
_SMALL_STEPS_Z = 6.0
#: below this stimulation frequency (Hz) a heartbeat modulates the artifact within a cycle or two and its
#: sidebands fall on the stimulation's own harmonics (session 18, `benchmarks/acceptance.py --freqs 1 2 3 4`:
#: within +-3 Hz of the harmonics 2.5-16x the neural power at 1-3 Hz, 0.6-0.9 at 4 Hz)
_SLOW_HZ = 4.0

#: rows on either side a row estimator fills an unusable bin from (see fill_rows)
_FILL_ROWS = 15

#: cycles over which a row estimator sets its spike-outlier threshold
_OUTLIER_ROWS = 30


class BlockPlan(NamedTuple):
    """What :meth:`CycleEstimator.prepare` decides once per block.

    Attributes
    ----------
    ref : int
        Channel the DAC grid is read from (the strongest unclipped one).
    grid : DacGrid or None
        DAC staircase locked to the cycle, if any.
    unlocked : float
        Steps per second no locked grid explains.
    response : GainResponse or None
        Gain filter response per channel.
    decided : list of dict or None
        The estimator's own choices per channel (:meth:`CycleEstimator._decide`).
    harmonics : int or None
        Harmonics the artifact's waveform shows on the strongest unclipped
        channel (:func:`waveform_harmonics`); None where every channel clips.
    judges : tuple of int
        Channels whose data judge the samples next to a DAC's tick edges
        (:func:`settle_edges`): ``ref`` alone, or where a channel clips
        ``ref`` and the strongest others, at most :data:`SETTLE_CHANNELS`.
    level : ndarray or None
        Each channel's DC level over the plan's stretch (:func:`_level`),
        taken off before any fit (:func:`level_off`).
    follows : ndarray of bool or None
        Channels whose level is followed in time as well (``track``): those
        with no clipped sample over the plan's stretch.
    track : LevelTrack or None
        Each channel's slow level over the block's work range
        (:func:`artifactclean.baseline.level_track`), read once by the plan
        so that pieces of the block need no context for it.
    edges : EdgeResponse or None
        What each of the DAC's steps leaves beside the tick levels, where the
        amplifier's low-pass spreads the steps over the samples after their
        edges (:mod:`artifactclean.step_response`), learned by the estimator
        from the plan's stretch (:meth:`CycleEstimator._edge_plan`); None
        where the samples beside an edge are settled into one tick or the
        other (:func:`settle_edges`).
    """

    ref: int
    grid: DacGrid | None
    unlocked: float
    response: GainResponse | None
    decided: list | None
    harmonics: int | None = None
    judges: tuple = ()
    level: np.ndarray | None = None
    follows: np.ndarray | None = None
    track: LevelTrack | None = None
    edges: EdgeResponse | None = None


#: channels whose data judge the samples next to a DAC's tick edges (:class:`BlockPlan`, :func:`settle_edges`):
#: this project's choice (the plan's DAC search pools as many)
SETTLE_CHANNELS = 4


#: harmonics weaker than this share of the fundamental are not counted in a waveform's shape
#: (this project's choice: 0.3% of a 4 mV artifact is 12 uV, a few times a template bin's noise)
_WAVEFORM_MIN_RELATIVE = 3e-3


def waveform_harmonics(x: np.ndarray, cycles: np.ndarray, fs: float, f: float, *, w: np.ndarray | None = None,
                       min_relative: float = _WAVEFORM_MIN_RELATIVE, below: float | None = None) -> int:
    """Highest harmonic of the stimulation that stands out in the mean cycle of ``x``.

    The mean cycle over the stretch (``cycles``: the stimulation phase of
    each sample, in cycles; ``w``: sample weights, 0 for lost samples) is
    taken on bins of the cycle and its DFT compared with its own noise: a
    harmonic counts when its amplitude exceeds 5 times the median harmonic
    amplitude (common practice for a detection threshold) and
    ``min_relative`` of the fundamental's. With ``below``, only harmonics
    under it count (a DAC's images sit at multiples of its tick rate). At
    least 1.
    """
    n_bins = max(8, int(round(fs / f)))
    b = np.floor(fractional_part(cycles) * n_bins).astype(np.int64)
    cnt = np.maximum(np.bincount(b, w, n_bins), 1e-12)
    mean = np.bincount(b, x if w is None else w * x, n_bins) / cnt
    amp = np.abs(np.fft.rfft(mean - mean.mean()))[1:]
    k = np.arange(1, amp.size + 1)
    strong = (amp > 5.0 * np.median(amp)) & (amp > min_relative * amp[0])
    if below is not None:
        strong &= k < below
    return int(k[strong].max()) if strong.any() else 1


def stretch_bounds(u: np.ndarray, span_cycles: float) -> np.ndarray:
    """Sample indices where stretches of ``span_cycles`` cycles start (counted from absolute cycle numbers), and the end.

    Stretches counted from absolute cycle numbers fall at the same samples in
    a piece of a block as in the whole block.
    """
    # a chunk at a time: the stretch numbers of the whole block, three arrays of its length, were where a task's
    # memory peaked (a 5 Hz block, one channel: 11.9 -> 11.2 float64 values a sample at the peak, tracemalloc)
    starts = [np.zeros(1, dtype=np.int64)]
    last = None
    for c0 in range(0, u.size, _STRETCH_CHUNK):
        stretch = np.floor(u[c0:c0 + _STRETCH_CHUNK] / span_cycles)
        if last is not None and stretch[0] != last:
            starts.append(np.array([c0]))
        starts.append(np.flatnonzero(np.diff(stretch)) + 1 + c0)
        last = stretch[-1]
    return np.concatenate(starts + [np.array([u.size])]).astype(np.int64)


#: samples :func:`stretch_bounds` numbers at once
_STRETCH_CHUNK = 1 << 16


def array_reader(x: np.ndarray, offset: int = 0):
    """``read(a, b, rows=None)`` for :meth:`CycleEstimator.prepare`: samples ``a..b`` of an array starting at ``offset``."""
    return lambda a, b, rows=None: x[slice(None) if rows is None else rows, a - offset:b - offset]


def block_key(blk) -> tuple:
    """Identity of a stimulation block that survives StimulationModel.window()."""
    return (round(blk.freq_hz, 9), round(blk.phase_ref, 9), blk.kind)


def trapezoid(n: int, blk, offset: int) -> np.ndarray:
    """Block envelope on samples ``offset .. offset + n``: ramps of the block's shape, plateau 1, 0 outside."""
    return envelope_at(np.arange(offset, offset + n, dtype=np.float64), blk)


def envelope_at(i: np.ndarray, blk) -> np.ndarray:
    """:func:`trapezoid` at samples ``i`` only (float)."""
    start, up_stop, down_start, stop = blk.geometry()  # the whole block's ramps, in a piece too
    shape = getattr(blk, "ramp_shape", "linear")
    if shape == "linear" and up_stop > start and stop > down_start and np.ndim(i) == 1:
        # linear ramps on both sides, the common case: one compiled pass, the same arithmetic
        return linear_envelope(np.asarray(i, dtype=np.float64), start, up_stop, down_start, stop, _ENV_FLOOR)
    up = (i - start) / max(up_stop - start, 1) if up_stop > start else np.where(i >= start, 1.0, 0.0)
    down = (stop - i) / max(stop - down_start, 1) if stop > down_start else np.where(i < stop, 1.0, 0.0)
    env = ramp_level(np.minimum(up, down), shape)
    return np.maximum(env, _ENV_FLOOR)


#: the envelope's floor: margin cycles (no artifact expected) are not divided by zero (session 37: 1e-3 until then,
#: which left that share of the artifact subtracted in the margins where the ramps had not started, 1.4-4.4 uV at
#: 5 Hz on 4 mV, periodic with the stimulation; 0.06 uV now, the acceptance and clipping rows within 0.001)
_ENV_FLOOR = 1e-5


def settle_edges(x, g, read, key, base_key, amb_lo, amb_hi, usable=None, compiled=True):
    """Put samples next to a DAC tick edge in whichever tick explains them best.

    The phase model locates an edge to a fraction of a sample; the held
    levels on either side tell where the edge actually fell. The neural
    signal is slow next to a step, so each candidate is judged against the
    residual two samples away on either side, or the nearest sample within
    four that is not itself next to an edge: with two samples a tick (a 15
    kHz DAC at 30 kHz) every other sample is, for a few dozen ticks around
    each tick of one sample, and judged against those the candidates kept
    whole steps (25-35 uV). ``read(keys, samples)`` gives the template (of
    this channel) at those tick keys.

    ``x`` and ``g`` may be several channels (rows), with ``read(keys,
    samples, row)`` and ``usable`` (bool, the rows' samples not at a rail):
    each sample is judged on every row where it and the samples it is
    judged against are usable, the squared misfits summed, and keeps the
    grid's tick where none is. One clipped channel judged alone took its
    rail samples for evidence, and every channel's samples beside the rails
    took the wrong tick (a whole step, 1-4 ms from the rails, where all four
    clip); a weaker channel judged alone, the strongest being clipped
    elsewhere, misassigned samples near every edge for seconds about each
    time the edges crossed a sample (0.1-0.17 x noise at 5 Hz).
    """
    rows = np.ndim(x) == 2
    if not rows:
        x, g = x[None, :], g[None, :]
        usable = None if usable is None else np.asarray(usable)[None, :]
        one = read
        read = lambda k, idx, r: one(k, idx)  # noqa: E731
    n = x.shape[1]
    hi = base_key.max()
    chosen = []  # each side's ambiguous samples and the ticks they keep
    unsure = np.zeros(n, dtype=bool)
    unsure[amb_lo] = True
    unsure[amb_hi] = True

    def sure_neighbour(amb, side):
        at = np.clip(amb + 2 * side, 0, n - 1)
        for k in (1, 3, 4):
            alt = np.clip(amb + k * side, 0, n - 1)
            at = np.where(unsure[at] & ~unsure[alt], alt, at)
        return at

    for amb, step in ((amb_lo, -1), (amb_hi, 1)):
        if amb.size == 0:
            continue
        left, right = sure_neighbour(amb, -1), sure_neighbour(amb, 1)
        k0 = base_key[amb]
        k1 = np.clip(k0 + step, 0, hi)
        # evidence for the other tick: squared misfits summed over the rows that can tell (the noise is
        # each channel's own; one DAC's steps are in every channel, scaled by its gain)
        favour = np.zeros(amb.size)
        for r in range(x.shape[0]):
            sel = slice(None) if usable is None else usable[r, amb] & usable[r, left] & usable[r, right]
            a, lo_, hi_ = amb[sel], left[sel], right[sel]
            if a.size == 0:
                continue
            around = np.concatenate([lo_, hi_])
            res = x[r, around] - g[r, around] * read(key[around], around, r)
            base = 0.5 * (res[: a.size] + res[a.size:])
            e0 = x[r, a] - g[r, a] * read(k0[sel], a, r) - base
            e1 = x[r, a] - g[r, a] * read(k1[sel], a, r) - base
            favour[sel] += e0 * e0 - e1 * e1
        chosen.append((amb, np.where(favour > 0, k1, k0)))
    return settled_keys(base_key, chosen, compiled=compiled)  # ticks never run backwards


def spike_outliers(x, fit, wb, fs, u, span_cycles, outlier_z, gain=None, compiled=True, out=None):
    """Zero the weight of spike-band outliers (and 1 ms around them) in ``wb``; return it and the count.

    The new weights go to ``out`` if given (``wb`` itself, for a caller done with it).

    Outliers are judged on the residual ``x - gain * fit`` (``gain`` None: 1).
    The threshold is set stretch by stretch (``span_cycles`` cycles, counted
    from absolute cycle numbers), so it follows slow changes of the noise
    and a piece of a block flags what the whole block would.
    """
    sos = signal.butter(2, min(300.0, 0.4 * fs), btype="highpass", fs=fs, output="sos")
    # lost samples carry no residual (zero), so their edges do not ring into flags
    hp = highpass_residual(sos, x, fit, gain, wb, compiled=compiled)
    # robust SD (MAD) per stretch; the threshold never flags more than 1% of the samples (the 99th
    # percentile), so a systematic residual (ramp corners, a near-noiseless channel) cannot empty the fit
    bounds = stretch_bounds(u, span_cycles)
    bad = outlier_flags(hp, wb, bounds, outlier_z * 1.4826, compiled=compiled)
    del hp  # the largest array here: gone before the new weights are made
    half = max(1, int(round(1e-3 * fs)))
    # widen each flag by `half` samples on either side (a running maximum)
    spread = widen_flags(bad, half, compiled=compiled)
    _keep_fits_fed(spread, wb, bounds)
    w = np.multiply(wb, ~spread, out=out)
    return w, int(spread.sum())


#: share of a stretch's usable samples the spike-band outliers may take from the fits (this project's choice;
#: session 37). Spikes, however dense, take a few per cent (four units at 15-30 spikes/s each: 7-9%); residue that
#: repeats with the stimulation does not: a 1 kHz DAC's steps through an amplifier's 7.5 kHz low-pass, which the
#: tick model does not follow, left residue at every edge, its flags widened by a millisecond took 17-37% of the
#: samples, and the starved fits left 250-31000x the neural power within 3 Hz of the harmonics at 20-40 Hz
_OUTLIER_SHARE = 0.2


def _keep_fits_fed(spread: np.ndarray, wb: np.ndarray, bounds: np.ndarray) -> None:
    """Clear the outlier flags ``spread`` (rows x samples, in place) of each stretch (``bounds``) where they cover
    more than :data:`_OUTLIER_SHARE` of its usable samples (``wb > 0``)."""
    usable = wb > 0
    starts, lengths = bounds[:-1], np.diff(bounds)
    if not starts.size:
        return
    flagged = np.add.reduceat(spread & usable, starts, axis=-1)
    total = np.add.reduceat(usable, starts, axis=-1)
    over = flagged > _OUTLIER_SHARE * np.maximum(total, 1)
    if over.any():
        spread &= ~np.repeat(over, lengths, axis=-1)


def _subset_plan(plan, fit: list[int]):
    """A block plan for the channels ``fit`` (indices into the channels the plan was made on).

    The reference's gain response row is kept: a reference outside ``fit``
    gets the row after them, so the report names the lines it passes as the
    whole-array run does.
    """
    ref, grid, unlocked, response, decided, harmonics, judges, level, follows, track, edges = plan
    rows = list(fit)
    if ref in rows:
        new_ref = rows.index(ref)
    else:
        new_ref = len(rows)
        rows.append(ref)
    if response is not None:
        response = response.rows(rows)
    if decided is not None:
        decided = [decided[i] for i in rows]
    # judges the clone does not see (an estimator that reads no reference data) are left out
    judges = tuple(rows.index(j) for j in judges if j in rows)
    return BlockPlan(new_ref, grid, unlocked, response, decided, harmonics, judges,
                     None if level is None else level[rows], None if follows is None else follows[rows],
                     None if track is None else track.rows(rows), edges)


def _level(x: np.ndarray, cycles: np.ndarray | None = None, harmonics: int | None = None,
           ref: int | None = None) -> np.ndarray:
    """Each row's DC level, from its mean cycle (on bins of the stimulation phase ``cycles``).

    An unclipped row's level is the mean of its mean cycle. A clipped row's unclipped samples miss the
    peaks the rails took (their mean was hundreds of microvolts off for a 4 mV waveform with harmonics,
    which the fits then saw as an offset: 0.95 x noise in the spike band): its level is the constant of
    a fit, on the phases none of whose samples is clipped, of a constant plus the mean cycle of the
    unclipped row ``ref`` (one stimulator: the channels see one waveform at different gains), or where
    every row clips, plus a harmonic series of ``harmonics`` (at most 5) terms.
    """
    x = np.atleast_2d(x)
    if cycles is None or x.shape[1] < 16:
        lv = x.mean(axis=1)
        return np.where(np.isfinite(lv), lv, 0.0)
    n_bins = 64
    b = np.floor(fractional_part(cycles) * n_bins).astype(np.int64)
    clipped = find_clipped(x)
    cnt = np.bincount(b, minlength=n_bins).astype(np.float64)
    have = cnt > 0
    means = np.stack([np.bincount(b, row, n_bins) for row in x]) / np.maximum(cnt, 1.0)
    whole = np.stack([np.bincount(b, row.astype(np.float64), n_bins) == 0 for row in clipped]) & have
    if ref is not None and whole[ref].sum() == have.sum():
        shape = means[ref] - means[ref][have].mean()
        basis = np.column_stack([np.ones(n_bins), shape])
    else:
        order = max(1, min(5 if harmonics is None else int(harmonics), 5))
        ph = 2 * np.pi * (np.arange(n_bins) + 0.5) / n_bins
        basis = np.column_stack([np.ones(n_bins)] + [fn(k * ph) for k in range(1, order + 1)
                                                     for fn in (np.cos, np.sin)])
    out = np.empty(x.shape[0])
    for ch in range(x.shape[0]):
        ok = whole[ch]
        if ok.sum() == have.sum() or ok.sum() < basis.shape[1] + 2:
            out[ch] = means[ch][ok if ok.any() else have].mean()
        else:
            out[ch] = np.linalg.lstsq(basis[ok], means[ch][ok], rcond=None)[0][0]
    return np.where(np.isfinite(out), out, 0.0)


#: a sham block's level is taken off where it exceeds this share of the channel's SD over the stretch (this
#: project's choice: an electrode offset of millivolts against a level read to tens of microvolts)
_SHAM_LEVEL = 0.25


def level_off(xb: np.ndarray, plan, blk, offset: int = 0) -> np.ndarray:
    """``xb`` (samples from ``offset`` of ``blk``'s recording) less its block's DC level
    (:attr:`BlockPlan.level`) and, on the channels the plan follows (:attr:`BlockPlan.follows`), less the
    level's drift (:attr:`BlockPlan.track`): a new array, the caller's is not changed.

    A DC-coupled amplifier holds tens of millivolts of electrode offset. The fits are blind to it only
    where every bin and part of the cycle weighs the same: outliers left out, clipped samples and the
    ramps' small gains let a share of it into the template's bins (a 20 mV offset at 40 Hz: 4000x the
    neural power within 3 Hz of the harmonics, the spike band at 5 x noise), and the row estimators
    divide it by the envelope at the ramps' feet (110-200 x noise). Both the level and its drift are read
    once per block by the plan, so every piece of a block takes off the same; on a channel that clips,
    whose samples at the rails are missing from every mean, only the constant level.
    """
    level = getattr(plan, "level", None)
    out = np.array(xb, dtype=np.float64) if level is None else xb - level[:xb.shape[0], None]
    follows, track = getattr(plan, "follows", None), getattr(plan, "track", None)
    if follows is not None and track is not None:
        track.subtract(out, offset - blk.ref_sample, np.flatnonzero(follows[:xb.shape[0]]))
    return out


def level_reader(read, blk, bounds: tuple[int, int], fs: float, n_ch: int, mapper=map):
    """``read`` (as :meth:`CycleEstimator.prepare` takes it) with each channel's drifting level taken off where
    none of its samples read is clipped, and the block's :class:`~artifactclean.baseline.LevelTrack` over its
    work range ``bounds`` (read first, its parts spread by ``mapper``): the level :func:`level_off` takes off
    the same samples when the fits run (``n_ch``: the channels ``read`` gives)."""
    track = level_track(read, fs, blk.freq_hz, bounds, n_ch, origin=blk.ref_sample,
                        corners=bent_corners(blk.geometry(), fs / blk.freq_hz), mapper=mapper)
    seen = level_off_reader(read, track, bounds, origin=blk.ref_sample,
                            follow=lambda rows: ~find_clipped(rows, dilate=0).any(axis=1))
    return seen, track


#: float64 values of an upsampled block's copy (per channel: its samples times the factor times the estimator's
#: memory per sample) a group of channels holds at once: 1 GiB, this project's choice (a 10 minute, 16 channel
#: 1 kHz array at 40 Hz peaked at 4.1 GB in one group)
_UPSAMPLED_VALUES = 2 ** 27


def _joined_reports(infos: list[dict]) -> dict:
    """One block report from those of groups of channels: counts summed, flags joined, per-channel lists
    concatenated, the rest (the block's plan) from the first group."""
    out = {}
    for i in infos:
        out.update({k: v for k, v in i.items() if k not in out})
    for k, v in out.items():
        vals = [i[k] for i in infos if k in i]
        if isinstance(v, bool):
            out[k] = any(vals)
        elif k in ("outliers_left_out", "censored_samples", "completed_samples"):
            out[k] = int(sum(vals))
        elif k in ("channels", "harmonics") and isinstance(v, list):
            out[k] = [x for part in vals for x in part]
    return out


def _track_parts(bounds: tuple[int, int], fs: float) -> list[tuple[int, int]]:
    """The parts ``(a, b)`` a heartbeat track over the work range ``bounds`` is computed in: :data:`_TRACK_S`
    s each, a short last part joined to the one before (each part holds a plateau)."""
    s, e = bounds
    core = int(_TRACK_S * fs)
    starts = list(range(s, e, core))
    if len(starts) > 1 and e - starts[-1] < core // 2:
        starts.pop()
    return [(a, e if j == len(starts) - 1 else starts[j + 1]) for j, a in enumerate(starts)]


class CycleEstimator(ArtifactEstimator):
    """Base of the estimators that model the artifact cycle by cycle within each block.

    Subclasses provide ``_block(xb, wb, u, fs, blk, offset)`` returning the
    artifact of one work range, a dict for the report and optionally a mask
    of further lost samples; and the parameters ``margin_cycles``, ``dac``,
    ``track_amplitude``, ``tracking_hz``.
    """

    #: the upsampling factor of each block (resampling.py), from :meth:`prepare`: pieces are sized from it
    _prepared_attrs = ("_factors",)

    def work_ranges(self, model, fs: float) -> list[tuple[int, int]]:
        """Sample ranges cleaned independently: each block plus its margins.

        Stimulation-free stretches between them are left untouched, so a
        file can be cleaned range by range with the same result as a whole
        array.
        """
        blocks = sorted(model.blocks, key=lambda b: b.start)
        n = model.n_samples
        out = []
        for i, b in enumerate(blocks):
            margin = int(round(self.margin_cycles * fs / b.freq_hz))
            lo_lim = 0 if i == 0 else (blocks[i - 1].stop + b.start) // 2
            hi_lim = n if i == len(blocks) - 1 else (b.stop + blocks[i + 1].start) // 2
            s, e = max(lo_lim, b.start - margin), min(hi_lim, b.stop + margin)
            if e - s >= 4:
                out.append((s, e, b))
        return out

    def _estimate(self, x, fs, model, lost):
        ranges = self.work_ranges(model, fs)
        # one range over the whole array (a file piece inside a block) is its own artifact array
        whole = len(ranges) == 1 and ranges[0][:2] == (0, x.shape[1])
        art = None if whole else np.zeros_like(x)
        extra = np.zeros(x.shape, dtype=bool)
        report = dict(blocks=[])
        for s, e, b in ranges:
            up = self._upsampling(b.freq_hz, fs)
            if up > 1:
                a, info, cen = self._upsampled_block(x, lost, s, e, b, fs, up)
            else:
                u = model.cycles(b, s, e)
                a, info, cen = self._block(x[:, s:e], (~lost[:, s:e]).astype(np.float64), u, fs, b, s)
            if whole and a.dtype == np.float64 and a.shape == x.shape and not np.may_share_memory(a, x):
                art = a
            else:
                if art is None:
                    art = np.zeros_like(x)
                art[:, s:e] = a
            if cen is not None:
                extra[:, s:e] |= cen
            report["blocks"].append(dict(start=s, stop=e, kind=b.kind, **info))
        return art, report, extra

    #: samples per cycle under which a block is cleaned on an upsampled copy, and how many the copy reaches
    _samples_per_cycle = (MIN_SAMPLES_PER_CYCLE, TARGET_SAMPLES_PER_CYCLE)

    def _upsampling(self, freq_hz: float, fs: float) -> int:
        """The factor a block at ``freq_hz`` is upsampled by (:func:`artifactclean.resampling.upsampling_factor`)."""
        least, target = self._samples_per_cycle
        return upsampling_factor(freq_hz, fs, least=least, target=target)

    def _upsampled_block(self, x, lost, s, e, blk, fs, up):
        """:meth:`_block` of range ``s..e`` on a copy upsampled ``up`` times (few samples per cycle), read back at
        the original samples (:mod:`artifactclean.resampling`).

        The copy holds ``up`` times the range's samples: channels are cleaned in groups that keep it within
        :data:`_UPSAMPLED_VALUES` values, each with the block's plan (made once on all channels, from the
        upsampled reader a prepared plan reads through), so the result does not depend on the grouping.
        """
        n_ch, n = x.shape
        bu = upsampled_block(blk, up)
        key = block_key(bu)
        plan = getattr(self, "_plans", {}).get(key)
        if plan is None:
            plan, = self._make_plans(upsampled_reader(array_reader(x), up, n), [bu], [(s * up, e * up)], fs * up)
        u = bu.cycles_at(np.arange(s * up, e * up, dtype=np.float64), fs * up)
        lo, hi = max(0, s - _UP_REACH), min(n, e + _UP_REACH + 1)
        per_channel = (e - s) * up * self.memory_per_sample[0]
        groups = channel_groups(n_ch, int(np.ceil(n_ch * per_channel / _UPSAMPLED_VALUES)))
        art = np.empty((n_ch, e - s))
        cen = None
        infos = []
        for rows in groups:
            # the data a prepared plan read (upsampled_reader)
            top, bottom = find_rails(x[rows, lo:hi])
            xu = upsample_railed(x[rows, lo:hi], up, rails=(top, bottom))[:, (s - lo) * up:(e - lo) * up]
            keep = ~lost[rows, s:e]
            # a sample between two originals is usable where both are
            wu = np.repeat(keep & np.concatenate((keep[:, 1:], keep[:, -1:]), axis=1), up, axis=1)
            wu[:, ::up] = keep
            # and not where the interpolation went beyond a rail (held there by upsample_railed)
            wu &= (xu < top[:, None]) & (xu > bottom[:, None])
            est = clone(self)
            est._plans = {key: _subset_plan(plan, list(rows))}
            a, info, c = est._block(xu, wu.astype(np.float64), u, fs * up, bu, s * up)
            del xu, wu
            art[rows] = a[:, ::up]
            if c is not None:
                if cen is None:
                    cen = np.zeros((n_ch, e - s), dtype=bool)
                cen[rows] = c[:, ::up]
            infos.append(info)
        return art, dict(_joined_reports(infos), upsampled_by=up), cen

    @one_blas_thread
    def prepare(self, read, model, fs: float, mapper=map) -> None:
        """Decide, once per block, what must not depend on how a recording is cut.

        File pieces call this before cleaning a block piece by piece:
        ``read(a, b, rows=None)`` returns samples ``a..b`` of the channels
        ``rows`` (indices; all channels by default). The DAC grid
        (and the channel it is read from) comes from the middle of the
        block's plateau, at most ``_PLAN_S`` seconds, exactly as when the
        whole array is cleaned at once. Blocks are planned one after
        another; ``mapper`` spreads each block's work (its DAC search,
        groups of channels and heartbeat rows) over workers
        (``ThreadPoolExecutor.map``; ``read`` must then be safe to call from
        several threads). It must not map onto a pool this call runs on.
        """
        ranges = {block_key(b): (s, e) for s, e, b in self.work_ranges(model, fs)}
        blocks = list(model.blocks)
        bounds = [ranges.get(block_key(b), (b.start, b.stop)) for b in blocks]
        # blocks with few samples per cycle are planned on the upsampled axis they are cleaned on
        ups = [self._upsampling(b.freq_hz, fs) for b in blocks]
        plans: list = [None] * len(blocks)
        for up in sorted(set(ups)):
            idx = [i for i, v in enumerate(ups) if v == up]
            if up == 1:
                made = self._make_plans(read, [blocks[i] for i in idx], [bounds[i] for i in idx], fs, mapper)
            else:
                made = self._make_plans(upsampled_reader(read, up, model.n_samples),
                                        [upsampled_block(blocks[i], up) for i in idx],
                                        [(bounds[i][0] * up, bounds[i][1] * up) for i in idx], fs * up, mapper)
            for i, plan in zip(idx, made):
                plans[i] = plan
        self._plans = {block_key(b): plan for b, plan in zip(blocks, plans)}
        self._factors = {block_key(b): up for b, up in zip(blocks, ups)}

    def _make_plans(self, read, blocks, bounds, fs, mapper=map) -> list:
        """:class:`BlockPlan` of each block (``bounds``: its work range), the work spread by ``mapper``."""
        if not blocks:
            return []
        # one block after another, each one's channels side by side (a block's plan waits for its jobs, so
        # blocks planned on the pool themselves could leave no worker for them)
        # every choice sees the data the fits will: each unclipped channel's drifting level taken off
        n_ch = np.asarray(read(blocks[0].start, blocks[0].start + 1)).shape[0]
        seen, tracks = zip(*[level_reader(read, b, bounds[i], fs, n_ch, mapper) for i, b in enumerate(blocks)])
        stretch = [self._stretch_plan(seen[i], b, fs, mapper) for i, b in enumerate(blocks)]
        # a heartbeat's phase over each whole block, once, from its reference channel: tasks on other channels
        # then need neither that channel nor the band-pass's context
        pulsed = [i for i, st in enumerate(stretch) if getattr(st[3], "pulse", None) is not None]
        # the tracks' parts of every block, one channel each, side by side (a part per _TRACK_S s; one map,
        # not one per block, so no task waits on others in the same pool)
        parts = [(i, ab) for i in pulsed for ab in _track_parts(bounds[i], fs)]
        jobs = [(i, ab, row) for i, ab in parts for row in stretch[i][3].pulse.pooled()]

        def row_part(job):
            i, ab, row = job
            return self._heart_row(seen[i], blocks[i], fs, bounds[i], ab, row)

        rows = iter(list(mapper(row_part, jobs)))
        done: dict[int, list] = {i: [] for i in pulsed}
        for i, ab in parts:
            pulse = stretch[i][3].pulse
            done[i].append(self._heart_part(blocks[i], pulse, ab, [next(rows) for _ in pulse.pooled()]))
        for i in pulsed:
            model = stretch[i][3].pulse
            track = join_tracks(done[i], model.heart_hz, fs)
            # every model the estimators apply has its track (none only if the range held no gain sample)
            stretch[i][3].pulse = None if track is None else model.with_track(track)
        # the estimator's own choices, per block and group of channels, side by side
        jobs = [(i, rows) for i, b in enumerate(blocks) for rows in self._decide_groups(b, fs, n_ch, bounds[i])]

        def decide(job):
            i, rows = job
            grid, response, level = stretch[i][1], stretch[i][3], stretch[i][6]

            def read_level_off(a, b, rows=None):
                # the choices see the data the fits will (level_off): the drift is off already
                x = np.asarray(seen[i](a, b, rows), dtype=np.float64)
                return x - (level if rows is None else level[list(rows)])[:, None]

            return self._decide(read_level_off, blocks[i], fs, grid, response, bounds[i], rows)

        decided: dict[int, list] = {}
        for (i, _), part in zip(jobs, mapper(decide, jobs)):
            decided.setdefault(i, []).extend(part)
        plans = [BlockPlan(*stretch[i][:4], decided.get(i), *stretch[i][4:], tracks[i]) for i in range(len(blocks))]
        # what the amplifier's low-pass makes of a DAC's steps, once the rest of the plan is fixed (the estimator
        # fits a stretch with it)
        return list(mapper(lambda i: self._edge_plan(read, blocks[i], fs, plans[i], bounds[i]), range(len(blocks))))

    def _edge_plan(self, read, blk, fs, plan, bounds):
        """``plan`` with its :attr:`BlockPlan.edges` (and the DAC grid they were learned on); as it is by default."""
        return plan

    def _heart_row(self, read, blk, fs, bounds, part, row):
        """One channel's share of a part of the heartbeat's track (see :meth:`_heart_part`): ``(positions,
        rate, deviation, envelope)`` of channel ``row``'s raw gain, read over the part ``(a, b)`` with twice
        :data:`~artifactclean.pulse.PULSE_HALF_S` on each side (the band-pass and the smoothing) within the
        block's work range ``bounds``, so memory follows :data:`_TRACK_S` and not the block's length."""
        s, e = bounds
        a, b = part
        f = blk.freq_hz
        per_cycle = segments_per_cycle(self.tracking_hz, f)
        margin = int(2 * PULSE_HALF_S * fs) + int(fs / f) + 1
        lo, hi = max(s, a - margin), min(e, b + margin)
        cycles = blk.cycles_at(np.arange(lo, hi, dtype=np.float64), fs)
        x = np.asarray(read(lo, hi, [row]), dtype=np.float64)
        raw, rate = segment_gain(x, (~find_clipped(x)).astype(np.float64), cycles, fs, f, per_cycle)
        del x
        # segment k covers cycles [first + k, first + k + 1) / per_cycle
        centre = (np.floor(cycles[0] * per_cycle) + np.arange(raw.shape[1]) + 0.5) / per_cycle
        t = blk.ref_sample + (centre - blk.phase_ref / (2 * np.pi)) * (fs / f)
        env = envelope_at(lo + np.clip(np.round(t - lo), 0, hi - lo - 1), blk)
        return t, rate, relative_deviation(raw[0], float(plateau_level(raw, env)[0]), env), env

    @staticmethod
    def _heart_part(blk, pulse, part, rows):
        """One part of the heartbeat's track (the plan's :class:`~artifactclean.pulse.PulseModel`
        ``pulse``): ``(positions, amplitude, phase)`` of the fundamental at positions (samples) from
        ``blk.ref_sample`` within ``part = (a, b)`` (see :func:`_track_parts`), for
        :func:`artifactclean.pulse.join_tracks`, from the :meth:`_heart_row` of each channel the model
        pools (or its reference's; as the model was fitted), in ``pulse.pooled()`` order.
        """
        a, b = part
        weights = None if pulse.weights is None else pulse.weights[pulse.pooled()]
        t, amp, ph = fundamental_of_rows(rows, pulse.heart_hz, weights, pulse.smooth_hz)
        # the pulse's harmonics hold the phase too (a third of what is known of it at 10 Hz), those a heart rate
        # or more below the stimulation frequency
        ph = harmonic_phase(rows, pulse, ph, pulse.smooth_hz, up_to_hz=blk.freq_hz - pulse.heart_hz)
        keep = (t >= a) & (t < b)
        # positions from the block's reference sample: a window of the recording (a file piece) keeps them
        return t[keep] - blk.ref_sample, amp[keep], ph[keep]

    #: :attr:`memory_per_sample` of a block whose plan has a DAC grid (None: the same)
    _memory_with_dac: tuple[float, float] | None = None

    def block_memory_per_sample(self, blk) -> tuple[float, float]:
        """:attr:`memory_per_sample` for ``blk`` after :meth:`prepare`, with or without a DAC grid in its plan."""
        plan = getattr(self, "_plans", None)
        plan = None if plan is None or blk is None else plan.get(block_key(blk))
        # a block cleaned on an upsampled copy holds `up` samples for each of the piece's, and the copy
        up = 1 if blk is None else getattr(self, "_factors", {}).get(block_key(blk), 1)
        if plan is None or plan.grid is None or self._memory_with_dac is None:
            a, b = self.memory_per_sample
        else:
            a, b = self._memory_with_dac
        return (a * up + 1, b * up) if up > 1 else (a, b)

    #: whether a block with a DAC grid reads the reference channel's data (not only its plan)
    _reads_reference = False
    #: whether the estimator models a DAC grid that repeats every few cycles (DacGrid.cycles_per_period)
    #: or at any phase (DacClock)
    _dac_periods = False

    def for_channels(self, channels, *, shared_edges: bool = False):
        """A clone for ``channels`` with the block plans of :meth:`prepare` restricted to them.

        A plan's reference channel and gain responses are indexed into the
        channels the clone sees; when the estimator reads the reference
        channel's data (:attr:`_reads_reference`, with a DAC grid) that channel
        and the plan's judges are added to ``fit_channels``, unless
        ``shared_edges``: the clone then takes the judges' choices from
        outside (:meth:`edge_judges`) and fits ``channels`` alone.
        """
        est, fit = super().for_channels(channels)
        plans = getattr(self, "_plans", None)
        if plans is None:
            return est, fit
        for plan in plans.values():
            # the reference's data for a DAC grid (the heartbeat's phase is in the plan's track), and the
            # channels that judge the samples next to its edges
            if self._reads_reference and plan.grid is not None and plan.edges is None and not shared_edges:
                for ch in (plan.ref, *plan.judges):
                    if ch not in fit:
                        fit.append(int(ch))
        est._plans = {key: _subset_plan(plan, fit) for key, plan in plans.items()}
        if shared_edges and self._reads_reference:
            est._shared_edges = True
        return est, fit

    def edge_judges(self, blk) -> list[int]:
        """Channels that judge the samples beside ``blk``'s DAC tick edges, where other channels' fits depend on
        them (the plan's reference first); empty where none do.

        A clone from ``for_channels(judges)`` with ``_record_edges`` set
        fits the judges only as far as their last settling, and leaves in
        ``edge_keys_`` the tick keys they settle, block by block and pass by
        pass (where they differ from the grid's). A clone from
        ``for_channels(..., shared_edges=True)`` with those keys in
        ``_edge_keys`` then cleans its channels as a clone that also fits the
        judges would, to the bit, without reading or cleaning them
        (:func:`artifactclean.parallel.edge_keys_task`).
        """
        plan = getattr(self, "_plans", {}).get(block_key(blk)) if blk is not None else None
        up = 1 if blk is None else getattr(self, "_factors", {}).get(block_key(blk), 1)
        # a grid whose steps are modelled through the amplifier's low-pass settles no sample (BlockPlan.edges)
        if not self._reads_reference or plan is None or plan.grid is None or plan.edges is not None or up > 1:
            return []
        return [int(c) for c in dict.fromkeys((plan.ref, *plan.judges))]

    def _decide_groups(self, blk, fs, n_ch, bounds) -> list:
        """Groups of channels (lists of indices) :meth:`_decide` is called on; none by default."""
        return []

    def _decide(self, read, blk, fs, grid, response, bounds, rows) -> list:
        """Per-channel choices made once per block, for the channels ``rows`` (one dict each)."""
        raise NotImplementedError

    def _stretch_plan(self, read, blk, fs, mapper=map):
        """Reference channel, DAC grid, unlocked step rate, gain response and waveform harmonics, from the plateau's middle.

        ``mapper`` spreads the DAC search and the gain response's share of
        each group of channels (:data:`_PLAN_GROUPS`, whatever the workers)
        over workers. It must not map onto a pool this call itself runs on
        (the call waits for its jobs).
        """
        f = blk.freq_hz
        n_ch = np.asarray(read(blk.start, blk.start + 1)).shape[0]
        # at most _PLAN_S s, less for many channels (memory), never under a second
        a, b = plan_stretch(blk, fs, max(1.0, min(_PLAN_S, _PLAN_S * 8 / max(n_ch, 1))))
        x = np.asarray(read(a, b), dtype=np.float64)
        # the strongest channel shows the DAC steps best; a clipped one shows rail edges instead
        spread = np.std(x, axis=1)
        intact = ~find_clipped(x, dilate=0).any(axis=1)
        ref = int(np.argmax(np.where(intact, spread, -1.0))) if intact.any() else int(np.argmax(spread))
        if b - a < 16:
            return ref, None, 0.0, None, None, (ref,), _level(x), None
        cycles = blk.cycles_at(np.arange(a, b, dtype=np.float64), fs)
        per_cycle = segments_per_cycle(self.tracking_hz, f)
        first = int(np.floor(cycles[0] * per_cycle))  # the gain segments' first number
        # a shift needs seconds of cycles
        shift = getattr(self, "track_phase", False) and (b - a) * f / fs >= 40

        def group_share(rows):
            """Channels ``rows``' raw gains, their means over ~1/32 cycle (modulations and the shift live in the
            first harmonics) and phase shifts, whether none of their samples is clipped, where the gains stood and
            the mean cycles they were fitted against."""
            xc = x[rows[0]:rows[-1] + 1]
            usable = (~find_clipped(xc)).astype(np.float64)
            raw, rate, moved, cycle = segment_gain(xc, usable, cycles, fs, f, per_cycle, return_shift=True,
                                                   return_cycle=True)
            xd, wd, ud, fsd = _block_means(xc, usable, cycles, fs, max(1, int(fs // (32 * f))))
            eta = segment_phase(xd, wd, ud, fsd, f, per_cycle, segments=(first, raw.shape[1]))[0] if shift else None
            return bool(usable.all()), raw, rate, xd, wd, ud, fsd, eta, moved, cycle

        def dac():
            """The DAC grid and the rate of steps no grid explains."""
            # on an upsampled copy the interpolated samples between the originals look like ticks at the
            # original rate (resampling.py): no grid is searched there
            if self.dac != "auto" or getattr(blk, "upsampled_by", 1) > 1:
                return None, 0.0
            grid = find_dac_grid(x[ref], cycles, fs, f)
            # a few samples a tick: no single step stands out, their rate and edges do when pooled; and
            # where the steps give the ticks, the edges from every pair's difference are the sharper
            pooled = find_fast_dac(x[ref], cycles, fs, f, max_period=24 if self._dac_periods else 1,
                                   ticks=None if grid is None else (grid.ticks_per_cycle, grid.cycles_per_period))
            if grid is None or pooled is not None:
                grid = pooled
            # steps that fit no grid locked to the cycle: a staircase this estimator cannot follow,
            # unless its ticks repeat every few cycles and the estimator models periods of cycles
            # the four strongest channels (one DAC drives them all: a weaker reference shows few steps;
            # a clipped one shows them between its rails)
            strong = x[[ref] + [int(c) for c in np.argsort(spread)[::-1] if c != ref][:3]]
            # steps per second from 2 s of each (a rate, not a grid: a few thousand steps are plenty)
            unlocked = max(step_rate(row[: int(2 * fs)], fs) for row in strong) if grid is None else 0.0
            # a fast DAC's steps are small (7.5 kHz at 40 Hz: at most 130-260 uV, four samples a tick) and
            # few pass 8 SDs; at 6 they show (370 a second) where neural data alone give none. What is
            # reported and warned about stays the count at 8 SDs unless a grid is found
            look = unlocked > _UNLOCKED_STEPS or (grid is None and self._dac_periods and max(
                step_rate(row[: int(2 * fs)], fs, z_threshold=_SMALL_STEPS_Z) for row in strong) > _UNLOCKED_STEPS)
            if look and self._dac_periods:
                grid = find_dac_period(strong, cycles, fs, f)
                if grid is None:
                    grid = find_dac_clock(strong, cycles, fs, f)  # ticks at any phase: read where they held
                    # nearly whole updates per cycle or two or three (a DAC on a clock of its own, ppm from the
                    # waveform's): the held phases form a cluster or two in each tick and most of the clock's
                    # bins stay empty; the same ticks are a period grid whose offset moves along a line.
                    # Longer periods spread their held phases over the tick, and the clock bins them well
                    grid = (grid and clock_as_grid(grid, max_period=3)) or grid
                if grid is not None:
                    unlocked = 0.0
            return grid, unlocked

        # the DAC search beside the channels' shares: the gain response needs its verdict only at the end
        groups = channel_groups(n_ch, _PLAN_GROUPS) if self.track_amplitude else []
        jobs = [dac] + [functools.partial(group_share, rows) for rows in groups]
        (grid, unlocked), *parts = mapper(_call, jobs)
        response = None
        if parts:
            # a line of the raw gain must also show beside the fundamental, not with a DAC or on clipped data:
            # a DAC's period or a rail's edges put lines of their own in the raw gain
            plain = self.dac != "auto" or grid is not None or unlocked > 0
            response = self._gain_response(parts, groups, f, ref, intact, plain, first, mapper)
        # the waveform's harmonics on an unclipped reference (clipping makes its own); with a DAC
        # below half the tick count, where the staircase's images start
        ticks = getattr(grid, "ticks_per_cycle", None)
        harmonics = waveform_harmonics(x[ref], cycles, fs, f, below=ticks / 2 if ticks else None) \
            if intact.any() else None
        # where a channel clips, the strongest channels, the reference first, judge the samples next to the DAC's
        # edges (the reference is then not the strongest, and at the rails it cannot judge); else the reference,
        # the strongest, alone (every task that cleans other channels reads the judges too)
        judges = (ref,) if intact.all() else \
            (ref, *[int(c) for c in np.argsort(-spread, kind="stable") if c != ref][:SETTLE_CHANNELS - 1])
        level = _level(x, cycles, harmonics, ref if intact[ref] else None)
        if blk.kind == "sham":
            # ramps only, a second or two: the mean cycle of a few ramped cycles gives the level to tens of
            # microvolts, itself an offset to the fits (0.22-0.25 x noise in the spike band of a sham that clips
            # at its peak); taken off only where it is the larger error (a DC-coupled amplifier's millivolts)
            level = np.where(np.abs(level) > _SHAM_LEVEL * spread, level, 0.0)
        return ref, grid, unlocked, response, harmonics, judges, level, intact

    def _gain_response(self, parts, groups, f, ref, intact, plain, first, mapper):
        """The plan's :class:`~artifactclean.modulation.GainResponse` from the ``parts`` of channel ``groups``
        (see :meth:`_stretch_plan`); unless ``plain``, a line of the raw gain must also show beside the
        fundamental."""
        whole = all(p[0] for p in parts)
        raw = np.concatenate([p[1] for p in parts])
        xd, wd = (np.concatenate([p[k] for p in parts]) for k in (3, 4))
        rate, ud, fsd = parts[0][2], parts[0][5], parts[0][6]
        per_cycle = segments_per_cycle(self.tracking_hz, f)
        # a pulsatile heartbeat's harmonics are modelled from its fundamental's phase; the response is
        # designed without them, so it passes neither them nor the floor under them
        moved = np.concatenate([p[8] for p in parts])
        cycle = np.concatenate([p[9] for p in parts])
        pulse = fit_pulse(raw, rate, max_hz=self.tracking_hz, ref=ref, pool=np.flatnonzero(intact),
                          shift=moved, per_cycle=per_cycle, cycle=cycle,
                          first=first, band=tuple(getattr(self, "heart_band_hz", HEART_HZ))) \
            if getattr(self, "model_pulse", False) else None
        if pulse is not None:
            # as the fit saw them: each part of the cycle sees the harmonics through its own weights, and that
            # pattern puts their images at the stimulation frequency less each one, where the sideband test is
            # fooled (f +- (f - h) is h and 2 f - h, the harmonic on the waveform's offset and on its 2nd harmonic)
            raw = raw - pulse.as_held(raw, rate, moved, first, per_cycle)
        response = design_gain_response(raw, rate, max_hz=self.tracking_hz, follow_hz=follow_below(f))
        # the gain filter restores what segments and the interpolation between them take off what it passes:
        # these segments' own share (5 Hz: 1.05 of a 2 Hz heartbeat where a segment's plain mean gives 0.99)
        response.seen = seen_by_segments(cycle, per_cycle, f, first, moved, response.freqs)
        if pulse is not None:
            # not where everything passes: a heart taken at half its rate (a slow 0.6 Hz one for a 1.2 Hz
            # one at 10 Hz) has harmonics there that the model does not hold
            stop_pulse(response, pulse, follow_below(f))
        response.pulse = pulse
        check = None if plain or not whole else raw

        def support(rows):
            # a line of the gain passes only as far as both its sidebands show: a neural rhythm near the
            # fundamental is one line, and following it would put its mirror image beside the fundamental
            at = slice(rows[0], rows[-1] + 1)
            return sideband_support(xd[at], wd[at], ud, fsd, f, response.freqs, above_hz=follow_below(f),
                                    gain=None if check is None else check[at], gain_rate=rate)

        both = np.concatenate(list(mapper(support, groups)))
        response.response = np.minimum(response.response, both)
        low = stop_low_images(response, f, follow_below(f))
        if pulse is not None:
            pass_heart(response, pulse, follow_below(f))
        if parts[0][7] is None:
            return response
        # the phase shift's own lines pass, nothing always does: without a phase modulation
        # the shift is the neural floor, which the derivative would copy onto every harmonic
        eta = np.concatenate([p[7] for p in parts])
        response.phase = np.minimum(
            design_gain_response(eta, rate, max_hz=self.tracking_hz, follow_hz=follow_below(f),
                                 over_subtraction=4.0).response, both)
        response.phase[:, low] = 0.0

        def helps(rows):
            # kept only where following it takes artifact off beside the fundamental and puts none beside the harmonics
            at = slice(rows[0], rows[-1] + 1)
            return phase_helps(xd[at], wd[at], ud, fsd, f, per_cycle, raw[at], eta[at], response.rows(rows),
                               first=first)

        response.phase[~np.concatenate(list(mapper(helps, groups)))] = 0.0
        return response

    def _validate_params(self) -> None:
        """The parameters every cycle estimator shares (subclasses add their own)."""
        if not self.tracking_hz > 0:
            raise ValueError(f"tracking_hz must be positive, got {self.tracking_hz!r}")
        if self.dac not in ("auto", "off"):
            raise ValueError(f"dac must be 'auto' or 'off', got {self.dac!r}")
        if not self.margin_cycles >= 0:
            raise ValueError(f"margin_cycles must be >= 0, got {self.margin_cycles!r}")
        if not getattr(self, "outlier_z", 1.0) > 0:
            raise ValueError(f"outlier_z must be positive, got {self.outlier_z!r}")
        band = getattr(self, "heart_band_hz", HEART_HZ)
        try:
            lo, hi = (float(v) for v in band)
        except (TypeError, ValueError):
            raise ValueError(f"heart_band_hz must be two frequencies (Hz), low and high, got {band!r}") from None
        if not (0 < lo < hi < np.inf):
            raise ValueError(f"heart_band_hz must be two positive frequencies, low below high, got {band!r}")

    def _block_plan(self, xb, blk, fs, offset):
        """The block's :class:`BlockPlan` (from :meth:`prepare`, or made from ``xb`` now), warning on an unlocked DAC."""
        plan = getattr(self, "_plans", {}).get(block_key(blk))
        if plan is None:
            # the block's stretch for the DAC search lies inside this array
            plan, = self._make_plans(array_reader(xb, offset), [blk], [(offset, offset + xb.shape[1])], fs)
        if blk.kind == "active" and blk.freq_hz < _SLOW_HZ:
            warnings.warn(
                f"stimulation at {blk.freq_hz:.2f} Hz: below {_SLOW_HZ:g} Hz a heartbeat modulates the artifact "
                "within a cycle or two and its sidebands fall on the stimulation's harmonics, which "
                f"{type(self).__name__} does not follow (on synthetic sessions the LFP within 3 Hz of the "
                "harmonics kept 2.5-16x the neural power at 1-3 Hz). Check the result with `artifactclean "
                "bench` before reading the LFP below 10 Hz", stacklevel=5)
        if plan.unlocked > _UNLOCKED_STEPS:
            warnings.warn(
                f"a DAC staircase ({plan.unlocked:.0f} steps/s) that is not locked to the {blk.freq_hz:.3f} Hz "
                f"cycle: {type(self).__name__} cannot follow it and a spike-band residual will remain; check "
                "the result with the validation figures", stacklevel=5)
        return plan


#: half-width (Hz) of the band the gain's response stops around each harmonic of the heartbeat that a channel's
#: pulse model carries (this project's choice, about the heart rate's wander at the 3rd harmonic: the model
#: puts the harmonic back whole, and what the response passed there came back twice. 5 Hz artifact alone,
#: pulsatile heartbeat: the residual's line at 1 Hz, where both of the 2nd and 3rd harmonics' lower sidebands
#: fall, 2.8 -> 0.7 uV)
_PULSE_STOP_HZ = 0.5


def stop_pulse(response: GainResponse, pulse, above_hz: float = 0.0) -> None:
    """Stop ``response`` within :data:`_PULSE_STOP_HZ` of each harmonic of ``pulse`` (a
    :class:`~artifactclean.pulse.PulseModel`) on the channels whose model carries it, in place; not at or
    below ``above_hz``, where everything passes (:func:`~artifactclean.modulation.follow_below`)."""
    for j, h in enumerate(range(2, pulse.coefs.shape[1] + 2)):
        rows = np.flatnonzero(pulse.coefs[:, j] != 0)
        band = (np.abs(response.freqs - h * pulse.heart_hz) <= _PULSE_STOP_HZ) & (response.freqs > above_hz)
        response.response[np.ix_(rows, band)] = 0.0


#: half-width (Hz) of the band passed whole about a modelled heart's rate (:func:`pass_heart`): a bin of the
#: response's 4 s spectrum on either side (0.5 passed the 7 Hz rhythm's image at 3 Hz beside a 2.5 Hz heart
#: at 10 Hz stimulation: LFP error away from the harmonics 0.091 -> 0.104, seed 1)
_HEART_PASS_HZ = 0.25


def pass_heart(response: GainResponse, pulse, above_hz: float = 0.0) -> None:
    """Pass ``response`` whole within :data:`_HEART_PASS_HZ` of the heart rate of ``pulse`` (a
    :class:`~artifactclean.pulse.PulseModel`) on every channel, in place, above ``above_hz``.

    A model is a heartbeat whose harmonics are locked to its fundamental: its line is not the floor's, and
    passing it only as far as it stands out of the floor left part of it (a 3 Hz heart, above what the gain
    always follows at 5 and 10 Hz: passed at 0.08-0.64 and 0.5-0.98 on the channels of seed 1).
    """
    band = (np.abs(response.freqs - pulse.heart_hz) <= _HEART_PASS_HZ) & (response.freqs > above_hz)
    response.response[:, band] = 1.0


#: a gain line whose image below the fundamental (``f - d``) falls under this (Hz) does not pass beyond what
#: the gain always follows (:func:`stop_low_images`; this project's choice: the LFP is strongest there and
#: its slope under a segment reads as a change of gain. 5 Hz stimulation, sinusoidal 1.7 Hz heart: lines of
#: the floor passed at 0.2-0.4 at 2.8-3.3 Hz and left 0.18-0.47 of the LFP away from the +-3 Hz bands,
#: 0.004-0.033 stopped)
LOW_IMAGE_HZ = 2.0


def stop_low_images(response: GainResponse, f: float, above_hz: float = 0.0) -> np.ndarray:
    """Stop ``response`` (and its phase response, if designed) where a gain line's lower image ``f - d``
    lies under :data:`LOW_IMAGE_HZ`, in place; not at or below ``above_hz``, where everything passes
    (:func:`~artifactclean.modulation.follow_below`), nor at or below
    :data:`~artifactclean.modulation.FOLLOW_HZ`: a person's heart and its first harmonic lie there, and
    below 4-5 Hz stimulation they must be followed wherever their images fall (a 2 Hz heart at 3 Hz:
    the residual within +-3 Hz of the harmonics 4.5 -> 11x the neural power with those lines stopped).
    Returns where it stopped (over ``response.freqs``).

    The image of the neural signal a gain line at ``d`` Hz takes off lies at ``f - d`` and ``f + d``;
    only below about 10 Hz stimulation does ``f - d`` reach the strongest LFP within the gain's band,
    and there the segments' gains carry that LFP most (its slope under part of a cycle). A modelled
    heartbeat's own line still passes (:func:`pass_heart`, after this); its harmonics are modelled, not
    passed.
    """
    band = (response.freqs > f - LOW_IMAGE_HZ) & (response.freqs > max(above_hz, FOLLOW_HZ))
    response.response[:, band] = 0.0
    if response.phase is not None:
        response.phase[:, band] = 0.0
    return band


def _call(job):
    """``job()``: a mapper's function for a list of different jobs."""
    return job()


def _block_means(x, w, cycles, fs, q):
    """Means over consecutive blocks of ``q`` samples: data, usable (all of the block), phase, rate."""
    if q <= 1:
        return x, w, cycles, fs
    m = x.shape[1] // q * q
    xd = x[:, :m].reshape(x.shape[0], -1, q).mean(axis=-1)
    wd = w[:, :m].reshape(w.shape[0], -1, q).min(axis=-1)
    ud = cycles[:m].reshape(-1, q).mean(axis=-1)
    return xd, wd, ud, fs / q


def plan_stretch(blk, fs: float, span_s: float) -> tuple[int, int]:
    """Samples ``a, b`` of the middle of ``blk``'s plateau, at most ``span_s`` seconds.

    A block too short for a plateau of ten cycles gives the middle of the whole block.
    """
    f = blk.freq_hz
    p0, p1 = blk.ramp_up_stop, blk.ramp_down_start
    if p1 - p0 < 10 * fs / f:
        p0, p1 = blk.start, blk.stop
    half = int(min(span_s * fs, p1 - p0) // 2)
    mid = (p0 + p1) // 2
    return mid - half, mid + half


class CycleGrid:
    """A work range's samples on a grid of phase bins, one row per stimulation cycle.

    Without a DAC, a cycle is divided into ``n_bins`` (about one per sample)
    bins; :meth:`gather` reads the data at the exact phase of each bin centre
    (linear interpolation between samples: the phase is linear in samples
    within a block), :meth:`scatter` reads a grid back at each sample's phase
    (linear interpolation between bin centres, across cycle boundaries too).
    With a DAC grid, the bins are its ticks: every sample of a tick holds one
    value, so :meth:`gather` averages a tick's samples and :meth:`scatter`
    gives each sample its tick's value (samples within a quarter sample of an
    edge are left out of the averages and put in the tick that explains them).

    Parameters
    ----------
    u : ndarray, shape (n,)
        Unwrapped stimulation phase (cycles) of the range's samples.
    fs, f : float
        Sampling and stimulation frequency (Hz).
    dac : DacGrid or None
    """

    def __init__(self, u: np.ndarray, fs: float, f: float, dac=None):
        n = u.size
        self.n = n
        self.dac = dac
        if dac is not None:
            self.n_bins = int(dac.ticks_per_cycle)
            key, edge = dac.ticks_and_edges(u)
            delta = dac.settle_width * self.n_bins * f / fs
            self.amb_lo = np.flatnonzero(edge < delta)
            self.amb_hi = np.flatnonzero(edge > 1 - delta)
        else:
            self.n_bins = max(4, int(round(fs / f)))
            key = np.floor(u[[0, -1]] * self.n_bins).astype(np.int64)  # the first and last rows only
        self.row0 = int(key[0] // self.n_bins)
        self.key = key - self.row0 * self.n_bins
        self.n_rows = int(self.key[-1] // self.n_bins) + 1
        n_grid = self.n_rows * self.n_bins
        self.n_grid = n_grid
        slope = (u[-1] - u[0]) / max(n - 1, 1)
        self._u = u
        self._slope = slope
        if dac is None:
            # the phase is linear in samples: where each bin centre is read from and where each
            # sample reads the grid back (between bin centres, and between the rows whose centres
            # bracket it) follow from it, computed in pieces or inline when needed: ten arrays of
            # the range's length less, most of a one-channel fit's memory (session 18)
            self.key = None
        else:
            # reading back: each sample its tick's bin, between the rows whose centres bracket it
            # (rows fitted one by one differ a little, and switching at cycle edges would leave
            # steps in the spike band)
            self._b0 = self._b1 = np.mod(self.key, self.n_bins)
            self._alpha = np.zeros(n)
            self._r0, self._r1, self._beta = group_position(u - self.row0, 1, self.n_rows)
        # sample index of each row's centre, for envelopes and gains per cycle
        self.row_centres = np.clip(np.round((np.arange(self.n_rows) + 0.5 - (u[0] - self.row0)) / slope), 0,
                                   n - 1).astype(np.int64)

    def _sampler(self, lo: int, hi: int):
        """Bin centres ``lo..hi`` of the grid (no DAC): the sample before each, its weight, and whether
        it lies within the range."""
        n = self.n
        pos = ((np.arange(lo, hi) + 0.5) / self.n_bins - (self._u[0] - self.row0)) / self._slope
        inside = ((pos >= 0) & (pos <= n - 1)).astype(np.float64)
        gi = np.clip(np.floor(pos).astype(np.int64), 0, max(n - 2, 0))
        return gi, np.clip(pos - gi, 0.0, 1.0), inside

    def occupied(self) -> np.ndarray:
        """Bins (n_rows, n_bins) that hold samples of the range, whatever their weights.

        The bins :meth:`gather` gives a weight to when every sample is usable:
        the first and last cycles of a range are partial.
        """
        if self.dac is None:
            out = np.empty(self.n_grid, dtype=bool)
            for lo, hi in piece_bounds(self.n_grid):
                out[lo:hi] = self._sampler(lo, hi)[2] > 0
            return out.reshape(self.n_rows, self.n_bins)
        use = np.ones(self.n)
        use[self.amb_lo] = 0.0
        use[self.amb_hi] = 0.0
        return (np.bincount(self.key, use, self.n_rows * self.n_bins) > 0.5).reshape(self.n_rows, self.n_bins)

    def at_samples(self, per_row: np.ndarray) -> np.ndarray:
        """Values given per row (..., n_rows) at every sample, between the rows' centres as :meth:`scatter` reads."""
        if self.dac is not None:
            return per_row[..., self._r0] * (1.0 - self._beta) + per_row[..., self._r1] * self._beta
        out = np.empty(per_row.shape[:-1] + (self.n,))
        for lo, hi in piece_bounds(self.n):
            r0, r1, beta = group_position(self._u[lo:hi] - self.row0, 1, self.n_rows)
            out[..., lo:hi] = per_row[..., r0] * (1.0 - beta) + per_row[..., r1] * beta
        return out

    def gather(self, x: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Grid values and weights (0 where no usable sample), both (n_channels, n_rows, n_bins)."""
        n_ch = x.shape[0]
        shape = (n_ch, self.n_rows, self.n_bins)
        if self.dac is None:
            v = np.empty((n_ch, self.n_grid))
            wt = np.empty((n_ch, self.n_grid))
            for lo, hi in piece_bounds(self.n_grid):
                gi, ga, inside = self._sampler(lo, hi)
                v[:, lo:hi] = x[:, gi] * (1 - ga) + x[:, gi + 1] * ga
                wt[:, lo:hi] = (w[:, gi] * w[:, gi + 1] * inside) > 0
            return v.reshape(shape), wt.reshape(shape)
        use = w.copy()
        use[:, self.amb_lo] = 0.0
        use[:, self.amb_hi] = 0.0
        m = self.n_rows * self.n_bins
        v = np.zeros((n_ch, m))
        wt = np.zeros((n_ch, m))
        for ch in range(n_ch):
            cnt = np.bincount(self.key, use[ch], m)
            v[ch] = np.bincount(self.key, use[ch] * x[ch], m) / np.maximum(cnt, 1e-300)
            wt[ch] = cnt > 0.5
        return v.reshape(shape), wt.reshape(shape)

    def scatter(self, grid: np.ndarray, x: np.ndarray | None = None, gain: np.ndarray | None = None) -> np.ndarray:
        """Values of ``grid`` (n_channels, n_rows, n_bins) at every sample, (n_channels, n).

        With a DAC and ``x`` given, samples next to a tick edge take whichever
        tick explains them best in ``x`` (channel by channel), the grid's
        values times ``gain`` (n_channels, n) when the grid is at unit level.
        """
        flat = np.ascontiguousarray(grid.reshape(grid.shape[0], -1))
        if self.dac is None:
            # rows are groups of one cycle: the template's read-back at each sample's phase, positions inline
            return phase_eval(flat, self.n_bins, self._u, self.row0, 1, self.n_rows)
        if x is None or (self.amb_lo.size == 0 and self.amb_hi.size == 0):
            return grouped_eval(flat, self.n_bins, self._r0, self._r1, self._beta, self._b0, self._b1, self._alpha)
        out = np.empty((flat.shape[0], self.n))
        ones = np.ones(self.n)
        for ch in range(flat.shape[0]):
            one = flat[ch:ch + 1]

            def at(k, idx, one=one):
                # candidate tick k read as sample idx would read it: blended between its rows
                b = np.mod(k, self.n_bins)
                return grouped_eval(one, self.n_bins, self._r0[idx], self._r1[idx], self._beta[idx],
                                    b, b, np.zeros(idx.size))[0]

            key = settle_edges(x[ch], ones if gain is None else gain[ch], at, self.key, self.key, self.amb_lo,
                               self.amb_hi)
            b = np.mod(key, self.n_bins)
            out[ch] = grouped_eval(one, self.n_bins, self._r0, self._r1, self._beta, b, b, self._alpha)[0]
        return out


class RowModelEstimator(CycleEstimator):
    """Base of the estimators that model the rows (cycles) of a :class:`CycleGrid`.

    A work range is put on the grid, ``_fit_rows`` models each channel's
    rows, and the model is read back at the samples. With ``robust``, the
    spike-band outliers of the first model's residual are left out and the
    rows fitted again (their bins filled by :func:`fill_rows`). A phase
    clipped in some cycle is interpolated along the cycle in every row
    within :data:`_FILL_ROWS` rows and reported as lost, like the clipped
    samples (the cycles that escaped the rail there are a biased sample).

    Subclasses implement ``_fit_rows(v, w, env, taps_fast, taps_slow, rate)``
    for one channel: ``v, w`` of shape (n_rows, n_bins), ``env`` the block
    envelope per row, the two row filters and the row rate; it returns the
    modelled rows and a dict of what it chose.
    """

    _samples_per_cycle = ROW_SAMPLES_PER_CYCLE

    #: channels whose plateau stretch is read at once for :meth:`_decide` (memory)
    _DECIDE_CHANNELS = 8

    def _decide_stretch(self, blk, fs, bounds):
        """Samples ``a, b`` :meth:`_decide` reads, or None when they hold too few cycles to choose from.

        The block's whole work range ``bounds`` (margins and ramps included,
        as a range of it sees them) when the block is at most
        :meth:`_decide_span` seconds long, else that much of the middle of
        its plateau (whose ramps are then not seen).
        """
        f = blk.freq_hz
        span = self._decide_span(f)
        a, b = bounds if blk.stop - blk.start <= span * fs else plan_stretch(blk, fs, span)
        return None if (b - a) * f / fs < 8 else (a, b)

    def _decide_groups(self, blk, fs, n_ch, bounds) -> list:
        if self._decide_stretch(blk, fs, bounds) is None:
            return []  # each range chooses for itself
        # channels read at once: _DECIDE_CHANNELS at _PLAN_S seconds, fewer for longer stretches
        per_read = max(1, int(self._DECIDE_CHANNELS * _PLAN_S / self._decide_span(blk.freq_hz)))
        return [list(range(c0, min(n_ch, c0 + per_read))) for c0 in range(0, n_ch, per_read)]

    def _decide(self, read, blk, fs, grid, response, bounds, rows) -> list:
        """Choices every range of the block shares, for the channels ``rows``.

        The lead harmonic and its level (:meth:`_demodulate`) and what
        ``_fit_rows`` chooses (regression: which harmonics are kept and
        tracked fast, the sequences' plateau levels; PCA: the mean cycle and
        the shapes) are made once per block on :meth:`_decide_stretch`, so
        that a block cleaned in pieces makes the choices of the whole block.
        """
        f = blk.freq_hz
        a, b = self._decide_stretch(blk, fs, bounds)
        cycles = blk.cycles_at(np.arange(a, b, dtype=np.float64), fs)
        x = np.asarray(read(a, b, rows), dtype=np.float64)
        sub = None if response is None else response.rows(rows)
        # the same passes as a range (outliers left out before the choices that count)
        *_, chosen = self._passes(x, (~find_clipped(x)).astype(np.float64), cycles, fs, blk, a, grid, sub, None,
                                  artifact=False)
        return [info["decided"] for info in chosen]

    def _decide_span(self, freq_hz: float) -> float:
        """Seconds of the plateau's middle :meth:`_decide` reads."""
        return _PLAN_S

    @staticmethod
    def _censor(grid, w, wb):
        """Bins interpolated along the cycle (phases lost in some row within the filling window), or None.

        A phase lost (clipped) in some row is interpolated along the cycle in every row within
        the filling window, and reported as lost too (see fill_rows); bins outside the range
        (first and last partial cycles) are not lost.
        """
        if not np.any(wb == 0):
            return None
        lost_bins = (w == 0) & grid.occupied()[None]
        return ndimage.maximum_filter1d(lost_bins, 2 * _FILL_ROWS + 1, axis=1, mode="nearest")

    def _passes(self, xb, wb, u, fs, blk, offset, dac, response, decided, artifact=True):
        """Model the rows of one range (with ``robust``, twice: outliers left out the second time).

        Returns the artifact (None without ``artifact``: only the choices
        are wanted), the grid, the censored bins (or None), the outliers
        left out and per channel a dict of what was chosen, whose
        ``"decided"`` entry holds the choices :meth:`_decide` keeps.
        """
        f = blk.freq_hz
        grid = CycleGrid(u, fs, f, dac)
        trap = trapezoid(xb.shape[1], blk, offset)
        env = trap[grid.row_centres]
        # the block's ramps (or steps) sample by sample: rows are rescaled by them within a row and
        # read back times them, as the template's gain is (a row-to-row line rounds a ramp's corners
        # and turns a step into a one-cycle ramp: the whole artifact left beside a step)
        relative = blk.kind == "active"
        trap_bins = grid.gather(trap[None, :], np.ones((1, trap.size)))[0][0] if relative else None
        # rows are cycles: sequences along rows are sampled at f
        slow = lowpass_taps(KEEP_HZ, f)
        ramp_hz = ramp_cutoff(blk, fs, self.tracking_hz)
        v, w = grid.gather(xb, wb)
        censor = self._censor(grid, w, wb)
        n_out = 0
        passes = 2 if self.robust else 1
        model = None if response is None else response.pulse
        for it in range(passes):
            rows = np.empty_like(v)
            rel = np.empty((xb.shape[0], grid.n_rows)) if relative else None
            chosen = []
            harm = None
            if model is not None:
                # the heartbeat's phase from the block's track, at the rows' centres (pulse.PulseModel)
                times = offset - blk.ref_sample + grid.row_centres
                harm = model.relative(None, f, env, n_rows=xb.shape[0], times=times)
                if relative and model.track is not None:
                    # harmonics beyond what rows of a cycle carry fold onto those they do (6 onto 4 Hz at 10
                    # Hz): what the rows hold of them comes off with the rest, and they come back at every sample
                    harm = (harm[0] + model.held_beyond(times, f, n_rows=xb.shape[0]), harm[1])
            for ch in range(xb.shape[0]):
                fast = slow if response is None else response.taps(min(ch, response.response.shape[0] - 1), f)
                cen = None if censor is None else censor[ch]
                dec = None if decided is None else decided[ch]
                g_row, vd, wd, made = self._demodulate(v[ch], w[ch], env, fast, f, cen, ramp_hz, dec,
                                                       trap_bins=trap_bins,
                                                       pulse=None if harm is None else (harm[0][ch], harm[1][ch]))
                rows[ch], info = self._fit_rows(vd, wd, g_row, fast, slow, f, censor=cen, decided=dec)
                if relative:
                    # each row at unit level, its gain relative to the ramps kept for reading back
                    rel[ch] = np.where(env < _FOOT, 1.0, g_row / env)
                    rows[ch] = _unit_rows(rows[ch], rel[ch] * env, env >= _FOOT)
                info["decided"] = {**made, **info.get("decided", {})}
                chosen.append(info)
            if it == passes - 1 and not artifact:
                return None, grid, censor, n_out, chosen
            if relative:
                if harm is not None and model.track is not None:
                    # the heartbeat's harmonics at every sample from the track (all of them: np.inf), not between
                    # the rows' centres: a line between them puts their images at f less each (20 - 6 Hz), whose
                    # sidebands are 6 and 34 Hz (1.3-1.6x the neural power there at 20 Hz); the rows keep the rest
                    inside = env >= _FOOT
                    rel = np.where(inside, rel - harm[1] / np.where(inside, env, 1.0), rel)
                    gain = grid.at_samples(rel)
                    model.add_at_samples(gain, np.inf, (offset - blk.ref_sample, fs / (8.0 * f)), trap)
                    gain *= trap
                else:
                    gain = grid.at_samples(rel) * trap
                art = grid.scatter(rows, xb, gain) * gain
            else:
                art = grid.scatter(rows, xb)
            if it < passes - 1:
                w_out, n_out = spike_outliers(xb, art, wb, fs, u, _OUTLIER_ROWS, self.outlier_z)
                v, w = grid.gather(xb, w_out)
        return art, grid, censor, n_out, chosen

    def _block(self, xb, wb, u, fs, blk, offset):
        plan = self._block_plan(xb, blk, fs, offset)
        ref, dac, unlocked, response, decided = plan[:5]
        xb = level_off(xb, plan, blk, offset)
        art, grid, censor, n_out, chosen = self._passes(xb, wb, u, fs, blk, offset, dac, response, decided)
        for info in chosen:
            del info["decided"]  # arrays: the report says what was chosen in words and counts
        report = dict(freq_hz=blk.freq_hz, bins_per_cycle=grid.n_bins,
                      dac_ticks_per_cycle=None if dac is None else dac.ticks_per_cycle,
                      modulation_lines_hz=[] if response is None else response.passed_lines(ref),
                      outliers_left_out=int(n_out), unlocked_dac_steps_per_s=float(unlocked),
                      channels=chosen)
        lost = None
        if censor is not None:
            lost = grid.scatter(censor.astype(np.float64)) > 0
            report["censored_samples"] = int(lost.sum())
        return art, report, lost

    @staticmethod
    def _lead(v, w, env, censor=None, decided=None, trap_bins=None):
        """The strongest harmonic's complex amplitude per row (the block's choice if ``decided``), and which."""
        vm, wm = v, w
        if trap_bins is not None:
            # each row measured on its bins within the ramps, brought to its centre's ramp level (a
            # row holding a step measured as half a row, or a ramp's corner as its mean, misleads)
            inside = trap_bins >= _FOOT
            vm = np.where(inside, v * env[:, None] / np.where(inside, trap_bins, 1.0), 0.0)
            wm = w * inside
        filled = fill_rows(vm, wm, env, _FILL_ROWS, censor)
        filled = filled - filled.mean(axis=1, keepdims=True)
        plateau = env > 0.99
        coef = np.fft.rfft(filled, axis=1)[:, 1:]
        if decided is not None:
            h = decided["lead"]
        elif coef.shape[1]:
            h = int(np.argmax(np.sum(np.abs(coef[plateau] if plateau.sum() > 2 else coef) ** 2, axis=0)))
        else:
            h = None
        return (coef[:, h] if h is not None else np.ones(v.shape[0], dtype=complex)), h

    def _demodulate(self, v, w, env, taps, rate, censor, ramp_hz, decided=None, trap_bins=None, pulse=None):
        """The envelope of the rows as the data show it, and the rows rescaled to their centres.

        The strongest harmonic's amplitude (the fundamental, normally),
        followed by the gain filter, gives the envelope per row: ramps of any
        shape and the common modulation of impedance, which scales every
        harmonic alike. Within a row the envelope still changes (on a ramp,
        or with the heartbeat); each bin is rescaled to its row centre's
        envelope, so that a row is one periodic shape (a change within the
        row would look like a step at its edge, which has every harmonic).
        Reading back interpolates between row centres, which restores the
        change. Bins where the envelope is below 2 % (margins, ramp feet)
        are left out.

        Which harmonic leads, the plateau level of its sequences and of its
        amplitude come from ``decided`` (the block's, made by :meth:`_decide`)
        when given, else from these rows; the fourth value returned holds them.

        With ``trap_bins`` (the block's ramps at every bin, shape of ``v``)
        the envelope within a row is the row's gain relative to the ramps,
        interpolated between row centres, times the ramps at each bin: a
        ramp's corner or a step stays where it is instead of being spread
        over a row.

        ``pulse`` holds the heartbeat's harmonics relative to the plateau
        level, fitted and carried (:meth:`artifactclean.pulse.PulseModel.relative`):
        they are taken out of the lead's sequences before the filter and put
        back whole.
        """
        n_rows, n_bins = v.shape
        lead, h = self._lead(v, w, env, censor, decided, trap_bins)
        plateau = env > 0.99
        seq = np.stack([lead.real, lead.imag])
        if decided is not None:
            scale, level = decided["lead_scale"], decided["level"]
        else:
            scale = plateau_level(seq, env)
        # the heartbeat's harmonics (pulse.PulseModel), relative to the plateau level: both parts of the
        # lead scale with the artifact's amplitude
        harm = None if pulse is None else tuple(np.asarray(scale, dtype=np.float64).reshape(-1, 1) * p[None]
                                                for p in pulse)
        pair = filter_sequences(seq, taps, rate, env, ramp_hz, scale=scale, pulse=harm)
        mag = np.hypot(pair[0], pair[1])
        if decided is None:
            level = float(np.median(mag[plateau])) if plateau.any() else max(float(mag.max()), 1e-300)
        g_row = np.where(env < _FOOT, env, mag / max(level, 1e-300))
        centres = np.arange(n_rows) + 0.5
        at_bins = np.arange(n_rows)[:, None] + (np.arange(n_bins)[None, :] + 0.5) / n_bins
        if trap_bins is None:
            g_bin = np.interp(at_bins.ravel(), centres, g_row).reshape(n_rows, n_bins)
        else:
            rel = np.where(env < _FOOT, 1.0, g_row / np.maximum(env, 1e-300))
            g_bin = np.interp(at_bins.ravel(), centres, rel).reshape(n_rows, n_bins) * trap_bins
        # a bin below half its row centre's level is filled from its neighbours, not scaled up: scaled
        # by up to 1 / _FOOT, its noise and LFP swayed the row's fit, which is read back at full level
        # at the ramp's other end (a 0.3 s raised-cosine ramp at 5 Hz: 27% of the artifact's peak left)
        ok = g_bin >= np.maximum(_FOOT, 0.5 * g_row[:, None])
        vd = np.where(ok, v * g_row[:, None] / np.where(ok, g_bin, 1.0), 0.0)
        return g_row, vd, w * ok, dict(lead=h, lead_scale=scale, level=level)

    def context_seconds(self, freq_hz: float) -> float:
        """Context (s) an output sample needs on each side.

        Per pass: the row filters' reach, the lost phases' censoring and the
        filling (:data:`_FILL_ROWS` rows each) and the row interpolation;
        between passes, the outlier threshold's stretch (:data:`_OUTLIER_ROWS` rows).
        The slow level (:attr:`BlockPlan.track`) is read over the whole block
        in the plan and needs no context here.
        """
        passes = 2 if self.robust else 1
        per_pass = HALF_S + (2 * _FILL_ROWS + 2) / freq_hz
        return passes * per_pass + (passes - 1) * _OUTLIER_ROWS / freq_hz + self.margin_cycles / freq_hz

    #: the gain filter is always designed for these estimators (their rows follow the modulation)
    track_amplitude = True


def _unit_rows(rows: np.ndarray, level: np.ndarray, usable: np.ndarray) -> np.ndarray:
    """Rows divided by their ``level``; a row not ``usable`` (centre at a ramp's foot or before a
    step) takes the nearest usable row's shape.

    Such a row was modelled at a level near nothing, where what the row
    filters spread into it from the plateau is as large as the row itself
    (divided by its level, 4x the artifact beside a 5 Hz step); its samples
    inside the block still read it.
    """
    ok = np.flatnonzero(usable)
    if ok.size == 0:
        return np.zeros_like(rows)
    out = rows / np.maximum(level, 1e-300)[:, None]
    bad = np.flatnonzero(~usable)
    if bad.size:
        right = np.clip(np.searchsorted(ok, bad), 0, ok.size - 1)
        left = np.clip(right - 1, 0, ok.size - 1)
        near = np.where(np.abs(ok[left] - bad) <= np.abs(ok[right] - bad), ok[left], ok[right])
        out[bad] = out[near]
    return out


def fill_rows(v: np.ndarray, w: np.ndarray, env: np.ndarray, half_rows: int = _FILL_ROWS,
              censor: np.ndarray | None = None) -> np.ndarray:
    """Rows with unusable bins (lost, or left out as spikes) filled from nearby data.

    A filled bin takes the weighted mean of its bin over ``half_rows`` rows
    on either side, scaled by the envelope, so neither spikes nor clipped
    peaks enter the fit through the filling. A bin with no usable neighbour
    (a phase clipped in every cycle around it) is interpolated along the
    cycle from the row's usable bins: an estimate from the data around the
    gap, never from other parts of the block, so a piece of a block is
    filled as the whole block is. The filled values only keep the fit of the
    usable bins sensible (a zero there would drag every harmonic); the lost
    samples themselves stay lost.

    ``censor`` (bool, like ``v``) marks bins interpolated along the cycle in
    every row, usable or not: phases clipped somewhere nearby, where the rows
    that escaped the rail are a biased sample and rows filled differently
    from one another would make the fitted amplitudes jump.
    """
    if censor is not None and censor.any():
        w = w * ~censor
    else:
        censor = None
    if np.all(w > 0):
        return v
    e = np.maximum(env, 1e-3)[:, None]
    size = 2 * half_rows + 1
    num = ndimage.uniform_filter1d(w * v * e, size, axis=0, mode="constant")
    den = ndimage.uniform_filter1d(w * e * e, size, axis=0, mode="constant")
    # usable weight judged against what the window would hold with every bin usable (local)
    full = ndimage.uniform_filter1d(np.broadcast_to(e * e, w.shape), size, axis=0, mode="constant")
    near = den > 1e-3 * full
    if censor is not None:
        near &= ~censor
    out = np.where(w > 0, v, np.where(near, num / np.where(near, den, 1.0), 0.0) * e)
    known = (w > 0) | near
    n_bins = v.shape[1]
    idx = np.arange(n_bins)
    for r in np.flatnonzero(~known.all(axis=1)):
        ok = known[r]
        if ok.any():
            out[r, ~ok] = np.interp(idx[~ok], idx[ok], out[r, ok], period=n_bins)
    return out


def noise_of_sequences(seq: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
    """Noise variance of each column of ``seq`` (n_rows, k) from consecutive differences.

    Differences cancel what changes slowly from row to row (the artifact);
    for Gaussian noise ``|d|^2`` has median ``2 sigma^2 ln 2`` (complex) or
    ``2 sigma^2 x 0.4549`` (real, the median of chi-square with one degree
    of freedom): medians, so spikes do not count.
    """
    d = np.diff(seq if rows is None else seq[rows], axis=0)
    med = np.median(np.abs(d) ** 2, axis=0)
    return med / (2 * np.log(2)) if np.iscomplexobj(seq) else med / (2 * 0.45494)
