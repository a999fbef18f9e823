"""Template subtraction over neighbouring stimulation cycles.

The artifact of each cycle is estimated as the average of the ``2K+1``
cycles around it, aligned on the stimulation phase rather than on whole
samples (a cycle is not a whole number of samples, and it drifts), then
subtracted (Helfrich et al. 2014, Curr Biol 24:333 describe the sliding
average of neighbouring cycles). This implementation adds what real
artifacts need:

* **sub-sample alignment**: the cycle is divided into phase bins; each sample
  falls in a bin by its exact phase, and the template is read back by linear
  interpolation between bin centres;
* **DAC staircases**: when the stimulator's DAC updates an integer number of
  times per cycle, the bins are the DAC ticks themselves and the template
  reproduces every step exactly (see :mod:`artifactclean.staircase`);
* **amplitude tracking**: a gain per cycle (or part of a cycle), low-passed at
  ``tracking_hz``, follows ramps and the heartbeat and respiration changes of
  electrode impedance; the template is the least-squares shape given the gain;
* **robust averaging**: after a first pass, spike-band outliers (spikes) are
  left out of the template and gain fits, so spikes are not smeared into
  neighbouring cycles;
* **no stimulation, no change**: only samples inside stimulation blocks (plus
  ``margin_cycles``) are touched;
* **clipping**: samples at the rails, and every phase clipped in some cycle of
  the window (the cycles that escaped the rail there are a biased sample), are
  left out of all fits and reported as lost;
* **pieces**: every decision is either local (per template, per stretch of
  cycles, groups aligned to absolute cycle numbers) or made once per block
  (:meth:`TemplateSubtraction.prepare`), so a long block cleaned in pieces with
  :meth:`context_seconds` of overlap gives the whole-array result.

What it removes and what it cannot
----------------------------------
It removes everything that repeats with the stimulation phase over the
window, scaled by a gain that varies no faster than ``tracking_hz``: the
fundamental, all harmonics and the staircase. Any neural signal locked to
the stimulation phase over the window, and neural signal within
``tracking_hz`` of each harmonic that projects on the artifact's shape, is
removed with it: no single-channel method can tell the two apart. The
average of ``2K+1`` cycles carries noise of about ``sigma / sqrt(2K+1)`` per
bin (less with DAC ticks, which pool many samples), which this estimator
subtracts along with the artifact; the default window keeps that below a
tenth of the noise.
"""

from __future__ import annotations



import numpy as np
from scipy import ndimage, signal, special
from sklearn.base import clone

from .._numeric import floor_runs
from ..clipping import find_clipped, find_rails
from ..modulation import HALF_S as GAIN_HALF_S
from ..modulation import _FOOT, cycle_slope, phase_highpass, phase_shift, ramp_cutoff, segments_per_cycle, shift_centres, \
    smooth_gain, to_middles
from ._kernels import (PhaseGrid, SegmentPositions, group_position, grouped_eval, phase_eval, segment_stats,
                       tick_eval, tick_sums)
from ..pulse import HEART_HZ
from ..staircase import DacClock
from ..step_response import EdgeResponse, fit_edge_response
from .cycles import CycleEstimator, _subset_plan, block_key, envelope_at, level_off, plan_stretch, settle_edges, \
    spike_outliers, stretch_bounds, trapezoid

__all__ = ["TemplateSubtraction"]


def _group_window(grp: np.ndarray, k_groups: int) -> np.ndarray:
    """Sums over groups ``i-k .. i+k`` (clamped) of (n_ch, n_groups, n_bins) group sums."""
    n_ch, n_groups, n_bins = grp.shape
    c = np.empty((n_ch, n_groups + 1, n_bins))
    c[:, 0] = 0.0
    if n_ch * n_bins >= 256:
        # the running sum a group at a time: whole rows added in order, the additions of numpy.cumsum along
        # the groups (the same bits), three times as fast as its strided walk on a cycle's bins
        for i in range(n_groups):
            np.add(c[:, i], grp[:, i], out=c[:, i + 1])
    else:
        np.cumsum(grp, axis=1, out=c[:, 1:])
    # c[min(i + k + 1, n)] - c[max(i - k, 0)] from slices (an index array per group gathered two copies)
    k = max(int(k_groups), 0)
    out = np.empty((n_ch, n_groups, n_bins))
    m = max(0, n_groups - k - 1)  # groups whose window ends inside
    out[:, :m] = c[:, k + 1:k + 1 + m]
    out[:, m:] = c[:, n_groups:n_groups + 1]
    s = min(k, n_groups)  # groups whose window starts at the first
    out[:, :s] -= c[:, :1]
    out[:, s:] -= c[:, :n_groups - s]
    return out


def _phase_derivative(t: np.ndarray, n_bins: int) -> np.ndarray:
    """d/du of each template (rows of ``n_bins`` bins): central differences, periodic."""
    r = t.reshape(t.shape[0], -1, n_bins)
    return (0.5 * n_bins * (np.roll(r, -1, axis=-1) - np.roll(r, 1, axis=-1))).reshape(t.shape)


def _median_of_positive(g: np.ndarray) -> np.ndarray:
    """Median over the last axis of the positive entries of ``g >= 0`` (0 where there are none).

    The same numbers as ``numpy.nanmedian`` with the zeros set to NaN, which
    goes row by row; templates without empty bins (the usual case) take one
    vectorised ``numpy.median``.
    """
    positive = g > 0
    if positive.all():
        return np.median(g, axis=-1, keepdims=True)
    typical = np.zeros(g.shape[:-1] + (1,))
    some = positive.any(axis=-1)  # rows with none stay 0 (and raise no all-NaN warning)
    typical[some] = np.nanmedian(np.where(positive[some], g[some], np.nan), axis=-1, keepdims=True)
    return typical


def _shape(s, g, n_bins, k_groups, denoise, stride, per=1, s_off=None, occupied=None, complete=None, failed=None):
    """Least-squares templates every ``stride`` cycles: windowed sum(w g x) / sum(w g^2).

    The window (``2 k_groups + 1`` groups of ``stride`` cycles) is centred on
    each group; samples read the template interpolated linearly
    between neighbouring group centres, so it changes smoothly from cycle to
    cycle (a template switched at cycle boundaries leaves small steps, which
    reach into the spike band).

    With ``denoise``, each template keeps only the harmonics of the cycle
    that stand out of its noise (amplitude above ``_KEEP`` times the median
    amplitude of the harmonics beside it, :data:`_FLOOR_RUN`): averaging
    2K+1 cycles leaves noise in every harmonic, and a smooth artifact has few.

    With ``complete`` (a number of harmonics), bins without data (phases
    clipped in the window) are completed from the template's other bins by
    :func:`_complete_holes`; ``failed`` (same shape as the group sums), if
    given, is set where that could not be trusted.

    Returns
    -------
    ndarray, shape (n_channels, n_groups * n_bins)
    """
    n_ch = s.shape[0]
    s = _group_window(s, k_groups)
    g = _group_window(g, k_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = np.where(g > 0, s / np.where(g > 0, g, 1.0), 0.0)
    if s_off is not None:
        # the samples of a bin sit off its centre by s_off / g bins on average (a free-running DAC's
        # ticks hold a few phases per bin): move each bin's mean to its centre along the template's
        # slope, or reading at the exact phase would be off by up to half a bin times the slope
        with np.errstate(invalid="ignore", divide="ignore"):
            off = np.where(g > 0, _group_window(s_off, k_groups) / np.where(g > 0, g, 1.0), 0.0)
        t = t - off * 0.5 * (np.roll(t, -1, axis=-1) - np.roll(t, 1, axis=-1))
    # a bin whose window holds almost no artifact energy (only cycles of near-zero gain, e.g.
    # margins, because the rest were clipped there) gives a ratio of noise to nothing: a hole
    # judged per template (locally), so a piece of a block decides as the whole block
    # typical over the bins that hold data: with more than half the bins clipped somewhere in the
    # window (heavily clipped channels), a median over all bins is 0 and no bin would be a hole
    typical = _median_of_positive(g)
    holes = g <= 0.05 * typical
    # holes left after completion (all of them without it)
    holes_left = _complete_holes(t, g, holes, complete, per) if complete is not None and holes.any() else holes
    if failed is not None:
        failed[...] = holes_left
    if holes_left.any():
        # bins with no data (phases clipped in every cycle of the window): interpolate
        # along the cycle so that samples next to a lost stretch read a sensible template
        idx = np.arange(n_bins)
        for ch, row in zip(*np.nonzero(holes_left.any(axis=-1))):
            ok = ~holes[ch, row]
            if ok.any():
                t[ch, row] = np.interp(idx, idx[ok], t[ch, row, ok], period=n_bins)
    # an alternating-current artifact has no mean over its cycle; a template mean would be
    # the slow LFP of the window, so it is removed (a stimulation DC offset stays in the data).
    # Templates with empty bins keep theirs: the mean of a gap-filled cycle is not the artifact's.
    if complete is not None:
        # completed rows are smooth across their gaps: whole (a row filled linearly is not); this
        # includes the phases a free-running DAC's ticks did not hold, completed the same way
        whole_rows = ~holes_left.any(axis=-1, keepdims=True)
    elif occupied is None:
        whole_rows = ~holes.any(axis=-1, keepdims=True)
        if per > 1:
            # rows of a DAC period hold one bin per tick, each from few samples: a few ticks emptied by
            # spike outliers (a locked unit flags the same ticks period after period) are filled along
            # the row, which is then whole; kept raw it took the LFP periodic by chance with it (LFP
            # error 0.11-0.15 on that channel)
            whole_rows |= holes.sum(axis=-1, keepdims=True) <= max(1, n_bins // 50)
    else:
        # held phases: a bin without usable weight may be one no tick of the window held, or one held
        # only on a ramp's foot; both are gaps in the sampling, filled along the cycle. A row is
        # partial only where most of a bin's samples were there and unusable (clipping)
        every, usable = (_group_window(o, k_groups) for o in occupied)
        lost_bins = holes & (usable < 0.5 * every)
        whole_rows = ~lost_bins.any(axis=-1, keepdims=True)
    # one amplitude for every template of the block (the gain carries the amplitude): each
    # template is scaled to the block-average shape over its own usable bins, so gains fitted
    # against different templates agree and the template/gain alternation settles fast
    valid = ~holes
    # the reference shape is the mean of the neighbouring templates (two groups each side):
    # local, so that a piece of a block scales its templates as the whole block does
    tv = np.where(valid, t, 0.0)
    ref = _group_window(tv, 2) / np.maximum(_group_window(valid.astype(np.float64), 2), 1)
    num = np.einsum("cgb,cgb->cg", tv, ref)
    den = np.einsum("cgb,cgb->cg", valid.astype(np.float64), ref * ref)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where((den > 0) & (num > 0), num / np.where(den > 0, den, 1.0), 1.0)
    t /= scale[..., None]
    t -= np.where(whole_rows, t.mean(axis=-1, keepdims=True), 0.0)
    if per > 1:
        # rows of `per` cycles, one bin per DAC tick: the held values are the waveform sampled at
        # the ticks, whose harmonics over the period are the stimulation's, multiples of `per`;
        # the rest is neural signal periodic by chance over the window (LFP at every 1 / period)
        c = np.fft.rfft(t, axis=-1)
        c[..., np.arange(c.shape[-1]) % per != 0] = 0.0
        t = np.where(whole_rows, np.fft.irfft(c, n=n_bins, axis=-1), t)
    if denoise and n_bins >= 16:
        c = np.fft.rfft(t, axis=-1)
        # each template decides from its own window (so a piece of a block decides as the
        # whole block would): harmonics above _KEEP times the amplitude of the noise beside them stay
        amp = np.abs(c)
        if n_bins >= _FEW_BINS:
            # the noise is the neural spectrum averaged over the window, coloured (the LFP's low harmonics, the
            # spikes' at 0.3-3 kHz): against the median of all harmonics, mostly the white noise above the
            # spikes' band, the template's share of unflagged spikes stood out there and was subtracted
            floor = np.maximum(np.median(amp[..., 1:], axis=-1, keepdims=True), _floor_beside(amp, _FLOOR_RUN))
        else:
            # few harmonics (a DAC of few ticks per cycle), many of them real: the weaker half is the noise
            weak = np.sort(amp[..., 1:], axis=-1)[..., : amp.shape[-1] // 2]
            floor = np.median(weak, axis=-1, keepdims=True)
        c *= amp > _KEEP * floor
        smooth = np.fft.irfft(c, n=n_bins, axis=-1)
        # templates with empty bins (phases lost in every cycle of the window) keep their raw
        # values: a truncated harmonic series would ring from the filled gap over the whole cycle
        t = np.where(whole_rows, smooth, t)
    return t.reshape(n_ch, -1)


#: a harmonic is kept when its amplitude in a template exceeds this many
#: times the noise beside it (:data:`_FLOOR_RUN`); common practice for a
#: detection threshold on Rayleigh-distributed amplitudes
_KEEP = 5.0
#: the noise beside a harmonic is the median amplitude of the run of this many harmonics it falls in, at least the
#: median of all (session 37; the median of all until then. Four units of 60-160 uV at 15 spikes/s on each
#: channel, 'broad' spikes, left 0.16-0.18 x noise in the spike band, 0.007 now; the acceptance rows without a
#: DAC 0.009-0.017 -> 0.003-0.004, the clipped ones of benchmarks/clipping.py 0.020-0.073 -> 0.004-0.042, a
#: 10 kHz DAC at 5 Hz 0.016 -> 0.006; the rest within 0.003 (DACs of few ticks a cycle are judged apart). This
#: project's choice: wide enough that an artifact's few harmonics side by side do not raise their own floor. A
#: running median over the same width gave the same figures and cost 0.26 -> 0.22x the notch comb, runs 0.25)
_FLOOR_RUN = 33


def _floor_beside(amp: np.ndarray, run: int) -> np.ndarray:
    """The median of ``amp`` over consecutive runs of ``run`` entries along the last axis, held over each run
    (the last run, if short, completed with its last value)."""
    n = amp.shape[-1]
    n_runs = -(-n // run)
    padded = np.concatenate((amp, np.repeat(amp[..., -1:], n_runs * run - n, axis=-1)), axis=-1)
    med = np.median(padded.reshape(amp.shape[:-1] + (n_runs, run)), axis=-1)
    return np.repeat(med, run, axis=-1)[..., :n]


#: seconds of a block's plateau its DAC steps' response is learned from (:meth:`TemplateSubtraction._edge_plan`;
#: this project's choice: a 1 kHz DAC gives 6000 steps; 10 s gave the same spike band at 5-40 Hz)
_EDGE_S = 6.0
#: rounds of fitting with the response so far and learning from the residual (the grid's drift moves the
#: samples' places, so the response is learned again after it)
_EDGE_ROUNDS = 2
#: samples after a grid edge (and one before) whose residual's first differences are compared with the rest's
#: before a response is learned (:meth:`TemplateSubtraction._edge_plan`): a filter's transition lies within them
_EDGE_NEAR = 3.0
#: how much more than elsewhere they must hold (this project's choice: settled sharp steps leave 1.01-1.03 times
#: the rest's there, 1-5 kHz DACs at 5-40 Hz; behind a 7.5 kHz low-pass 5-580 times)
_EDGE_EXCESS = 1.2
#: share of the residual's first differences' mean square the response must take off to be kept (this project's
#: choice: a residue of 0.1 x noise is 1% of the noise's power)
_EDGE_GAIN = 0.005

#: below this many bins per template (a DAC of few ticks per cycle: 25 at 40 Hz from 1 kHz) the
#: median harmonic is no noise estimate once half the harmonics are real (a waveform with harmonics
#: to the 7th lost its 4th-7th: 0.9-2.5 x noise in the spike band on unclipped channels); the
#: harmonic clean-up then judges against the weaker half of the harmonics
_FEW_BINS = 64

#: a phase clipped in more than this share of the window's cycles is left out of the fits and its
#: template completed from the rest of the cycle (:func:`_complete_holes`); below it the clipped
#: samples enter the fits as their expectation beyond the rail (:meth:`TemplateSubtraction._fill_rails`).
#: This project's choice from ``benchmarks/clipping.py`` and an independent generator (0.5 let the
#: fill's bias show; 0.1 failed on a channel clipped on half its samples)
_CENSOR_SHARE = 0.25
#: harmonics a completion uses when no unclipped channel shows the waveform's (the issue's
#: acceptance traces have harmonics to the 5th): this project's choice
_COMPLETE_ORDER = 5
#: a completed bin whose variance would exceed this many times a fitted bin's (a wide gap, or a
#: staircase of few ticks per cycle) is not trusted: its samples stay lost. This project's choice:
#: 100 also rejected completions that cleaned well, 1e12 accepted ones that did not
_COMPLETE_GAIN = 1000.0


def _complete_holes(t: np.ndarray, g: np.ndarray, holes: np.ndarray, order: int, per: int = 1) -> np.ndarray:
    """Complete each template's holes with a harmonic series fitted to its other bins; return where that failed.

    The artifact is a smooth periodic waveform (a sinusoid and a few
    harmonics; a DAC's held values sample it), so the phases lost to clipping
    are read from the series that the rest of the cycle fixes: weighted least
    squares (weights ``g``, the bins' summed squared gains, i.e. their
    inverse noise variances up to a factor) of a constant and ``order``
    harmonics of the stimulation (multiples of ``per`` on rows of ``per``
    cycles; fewer only where the bins per row cannot hold that many). A
    row is left as it was, its holes returned as failed, when its fitted
    bins are fewer than the series needs plus two (a shorter series would
    be biased), or when its completed values would be more than
    :data:`_COMPLETE_GAIN` times noisier (in variance) than a typical
    fitted bin, from the fit's covariance.

    ``t`` (n_ch, n_groups, n_bins) is changed in place.
    """
    n_bins = t.shape[-1]
    failed = np.zeros(holes.shape, dtype=bool)
    top = max(0, min(int(order), (n_bins // 2 - 1) // max(per, 1)))
    if top < 1:
        failed[...] = holes
        return failed
    ph = 2 * np.pi * (np.arange(n_bins) + 0.5) / n_bins
    basis = np.column_stack([np.ones(n_bins)] + [fn(k * per * ph) for k in range(1, top + 1) for fn in (np.cos, np.sin)])
    for ch, row in zip(*np.nonzero(holes.any(axis=-1))):
        ok = ~holes[ch, row]
        if int(ok.sum()) < 2 * top + 3:
            # fewer bins than the waveform's harmonics need: a shorter series would be biased
            failed[ch, row] = holes[ch, row]
            continue
        sw = np.sqrt(g[ch, row, ok])
        a = basis[ok] * sw[:, None]
        coef, *_ = np.linalg.lstsq(a, t[ch, row, ok] * sw, rcond=None)
        cov = np.linalg.pinv(a.T @ a)
        gap = basis[~ok]
        spread = float(np.max(np.einsum("ij,jk,ik->i", gap, cov, gap))) * float(np.median(g[ch, row, ok]))
        if spread > _COMPLETE_GAIN:
            failed[ch, row] = holes[ch, row]
            continue
        t[ch, row, ~ok] = gap @ coef
    return failed


def _rail_samples(xb: np.ndarray, wb: np.ndarray, censored: np.ndarray):
    """Lost samples at a channel's rails outside ``censored``: (mask, at the upper rail, rail values), or None.

    A sample is at a rail when it is lost and holds its channel's rail
    (:func:`artifactclean.clipping.find_rails`: the extreme that recurs in
    runs). The clipping finder also marks one sample beside each run, and
    non-finite samples are lost as zeros: those stay plain lost samples.
    """
    lost = wb == 0
    top, bottom = find_rails(xb)
    hi = lost & (xb == top[:, None])
    lo = lost & (xb == bottom[:, None])
    at = (hi | lo) & ~censored
    if not at.any():
        return None
    return at, hi[at], xb[at].copy()


class TemplateSubtraction(CycleEstimator):
    """Moving-window template subtraction with phase alignment and amplitude tracking.

    Parameters
    ----------
    n_cycles : int or None
        Half-width ``K`` of the window: each cycle's template averages about
        ``2K+1`` cycles around it (whole groups of ``K/4`` cycles; the exact
        count is in ``report_``). None chooses ``K = max(30, 1.5 s * f)``.
    robust : bool
        Leave spike-band outliers (spikes) out of the template.
    track_amplitude : bool
        Fit a slowly varying gain on top of the template.
    tracking_hz : float
        Highest modulation frequency the gain may follow. Heartbeat (up to
        ~3 Hz, with harmonics: its impedance pulse is not a sinusoid) and
        respiration (~0.2-0.5 Hz) sit below it. Within it, the gain passes
        only the modulation lines that stand out of the neural floor of its
        own spectrum, designed per block (see :mod:`artifactclean.modulation`).
    dac : {"auto", "off"}
        Look for a DAC staircase locked to the stimulation phase.
    margin_cycles : float
        Cycles beyond each detected block edge that are also cleaned.
    outlier_z : float
        Robust z-score above which a spike-band sample is an outlier.
    denoise : bool
        Keep only the harmonics of the cycle that stand out of the noise in
        the block-average template; cuts the noise the template adds.
    compiled : bool
        Use the numba-compiled inner loops when numba is installed (same
        numbers as the numpy ones, several times faster).
    track_phase : bool
        With ``track_amplitude``, also follow a phase shift of the artifact
        where the block's plan finds it modulated: electrode impedance is
        partly capacitive, so heartbeat and respiration shift the artifact's
        phase as well as its amplitude (Noury & Siegel 2017, NeuroImage). The
        template's phase derivative times the shift, fitted per gain segment
        on high-passed data and filtered to the shift's own lines, is added to
        the template.
    model_pulse : bool
        With ``track_amplitude``, model a pulsatile heartbeat's harmonics in
        the gain from its fundamental's phase (:mod:`artifactclean.pulse`)
        instead of filtering them: one pulse shape per block, fitted on the
        block's plan and pooled over channels; the fundamental's phase is read
        once over the whole block from the plan's reference channel (a
        channel group of a file needs neither that channel nor more context).
        Harmonics that do not stand out of the neural floor are left to the
        filter.
    heart_band_hz : (float, float)
        Heart rates (Hz) the pulse model looks for: people and monkeys by
        default (:data:`artifactclean.pulse.HEART_HZ`, 0.6-3.5 Hz). A
        rodent's heart (rat about 5-7 Hz, mouse 8-11 Hz awake; from memory)
        needs ``(4, 12)`` and a ``tracking_hz`` of at least twice the rate,
        so that its harmonics are modelled (README, "Cleaning your own
        recordings").

    Attributes
    ----------
    report_ : dict
        Per block: window, bins per cycle, DAC grid found, outliers left out,
        the heart rate and harmonics modelled.
    """

    _method_name = "template"
    # tracemalloc peaks of fit_transform, 20 Hz, 1 and 4 channels x 20 s (session 17); shared 12.0 until
    # session 18, when the phase grid's index and weight arrays gave way to positions computed inline
    # (PhaseGrid). A DAC's ticks keep their keys per sample
    memory_per_sample = (4.7, 5.5)
    _memory_with_dac = (4.1, 8.9)
    _reads_reference = True
    _dac_periods = True

    def __init__(
        self,
        n_cycles: int | None = None,
        robust: bool = True,
        track_amplitude: bool = True,
        tracking_hz: float = 10.0,
        dac: str = "auto",
        margin_cycles: float = 2.0,
        outlier_z: float = 5.0,
        denoise: bool = True,
        compiled: bool = True,
        track_phase: bool = True,
        model_pulse: bool = True,
        heart_band_hz: tuple[float, float] = HEART_HZ,
    ):
        self.n_cycles = n_cycles
        self.robust = robust
        self.track_amplitude = track_amplitude
        self.tracking_hz = tracking_hz
        self.dac = dac
        self.margin_cycles = margin_cycles
        self.outlier_z = outlier_z
        self.denoise = denoise
        self.compiled = compiled
        self.track_phase = track_phase
        self.model_pulse = model_pulse
        self.heart_band_hz = heart_band_hz

    @property
    def context_cycles(self) -> float:  # type: ignore[override]
        # at the default window (K depends on the frequency) see context_seconds
        k = 30 if self.n_cycles is None else self.n_cycles
        return float((3 if self.robust else 2) * (k + 2 * max(1, k // 4) + 2) + self.margin_cycles)

    def context_seconds(self, freq_hz: float, cycles_per_row: int = 1) -> float:
        """Context (s) an output sample needs on each side.

        The window reaches K cycles plus two template groups (alignment and
        interpolation between groups), once per pass; the gain's low-pass
        filter reaches :data:`artifactclean.modulation.HALF_S` seconds. With
        a DAC whose ticks repeat every ``cycles_per_row`` cycles the
        template's rows are such periods (see :meth:`block_context_seconds`).
        The heartbeat's phase, where a block's plan models its harmonics, and
        the slow level (:attr:`~artifactclean.estimators.cycles.BlockPlan.track`)
        are read over the whole block in the plan and need no context here.
        """
        k = self._rows(self._window(freq_hz), cycles_per_row)
        reach = (k + 2 * max(1, k // 4) + 2) * cycles_per_row
        # each pass builds on the previous pass's residual, so edge effects travel one window per pass
        passes = 3 if self.robust else 2
        return (passes * reach + self.margin_cycles) / freq_hz + GAIN_HALF_S

    def block_context_seconds(self, blk) -> float:
        """:meth:`context_seconds` for ``blk``, with the rows its plan (:meth:`prepare`) gives it."""
        plan = getattr(self, "_plans", {}).get(block_key(blk))
        grid = None if plan is None else plan.grid
        return self.context_seconds(blk.freq_hz, 1 if grid is None else grid.cycles_per_period)

    @staticmethod
    def _rows(k_half: int, cycles_per_row: int) -> int:
        """The window's half-width in rows: ``K`` cycles, or at least 2 periods of several cycles."""
        return k_half if cycles_per_row == 1 else max(2, int(round(k_half / cycles_per_row)))

    def _edge_plan(self, read, blk, fs, plan, bounds):
        """``plan`` with what each DAC step leaves beside the tick levels (:mod:`artifactclean.step_response`).

        Learned on the plan's reference channel over at most :data:`_EDGE_S`
        seconds of the plateau: the stretch is fitted with every sample kept
        in its grid tick and the response so far, the response and a drift
        of the grid's edges are learned from the residual, twice; kept where
        the fit with it leaves :data:`_EDGE_GAIN` less in the residual's
        first differences than the fit that settles the samples beside each
        edge (a DAC the amplifier does not filter, or one it filters little,
        keeps the settling).
        """
        grid = plan.grid
        if grid is None:
            return plan
        f = blk.freq_hz
        a, b = plan_stretch(blk, fs, _EDGE_S)
        a, b = max(a, bounds[0]), min(b, bounds[1])
        if (b - a) * f / fs < 20:
            return plan  # a block of a few cycles: too few steps to learn from (this project's choice)
        x = np.asarray(read(a, b, [plan.ref]), dtype=np.float64)
        w = (~find_clipped(x)).astype(np.float64)
        u = blk.cycles_at(np.arange(a, b, dtype=np.float64), fs)
        per = grid.cycles_per_period
        length = fs * per / (f * grid.ticks_per_cycle)  # samples a tick
        key = block_key(blk)

        def probe(p):
            est = clone(self)
            est._plans = {key: _subset_plan(p, [plan.ref])}
            est._edge_probe = {}
            est._block(x, w.copy(), u, fs, blk, a)  # a fit writes its outlier flags into the weights it is given
            return est._edge_probe

        def first_differences(pr):
            """Squared first differences of a probe's residual, and the pairs whose samples its fits used."""
            return np.diff(pr["residual"]) ** 2, pr["usable"][1:] & pr["usable"][:-1]

        diff2, ok = first_differences(probe(plan))
        settled = float(diff2[ok].mean())
        # where settling leaves no more beside the edges than elsewhere, the steps are sharp: nothing to learn (a
        # tick of fewer samples than a filter's transition has no sample clear of it: learned, and judged below)
        if length >= 2 * (_EDGE_NEAR + 1.0):
            delay = grid.ticks_and_edges(u)[1][1:] * length
            near = (delay < _EDGE_NEAR) | (delay > length - 1.0)
            if (ok & near).any() and (ok & ~near).any() and \
                    diff2[ok & near].mean() < _EDGE_EXCESS * diff2[ok & ~near].mean():
                return plan
        # the drift's line through the work range's ends (the grid's track is constant beyond its knots)
        ends = np.array([bounds[0], bounds[1] - 1], dtype=np.float64)
        at = blk.cycles_at(ends, fs)
        resp = EdgeResponse.flat(length)
        for rounds in range(_EDGE_ROUNDS):
            pr = probe(plan._replace(grid=grid, edges=resp))
            # the first round learns the response from nothing, then the drift from its slope
            resp, shift = fit_edge_response(pr["residual"], pr["usable"], grid.ticks_and_edges(u)[1], pr["steps"],
                                            length, current=resp if rounds else None)
            line = shift[0] + (shift[1] - shift[0]) * (ends - a) / max(b - 1 - a, 1)
            grid = grid.moved(at, line / length)
        learned = plan._replace(grid=grid, edges=resp)
        diff2, ok = first_differences(probe(learned))
        return learned if diff2[ok].mean() < (1.0 - _EDGE_GAIN) * settled else plan

    def _validate_params(self) -> None:
        super()._validate_params()
        if self.n_cycles is not None and (int(self.n_cycles) != self.n_cycles or self.n_cycles < 1):
            raise ValueError(f"n_cycles must be a positive integer or None, got {self.n_cycles!r}")

    def _window(self, freq: float) -> int:
        if self.n_cycles is not None:
            return int(self.n_cycles)
        return int(max(30, round(1.5 * freq)))

    # ------------------------------------------------------------------ one block
    def _block(self, xb, wb, u, fs, blk, offset):
        n_ch, n = xb.shape
        f = blk.freq_hz
        k_half = self._window(f)
        plan = self._block_plan(xb, blk, fs, offset)
        ref, grid, unlocked, response = plan[:4]
        # a DAC's steps through the amplifier's low-pass: every sample keeps the grid's tick and the steps'
        # response is added beside the levels (step_response); else the samples beside an edge are settled
        edges = plan.edges if grid is not None else None
        xb = level_off(xb, plan, blk, offset)
        pulse_model = None if response is None else response.pulse
        # the template's rows: cycles, or periods of a few cycles when a DAC's ticks repeat only so
        per = 1 if grid is None else grid.cycles_per_period
        k_rows = self._rows(k_half, per)
        # a free-running DAC (any number of updates per cycle): samples are binned, and the template
        # read, at the phase their tick held (DacClock.held_cycles), on bins of the cycle
        free = isinstance(grid, DacClock)
        if grid is not None:
            # samples next to a tick edge (within a quarter sample, for a grid from single steps)
            # are assigned by the data
            ticks, edge = grid.ticks_and_edges(u)
            place = None if edges is None else edge.copy()
            delta = grid.settle_width * grid.ticks_per_cycle * f / (per * fs)
            amb_lo = np.flatnonzero(edge < delta)
            amb_hi = np.flatnonzero(edge > 1 - delta)
            # the stimulator computes the ramps with the waveform, and its DAC holds both through a tick:
            # the block's envelope is read where each sample's tick began (a level read at the samples
            # themselves left a sawtooth of 0.1% of the artifact a tick on 1 s ramps from 1 kHz, 0.1 x noise)
            edge *= per * fs / (f * grid.ticks_per_cycle)
            trap = envelope_at(np.arange(offset, offset + n, dtype=np.float64) - edge, blk)
            del edge  # arrays of the block's length are freed as soon as they are done with (memory)
        else:
            trap = trapezoid(n, blk, offset)
        if free:
            # a bin must hold many ticks, far apart in time, or it holds the LFP of a few moments:
            # four bins per update (about 16 ticks each over 63 cycles), their means moved to the
            # bins' centres and the template kept to its clear harmonics (_shape, every pass)
            n_bins = int(min(max(16, 4 * np.ceil(grid.ticks_per_cycle)), max(16, round(fs / f))))

            # tick numbers from the block's first (settle_edges keeps them >= 0)
            tick0 = int(ticks[0])
            ticks = ticks - tick0

            def held_bins(tk):
                """Bin keys of the held phases, and each sample's offset from its bin's centre (bins)."""
                pos = grid.held_cycles(tk + tick0) * n_bins
                b = np.floor(pos).astype(np.int64)
                return b, pos - b - 0.5

            key, bin_off = held_bins(ticks)
        elif grid is not None:
            n_bins = grid.ticks_per_cycle
            key, ticks = ticks, None
        else:
            n_bins = max(4, int(round(fs / f)))
            # the grid's first and last rows only: the phase grid places every sample (PhaseGrid)
            key = np.floor(u[[0, -1]] * n_bins).astype(np.int64)
        # templates are computed every `stride` rows and interpolated between (see _shape);
        # groups start at multiples of `stride` in absolute row numbers, so a piece of a
        # block groups its rows exactly as the whole block does
        stride = max(1, k_rows // 4)
        row0 = (key[0] // n_bins) // stride * stride
        key = key - row0 * n_bins  # first group starts at row 0
        n_rows = int(key[-1] // n_bins) + 1
        n_grid = n_rows * n_bins
        n_groups = -(-n_rows // stride)
        k_groups = max(1, int(round(k_rows / stride)))
        if free:
            base_ticks = ticks.copy()
            sampler = None

            def read_free(tmpl, tk, out=None):
                # linear interpolation between bin centres and between groups, at the held phase
                return phase_eval(tmpl, n_bins, grid.held_cycles(tk + tick0) - row0, 0, stride, n_groups, out=out,
                                  compiled=self.compiled)
        elif grid is not None:
            # every sample of a DAC tick shares one held value
            base_key = key.copy()
            sampler = None
        else:
            # resample each cycle at exact bin-centre phases and read the templates back at every sample's
            # phase: both from the phase, which is linear in samples, computed where the kernels need them
            sampler = reader = PhaseGrid(u, row0, n_bins, stride, n_groups, n_grid)
            key = None  # the sampler and the reader place every sample: bin keys are for DAC ticks only
        edge_weights = edge_steps = None
        if edges is not None:
            # each sample's weights at its neighbour edges, and each row's steps there from the template's levels
            edge_weights = edges.weights(place)
            del place
            tick_keys, top = (ticks, ticks[-1]) if free else (key, n_grid - 1)

            def edge_steps(tm, level=None):
                """Steps ``T[k+j] - T[k+j-1]`` of a template row ``tm`` at every sample's neighbour edges ``j``, one
                after another (``level``: ``T[k]``, if read already); two reads held at a time (memory)."""

                def at(j):
                    if j == 0 and level is not None:
                        return level
                    k = np.clip(tick_keys + j, 0, top)
                    return (read_free(tm, k) if free else self._read_ticks(tm, k, n_bins, stride, n_groups))[0]

                prev = at(edges.edges[0] - 1)
                for j in edges.edges:
                    now = at(j)
                    yield now - prev
                    prev = now

        # gain segments: enough per cycle to sample the tracking band
        per_cycle = segments_per_cycle(self.tracking_hz, f)
        seg_starts, seg_at = floor_runs(u, per_cycle, compiled=self.compiled)
        seg_u = (seg_at + 0.5) / per_cycle
        del seg_at
        # each segment's first phase, and the phase step per sample (phase is linear in samples)
        seg_first = (u[seg_starts], (u[-1] - u[0]) / max(n - 1, 1), per_cycle)
        # every pass reads the gain at the same phases, placed between segment centres a chunk at a time
        seg_pos = SegmentPositions(seg_u, u)

        censored = fill = failed = complete = None
        wb0 = wb
        judge, usable = [ref], None
        # the judges' settled keys from a run of their own (CycleEstimator.edge_judges), or recorded for others
        bkey = block_key(blk)
        given = None
        if grid is not None and edges is None and getattr(self, "_shared_edges", False):
            given = getattr(self, "_edge_keys", None)
            given = None if given is None else given.get(bkey)
            if given is None:
                raise RuntimeError("a clone for shared edges needs the judges' keys of each block with a DAC grid "
                                   "(edge_keys_ of a clone fitted on CycleEstimator.edge_judges)")
        record = None
        if grid is not None and edges is None and getattr(self, "_record_edges", False):
            # one list a block and fit: a refit starts the block's passes again
            self.__dict__.setdefault("edge_keys_", {})[bkey] = record = []

        def settled(now, base, read):
            # each pass's keys differ from the grid's at a few % of the samples: those are handed on
            if given is not None:
                idx, val = given[it - 1]
                out = base.copy()
                out[idx] = val
                return out
            out = settle_edges(xb[judge], gain[judge], read, now, base, amb_lo, amb_hi, usable,
                               compiled=self.compiled)
            if record is not None:
                idx = np.flatnonzero(out != base)
                record.append((idx, out[idx]))
            return out

        if grid is not None and edges is None and given is None:
            # samples beside a tick edge are judged on the plan's strongest channels where they are not at a
            # rail (settle_edges): the reference alone is the strongest unclipped one, weaker than a clipped one
            judge = [int(c) for c in plan.judges if c < n_ch] or [ref]
            usable = wb[judge] > 0 if np.any(wb[judge] == 0) else None
        if np.any(wb == 0):
            censored = self._censored(wb, sampler, key, reader if sampler is not None else None,
                                      n_bins, stride, k_groups, n_groups, trap if blk.kind == "sham" else None)
            fill = _rail_samples(xb, wb, censored)
            if fill is not None:
                xb = xb.copy()  # the rail samples take their expected values: never the caller's array
            complete = _COMPLETE_ORDER if plan.harmonics is None else int(plan.harmonics)
            failed = np.zeros((n_ch, n_groups, n_bins), dtype=bool)
        # start from the block's trapezoid (linear ramps), so that the first templates are not
        # ramp averages; the fitted gain takes over from the second pass
        gain = np.repeat(trap[None, :], n_ch, axis=0)
        seg_env = trap[(seg_starts + np.append(seg_starts[1:], n)) // 2]
        # where each segment stands, in samples from the block's reference sample (which a window of the
        # recording keeps): the heartbeat's track is read there (pulse.PulseModel)
        seg_times = offset - blk.ref_sample + (seg_starts + np.append(seg_starts[1:], n)) / 2.0
        # the heartbeat's harmonics are evaluated every eighth of a segment from the block's reference sample
        pulse_grid = (offset - blk.ref_sample, fs / (8.0 * f * per_cycle))
        b_start, b_up, b_down, b_stop = blk.geometry()
        # an active block's ramps are placed at the full rate (stimulation._ramp_fit): its gain is read
        # relative to them; a sham block's ramps, from the decimated envelope only, keep segment values
        relative = blk.kind == "active" or b_up == b_start or b_down == b_stop
        ramp_hz = ramp_cutoff(blk, fs, self.tracking_hz)
        # phases clipped in many cycles of the window are left out of every fit, not only the
        # clipped samples: the cycles that escaped the rail there are a biased selection
        if censored is not None:
            wb = wb * ~censored
            if fill is not None:
                wb[fill[0]] = 1.0  # first at the rail value, then at its expectation beyond it
        w = wb
        n_out = 0
        passes = 3 if self.robust else 2
        # the phase shift is followed where the block's plan found it modulated (heartbeat, respiration)
        follow_shift = self.track_phase and self.track_amplitude and response is not None and n > 64 and any(
            response.phase_taps(min(ch, response.response.shape[0] - 1)) is not None for ch in range(n_ch))

        def read_judged(k, _, r):
            # the current pass's template of judge r at tick keys k
            if free:
                return read_free(tmpl[judge[r]:judge[r] + 1], k)[0]
            return self._read_ticks(tmpl[judge[r]:judge[r] + 1], k, n_bins, stride, n_groups)[0]

        for it in range(passes):
            if fill is not None and it > 0:
                self._fill_rails(xb, wb, gain, t_n, fill, u, max(4, k_half // 2))
            # the harmonic clean-up only matters for the template that is subtracted
            denoise = self.denoise and it == passes - 1
            if record is not None and it == passes - 1 and it > 0:
                # the judges' last keys are settled below; what the last pass fits is not needed from them
                settled(ticks if free else key, base_ticks if free else base_key, read_judged)
                return np.zeros((n_ch, n)), {}, None
            if free:
                if it > 0 and edges is None:
                    ticks = settled(ticks, base_ticks, read_judged)
                    key, bin_off = held_bins(ticks)
                    key -= row0 * n_bins
                tmpl = self._tick_template(xb, w, gain, key, n_groups, n_bins, k_groups, self.denoise, stride,
                                           bin_off=bin_off, complete=complete, failed=failed)
                t_n = read_free(tmpl, ticks, out=None if it == 0 else t_n)
            elif sampler is None:
                if it > 0 and edges is None:
                    key = settled(key, base_key, read_judged)
                tmpl = self._tick_template(xb, w, gain, key, n_groups, n_bins, k_groups, denoise, stride, per,
                                           complete=complete, failed=failed)
                t_n = self._read_ticks(tmpl, key, n_bins, stride, n_groups, out=None if it == 0 else t_n)
            else:
                tmpl = self._phase_template(xb, w, gain, sampler, n_groups, n_bins, k_groups, denoise, stride,
                                            complete=complete, failed=failed)
                # one buffer for every pass: fresh arrays of the data's size cost page faults
                t_n = reader.read(tmpl, out=None if it == 0 else t_n, compiled=self.compiled)
            if edges is not None:
                for ch in range(n_ch):
                    t_n[ch] += sum(step * g for step, g in zip(edge_steps(tmpl[ch:ch + 1], t_n[ch]), edge_weights))
            if self.track_amplitude:
                # the new gain depends only on the template: it overwrites the old one
                # the heartbeat's harmonics at every sample only in the gain that is subtracted (they cost a
                # tenth of the template's time at 20 Hz; the templates average the segment values' images off)
                last = it == passes - 1 and not follow_shift
                gain = self._gain(xb, w, t_n, seg_starts, seg_u, seg_pos, f * per_cycle, response,
                                  trap if relative else None, seg_env, ramp_hz, seg_first, out=gain,
                                  seg_times=seg_times, pulse_grid=pulse_grid if last else None)
            if self.robust and it == passes - 2:
                # filled rail samples are not data: judged as lost, then put back
                # without clipping the block's weights are not needed again: the new ones take their place
                w, n_out = spike_outliers(xb, t_n, wb if fill is None else wb * ~fill[0], fs, u, max(4, k_half // 2),
                                          self.outlier_z, gain=gain, compiled=self.compiled,
                                          out=wb if fill is None and censored is None else None)
                if fill is not None:
                    w[fill[0]] = 1.0
        completed = 0
        if censored is not None:
            # lost: the rail samples, and the samples of phases whose completion was not trusted
            unsure = censored & self._read_flags(failed, sampler, key, reader if sampler is not None else None,
                                                 n_bins, stride, n_groups)
            completed = int((censored & ~unsure & (wb0 > 0)).sum())
            censored = unsure | (wb0 == 0)
        info = dict(
            freq_hz=f,
            n_cycles=(2 * k_groups + 1) * stride * per,
            cycles_per_template=stride * per,
            dac_cycles_per_period=None if grid is None else per,
            bins_per_cycle=n_bins,
            dac_ticks_per_cycle=None if grid is None else grid.ticks_per_cycle,
            dac_free_running=free,
            dac_concentration=None if grid is None else grid.concentration,
            gain_segments_per_cycle=per_cycle if self.track_amplitude else 0,
            heart_rate_hz=None if pulse_model is None else round(pulse_model.heart_hz, 3),
            heartbeat_harmonics_modelled=[] if pulse_model is None else pulse_model.harmonics(),
            outliers_left_out=int(n_out),
            censored_samples=0 if censored is None else int((censored & (wb0 > 0)).sum()),
            completed_samples=completed,
            unlocked_dac_steps_per_s=float(unlocked),
            dac_step_response=edges is not None,
        )
        shifted = False
        if follow_shift:
            # the phase shift; the derivative is read one channel at a time (an array of the data's size fewer)
            d_tmpl = _phase_derivative(tmpl, n_bins)
            if free:
                read_d = lambda ch: read_free(d_tmpl[ch:ch + 1], ticks)[0]  # noqa: E731
            elif sampler is None:
                read_d = lambda ch: self._read_ticks(d_tmpl[ch:ch + 1], key, n_bins, stride, n_groups)[0]  # noqa: E731
            else:
                read_d = lambda ch: reader.read(d_tmpl[ch:ch + 1], compiled=self.compiled)[0]  # noqa: E731
            self._add_phase_term(t_n, xb, w, gain, read_d, fs, f, seg_starts, seg_u, seg_pos, f * per_cycle,
                                 response, seg_env, seg_first)
            # the gain was fitted on the template alone, and within a segment the shift's term is not orthogonal
            # to it (a waveform with harmonics; segments off its extrema): part of the shift's modulation went
            # into the gain. Fitted again on the template with its shift
            gain = self._gain(xb, w, t_n, seg_starts, seg_u, seg_pos, f * per_cycle, response,
                              trap if relative else None, seg_env, ramp_hz, seg_first, out=gain, seg_times=seg_times,
                              pulse_grid=pulse_grid)
            shifted = True
        info["phase_shift_followed"] = shifted
        probe = getattr(self, "_edge_probe", None)
        if probe is not None:
            # what the plan learns the steps' response from (TemplateSubtraction._edge_plan): the first channel's
            # residual, the samples its fits used and, with a response, the steps at each neighbour edge
            probe.update(residual=xb[0] - gain[0] * t_n[0], usable=w[0] > 0)
            if edges is not None:
                probe["steps"] = [gain[0] * step for step in edge_steps(tmpl[:1])]
        return np.multiply(gain, t_n, out=t_n), info, censored

    def _add_phase_term(self, t_n, xb, w, gain, read_d, fs, f, seg_starts, seg_u, seg_pos, seg_rate, response,
                        seg_env, seg_first):
        """Add ``eta d`` to ``t_n``, channel by channel: the template's phase derivative ``d = read_d(ch)``
        times the filtered phase shift (cycles).

        The shift is fitted per gain segment on data and regressors high-passed
        alike (:func:`artifactclean.modulation.phase_shift`) and filtered by the
        block's phase response (its own lines only); it is 0 in the margins.
        Channels are independent, so one at a time keeps the filtered rows,
        the derivative and the term to one channel's size.
        """
        sos = phase_highpass(f, fs)
        for ch in range(t_n.shape[0]):
            taps = response.phase_taps(min(ch, response.response.shape[0] - 1), seg_rate)
            if taps is None:
                continue
            keep = w[ch:ch + 1] > 0

            def high_passed(v):
                v *= keep  # in place: the rows of this loop are the block's largest temporaries
                return signal.sosfiltfilt(sos, v, axis=-1)

            xh = high_passed(xb[ch:ch + 1].copy())
            th = high_passed(gain[ch:ch + 1] * t_n[ch:ch + 1])
            d_n = read_d(ch)[None, :]
            dh = high_passed(gain[ch:ch + 1] * d_n)
            eta_seg, ok = phase_shift(xh, th, dh, w[ch:ch + 1], seg_starts, compiled=self.compiled)
            # where each shift stands: as for the gain (to_middles), read at the middles the positions act as a delay
            u_first, u_step, per_cycle = seg_first
            shift = (u_first + u_step * shift_centres(th, dh, w[ch:ch + 1], seg_starts)[0] - seg_u) * per_cycle
            del xh, th, dh, keep
            # on the plateau and the upper half of the ramps: lower, the shift is a ratio of small numbers
            use = ok[0] & (seg_env > 0.5)
            if use.sum() < 2:
                continue
            filled = np.interp(seg_u, seg_u[use], eta_seg[0, use])
            eta = ndimage.convolve1d(filled, taps, mode="nearest")
            # moved to the middles by the filtered shift's slope over whole cycles (the pattern of the positions
            # repeats every cycle)
            eta = ndimage.convolve1d(to_middles(filled[None, :], np.where(use, shift, 0.0)[None, :], per_cycle,
                                                slope=cycle_slope(eta[None, :], per_cycle))[0], taps, mode="nearest")
            eta[seg_env <= _FOOT] = 0.0
            term = seg_pos.read(eta[None, :], compiled=self.compiled)
            term *= d_n
            t_n[ch] += term[0]

    def _censored(self, wb, sampler, key, reader, n_bins, stride, k_groups, n_groups, env=None):
        """Samples whose template comes from phases clipped in many cycles of the window.

        Clipping cuts off the largest samples of a phase; the cycles that remain
        there are the ones that stayed below the rail, a biased selection. A
        phase clipped in more than :data:`_CENSOR_SHARE` of the window's
        cycles is left out of every fit and its template completed from the
        rest of the cycle (:func:`_complete_holes`); below that share the
        clipped samples enter the fits as their expectation beyond the rail
        (:meth:`_fill_rails`).

        With ``env`` (a sham block's envelope) cycles count as the template's
        fit weighs them, by ``env`` squared: the few cycles at a sham's peak,
        where it clips, are 2-3 of the 14 its window holds but most of what its
        template learns, and their expectations beyond the rail, from a template
        the rails had cut, kept its peaks 1-2 mV short (4 x noise in the spike
        band at 5 Hz). An active block's cycles count alike: weighted, its
        clipped plateau outweighed the ramps' first clipped cycles, whose
        unclipped samples then read a completion from a heavily clipped cycle
        (up to 1 mV off at 40 Hz with 31% of the samples clipped).
        """
        n_ch, n = wb.shape
        ones = np.ones_like(wb)
        weight = ones if env is None else np.repeat(np.asarray(env, dtype=np.float64)[None, :], n_ch, axis=0)
        if sampler is None:
            counts, _ = tick_sums(1.0 - wb, ones, ones, key, n_bins, stride, n_groups, compiled=self.compiled)
            lost = counts if env is None else tick_sums((1.0 - wb) * weight, ones, weight, key, n_bins, stride,
                                                        n_groups, compiled=self.compiled)[0]
            _, every = tick_sums(ones, ones, weight, key, n_bins, stride, n_groups, compiled=self.compiled)
        else:
            _, usable = sampler.sums(ones, wb, ones, compiled=self.compiled)
            _, every = sampler.sums(ones, ones, ones, compiled=self.compiled)
            counts = every - usable
            if env is None:
                lost = counts
            else:
                _, usable = sampler.sums(ones, wb, weight, compiled=self.compiled)
                _, every = sampler.sums(ones, ones, weight, compiled=self.compiled)
                lost = every - usable
        del weight
        clipped, total = _group_window(counts, k_groups), _group_window(every, k_groups)
        bad = (clipped > 0.5) & (_group_window(lost, k_groups) > _CENSOR_SHARE * total)
        return self._read_flags(bad, sampler, key, reader, n_bins, stride, n_groups)

    def _read_flags(self, bad, sampler, key, reader, n_bins, stride, n_groups):
        """Samples that read any flagged bin of ``bad`` (n_ch, n_groups, n_bins) (between groups and bins)."""
        n_ch = bad.shape[0]
        bad = bad.astype(np.float64).reshape(n_ch, -1)
        if sampler is not None:
            return reader.read_any(bad, compiled=self.compiled)
        half = np.full(key.size, 0.5)
        row, b = np.divmod(key, n_bins)
        i0, i1, _ = group_position(row + (b + 0.5) / n_bins, stride, n_groups)
        return grouped_eval(bad, n_bins, i0, i1, half, b, b, half, compiled=self.compiled) > 0

    def _fill_rails(self, xb, wb, gain, t_n, fill, u, span):
        """Set the rail samples of ``fill`` in ``xb`` to their expectation beyond the rail (Tobit's E-step).

        A sample at the upper rail ``c`` is ``mu + e >= c``, with ``mu`` the
        current artifact and ``e`` normal with the local residual SD ``s``
        (RMS of the unclipped residual over stretches of ``span`` cycles
        counted from absolute cycle numbers, so a piece of a block sets what
        the whole block would). Its expectation is ``mu + s * lambda(a)``,
        ``a = (c - mu) / s``, ``lambda`` the inverse Mills ratio
        ``phi(a) / (1 - Phi(a))`` (Tobin 1958, Econometrica 26; the EM form as
        in Amemiya 1984, J. Econometrics 24, from memory), evaluated as
        ``sqrt(2 / pi) / erfcx(a / sqrt(2))`` (``scipy.special.erfcx``) so it
        holds far in the tails; the lower rail mirrors it. Each pass of the
        template moves its clipped phases towards the censored-data fit.
        """
        at, upper, rail = fill
        rows = np.flatnonzero(at.any(axis=1))  # only the clipped channels need a residual SD
        ok = (wb[rows] > 0) & ~at[rows]
        e = np.where(ok, xb[rows] - gain[rows] * t_n[rows], 0.0)
        starts = stretch_bounds(u, span)[:-1]
        # residual SD per clipped channel and stretch, read at each rail sample's stretch
        n_ok = np.add.reduceat(ok, starts, axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            sd = np.where(n_ok >= 16, np.sqrt(np.add.reduceat(e * e, starts, axis=1) / n_ok), np.inf)
        ch, i = np.nonzero(at)
        s = sd[np.searchsorted(rows, ch), np.searchsorted(starts, i, side="right") - 1]
        mu = gain[ch, i] * t_n[ch, i]
        z = np.where(upper, rail - mu, mu - rail) / s  # distance to the rail, towards the censored side
        lam = np.sqrt(2 / np.pi) / special.erfcx(z / np.sqrt(2))
        val = mu + np.where(upper, 1.0, -1.0) * s * lam
        # a stretch without a residual SD (too few unclipped samples) keeps the rail value
        val = np.where(np.isfinite(val), val, rail)
        xb[at] = np.where(upper, np.maximum(val, rail), np.minimum(val, rail))

    def _read_ticks(self, tmpl, key, n_bins, stride, n_groups, out=None):
        """Template at DAC tick keys, interpolated between group centres (into ``out`` if given)."""
        return tick_eval(tmpl, key, n_bins, stride, n_groups, out=out, compiled=self.compiled)

    def _tick_template(self, xb, w, gain, key, n_groups, n_bins, k_groups, denoise, stride, per=1, bin_off=None,
                       complete=None, failed=None):
        s, g = tick_sums(xb, w, gain, key, n_bins, stride, n_groups, compiled=self.compiled)
        s_off = occupied = None
        if bin_off is not None:  # held phases: sum w g^2 (offset from the bin centre), and samples per bin
            s_off, _ = tick_sums(gain * bin_off, w, gain, key, n_bins, stride, n_groups, compiled=self.compiled)
            ones = np.ones_like(w)
            every, usable = tick_sums(ones, ones, (w > 0).astype(np.float64), key, n_bins, stride, n_groups,
                                      compiled=self.compiled)
            occupied = (every, usable)
        return _shape(s, g, n_bins, k_groups, denoise, stride, per, s_off, occupied, complete, failed)

    def _phase_template(self, xb, w, gain, sampler, n_groups, n_bins, k_groups, denoise, stride, complete=None,
                        failed=None):
        s, g = sampler.sums(xb, w, gain, compiled=self.compiled)
        return _shape(s, g, n_bins, k_groups, denoise, stride, complete=complete, failed=failed)

    def _gain(self, xb, w, t_n, seg_starts, seg_u, seg_pos, seg_rate, response, trap, seg_env, ramp_hz, seg_first,
              out, seg_times=None, pulse_grid=None):
        # with ``trap`` given the gain is fitted relative to the block's envelope and multiplied by it
        # sample by sample: read from segment values, the envelope turns a step into a ramp one
        # segment long (up to the whole artifact left there) and rounds a ramp's corners over a
        # segment (about amplitude x segment / (8 x ramp): 100-400 uV on 0.1-0.3 s ramps at 5-20 Hz).
        # Without it (a sham block, whose ramps come from the decimated envelope only) linear
        # interpolation of segment values follows ramps that the block model places a little late
        num, den, full, centre = segment_stats(xb, w, t_n, seg_starts, trap, compiled=self.compiled)
        # a segment's gain stands for its template-weighted centre, not its middle (to_middles)
        u_first, u_step, per_cycle = seg_first
        shift = (u_first + u_step * centre - seg_u) * per_cycle
        g = np.zeros_like(num)
        # the parts of the cycle see the heartbeat's harmonics differently (pulse.PulseModel.part_pattern): that
        # pattern comes off the raw gains, whose images of the harmonics would pass where everything passes
        pattern = None
        if response is not None and response.pulse is not None and seg_times is not None:
            of_cycle = np.round(seg_u * per_cycle - 0.5).astype(np.int64) % per_cycle
            pattern = response.pulse.part_pattern(seg_times, of_cycle, seg_rate, n_rows=g.shape[0])
            if pattern is not None and trap is None:
                pattern = pattern * seg_env
        for ch in range(g.shape[0]):
            # a segment with too little usable template energy (outliers, clipping) takes its
            # gain from its neighbours; clipping removes the peaks of every cycle, so usable
            # energy is judged against the typical segment, not against the segment's own total
            local = ndimage.median_filter(full[ch], size=41, mode="nearest")  # ~20 segments each side
            ok = den[ch] > 0.1 * np.maximum(local, 1e-300)
            if trap is not None:
                ok &= seg_env > _FOOT  # a gain relative to an envelope of nothing is noise over nothing
            shift[ch, ~ok] = 0.0
            vals = num[ch, ok] / den[ch, ok] - (0.0 if pattern is None else pattern[ch, ok])
            if ok.sum() >= 2:
                g[ch] = np.interp(seg_u, seg_u[ok], vals)
            elif ok.any():
                g[ch] = vals.mean()
            else:
                g[ch] = 1.0
        def smooth(gg):
            # the gain is 1 on the plateau by construction (templates carry the amplitude): a fixed
            # level keeps the ramps' filtering local, so pieces of a block match the whole block
            if trap is None:
                return smooth_gain(gg, response, seg_rate, seg_env, ramp_hz, scale=1.0, times=seg_times)
            gg = smooth_gain(gg * seg_env, response, seg_rate, seg_env, ramp_hz, scale=1.0, times=seg_times)
            with np.errstate(invalid="ignore", divide="ignore"):
                return np.where(seg_env > _FOOT, gg / seg_env, 1.0)

        def pulse(gg, slope):
            # the heartbeat's harmonics smooth() puts in gg (pulse.PulseModel), and with ``slope`` their slope
            # per segment (else None)
            if trap is None:
                out = response.pulse.parts(gg, seg_rate, seg_env, 1.0, times=seg_times, slope=slope)[1:]
                return out if slope else (out[0], None)
            _, part, *d_part = response.pulse.parts(gg * seg_env, seg_rate, seg_env, 1.0, times=seg_times,
                                                    slope=slope)
            inside = seg_env > _FOOT
            env = np.where(inside, seg_env, 1.0)
            if not slope:
                return np.where(inside, part / env, 0.0), None
            return (np.where(inside, part / env, 0.0),
                    np.where(inside, d_part[0] / env - part * np.gradient(seg_env) / env ** 2, 0.0))

        if response is None:
            g = to_middles(g, shift, per_cycle)
        else:
            # the slope that moves each gain to its segment's middle is the filtered gain's (the raw
            # gains carry the neural floor, whose slope times the shifts would come back as noise),
            # over whole cycles (the filter may pass the shifts' own pattern)
            smoothed = smooth(g)
            slope = cycle_slope(smoothed, per_cycle)
            if response.pulse is not None:
                # the heartbeat's harmonics have no such pattern, and a cycle's mean takes most of their
                # slope off when they are near the stimulation frequency (4 Hz at 5 Hz: 0.23 of it is
                # left, and the shifts' pattern times the rest put lines at 1 and 9 Hz): theirs is exact
                # (from the heartbeat's phase: a difference of segments takes 0.76 of a 6 Hz slope at 30 a second)
                # the exact slope moves a pulse that stands where the parts of the cycle put it; one whose
                # pattern came off stands at the middles already
                part, d_part = pulse(g, slope=pattern is None)
                slope = slope - cycle_slope(part, per_cycle) + (0.0 if d_part is None else d_part)
            g = smooth(to_middles(g, shift, per_cycle, slope=slope))
        fine = response is not None and response.pulse is not None and response.pulse.track is not None \
            and pulse_grid is not None
        if fine:
            # the heartbeat's harmonics are read back at the samples from the track, not between segment
            # centres (whose interpolation puts their images beside the stimulation frequency)
            g = g - part
        out = seg_pos.read(g, out=out, compiled=self.compiled)
        if fine:
            response.pulse.add_at_samples(out, seg_rate, pulse_grid, trap)
        if trap is not None:
            out *= trap
        return out
