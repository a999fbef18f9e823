"""The heartbeat's harmonics in the artifact's gain, locked to the phase of its fundamental.

An arterial pulse is not a sinusoid: the impedance it modulates rises fast and
falls slowly, so the gain carries the heart rate and several of its harmonics
(2 Hz and 4, 6, 8 Hz ...). The heart rate also wanders by a few per cent within
seconds, and a harmonic wanders that many times as far. The gain filter of
:mod:`artifactclean.modulation` passes a line as far as it stands out of the
neural floor over a 4 s spectrum: a wandering harmonic spreads over several
bins and passes only in part, and each harmonic left behind puts a pair of
sidebands beside every stimulation harmonic, in the LFP away from them (a 2 Hz
pulse's 4 and 6 Hz harmonics beside 10 Hz: residual lines at 4, 6, 14 and 16 Hz,
up to 8 times the neural power there).

Here the harmonics are modelled instead of filtered. The fundamental, strong
and within the band the gain always follows, gives the heartbeat's phase
``phi(t)`` and amplitude ``a(t)`` (a complex band-pass around the heart rate
on the gains of up to four channels, weighted so that the neural floors they
share cancel, :func:`pool_weights`; or on the plan's reference channel alone,
whose floor is the lowest); harmonic ``h`` of a channel is ``Re(k B_h a(t) exp(i h phi(t)))``:
``k`` is how strongly the channel carries the reference's fundamental, ``B_h``
the pulse's shape, one per block, fitted on the block's plan (least squares on
seconds of gain samples, pooled over channels by generalised least squares
over their floors' cross-spectrum: the neural floor enters through a few
coefficients instead of through a pass band, and what the channels share of it
cancels). Each harmonic is shrunk by how far it stands out of what the floor
alone gives such a fit (:data:`_SIGNIFICANCE`; the floors' cross-spectrum
counted, since nearby contacts share their LFP): a sinusoidal heartbeat, or
none, gives no model.

What it cannot do: follow a pulse whose shape changes within a block (its
fundamental's amplitude is followed, the ratios of its harmonics are not), or
a heartbeat outside :data:`HEART_HZ`. A neural rhythm at a harmonic of the
heart rate within ``tracking_hz`` of a stimulation harmonic is not told from
it; as everywhere in this package, no single-channel method can.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy import linalg, ndimage, signal

from ._numeric import interp_sorted
# the gain filter's own bounds: the harmonics are boosted, and the plateau read, as it does
from .modulation import _FOOT, _MAX_BOOST, as_moved, as_seen, plateau_level, seen_by_segments, segment_transfer

__all__ = ["HEART_HZ", "PULSE_HALF_S", "PulseModel", "fit_pulse", "fundamental", "fundamental_of_rows", "harmonic_phase",
           "heart_rate", "join_tracks", "phase_information", "pool_weights", "relative_deviation", "track_smoothing"]

#: heart rates (Hz) searched for in the gain: about 35-210 beats a minute, people and monkeys at rest and
#: under anaesthesia (common practice)
HEART_HZ = (0.6, 3.5)
#: half-length (s) of the complex band-pass that reads the heartbeat's phase from the gain
PULSE_HALF_S = 2.0
#: the heartbeat's phase and amplitude, where the model is applied, are smoothed to this (Hz), which must pass
#: the heart rate's changes with breathing (respiratory sinus arrhythmia: heart-rate variability's
#: high-frequency band, 0.15-0.4 Hz; Task Force of the ESC and NASPE 1996, Circulation 93:1043, from memory);
#: the floor's faster wander is smoothed off. 0.3 lagged the rate, and the phase error, times each harmonic's
#: number, left the pulse's harmonics in the LFP (session 22, `benchmarks/acceptance.py --seeds 1 2 3 4`,
#: pulsatile, LFP away: 20 Hz 0.043-0.056 -> 0.028-0.036, 10 Hz 0.067-0.090 -> 0.043-0.070, 40 Hz seed 4
#: 0.041 -> 0.028; 0.8 and 1.2 gave the same within 0.005)
_SMOOTH_HZ = 0.6
#: where the fundamental knows little of the phase (its power over the floor's density beside it, in Hz:
#: :func:`phase_information`) the floor's wander, not the rate's, is the track's error: below this
#: information the smoothing is :data:`_SMOOTH_HZ` times (information / this)^(1/4), at least
#: :data:`_SMOOTH_MIN_HZ` (session 24: the acceptance traces' fundamental held 30-36 at 5 Hz, 530-730 at
#: 10 Hz; smoothed to 0.3 Hz the 5 Hz LFP error away from the harmonics was 0.076-0.109 instead of
#: 0.087-0.130, the 10 Hz one 0.051-0.061 instead of 0.048-0.051. The quarter power balances a noise
#: error growing with the bandwidth against a lag behind a rate that wanders as a random walk, whose
#: phase's spectrum falls as f^-4: this project's reasoning, not a published rule)
_INFO_FULL = 500.0
_SMOOTH_MIN_HZ = 0.2
#: the same for the regressors the pulse's shape is fitted on (:func:`fit_pulse`): its test of each harmonic
#: takes the regressors for independent of the floor, and a phase passing more of the floor's wander breaks
#: that (a sinusoidal heartbeat on channels of one sign got a 2nd harmonic of 0.071 at 0.6, 0.034 at 0.3)
_FIT_SMOOTH_HZ = 0.3
#: half-width of that band-pass, a fraction of the heart rate: wide enough for the rate's wander over a block,
#: narrow enough to keep respiration and the second harmonic out (this project's choice)
_WIDTH = 0.35
#: a fundamental this many times its floor (mean over channels) is taken for a heartbeat (this project's choice;
#: session 22 lowered it from 4: a person's resting 1.2 Hz heart with 6% breathing arrhythmia stood 3.5 times its
#: floor at 10 Hz and went unmodelled, LFP away 0.25 -> 0.08; session 25 from 3: at 5 Hz, where the floor beside
#: the heart rate is the strong LFP at 5 -+ 1 Hz and the 2 Hz floor window holds respiration and the pulse's own
#: 2nd harmonic, a 1.0-1.2 Hz heart stood 2.2-2.8 times it, and its 3rd harmonic, beyond what the gain always
#: follows, left 0.19-0.24 of the LFP away from the harmonics, 0.05-0.09 once found). Without a heartbeat the
#: floor's strongest line in the band stands 1.2-3.6 times it, a rhythm beside the fundamental up to 9: those
#: that pass get no pulse, as no harmonic of theirs stands out of the floor (`_SIGNIFICANCE`; with 2, one of
#: sixteen traces without a heartbeat got a model, LFP away 0.015 -> 0.018)
_HEART_LINE = 2.0
#: half a passing line is a candidate fundamental where the half and one and a half of the line stand this many
#: times their floor (this project's choice; without a heartbeat the floor's lines reach 1.2-3.6): a 0.9 Hz heart
#: with 8% breathing arrhythmia at 40 Hz stood 2.6x, its 2nd harmonic 4.4x and its 3rd 3.0x (session 22)
_HALF_LINE = 2.0
#: each harmonic of the pooled shape is multiplied by ``1 - this / z``, z its fitted power over what the
#: floor alone gives such a fit (its expectation, 2 S / (T a^2)): none below this, nearly all far above
#: (this project's choice: with 2 a sinusoidal heartbeat's floor, fitted at 4 times its mean on every
#: channel of one trace, doubled the LFP error away from the harmonics at 10 Hz, 0.021 -> 0.044). z is
#: about exponential with mean 1 for the floor alone, so a harmonic passes by chance once in e^5 = 150
_SIGNIFICANCE = 5.0
#: harmonics modelled at most (2 ... this + 1; session 37: 8 left a 1.2 Hz alpha-shaped pulse's 10th-13th
#: harmonics beside 20 and 40 Hz, LFP away 0.045-0.052 where 12 gave 0.026-0.037)
_MAX_HARMONICS = 12
#: a harmonic within this fraction above the highest frequency the gain follows is still modelled: the heart
#: rate wanders by a few per cent (and is read within about a per cent), so its line spends time on both sides
#: of the limit (this project's choice: a 2.49 Hz heart read as 2.51 Hz lost its 4th harmonic at 10 Hz, whose
#: sidebands beside 40 Hz left 11x the neural power there)
_RATE_WANDER = 0.05
#: what is slower than this fraction of the heart rate is fitted away beside the harmonics (:func:`_slow_basis`;
#: the fundamental's band-pass starts at 1 - :data:`_WIDTH` of it; this project's choice)
_SLOW_FRACTION = 0.6
#: a block's heartbeat is read where the band-pass covers at least this fraction of the best-covered element's
#: weight (the envelope, :func:`_read_through`); the rest holds the nearest such element's reading
_COVERED = 0.05
#: where a block's envelope is above this, its plateau: the floors' densities and the harmonics' mean phases
#: are read there (:func:`harmonic_phase`)
_PLATEAU_ENV = 0.9
#: channels whose gains are pooled for the heartbeat's phase at most (this project's choice: each is read
#: over every block again for the track)
_POOL_MAX = 4
#: diagonal loading of the floors' cross-spectrum in :func:`pool_weights`, a fraction of its mean diagonal
#: (this project's choice; 0.05-0.2 gave the same phase errors within 0.01 rad on the acceptance traces)
_POOL_LOADING = 0.2


@dataclass
class PulseModel:
    """A pulse's harmonics relative to its fundamental on one channel, per channel.

    The heartbeat is the same for every channel; its phase is read from the
    gain of the reference channel ``ref`` (the plan's strongest unclipped
    channel, whose gain has the least neural floor).

    Attributes
    ----------
    heart_hz : float
        Heart rate (Hz) the band-pass is centred on.
    coefs : ndarray, complex, shape (n_channels, n_harmonics)
        ``k B_h`` of harmonics ``2 ... n_harmonics + 1``, relative to half the
        reference's fundamental (0 where one did not stand out of the floor),
        in the artifact's modulation: what a gain sequence holds of them is
        :meth:`seen_coefs`.
    ref : int
        Row of the reference channel.
    """

    heart_hz: float
    coefs: np.ndarray
    ref: int
    #: the heartbeat's fundamental over a whole block (:func:`join_tracks`): positions in samples from the
    #: block's reference sample, amplitude and unwrapped phase; with it the reference's gain is not needed
    #: where the model is applied
    track: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
    #: complex weight of each channel's gain in the heartbeat's fundamental (:func:`pool_weights`; 0 for
    #: channels left out); None: the reference's gain alone
    weights: np.ndarray | None = None
    #: what the fundamental and each harmonic know of the heartbeat's phase, and each harmonic's reading's
    #: mean error (:func:`phase_information`); None: the phase is read from the fundamental alone
    phase_info: np.ndarray | None = None
    phase_offset: np.ndarray | None = None
    #: how the segment gains the model was fitted on see each channel's harmonics (complex, the shape of
    #: ``coefs``: the mean over a cycle's segments of :func:`artifactclean.modulation.segment_transfer`, as
    #: moved to the middles); None: as a plain mean over each element does (``sinc``)
    seen: np.ndarray | None = None
    #: what the heartbeat's phase and amplitude are smoothed to where the model is applied (Hz;
    #: :func:`track_smoothing`)
    smooth_hz: float = _SMOOTH_HZ
    #: how each part of the cycle's segment gain sees each channel's harmonics (complex, n_channels x parts x
    #: harmonics: :func:`artifactclean.modulation.segment_transfer`); None where not known
    seen_by_part: np.ndarray | None = None

    def pooled(self) -> list[int]:
        """The channels the heartbeat's fundamental is read from."""
        if self.weights is None:
            return [int(self.ref)]
        return [int(c) for c in np.flatnonzero(self.weights)]

    def rows(self, rows) -> "PulseModel | None":
        """The model of channels ``rows`` only; None if it needs channels that are not among them."""
        rows = list(rows)
        seen = None if self.seen is None else self.seen[rows]
        by_part = None if self.seen_by_part is None else self.seen_by_part[rows]
        if self.track is not None:
            return PulseModel(self.heart_hz, self.coefs[rows], rows.index(self.ref) if self.ref in rows else -1,
                              self.track, phase_info=self.phase_info, phase_offset=self.phase_offset, seen=seen,
                              smooth_hz=self.smooth_hz, seen_by_part=by_part)
        if not set(self.pooled()) <= set(rows):
            return None
        return PulseModel(self.heart_hz, self.coefs[rows], rows.index(self.ref), None,
                          None if self.weights is None else self.weights[rows], self.phase_info, self.phase_offset,
                          seen, self.smooth_hz, by_part)

    def with_track(self, track: tuple[np.ndarray, np.ndarray, np.ndarray] | None) -> "PulseModel":
        """The same model with the heartbeat's fundamental read from ``track`` (see :func:`join_tracks`)."""
        return dataclasses.replace(self, track=track)

    def harmonics(self) -> list[int]:
        """The harmonic numbers modelled on any channel."""
        return [int(h) for h in np.flatnonzero(np.any(self.coefs != 0, axis=0)) + 2]

    def seen_coefs(self, rate: float, segments: bool = True) -> np.ndarray:
        """:attr:`coefs` as a gain sequence at ``rate`` holds them: as the template's segments see them
        (:attr:`seen`) with ``segments``, else (or without :attr:`seen`) as a mean over each element, whose
        ``sinc(f / rate)`` (a boxcar's Fourier transform) takes a harmonic at ``f`` down."""
        if segments and self.seen is not None:
            return self.coefs * self.seen
        hs = np.arange(2, self.coefs.shape[1] + 2)
        return self.coefs * np.sinc(hs * self.heart_hz / rate)[None, :]

    def relative(self, ref_gain: np.ndarray | None, rate: float, envelope: np.ndarray | None = None,
                 level: float | None = None, n_rows: int | None = None,
                 times: np.ndarray | None = None, slope: bool = False,
                 segments: bool = False) -> tuple[np.ndarray, ...]:
        """Each channel's pulse harmonics relative to its plateau level, as fitted and as carried.

        With a :attr:`track` and ``times`` (the sample position of each
        element of the sequences, at ``rate`` a second) the heartbeat's
        fundamental is read from the track there. Otherwise ``ref_gain`` is
        the reference channel's gain sequence, ``level`` its plateau level (its
        plateau median by default); with ``envelope`` (see
        :func:`artifactclean.modulation.filter_sequences`) its deviation from
        ``level`` times the envelope is read, as the gain filter reads it.
        Harmonics at or above 0.45 ``rate`` are left out (rows of one cycle at
        10 Hz hold 4 Hz, not 6). The first array is the harmonics as the
        sequence holds them (:meth:`seen_coefs`; ``segments``: the template's
        segment gains, else means over each element); the second is the
        harmonics divided by ``sinc(f / rate)^2`` (at most :data:`_MAX_BOOST`):
        what the linear interpolation between the elements' centres takes off
        (a triangle kernel's Fourier transform), as the gain filter restores
        for what it passes. ``n_rows`` channels are returned (the model's by
        default).
        With ``slope``, a third array: the second's derivative per element,
        from the fundamental's slow amplitude and phase (a difference of the
        harmonics themselves, ``numpy.gradient``, takes 0.76 of a 6 Hz
        harmonic's slope at 30 elements a second).
        """
        if self.track is not None and times is not None:
            t, a, p = self.track
            times = np.asarray(times, dtype=np.float64)
            amp, ph = np.interp(times, t, a), np.interp(times, t, p)
        else:
            if ref_gain is None or self.ref < 0:
                raise ValueError("the pulse model needs the reference channel's gain, or a track and times")
            ref_gain = np.asarray(ref_gain, dtype=np.float64)
            if level is None:
                level = _plateau_median(ref_gain, envelope) if envelope is not None else float(np.mean(ref_gain))
            amp, ph = _amplitude_phase(relative_deviation(ref_gain, level, envelope), rate, self.heart_hz)
        return self._evaluate(amp, ph, rate, n_rows, slope, segments)

    def _evaluate(self, amp: np.ndarray, ph: np.ndarray, rate: float,
                  n_rows: int | None, slope: bool = False, segments: bool = False) -> tuple[np.ndarray, ...]:
        """The harmonics, fitted and carried (see :meth:`relative`), from the fundamental's amplitude and phase;
        with ``slope``, the carried ones' derivative per element too."""
        hs, coefs = self._carried(rate, n_rows)
        _, held = self._carried(rate, n_rows, self.seen_coefs(rate, segments))
        reg = _harmonic_regressors(amp, ph, hs)
        boost = 1.0 / np.maximum(np.sinc(hs * self.heart_hz / rate) ** 2, 1.0 / _MAX_BOOST)
        carried = coefs * boost[None, :]
        out = (np.real(np.einsum("ch,hn->cn", held, reg)), np.real(np.einsum("ch,hn->cn", carried, reg)))
        if not slope:
            return out
        if amp.size < 2:
            return out + (np.zeros_like(out[1]),)
        d_reg = reg * _log_slope(amp, ph, hs)
        return out + (np.real(np.einsum("ch,hn->cn", carried, d_reg)),)

    def _carried(self, rate: float, n_rows: int | None, coefs: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Harmonic numbers and ``n_rows`` channels' coefficients (:attr:`coefs` by default), 0 for harmonics a
        sequence at ``rate`` does not carry (at or above 0.45 ``rate``)."""
        hs = np.arange(2, self.coefs.shape[1] + 2)
        coefs = self.coefs if coefs is None else coefs
        n_rows = coefs.shape[0] if n_rows is None else n_rows
        rows = np.minimum(np.arange(n_rows), coefs.shape[0] - 1)
        return hs, coefs[rows] * (hs * self.heart_hz < 0.45 * rate)

    def at_times(self, times: np.ndarray, rate: float, n_rows: int | None = None) -> np.ndarray:
        """Each channel's harmonics at sample positions ``times`` from the :attr:`track`, relative to the
        plateau level, as a gain read at every sample holds them.

        The harmonics a gain sequence at ``rate`` carries (below 0.45
        ``rate``, as :meth:`relative`), as the artifact's modulation holds
        them (:attr:`coefs`). Interpolating the sequence instead puts images
        of the harmonics at the rate less them, beside the stimulation
        frequency (30 - 4 Hz: f + 6 Hz at 10 Hz).
        """
        t, a, p = self.track
        times = np.asarray(times, dtype=np.float64)
        hs, coefs = self._carried(rate, n_rows)
        reg = _harmonic_regressors(np.interp(times, t, a), np.interp(times, t, p), hs)
        return np.real(np.einsum("ch,hn->cn", coefs, reg))

    def held_beyond(self, times: np.ndarray, rate: float, n_rows: int | None = None) -> np.ndarray:
        """What means over elements of a sequence at ``rate`` a second hold of the harmonics it does not carry.

        The harmonics at or above 0.45 ``rate`` (:meth:`relative` leaves them
        out), at positions ``times`` from the :attr:`track`, each times
        ``sinc(f / rate)`` (a boxcar's Fourier transform) and sampled there:
        rows of one cycle at 10 Hz hold a 6 Hz harmonic at half its size,
        folded onto 4 Hz, where a 2 Hz pulse's 2nd harmonic is.
        """
        t, a, p = self.track
        times = np.asarray(times, dtype=np.float64)
        n_rows = self.coefs.shape[0] if n_rows is None else n_rows
        rows = np.minimum(np.arange(n_rows), self.coefs.shape[0] - 1)
        hs = np.arange(2, self.coefs.shape[1] + 2)
        beyond = self.coefs[rows] * ((hs * self.heart_hz >= 0.45 * rate) * np.sinc(hs * self.heart_hz / rate))[None, :]
        reg = _harmonic_regressors(np.interp(times, t, a), np.interp(times, t, p), hs)
        return np.real(np.einsum("ch,hn->cn", beyond, reg))

    def add_at_samples(self, out: np.ndarray, rate: float, grid: tuple[float, float],
                       trap: np.ndarray | None = None) -> None:
        """Add the harmonics (:meth:`at_times`) to the gains ``out`` (n_channels, n) at every sample, in place.

        ``rate`` is the gain sequence's (its harmonics as :meth:`at_times`
        carries them; ``numpy.inf``: every harmonic the model has, for a
        sequence that lost those it does not carry as it held them,
        :meth:`held_beyond`); with ``trap`` (the block's ramps per sample) the
        harmonics are added relative to it. ``grid = (t0, step)``: the
        range's first sample from the block's reference sample, and the
        spacing (samples) of the grid the harmonics are evaluated on and
        interpolated from, whole multiples of it from the reference sample
        (a piece of a block reads the same grid as the whole block).
        """
        n = out.shape[1]
        if not self.harmonics() or n < 2:
            return
        t0, step = grid
        k = np.arange(np.floor(t0 / step) - 1, np.ceil((t0 + n - 1) / step) + 2)
        at = k * step - t0
        vals = self.at_times(k * step, rate, n_rows=out.shape[0])
        if trap is not None:
            env = trap[np.clip(np.round(at), 0, n - 1).astype(np.int64)]
            vals = np.where(env > _FOOT, vals / np.where(env > _FOOT, env, 1.0), 0.0)
        interp_sorted(np.arange(n, dtype=np.float64), at, vals, out, mode="add")

    def part_pattern(self, times: np.ndarray, part: np.ndarray, rate: float,
                     n_rows: int | None = None) -> np.ndarray | None:
        """What each segment's part of the cycle sees of the harmonics beyond the parts' mean.

        ``times``: each segment's middle (samples from the block's reference
        sample, read on the :attr:`track`); ``part``: its part of the cycle.
        A pattern repeating every cycle times a harmonic puts its images at the
        segments' cycle rate less the harmonic (5 Hz: 6 - 5 = 1 Hz), where the
        gain filter passes everything. None without :attr:`seen_by_part` or a
        :attr:`track`. The harmonics beyond the parts' mean, not beyond
        :attr:`seen` (the mean as the move to the middles leaves it): with
        the pattern off, the pulse stands at the middles and is not moved.
        """
        n_rows = self.coefs.shape[0] if n_rows is None else n_rows
        if self.seen_by_part is None or self.track is None:
            return None
        t, a, p = self.track
        hs, coefs = self._carried(rate, n_rows)
        rows = np.minimum(np.arange(n_rows), self.coefs.shape[0] - 1)
        by_part = self.seen_by_part[rows]
        beyond = by_part[:, part, :] - by_part.mean(axis=1)[:, None, :]  # (n_rows, n_seg, n_h)
        reg = _harmonic_regressors(np.interp(times, t, a), np.interp(times, t, p), hs)  # (n_h, n_seg)
        return np.real(np.einsum("ch,csh,hs->cs", coefs, beyond, reg))

    def parts(self, gain: np.ndarray, rate: float, envelope: np.ndarray | None = None,
              scale=None, times: np.ndarray | None = None, slope: bool = False,
              segments: bool = False) -> tuple[np.ndarray, ...]:
        """The pulse's harmonics in each gain sequence (one per row of the model), fitted and carried
        (and with ``slope`` the carried ones' derivative per element, see :meth:`relative`).

        As :meth:`relative`: from the track at ``times``, or from the rows
        of ``gain`` the fundamental is read from (:meth:`pooled`); ``scale``
        is each sequence's plateau level (one, or one per row; the plateau
        medians by default), by which the relative harmonics are multiplied.
        """
        gain = np.atleast_2d(gain)
        ref = min(max(self.ref, 0), gain.shape[0] - 1)
        levels = self._levels(gain, envelope, scale)
        if self.weights is not None and (self.track is None or times is None):
            out = self._evaluate(*self._read(gain, rate, levels, envelope), rate, gain.shape[0], slope, segments)
        else:
            out = self.relative(gain[ref], rate, envelope, float(levels[ref]), n_rows=gain.shape[0], times=times,
                                slope=slope, segments=segments)
        return tuple(a * levels[:, None] for a in out)

    def _read(self, gain: np.ndarray, rate: float, levels: np.ndarray,
              envelope: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """The fundamental's amplitude and phase read from gain sequences at their plateau ``levels``: pooled over
        the channels of :attr:`weights`, else the reference's, as :meth:`relative` reads it."""
        if self.weights is not None:
            return fundamental(relative_deviation(gain, levels[:, None], envelope), rate, self.heart_hz, self.weights)
        if self.ref < 0:
            raise ValueError("the pulse model needs the reference channel's gain, or a track and times")
        return _amplitude_phase(relative_deviation(gain[self.ref], float(levels[self.ref]), envelope), rate,
                                self.heart_hz)

    @staticmethod
    def _levels(gain: np.ndarray, envelope: np.ndarray | None, scale) -> np.ndarray:
        """Each sequence's plateau level: ``scale`` (one, or one per row), else its plateau median (its mean
        without an ``envelope``)."""
        if scale is None:
            return np.array([_plateau_median(row, envelope) if envelope is not None else float(np.mean(row))
                             for row in gain])
        return np.broadcast_to(np.atleast_1d(np.asarray(scale, dtype=np.float64)), (gain.shape[0],))

    def as_held(self, gain: np.ndarray, rate: float, shift: np.ndarray, first: int, per_cycle: int) -> np.ndarray:
        """The pulse's harmonics in raw segment gains of a stretch of plateau, as each part of the cycle holds them.

        ``gain`` (one row per channel of the model, ``rate`` a second) are
        the gains :func:`fit_pulse` was given, ``shift``, ``first`` and
        ``per_cycle`` where they stood as there. The fundamental is read
        from them as :meth:`parts` reads it; each harmonic is then seen
        through its part of the cycle's weights and the move to the middles
        (:func:`artifactclean.modulation.as_seen`), as the fit saw it, not as
        the parts' mean (:meth:`parts` with ``segments``): the parts'
        pattern puts images of a harmonic at the stimulation frequency less
        it (10 - 4.07 Hz), a line of the raw gain that :meth:`parts` leaves.
        Without :attr:`seen_by_part`, :meth:`parts`' fitted harmonics.
        """
        gain = np.atleast_2d(gain)
        if self.seen_by_part is None:
            return self.parts(gain, rate, segments=True)[0]
        levels = self._levels(gain, None, None)
        hs, coefs = self._carried(rate, gain.shape[0])
        reg = _harmonic_regressors(*self._read(gain, rate, levels), hs)
        shift = np.atleast_2d(shift)
        out = np.empty_like(gain, dtype=np.float64)
        for c in range(gain.shape[0]):
            out[c] = np.real(coefs[c] @ as_seen(reg, self.seen_by_part[c], first, shift[c], per_cycle))
        return out * levels[:, None]


def relative_deviation(gain: np.ndarray, level, envelope: np.ndarray | None = None) -> np.ndarray:
    """A gain sequence over its plateau ``level`` (0 taken as 1), less the block's ``envelope`` (less 1
    without one); 0 where the envelope is below the foot: what the heartbeat's fundamental is read from."""
    level = np.where(np.asarray(level) != 0, level, 1.0)
    if envelope is None:
        return (gain - level) / level
    return np.where(envelope < _FOOT, 0.0, gain / level - envelope)


def _plateau_median(seq: np.ndarray, envelope: np.ndarray | None) -> float:
    """The sequence's level: its median on the envelope's plateau (:func:`plateau_level`), or overall."""
    return float(np.median(seq)) if envelope is None else float(plateau_level(seq, envelope)[0])


def _band_lowpass(heart_hz: float, rate: float) -> np.ndarray:
    """The low-pass that, moved to ``heart_hz``, is :func:`_band`."""
    return signal.firwin(2 * int(PULSE_HALF_S * rate) + 1, min(_WIDTH * heart_hz, 0.45 * rate), fs=rate)


def _band(heart_hz: float, rate: float) -> np.ndarray:
    """Complex FIR taps passing ``heart_hz`` +- :data:`_WIDTH` of it, positive frequencies only, unit gain."""
    lp = _band_lowpass(heart_hz, rate)
    t = (np.arange(lp.size) - lp.size // 2) / rate
    return lp * np.exp(2j * np.pi * heart_hz * t)


def _weighted_lowpass(seq: np.ndarray, weights: np.ndarray, taps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``seq`` (sequences along the last axis, complex or real) low-passed by ``taps`` with ``weights`` (one
    per element, normalised convolution), read at each element itself, and the weights' coverage there (0
    where too little); the weights' sums are taken once for every sequence.

    Where the weights fall off (a block's edges and ramps) the taps see one
    side: the normalised mean stands for the weights' centroid, ``c`` elements
    away, and is moved back by ``c`` times its own slope. Where the weights
    are 1 over the taps' reach, the plain convolution (``taps`` sum to 1).
    Elements covered by less than :data:`_COVERED` of the best take the
    nearest covered element's mean: there is nothing there to read.
    """
    conv = lambda x: ndimage.convolve1d(x, taps, axis=-1, mode="constant")  # noqa: E731
    h = taps.size // 2
    s0 = conv(weights)
    good = s0 > _COVERED * max(float(np.max(s0)), 1e-300)
    if not good.any():
        return np.zeros_like(seq), np.zeros_like(s0)
    # convolve1d takes element n - j with tap h + j: its offset from n is -j
    s1 = ndimage.convolve1d(weights, -taps * (np.arange(taps.size) - h), mode="constant")
    div = np.where(good, s0, 1.0)
    idx, at = np.arange(s0.size), np.flatnonzero(good)

    def held(x):
        return np.apply_along_axis(lambda row: np.interp(idx, at, row[at]), -1, x)

    if np.iscomplexobj(seq):
        mean = held(conv(weights * seq.real) / div) + 1j * held(conv(weights * seq.imag) / div)
    else:
        mean = held(conv(weights * seq) / div)
    if mean.shape[-1] < 2:
        return mean, np.where(good, s0, 0.0)
    centroid = np.where(good, s1 / div, 0.0)
    return mean - centroid * np.gradient(mean, axis=-1), np.where(good, s0, 0.0)


def _baseband_fundamental(dev: np.ndarray, rate: float, heart_hz: float,
                          envelope: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The heartbeat's fundamental in a block's relative gain deviation ``dev`` (one sequence), read through
    its ramps, at baseband (times ``exp(-2 pi i heart_hz n / rate)``), and where it can be read (coverage).

    ``dev`` is the modulation times the block's ``envelope`` over a floor that
    the envelope does not scale. Divided by the envelope and weighted by it,
    the band-pass is a normalised convolution whose taps see one side at the
    block's edges (see :func:`_weighted_lowpass`; a plain band-pass of
    ``dev``, a mean over a one-sided window of a heartbeat off the band's
    centre, stood 0.1-0.3 rad off its phase within a ramp). The weights
    trade the floor, which the envelope's square would weigh down, against
    a ramp's own reading (session 23, 10 Hz acceptance traces, LFP away:
    squared 0.056 / 0.055 / 0.055, the envelope 0.054 / 0.054 / 0.055, none
    0.055 / 0.059 / 0.067).
    """
    mod, weights = _read_through(dev, envelope)
    rot = np.exp(-2j * np.pi * heart_hz * np.arange(mod.shape[-1]) / rate)
    return _weighted_lowpass(mod * rot, weights, _band_lowpass(heart_hz, rate))


def _read_through(dev: np.ndarray, envelope: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A block's relative gain deviation divided by its ``envelope`` (the modulation; 0 below the foot), and
    the weights it is read with (the envelope; see :func:`_baseband_fundamental`)."""
    env = np.asarray(envelope, dtype=np.float64)
    inside = env >= _FOOT
    mod = np.where(inside, np.asarray(dev, dtype=np.float64) / np.where(inside, env, 1.0), 0.0)
    return mod, np.where(inside, env, 0.0)


def _analytic(dev: np.ndarray, rate: float, heart_hz: float) -> np.ndarray:
    """The heartbeat's fundamental in ``dev`` (rows, or one sequence) as a complex band-passed signal."""
    taps = _band(heart_hz, rate)
    # a real cosine of amplitude A gives A/2 exp(i phi): the harmonics' coefficients are relative to A/2
    return (ndimage.convolve1d(dev, taps.real, axis=-1, mode="nearest")
            + 1j * ndimage.convolve1d(dev, taps.imag, axis=-1, mode="nearest"))


def _smoothing_taps(rate: float, smooth_hz: float) -> np.ndarray:
    """The low-pass (unit sum) that smooths the heartbeat's phase and amplitude to ``smooth_hz``."""
    lp = signal.firwin(2 * int(PULSE_HALF_S * rate) + 1, min(smooth_hz, 0.45 * rate), fs=rate)
    return lp / lp.sum()


def _smooth_fundamental(c: np.ndarray, rate: float,
                        smooth_hz: float = _SMOOTH_HZ) -> tuple[np.ndarray, np.ndarray]:
    """Amplitude and unwrapped phase of the complex fundamental ``c``, smoothed to ``smooth_hz``."""
    # the band holds neural floor besides the line; the heartbeat's rate and strength change more slowly than
    # that floor, so phase and amplitude are smoothed further (a linear phase passes a symmetric FIR unchanged)
    lp = _smoothing_taps(rate, smooth_hz)
    ph = ndimage.convolve1d(np.unwrap(np.angle(c)), lp, mode="nearest")
    amp = ndimage.convolve1d(np.abs(c), lp, mode="nearest")
    return amp, ph


def _smooth_baseband(cb: np.ndarray, coverage: np.ndarray, rate: float, heart_hz: float, envelope: np.ndarray,
                     smooth_hz: float = _SMOOTH_HZ) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_smooth_fundamental` of a block's baseband fundamental ``cb`` read through its ramps
    (:func:`_baseband_fundamental`): phase and amplitude smoothed with the band-pass's ``coverage`` as weights,
    the amplitude given back times the ``envelope`` (as a deviation from the plateau carries it)."""
    lp = _smoothing_taps(rate, smooth_hz)
    (ph, amp), _ = _weighted_lowpass(np.stack((np.unwrap(np.angle(cb)), np.abs(cb))), coverage, lp)
    amp = np.maximum(amp, 0.0) * np.asarray(envelope, dtype=np.float64)
    return amp, ph + 2 * np.pi * heart_hz * np.arange(cb.shape[-1]) / rate


def _amplitude_phase(dev: np.ndarray, rate: float, heart_hz: float,
                     smooth_hz: float = _SMOOTH_HZ) -> tuple[np.ndarray, np.ndarray]:
    """Amplitude ``a(t)`` and unwrapped phase ``phi(t)`` of the heartbeat's fundamental in ``dev``."""
    return _smooth_fundamental(_analytic(dev, rate, heart_hz), rate, smooth_hz)


def _bin_covariance(z: np.ndarray, bins: np.ndarray) -> np.ndarray:
    """Cross-spectral matrix of short-time spectra ``z`` (channels, frequencies, segments) over ``bins``."""
    zs = z[:, bins, :].reshape(z.shape[0], -1)
    return (zs @ zs.conj().T) / zs.shape[1]


def _loaded(cov: np.ndarray) -> np.ndarray:
    """``cov`` loaded by :data:`_POOL_LOADING` of its mean diagonal: estimated from a few bins of seconds
    of data, it is inverted."""
    return cov + _POOL_LOADING * max(float(np.mean(np.real(np.diag(cov)))), 1e-300) * np.eye(cov.shape[0])


def pool_weights(dev: np.ndarray, rate: float, heart_hz: float, ref: int,
                 fit: slice | None = None, pool=None) -> np.ndarray | None:
    """Weights that read one heartbeat's fundamental from several channels' gains, their floors cancelling.

    Each channel's relative gain carries the same heartbeat (``k_c`` times
    the reference's, ``k_ref = 1``) over a floor of its own: the neural
    signal beside the stimulation's harmonics, divided by that channel's
    artifact amplitude. Nearby channels share most of their LFP and their
    artifacts differ in size and sign, so the floors are correlated and a
    weighted sum cancels much of them. With ``S`` the floors' cross-spectrum
    (bins between 0.5 and 0.7, and 1.3 and 1.5 times the heart rate: beside
    the line and its wander, below its second harmonic) and ``C`` the
    covariance of the band-passed fundamentals (heartbeat plus floor), the
    top generalised eigenvector ``v`` of ``(C, S)`` is ``S^-1 k`` up to a
    scale, the minimum-variance weights for a common signal of loadings ``k
    = S v`` (Capon 1969, Proc. IEEE 57; generalised least squares). At most
    :data:`_POOL_MAX` channels of ``pool`` (indices; all by default), those
    whose own line stands highest over their floor; ``S`` is loaded by
    :data:`_POOL_LOADING` of its mean diagonal, as it comes from a few bins
    of seconds of data.

    Returns
    -------
    ndarray of complex, shape (n_channels,) or None
        ``w`` with ``w^H k = 1`` (0 for channels left out), so that
        ``sum(conj(w) c)`` reads the reference's fundamental; None for one
        channel, or where the floor cannot be estimated.
    """
    dev = np.atleast_2d(dev)
    n_ch = dev.shape[0]
    if n_ch < 2:
        return None
    part = dev if fit is None else dev[:, fit]
    nper = min(part.shape[1], int(4 * rate)) // 2 * 2
    if nper < 16:
        return None
    fz, _, z = signal.stft(part, fs=rate, nperseg=nper, noverlap=nper // 2, detrend="linear",
                           boundary=None, padded=False)
    off = ((fz >= 0.5 * heart_hz) & (fz <= 0.7 * heart_hz)) | ((fz >= 1.3 * heart_hz) & (fz <= 1.5 * heart_hz))
    on = np.abs(fz - heart_hz) <= _WIDTH * heart_hz
    if not off.any() or not on.any():
        return None
    floor, line = _bin_covariance(z, off), _bin_covariance(z, on)
    diag_f = np.maximum(np.real(np.diag(floor)), 1e-300)
    # the strongest lines over their own floors, the reference always among them
    snr = np.real(np.diag(line)) / diag_f
    allowed = set(range(n_ch)) if pool is None else {int(c) for c in pool}
    order = [ref] + [int(c) for c in np.argsort(snr)[::-1] if c != ref and c in allowed]
    if len(order) < 2:
        return None
    use = np.array(sorted(order[:_POOL_MAX]))
    s_use = _loaded(floor[np.ix_(use, use)])
    try:
        _, vecs = linalg.eigh(line[np.ix_(use, use)], s_use)
    except (linalg.LinAlgError, ValueError):
        return None
    v = vecs[:, -1]
    k = s_use @ v
    r = int(np.flatnonzero(use == ref)[0])
    if abs(k[r]) <= 1e-12 * np.abs(k).max():
        return None
    k = k / k[r]
    w = np.zeros(n_ch, dtype=np.complex128)
    w[use] = v / np.conj(np.vdot(v, k))
    return w


def fundamental(dev: np.ndarray, rate: float, heart_hz: float, weights: np.ndarray | None = None,
                smooth_hz: float = _SMOOTH_HZ) -> tuple[np.ndarray, np.ndarray]:
    """Amplitude and unwrapped phase of the heartbeat's fundamental in a relative gain deviation ``dev``.

    ``dev`` is a reference channel's gain over its plateau level, less the
    block's envelope (0 where the envelope is below the foot), ``rate``
    samples a second; or, with ``weights`` (:func:`pool_weights`, one per
    row), such rows of several channels, pooled. Both are smoothed to
    ``smooth_hz`` (:data:`_SMOOTH_HZ` where the model is applied,
    :data:`_FIT_SMOOTH_HZ` where its shape is fitted). The first
    :data:`PULSE_HALF_S` s at each end hold the edge values: a track is
    read away from them, or from a whole block.
    """
    dev = np.asarray(dev, dtype=np.float64)
    if weights is None:
        return _amplitude_phase(dev, rate, heart_hz, smooth_hz)
    rows = np.atleast_2d(dev)[np.flatnonzero(weights)]
    return fundamental_of_rows(((None, rate, row) for row in rows), heart_hz, weights, smooth_hz)[1:]


def fundamental_of_rows(rows, heart_hz: float, weights: np.ndarray | None = None,
                        smooth_hz: float = _SMOOTH_HZ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`fundamental` of relative gain deviations that arrive one channel at a time.

    ``rows`` yields ``(positions, rate, dev)`` per channel, in the order of
    the nonzero ``weights`` (one row without weights), all on the same
    positions; each row's band-passed fundamental is added in as it comes,
    so only one row is held at a time. Returns the positions, amplitude
    and unwrapped phase. A row ``(positions, rate, dev, envelope)`` is a
    block's, read through its ramps (:func:`_baseband_fundamental`); every
    row then has the same envelope.
    """
    use = None if weights is None else np.asarray(weights)[np.flatnonzero(weights)]
    total, pos, rate, env, cover = None, None, None, None, None
    for k, (pos, rate, dev, *more) in enumerate(rows):
        dev = np.asarray(dev, dtype=np.float64)
        env = more[0] if more else None
        if env is not None:
            c, cover = _baseband_fundamental(dev, rate, heart_hz, env)
        else:
            c = _analytic(dev, rate, heart_hz)
        if use is not None:
            c = np.conj(use[k]) * c
        total = c if total is None else total + c
        if use is None:
            break
    if total is None:
        raise ValueError("no rows to read the heartbeat's fundamental from")
    if env is not None:
        amp, ph = _smooth_baseband(total, cover, rate, heart_hz, env, smooth_hz)
    else:
        amp, ph = _smooth_fundamental(total, rate, smooth_hz)
    return pos, amp, ph


def _harmonic_readings(rows, model: "PulseModel", phase: np.ndarray, smooth_hz: float, densities: bool = False,
                       harmonics=None):
    """Per harmonic number ``h`` (1 the fundamental) of ``model`` (those in ``harmonics`` only, when given):
    the ``rows`` (see :func:`harmonic_phase`) demodulated at ``h phase``, combined over channels as the model
    reads that harmonic and smoothed to ``smooth_hz``; with ``densities``, also the combination's floor density
    beside it on the plateau and the plateau's mask. Yields ``(h, reading)`` or ``(h, reading, density,
    plateau)``."""
    rows = list(rows)
    rate = rows[0][1]
    env = np.asarray(rows[0][3], dtype=np.float64) if len(rows[0]) > 3 else np.ones(len(rows[0][2]))
    read = [_read_through(r[2], env) for r in rows]
    mods, weights = [m for m, _ in read], read[0][1]
    plateau = env > _PLATEAU_ENV
    nper = min(int(4 * rate), int(plateau.sum())) // 2 * 2
    chans = model.pooled()
    demod = []
    for h in range(1, model.coefs.shape[1] + 2):
        if harmonics is not None and h not in harmonics:
            continue
        if h == 1:
            comb = np.ones(len(chans)) if model.weights is None else np.conj(model.weights[chans])
        else:
            comb = np.conj(model.seen_coefs(rate)[chans, h - 2])
        if np.any(comb != 0):
            demod.append((h, sum(c * m for c, m in zip(comb, mods)) * np.exp(-1j * h * phase)))
    if not demod:
        return
    readings, _ = _weighted_lowpass(np.stack([q for _, q in demod]), weights, _smoothing_taps(rate, smooth_hz))
    for (h, q), r in zip(demod, readings):
        if not densities:
            yield h, r
            continue
        if nper < 16:
            return
        # the floor beside the line: between the heart rate's multiples, where the other harmonics lie
        fz, pz = signal.welch(q[plateau], fs=rate, nperseg=nper, return_onesided=False)
        beside = (np.abs(fz) >= 0.35 * model.heart_hz) & (np.abs(fz) <= 0.65 * model.heart_hz)
        yield h, r, (float(np.median(pz[beside])) if beside.any() else 0.0), plateau


def phase_information(rows, model: "PulseModel", phase: np.ndarray,
                      smooth_hz: float = _SMOOTH_HZ) -> tuple[np.ndarray, np.ndarray]:
    """What each harmonic of ``model`` knows of the heartbeat's phase, and its reading's mean error.

    For :func:`harmonic_phase`, measured once (on the plan's stretch, by
    :func:`fit_pulse`) so that a block read in parts reads every part alike.
    The information of harmonic ``h`` is ``h^2`` times its power over its
    floor's density (a sinusoid's phase estimate has a variance of the floor
    over the power: Kay 1993, Fundamentals of Statistical Signal Processing
    I, the Cramer-Rao bound of a sinusoid's phase, from memory); its power
    is that of its reading's mean on the plateau, what stays locked to the
    phase: a line beside the harmonic that wanders against it, and the
    floor within the smoothing's band, hold none of the phase (a 0.8 Hz
    heart at 20 Hz: a 6th harmonic fitted at 0.008 of the fundamental read
    3.8 times the floor's share from such a line, took 0.64 of the track's
    weight, and its errors times 2 and 3 on the strong harmonics left 0.091
    of the LFP away from the stimulation's harmonics; 0.025 with the mean).
    Its mean error is that mean's phase over ``h`` (what the shape's fit
    leaves between the harmonic and the fundamental).

    Returns
    -------
    info, offset : ndarray, shape (n_harmonics + 1,)
        Index 0 is the fundamental (offset 0); 0 information for a harmonic
        the model does not have.
    """
    info = np.zeros(model.coefs.shape[1] + 1)
    offset = np.zeros_like(info)
    for h, r, density, plateau in _harmonic_readings(rows, model, phase, smooth_hz, densities=True):
        if density > 0 and plateau.any():
            mean = np.mean(r[plateau])
            info[h - 1] = h ** 2 * abs(mean) ** 2 / density
            offset[h - 1] = 0.0 if h == 1 else float(np.angle(mean)) / h
    return info, offset


def harmonic_phase(rows, model: "PulseModel", phase: np.ndarray, smooth_hz: float = _SMOOTH_HZ,
                   up_to_hz: float = np.inf) -> np.ndarray:
    """The heartbeat's ``phase`` read from its fundamental, refined with its harmonics.

    ``rows`` are the ``(positions, rate, dev[, envelope])`` the phase was
    read from (:func:`fundamental_of_rows`; ``model.pooled()`` channels, in
    that order), ``phase`` is at their positions. Each harmonic ``h`` of the
    fitted shape holds the phase too, ``h`` times: the rows demodulated at
    ``h phase`` and combined by the shape's coefficients, smoothed to
    ``smooth_hz``, show ``h`` times the phase's error (less the reading's
    mean error, ``model.phase_offset``). The readings are weighted by their
    information (``model.phase_info``, :func:`phase_information`), the
    fundamental's (no change) among them. On the 10 Hz acceptance traces the
    harmonics held a third of it. A model without that information is left
    as it was.

    Harmonics above ``up_to_hz`` are not read: give it the stimulation
    frequency less the heart rate. Nearer the stimulation frequency a
    change of gain within a cycle is told from one of the cycle's shape
    less well (session 23: at 5 Hz the 4 and 6 Hz harmonics made the LFP
    error away from the harmonics worse, 0.107 -> 0.128 and 0.108 -> 0.148,
    and at 10 Hz a 10 Hz one, 0.050 -> 0.054).
    """
    rows = list(rows)
    if not rows or model.phase_info is None:
        return phase
    info, offset = model.phase_info, model.phase_offset
    use = [h for h in range(2, info.size + 1) if info[h - 1] > 0 and h * model.heart_hz <= up_to_hz]
    total = info[0] + sum(info[h - 1] for h in use)
    if not use or not total > 0:
        return phase
    moved = 0.0
    for h, r in _harmonic_readings(rows, model, phase, smooth_hz, harmonics=use):
        moved = moved + info[h - 1] * np.angle(r * np.exp(-1j * h * offset[h - 1])) / h
    return phase + moved / total


def join_tracks(parts, heart_hz: float, fs: float) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """One track from consecutive ``(positions, amplitude, phase)`` parts, each unwrapped on its own.

    Each part's phase is moved by the whole turns that continue the
    previous part's last phase at the heart rate (``positions`` are
    samples at ``fs``). None if no part holds a sample.
    """
    ts, amps, phs = [], [], []
    for t, a, p in parts:
        if not len(t):
            continue
        if ts:
            expect = phs[-1][-1] + 2 * np.pi * heart_hz * (t[0] - ts[-1][-1]) / fs
            p = p + 2 * np.pi * np.round((expect - p[0]) / (2 * np.pi))
        ts.append(np.asarray(t, dtype=np.float64))
        amps.append(np.asarray(a, dtype=np.float64))
        phs.append(np.asarray(p, dtype=np.float64))
    if not ts:
        return None
    return np.concatenate(ts), np.concatenate(amps), np.concatenate(phs)


def _regressors(dev: np.ndarray, rate: float, heart_hz: float, hs: np.ndarray,
                weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``a(t) exp(i h phi(t))`` for each harmonic number in ``hs``, from the fundamental of ``dev``
    (one row, or rows pooled with ``weights``), and their derivatives per sample.

    The derivatives are :func:`_log_slope` times the regressors.
    """
    amp, ph = fundamental(dev, rate, heart_hz, weights, _FIT_SMOOTH_HZ)
    reg = _harmonic_regressors(amp, ph, hs)
    return reg, reg * _log_slope(amp, ph, hs)


def _slow_basis(n: int, rate: float, below_hz: float) -> np.ndarray:
    """Cosines of the type II discrete cosine transform of ``n`` samples up to ``below_hz``, one per row.

    Fitted beside the heartbeat's harmonics they take what is slower than its fundamental (respiration,
    the slowest LFP) out of the fit. Over a few seconds two lines hertz apart are not orthogonal, and
    respiration stands thousands of times above the floor the harmonics are judged against: without them
    a sinusoidal 1.58 Hz heart at 10 Hz got harmonics 2-6 (the 6th, at 9.55 Hz, 0.39 of its fundamental;
    session 26), and their sidebands left 18 times the neural power within 3 Hz of 20 Hz.
    """
    k = np.arange(int(np.floor(2 * n * below_hz / rate)) + 1)
    return np.cos(np.pi * k[:, None] * (np.arange(n) + 0.5)[None, :] / n)


def _harmonic_regressors(amp: np.ndarray, ph: np.ndarray, hs) -> np.ndarray:
    """``a exp(i h phi)``, one row per harmonic number in ``hs``."""
    return amp[None, :] * np.exp(1j * np.asarray(hs)[:, None] * ph[None, :])


def _log_slope(amp: np.ndarray, ph: np.ndarray, hs) -> np.ndarray:
    """``a' / a + i h phi'`` per element (rows: ``hs``): the slope of :func:`_harmonic_regressors` over
    themselves. ``a`` and ``phi`` are slow and their differences exact where a harmonic's own
    (``numpy.gradient``: 0.76 of the slope of a 6 Hz harmonic at 30 a second) are not."""
    rel = np.gradient(amp) / np.maximum(amp, 1e-300)
    return rel[None, :] + 1j * np.asarray(hs)[:, None] * np.gradient(ph)[None, :]


def _variance_of_fit(freqs: np.ndarray, psd: np.ndarray, hz: float, t_fit: float, amp2: float) -> float:
    """Variance of a harmonic's least-squares coefficient at ``hz`` over a floor of density ``psd``.

    The fit is on Re and Im of ``a exp(i h phi)`` (each summing to ``N a^2 /
    2``) over ``t_fit`` seconds; with a one-sided density ``S`` (the median
    within 1 Hz of ``hz``: lines do not move it) each part's variance is ``S
    / (T a^2)`` and ``|beta - truth|^2`` averages ``2 S / (T a^2)``.
    """
    near = np.abs(freqs - hz) <= 1.0
    s_h = float(np.median(psd[near])) if near.any() else float(np.median(psd))
    return max(2 * s_h / (t_fit * max(amp2, 1e-300)), 1e-300)


def _shape_weights(resid: np.ndarray, k: np.ndarray, rate: float, hz: np.ndarray, nper: int) -> np.ndarray:
    """Weights ``a`` (n_channels, n_harmonics) of the pooled shape ``B_h = sum_c a_c beta_ch``.

    Generalised least squares of ``beta_h = k B_h`` over the floors'
    cross-spectrum ``S`` within 1 Hz of each harmonic (from the fits'
    residuals; loaded by :data:`_POOL_LOADING` of its mean diagonal):
    ``a = conj(S^-1 k) / (k^H S^-1 k)`` (Aitken 1935, Proc. R. Soc. Edinb.
    55, from memory). Floors the channels share cancel, as in
    :func:`pool_weights`.
    """
    n_ch = resid.shape[0]
    fz, _, z = signal.stft(resid, fs=rate, nperseg=nper, noverlap=nper // 2, detrend="constant",
                           boundary=None, padded=False)
    out = np.zeros((n_ch, len(hz)), dtype=np.complex128)
    for j, h in enumerate(hz):
        near = np.abs(fz - h) <= 1.0
        if not near.any() or not z.shape[-1]:
            continue
        try:
            v = linalg.solve(_loaded(_bin_covariance(z, near)), k, assume_a="her")
        except (linalg.LinAlgError, ValueError):
            continue
        norm = float(np.real(np.vdot(k, v)))
        if norm > 0:
            out[:, j] = np.conj(v) / norm
    return out


def _pooled_variance(resid: np.ndarray, a: np.ndarray, rate: float, hz: np.ndarray, t_fit: float,
                     amp2: float, nper: int) -> np.ndarray:
    """Variance of each pooled coefficient ``sum_c a_c beta_c`` (``a``: (n_channels, n_harmonics)).

    The channels' floors are not independent (nearby contacts share their
    LFP), so the variance is not the sum of theirs: each coefficient's error
    is the fit of ``z = sum_c a_c resid_c`` (a complex sequence: ``beta``
    reads ``sum z conj(a exp(i h phi))``, its positive-frequency Fourier
    coefficient), whose two-sided density at ``+hz``, doubled, takes the
    place of ``S`` in :func:`_variance_of_fit`. With independent floors this
    is ``sum |a_c|^2 var_c``; with the floors shared by four channels, up to
    four times that.
    """
    out = np.empty(len(hz))
    for j, h in enumerate(hz):
        z = a[:, j] @ resid
        fz, pz = signal.welch(z, fs=rate, nperseg=nper, return_onesided=False)
        out[j] = _variance_of_fit(fz, 2 * pz, h, t_fit, amp2)
    return out


def heart_rate(dev: np.ndarray, rate: float, band: tuple[float, float] = HEART_HZ) -> float | None:
    """The heart rate (Hz) whose line stands out in gain deviations ``dev``, or None.

    ``dev`` (n_channels, n_samples) are gains less their means, ``rate``
    samples a second. Each channel's Welch spectrum (4 s Hann segments) is
    divided by its running median over 2 Hz (the floor) and the ratios are
    averaged over channels. Lines in ``band`` (Hz; people and monkeys by
    default, :data:`HEART_HZ`) that stand :data:`_HEART_LINE` times their
    floor are candidates, and half of one where its half and one and a half
    are lines of their own (:func:`_line_at`) standing :data:`_HALF_LINE`
    times their floors (a slow heart whose 2nd harmonic stands higher than
    its fundamental); the candidate whose first three
    harmonics stand out most wins (a harmonic sum, after Noll 1969, J.
    Acoust. Soc. Am., from memory). The rate is the power-weighted mean of
    the line's peak bin and its neighbours (of the line's, halved, for a
    half). None where a 4 s segment holds fewer than 16 samples or no line
    stands out.
    """
    dev = np.atleast_2d(np.asarray(dev, dtype=np.float64))
    nper = min(dev.shape[1], int(4 * rate)) // 2 * 2
    if nper < 16:
        return None
    freqs, p = signal.welch(dev, fs=rate, nperseg=nper, detrend="linear", axis=-1)
    floor = ndimage.median_filter(p, size=(1, max(3, int(round(2.0 / freqs[1])) | 1)), mode="nearest")
    score = np.mean(p / np.maximum(floor, 1e-300), axis=0)
    in_band = (freqs >= band[0]) & (freqs <= band[1])
    if not in_band.any():
        return None
    # the fundamental, not a harmonic: of the lines in the band, the one whose first harmonics stand out most
    # too (a harmonic sum, after Noll 1969, J. Acoust. Soc. Am., from memory); a slow heart's fundamental
    # shares its floor's window with respiration and its own harmonic, and may stand less high than that
    peak = ndimage.maximum_filter1d(score, 3)
    lines = np.flatnonzero(in_band & (peak >= _HEART_LINE) & (score == peak))
    if not lines.size:
        return None
    # a candidate's multiples are read over a bin on either side, but not from below the band: respiration's
    # line (0.2-0.5 Hz) beside half a 1.2 Hz heart made it pass for one (10 Hz stimulation, seeds 1 and 3: the
    # pulse modelled at 0.6 Hz, LFP error away from the harmonics 0.24-0.26 instead of 0.04)
    near_band = ndimage.maximum_filter1d(np.where(freqs >= band[0] - freqs[1], score, 0.0), 3)
    at = lambda hz: near_band[min(int(round(hz / freqs[1])), near_band.size - 1)]  # noqa: E731
    # a slow heart's fundamental may stand under the threshold while its 2nd harmonic passes (the floor
    # rises towards the stimulation's carrier): half a passing line competes too where the half and one and
    # a half of it stand out (a false half still needs harmonics phase-locked to it: :func:`fit_pulse`)
    cands = [(freqs[i], i, 1) for i in lines]
    cands += [(freqs[i] / 2, i, 2) for i in lines if freqs[i] / 2 >= band[0]
              and min(_line_at(score, peak, freqs, freqs[i] / 2), _line_at(score, peak, freqs, 1.5 * freqs[i]))
              >= _HALF_LINE]
    total = [sum(np.log(max(at(h * hz), 1.0)) for h in (1, 2, 3)) for hz, _, _ in cands]
    _, i, div = cands[int(np.argmax(total))]
    # the line's bin is where its power peaks: beside a strong line the floor falls steeply, and its score may
    # peak a bin away, in the window's leakage (a 1.2 Hz heart at 20 Hz, 4 s Hann segments: read at 1.28 Hz)
    near = slice(max(i - 1, 0), i + 2)
    i = near.start + int(np.argmax(p[:, near].sum(axis=0)))
    # between bins: the power-weighted mean of the line's bin and its neighbours (for a half, of the line's)
    near = slice(max(i - 1, 0), i + 2)
    return float(np.sum(freqs[near] * p[:, near].sum(axis=0)) / np.sum(p[:, near])) / div


def _line_at(score: np.ndarray, peak: np.ndarray, freqs: np.ndarray, hz: float) -> float:
    """Score of a line at ``hz``: a local maximum of ``score`` (``peak``, its running maximum over 3 bins)
    in one of the two bins around ``hz``; 0 where neither is one.

    A half heart must be a line of its own: read over a bin on either side, respiration's main lobe
    (0.5 Hz wide either way in 4 s Hann segments) lent its score to half a 1.58 Hz heart, and the pulse
    was modelled at 0.79 Hz with harmonics 5-6 times its fundamental (session 26)."""
    j = hz / freqs[1]
    bins = {int(np.floor(j)), int(np.ceil(j))}
    return max((float(score[k]) for k in bins if 0 <= k < score.size and score[k] == peak[k]), default=0.0)


def fit_pulse(gain: np.ndarray, rate: float, *, max_hz: float, ref: int = 0, pool=None,
              shift: np.ndarray | None = None, per_cycle: int = 1, cycle: np.ndarray | None = None,
              first: int = 0, band: tuple[float, float] = HEART_HZ, beyond: bool = True) -> PulseModel | None:
    """Find a heartbeat in ``gain`` and fit its harmonics' ratios to its fundamental.

    Parameters
    ----------
    gain : ndarray, shape (n_channels, n_segments)
        Raw gain sequences of a stretch of plateau (see
        :func:`artifactclean.modulation.segment_gain`).
    rate : float
        Gain samples per second.
    max_hz : float
        Highest modulation frequency the gain may follow (the tracking
        limit; harmonics to :data:`_RATE_WANDER` beyond it are modelled as
        within it).
    beyond : bool
        Model harmonics beyond ``max_hz`` too, as far as the gain's samples
        hold them (0.45 of ``rate``), each only while every harmonic below
        it stands out of the floor: the gain's filter takes off all beyond
        the limit, so a harmonic left unmodelled there stays as sidebands
        beside every stimulation harmonic, and a pulse's harmonics fall off
        smoothly (an alpha-shaped pulse's as ``1 / k^2``,
        :func:`artifactclean.synthetic.alpha_pulse_harmonics`), so a line
        beyond the limit after one that does not stand out is the floor's.
        False: none beyond the limit.
    ref : int
        Row whose fundamental gives the heartbeat's phase to all, with those
        of up to :data:`_POOL_MAX` - 1 more rows of ``pool`` (indices; all
        by default; leave out clipped channels, whose gains show the rails'
        edges) where they can be pooled (:func:`pool_weights`).
    shift : ndarray, shape of ``gain``, optional
        Where each raw gain stood before it was moved to its segment's
        middle (``per_cycle`` segments a cycle; see
        :func:`artifactclean.modulation.segment_gain`): each channel's
        harmonics are fitted as the move left them in its gains
        (:func:`artifactclean.modulation.as_moved`, to first order), not as
        at the middles.
    cycle : ndarray, shape (n_channels, n_bins), optional
        With ``shift``: the mean cycles the gains were fitted against
        (:func:`artifactclean.modulation.segment_gain` with
        ``return_cycle``), ``first`` the number of the first gain's segment.
        Each channel's harmonics are then fitted as its segments see them
        exactly (:func:`artifactclean.modulation.segment_transfer`,
        :func:`artifactclean.modulation.as_seen`), and the model keeps how
        (:attr:`PulseModel.seen`). Without it a segment is taken for a plain
        mean of the modulation.

    Returns
    -------
    PulseModel or None
        None without a heartbeat line within ``band``, or without any
        harmonic that stands out of the floor.
    """
    gain = np.atleast_2d(np.asarray(gain, dtype=np.float64))
    n = gain.shape[1]
    nper = min(n, int(4 * rate)) // 2 * 2
    if nper < 16 or n < 8 * rate:
        return None  # under about 8 s: too few heartbeats to fit a shape
    dev = gain - gain.mean(axis=1, keepdims=True)
    heart = heart_rate(dev, rate, band)
    if heart is None:
        return None
    # harmonics 2 .. within + 1 lie within the tracking limit; up to n_harm + 1 where the gain's samples hold them
    within = int(min(_MAX_HARMONICS, np.floor(min(max_hz * (1 + _RATE_WANDER), 0.45 * rate) / heart) - 1))
    n_harm = int(min(_MAX_HARMONICS, np.floor(0.45 * rate / heart) - 1)) if beyond else within
    if within < 1:
        return None
    # fit away from the sequence's ends, where the band-pass holds the edge value
    edge = int(PULSE_HALF_S * rate)
    fit = slice(edge, n - edge) if n - 2 * edge >= 4 * rate else slice(0, n)
    t_fit = (fit.stop - fit.start) / rate
    hs = np.arange(1, n_harm + 2)
    # the heartbeat's phase from every strong channel, their shared floor cancelled; the reference's alone
    # where it cannot be pooled
    weights = pool_weights(dev, rate, heart, ref, fit, pool)
    r_all, dr_all = _regressors(dev[ref] if weights is None else dev, rate, heart, hs, weights)
    r = r_all[:, fit]
    amp2 = np.mean(np.abs(r[0]) ** 2)  # a(t)^2: the same for every harmonic
    # each channel's fit: its fundamental relative to the reference's (k) and its harmonics (beta); with the
    # gains' shifts, on the regressors as the move to the middles left them in that channel's gains (a cycle's
    # mean takes half the slope of a 6 Hz harmonic at 10 Hz off: its fitted phase was 0.1 rad behind)
    b = np.empty((dev.shape[0], hs.size), dtype=np.complex128)
    resid = np.empty_like(dev[:, fit])

    # respiration and the slowest LFP are fitted beside the harmonics, not left for them to correlate with
    slow = _slow_basis(fit.stop - fit.start, rate, _SLOW_FRACTION * heart)

    def solve(rc, rows):
        design = np.concatenate((rc.real, rc.imag, slow)).T
        sol, *_ = np.linalg.lstsq(design, dev[rows, fit].T, rcond=None)
        b[rows] = (sol[:hs.size] - 1j * sol[hs.size:2 * hs.size]).T  # Re(b z) = Re(b) Re(z) - Im(b) Im(z)
        resid[rows] = dev[rows, fit] - (design @ sol).T

    held = None
    if shift is None:
        solve(r, slice(None))
    elif cycle is not None:
        # a segment's gain is a weighted mean of the modulation whose weights change sign within the segment:
        # 1.09 of a 6 Hz harmonic at 5 Hz, 5 segments a cycle, where a plain mean gives 0.91 (segment_transfer)
        transfer = segment_transfer(cycle, per_cycle, rate / per_cycle, heart * hs)
        for c in range(dev.shape[0]):
            solve(as_seen(r_all, transfer[c], first, shift[c], per_cycle)[:, fit], slice(c, c + 1))
        held = seen_by_segments(cycle, per_cycle, rate / per_cycle, first, shift, heart * hs[1:], transfer[:, :, 1:])
    else:
        for c in range(dev.shape[0]):
            solve(as_moved(r_all, shift[c], per_cycle, dr_all)[:, fit], slice(c, c + 1))
    k, beta = b[:, 0], b[:, 1:]
    nper_fit = min(nper, resid.shape[1] // 2 * 2)
    # one heartbeat, one pulse shape: channels differ in how strongly they carry it (k) over floors they partly
    # share, so the shape is pooled over channels by generalised least squares of beta = k B
    a = _shape_weights(resid, k, rate, heart * hs[1:], nper_fit)
    shape = (a * beta).sum(axis=0)
    stat = np.abs(shape) ** 2 / _pooled_variance(resid, a, rate, heart * hs[1:], t_fit, amp2, nper_fit)
    # shrunk by how far each harmonic stands out of the floor (none at about the floor's own fit)
    shrink = np.clip(1.0 - _SIGNIFICANCE / np.maximum(stat, 1e-300), 0.0, 1.0)
    # beyond the tracking limit only an unbroken run of harmonics: on a sinusoidal heart every harmonic the gain's
    # rate holds, each tested alone, made the floor's chance lines into harmonics (session 28: LFP away 0.039 ->
    # 0.046 at 10 Hz on one draw)
    if n_harm > within:
        run = np.cumprod(shrink[within - 1:] > 0)[1:]  # from the last harmonic within the limit
        shrink[within:] *= run
    coefs = k[:, None] * (shape * shrink)[None, :]
    if held is None:
        # fitted as the gains hold them; a plain mean over each segment holds sinc(f / rate) of the modulation
        coefs = coefs / np.sinc(hs[1:] * heart / rate)[None, :]
    if not np.any(coefs != 0):
        return None
    model = PulseModel(heart, coefs, int(ref), weights=weights, seen=held,
                       seen_by_part=None if held is None else transfer[:, :, 1:])
    # what each harmonic knows of the phase, measured here once (harmonic_phase), on the phase as applied
    chans = model.pooled()
    _, ph = fundamental(dev[ref] if weights is None else dev, rate, heart, weights)
    rows = [(None, rate, dev[c][fit]) for c in chans]
    model.phase_info, model.phase_offset = phase_information(rows, model, ph[fit])
    model.smooth_hz = track_smoothing(float(model.phase_info[0]))
    if model.smooth_hz != _SMOOTH_HZ:
        # each reading's mean error as the track will be smoothed
        model.phase_info, model.phase_offset = phase_information(rows, model, ph[fit], model.smooth_hz)
    return model


def track_smoothing(information: float) -> float:
    """What the heartbeat's track is smoothed to (Hz), from what its fundamental knows of the phase.

    ``information`` is the fundamental's power over the floor's density
    beside it (Hz; :func:`phase_information`). A phase read through a floor
    has an error growing with the smoothing's bandwidth over the
    information, and a phase smoothed too much lags the heart rate's wander:
    :data:`_SMOOTH_HZ` from :data:`_INFO_FULL` up, ``(information /
    _INFO_FULL)^(1/4)`` of it below, at least :data:`_SMOOTH_MIN_HZ`.
    """
    if not information > 0:
        return _SMOOTH_HZ
    return float(np.clip(_SMOOTH_HZ * (information / _INFO_FULL) ** 0.25, _SMOOTH_MIN_HZ, _SMOOTH_HZ))
