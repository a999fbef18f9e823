"""How fast the artifact's amplitude changes, learned from the data.

Electrode impedance follows heartbeat and respiration, so the artifact is
multiplied by a slowly varying gain ``1 + m(t)``. An estimate of that gain
from the data carries, besides ``m(t)``, the neural signal near the
stimulation harmonics that projects on the artifact's shape (a floor in its
spectrum). A fixed low-pass either leaves modulation (heartbeat harmonics
above its cut-off put sidebands in the LFP) or follows the neural signal
(and removes it). Here the gain is filtered by a zero-phase FIR whose
response is a Wiener-type gain designed from the gain's own spectrum: the
modulation lines that stand out of the floor pass, the floor between them
does not.

The response is designed once per stimulation block, from the middle of its
plateau (see :meth:`TemplateSubtraction.prepare
<artifactclean.estimators.TemplateSubtraction.prepare>`), so a block cleaned
in pieces is filtered exactly as the whole block.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage, signal

from .estimators._kernels import gain_sums, quadrature_sums, segment_stats
from ._numeric import fractional_part

__all__ = ["FOLLOW_HZ", "GainResponse", "design_gain_response", "filter_sequences", "follow_below", "lowpass_taps", "plateau_level", "ramp_cutoff",
           "phase_highpass", "phase_shift", "segment_gain", "segment_phase", "segments_per_cycle", "shift_centres", "sideband_support",
           "smooth_gain", "segment_transfer", "seen_by_segments", "as_seen",
           "to_middles", "cycle_slope"]

#: below this (Hz) the row estimators' slow sequences pass: respiration (~0.2-0.5 Hz) and the
#: filter's transition
KEEP_HZ = 1.0
#: below this (Hz) the gain filter always passes: respiration and the heartbeat's fundamental and
#: first harmonics in people (a resting heart beats at about 1-1.7 Hz, common practice). There the
#: lines crowd the median that judges them (respiration, heartbeat and its harmonics fill most of
#: a 2 Hz window): a 1.2 Hz heartbeat's line passed at 0.65 and left sidebands at 8 times the
#: neural power within 3 Hz of a 20 Hz fundamental. The neural signal the gain follows here lies
#: within 2.75 Hz of each harmonic, plus the filter's transition (about 0.5 Hz, :data:`HALF_S`):
#: inside the +-3 Hz bands. At 3 Hz, the transition leaked the neural signal on one side of a
#: harmonic into the other side (10 Hz: 6.75 Hz into 13.25 Hz, LFP error away from the bands
#: 0.02 -> 0.11)
FOLLOW_HZ = 2.75
#: half-length (s) of the gain filter; its resolution is about 1 / this
HALF_S = 2.0
#: the most the gain filter restores of what segment means and interpolation take off
_MAX_BOOST = 1.5
#: envelope below which (margins, ramp feet) the gain is the envelope itself
_FOOT = 0.02
#: envelope above which a sequence is on its plateau (0.9, not 1: a data-driven envelope breathes)
_PLATEAU = 0.9


@dataclass
class GainResponse:
    """Amplitude response of the gain filter, per channel.

    Attributes
    ----------
    freqs : ndarray, shape (n_freqs,)
        From 0 to ``rate / 2`` (Hz).
    response : ndarray, shape (n_channels, n_freqs)
        Between 0 and 1.
    rate : float
        Rate (Hz) of the gain samples the response was designed for.
    phase : ndarray, shape (n_channels, n_freqs), optional
        The response for the artifact's phase shift (:func:`segment_phase`),
        designed from its own spectrum with nothing always passed.
    pulse : PulseModel, optional
        The heartbeat's harmonics (:mod:`artifactclean.pulse`), modelled
        instead of passed: the response was designed without them.
    """

    freqs: np.ndarray
    response: np.ndarray
    rate: float
    phase: np.ndarray | None = None
    pulse: object | None = None
    #: how the segment gains see a modulation at each of ``freqs`` (n_channels, n_freqs; complex), moved to
    #: their middles (:func:`seen_by_segments`); None: as a mean over each segment (``sinc``)
    seen: np.ndarray | None = None

    def rows(self, rows) -> "GainResponse":
        """The responses of channels ``rows`` only."""
        return GainResponse(self.freqs, self.response[rows], self.rate,
                            None if self.phase is None else self.phase[rows],
                            None if self.pulse is None else self.pulse.rows(rows),
                            None if self.seen is None else self.seen[rows])

    def phase_taps(self, ch: int, rate: float | None = None) -> np.ndarray | None:
        """Zero-phase FIR taps for channel ``ch``'s phase shift; None where nothing passes.

        As :meth:`taps`, but 0 at 0 Hz and not scaled to a unit gain there: the
        shift passes at its lines only (its mean is the template's).
        """
        if self.phase is None or not np.any(self.phase[ch][self.freqs > 0] > 0.5):
            return None
        phase = self.phase.copy()
        phase[:, self.freqs == 0] = 0.0
        return GainResponse(self.freqs, phase, self.rate).taps(ch, rate, unit_dc=False)

    def taps(self, ch: int, rate: float | None = None, unit_dc: bool = True,
             segments: bool = False) -> np.ndarray:
        """Symmetric FIR taps (``scipy.signal.firwin2``) for channel ``ch`` at ``rate``.

        The response ``r`` is multiplied by ``(1 / sinc(f / rate)^3) ** r``
        (at most :data:`_MAX_BOOST`): a mean over each gain segment and the
        linear interpolation between segment centres take ``sinc^3`` off a
        modulation at ``f`` (boxcar and triangle kernels, textbook Fourier
        pairs), restored in full where the response passes in full. With
        ``segments`` (the template's segment gains) and :attr:`seen`, the
        segments' own ``|seen|`` takes the place of the boxcar's ``sinc``.
        """
        rate = self.rate if rate is None else rate
        nyq = rate / 2
        f = np.concatenate((self.freqs[self.freqs < nyq], [nyq]))
        r = np.interp(f, self.freqs, self.response[ch], right=0.0)
        # a gain sample is a mean over its segment (a cycle, or part of one) and samples read the
        # gain by linear interpolation between segment centres: sinc(f / rate) times sinc^2
        # (the triangle kernel), 11% short at 6 Hz from segments at 40 Hz, 37% from cycles at 20 Hz;
        # what passes is restored in proportion to how surely it is modulation: a line barely out of
        # the floor (response well below 1) is mostly floor, which a full boost would amplify
        # (measured at 5 Hz: LFP error away from the harmonics 0.28 with this, 0.31 with full boost)
        mean = np.sinc(f / rate)
        if segments and self.seen is not None:
            mean = np.interp(f, self.freqs, np.abs(self.seen[ch]))
        boost = 1 / np.maximum(mean * np.sinc(f / rate) ** 2, 1 / _MAX_BOOST)
        r = r * boost ** r
        numtaps = 2 * int(HALF_S * rate) + 1
        taps = signal.firwin2(numtaps, f, r, fs=rate, window="hann")
        # the window smooths the response near 0 Hz too: restore a unit gain there exactly,
        # or the whole artifact would be scaled by a few per cent
        return taps / taps.sum() if unit_dc else taps

    def passed_lines(self, ch: int = 0) -> list[float]:
        """Frequencies (Hz) above :data:`FOLLOW_HZ` where the response passes more than half."""
        f, r = self.freqs, self.response[ch]
        on = (r > 0.5) & (f > FOLLOW_HZ)
        starts = np.flatnonzero(on & ~np.concatenate(([False], on[:-1])))
        return [float(f[i]) for i in starts]


def segments_per_cycle(tracking_hz: float, f: float) -> int:
    """Gain samples per cycle: at least 2.5 ``tracking_hz`` per second (1.25 times the Nyquist rate).

    No more than that: a segment shorter than needed holds a part of the cycle so nearly
    straight that the slow LFP under it passes for a change of gain (measured: 8 segments per
    5 Hz cycle left 2.9 times the neural power within 3 Hz of the fundamental, 5 segments 1.6).
    """
    return max(1, int(np.ceil(2.5 * tracking_hz / f)))


def segment_gain(x: np.ndarray, w: np.ndarray, u: np.ndarray, fs: float, f: float,
                 per_cycle: int, *, compiled: bool = True, return_shift: bool = False, return_cycle: bool = False):
    """Raw gain of each channel per part of a cycle against the stretch's mean cycle.

    Parameters
    ----------
    x, w : ndarray, shape (n_channels, n)
        Samples and their weights (0 for lost samples).
    u : ndarray, shape (n,)
        Stimulation phase in cycles (unwrapped).
    fs, f : float
        Sampling and stimulation frequency (Hz).
    per_cycle : int
        Gain samples per cycle.
    compiled : bool
        Compiled sums (numba) when installed; the same numbers as numpy's.
    return_shift : bool
        Return also where each gain stood before :func:`to_middles` moved it.
    return_cycle : bool
        Return also the mean cycle the gains are fitted against (for
        :func:`segment_transfer`).

    Returns
    -------
    gain : ndarray, shape (n_channels, n_segments)
        Least-squares scale of the mean cycle in each segment, relative to 1.
    rate : float
        Gain samples per second.
    shift : ndarray, shape (n_channels, n_segments)
        With ``return_shift``: where each gain stood, in segments from its
        segment's middle, as :func:`to_middles` took it; NaN (taken as 0)
        where the segment held too little of the cycle to be fitted and its
        gain was interpolated from its neighbours'.
    cycle : ndarray, shape (n_channels, n_bins)
        With ``return_cycle``: each channel's mean cycle less its mean, on
        ``n_bins`` equal bins of the phase (last).
    """
    n_bins = max(8, int(round(fs / f)))
    b = np.floor(fractional_part(u) * n_bins).astype(np.int64)
    useg = u * per_cycle
    seg = np.floor(useg).astype(np.int64)
    seg -= seg[0]
    n_seg = int(seg[-1]) + 1
    g = np.ones((x.shape[0], n_seg))
    x = np.ascontiguousarray(x, dtype=np.float64)
    w = np.ascontiguousarray(w, dtype=np.float64)
    # with an offset per segment: the slow LFP is an offset over part of a cycle, and
    # the part of a cycle a segment covers has a non-zero mean
    pos = useg - np.floor(useg[0])  # in segments from the first segment's start
    sw, sx, st, sxt, stt, spt, sptt, cycle = gain_sums(x, w, b, seg, n_bins, n_seg, pos, compiled=compiled,
                                                       return_cycle=True)
    sw = np.maximum(sw, 1e-12)
    mx, mt = sx / sw, st / sw
    num = sxt - sw * mx * mt
    den = stt - sw * mt * mt
    with np.errstate(invalid="ignore", divide="ignore"):
        # where each segment's gain stands (see segment_stats), in segments from its middle
        shift = (sptt - mt * spt) / den - 0.5 - np.arange(n_seg)
    for ch in range(x.shape[0]):
        ok = den[ch] > 0.1 * np.median(den[ch])
        if ok.sum() >= 2:
            g[ch] = np.interp(np.arange(n_seg), np.flatnonzero(ok), num[ch, ok] / den[ch, ok])
    shift = np.where(den > 0.1 * np.median(den, axis=1, keepdims=True), shift, np.nan)
    out = (to_middles(g, shift, per_cycle), f * per_cycle) + ((shift,) if return_shift else ())
    return out + ((cycle,) if return_cycle else ())


#: a part of the cycle whose transfer weights sum to more than this in absolute value is taken for flat
#: (:func:`segment_transfer`): a sine's part at its peak, 5 parts a cycle, sums to about 17; a part held
#: at a rail by clipping summed to 6e13, and its transfer, times the pulse, put a gain of 1e11 on the
#: channel (this project's choice)
_TRANSFER_WEIGHT = 100.0


def segment_transfer(cycle: np.ndarray, per_cycle: int, f: float, hz) -> np.ndarray:
    """How the gain of each part of a cycle sees a modulation of the artifact, per part and frequency.

    A segment's gain is the least-squares scale of the mean cycle ``t`` over
    the segment, about the segment's means (:func:`segment_gain`,
    :func:`artifactclean.estimators._kernels.segment_stats`): of an artifact
    ``a(tau) t`` it is ``sum a t (t - mean t) / sum (t - mean t)^2``, a
    weighted mean of ``a`` whose weights change sign where ``t`` and its
    deviation from the segment's mean differ in sign. For ``a = exp(2 pi i
    nu tau)``, ``tau`` from the segment's middle, that is ``H_k(nu)``: not a
    segment's plain mean (``sinc``), and larger than 1 at a few hertz where
    the weights change sign (the 3rd harmonic of a 2 Hz pulse at 5 Hz
    stimulation, 5 segments a cycle: 1.09, where a plain mean gives 0.91).

    Parameters
    ----------
    cycle : ndarray, shape (n_channels, n_bins)
        Mean cycle of each channel on equal bins of the phase (its mean
        does not matter), as :func:`segment_gain` returns it.
    per_cycle : int
        Segments per cycle; segment ``k`` holds the phases ``[k, k + 1) /
        per_cycle`` of the cycle.
    f : float
        Stimulation frequency (Hz).
    hz : array_like
        Modulation frequencies (Hz).

    Returns
    -------
    ndarray, complex, shape (n_channels, per_cycle, n_hz)
    """
    cycle = np.atleast_2d(np.asarray(cycle, dtype=np.float64))
    hz = np.atleast_1d(np.asarray(hz, dtype=np.float64))
    n_bins = cycle.shape[1]
    ph = (np.arange(n_bins) + 0.5) / n_bins
    part = np.minimum(np.floor(ph * per_cycle).astype(np.int64), per_cycle - 1)
    out = np.ones((cycle.shape[0], per_cycle, hz.size), dtype=np.complex128)
    for k in range(per_cycle):
        sel = part == k
        t = cycle[:, sel]
        dev = t - t.mean(axis=1, keepdims=True)
        den = np.sum(dev * dev, axis=1, keepdims=True)
        weights = t * dev / np.maximum(den, 1e-300)
        # a part the mean cycle holds flat (a rail in every cycle) weighs noise over nothing: its gains are
        # taken from the neighbours' (segment_gain), and it sees a modulation as a plain mean, 1
        ok = (den[:, 0] > 0) & (np.abs(weights).sum(axis=1) <= _TRANSFER_WEIGHT)
        tau = (ph[sel] - (k + 0.5) / per_cycle) / f
        out[ok, k] = weights[ok] @ np.exp(2j * np.pi * np.outer(tau, hz))
    return out


def seen_by_segments(cycle: np.ndarray, per_cycle: int, f: float, first: int, shift: np.ndarray,
                     hz, transfer: np.ndarray | None = None) -> np.ndarray:
    """How each channel's segment gains hold a modulation at each of ``hz``, moved to their middles, on average.

    The least-squares ratio of :func:`as_seen` of ``exp(2 pi i nu t)`` to
    itself over the segments of ``shift`` (each channel's, from
    :func:`segment_gain` with ``return_shift``; ``first`` the first one's
    number): :func:`segment_transfer` averaged over the cycle's parts as
    the shifts and the move leave it. ``transfer``: that of ``cycle`` at
    ``hz``, where it is at hand.

    Returns
    -------
    ndarray, complex, shape (n_channels, n_hz)
    """
    hz = np.atleast_1d(np.asarray(hz, dtype=np.float64))
    shift = np.atleast_2d(shift)
    if transfer is None:
        transfer = segment_transfer(cycle, per_cycle, f, hz)
    n = shift.shape[1]
    reg = np.exp(2j * np.pi * np.outer(hz, np.arange(n)) / (f * per_cycle))
    edge = slice(min(per_cycle + 2, n // 4), n - min(per_cycle + 2, n // 4))  # a cycle's slope needs a cycle each side
    out = np.empty((shift.shape[0], hz.size), dtype=np.complex128)
    for c in range(shift.shape[0]):
        seen = as_seen(reg, transfer[c], first, shift[c], per_cycle)
        out[c] = np.mean((np.conj(reg) * seen)[:, edge], axis=1)
    return out


def as_seen(seq: np.ndarray, transfer: np.ndarray, first: int, shift: np.ndarray, per_cycle: int) -> np.ndarray:
    """Modulations ``seq`` at the segments' middles as :func:`segment_gain`'s gains hold them.

    Each segment's gain sees a modulation through its part of the cycle's
    weights (``transfer``, :func:`segment_transfer` at the modulations'
    frequencies) and is then moved to its middle by a cycle's slope
    (:func:`to_middles`): exact for modulations whose frequency changes
    little over a segment, where :func:`as_moved` is right to first order.

    Parameters
    ----------
    seq : ndarray, complex, shape (n_mod, n_segments)
        Each modulation ``exp(2 pi i nu t)`` (times a slow amplitude) at the
        segments' middles.
    transfer : ndarray, shape (per_cycle, n_mod)
        One channel's :func:`segment_transfer` at the modulations' frequencies.
    first : int
        Number of the first segment (its part of the cycle is ``first %
        per_cycle``).
    shift : ndarray, shape (n_segments,)
        Where each gain stood (:func:`segment_gain` with ``return_shift``;
        NaN where a gain was interpolated from its neighbours', as it is here).
    per_cycle : int
    """
    seq = np.asarray(seq)
    k = (first + np.arange(seq.shape[-1])) % per_cycle
    raw = seq * transfer[k].T
    ok = np.isfinite(shift)
    if 2 <= ok.sum() < ok.size:
        at, known = np.arange(ok.size), np.flatnonzero(ok)
        raw = np.array([np.interp(at, known, r.real[ok]) + 1j * np.interp(at, known, r.imag[ok]) for r in raw])
    slope = cycle_slope(raw.real, per_cycle) + 1j * cycle_slope(raw.imag, per_cycle)
    return raw - np.clip(np.nan_to_num(shift), -3.0, 3.0) * slope


def to_middles(g: np.ndarray, shift: np.ndarray, per_cycle: int, slope: np.ndarray | None = None) -> np.ndarray:
    """Gains fitted per segment, moved from where they stand to the segments' middles.

    A gain fitted over part of a cycle stands for the template-weighted
    centre of that part (see :func:`artifactclean.estimators._kernels.segment_stats`),
    ``shift`` segments from its middle; the shifts repeat every cycle, so
    gains left at the middles carry that pattern times the gain's slope
    (lines at the heart rate +- multiples of ``f``, which the response would
    pass and the fundamental brings back down to the heart rate). Each gain
    is corrected to first order by ``slope`` (per segment), by default the
    slope of the gains' mean over a cycle (:func:`cycle_slope`, which has no
    such pattern); shifts are bounded to 3 segments.

    Parameters
    ----------
    g : ndarray, shape (n_channels, n_segments)
    shift : ndarray, same shape
        Where each gain stands, in segments from its segment's middle (0 where unknown).
    per_cycle : int
        Segments per cycle.
    """
    if slope is None:
        slope = cycle_slope(g, per_cycle)
    return g - slope * np.clip(np.nan_to_num(shift), -3.0, 3.0)


def as_moved(seq: np.ndarray, shift: np.ndarray, per_cycle: int, slope: np.ndarray | None = None) -> np.ndarray:
    """A smooth modulation ``seq`` (at the segments' middles) as :func:`to_middles` leaves it in the gains.

    A gain standing ``shift`` segments from its middle holds the modulation
    there, about ``seq + shift slope`` (``slope``: the modulation's
    derivative per segment; by default ``numpy.gradient``, which a
    modulation near the segment rate's Nyquist frequency outruns: give it
    exactly where it is known), and is moved back by the slope of a cycle's
    mean: a modulation near the stimulation frequency keeps ``shift (slope
    - cycle_slope(seq))`` (a cycle's mean takes most of its slope off).
    ``seq`` may be complex; ``shift`` broadcasts against it.
    """
    seq = np.asarray(seq)
    if seq.shape[-1] < 2:
        return seq.copy()
    if slope is None:
        slope = np.gradient(seq, axis=-1)
    if np.iscomplexobj(seq):
        kept = slope - (cycle_slope(seq.real, per_cycle) + 1j * cycle_slope(seq.imag, per_cycle))
    else:
        kept = slope - cycle_slope(seq, per_cycle)
    return seq + np.clip(np.nan_to_num(shift), -3.0, 3.0) * kept


def cycle_slope(g: np.ndarray, per_cycle: int) -> np.ndarray:
    """Slope (per segment) of the mean of ``g`` over one cycle (``per_cycle`` segments) around each segment."""
    if g.shape[-1] < 2:
        return np.zeros_like(g)
    mean = ndimage.uniform_filter1d(g, per_cycle, axis=-1, mode="nearest") if per_cycle > 1 else g
    return np.gradient(mean, axis=-1)


def phase_highpass(f: float, fs: float) -> np.ndarray:
    """Second-order sections of the zero-phase high-pass at ``f / 2`` the phase-shift fits use.

    Over a part of a cycle the slow LFP is a slope, which projects on the
    template's phase derivative; removed, the fit sees the artifact and the
    neural signal near its harmonics only. The data and both regressors go
    through the same filter (``scipy.signal.sosfiltfilt``), so the filter's
    own gain at the harmonics cancels.
    """
    return signal.butter(2, 0.5 * f, "highpass", fs=fs, output="sos")


def phase_shift(xh: np.ndarray, th: np.ndarray, dh: np.ndarray, w: np.ndarray, seg_starts: np.ndarray,
                *, compiled: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Phase shift (cycles) per segment from high-passed data, template and derivative.

    Per segment, ``xh = g th + h dh`` by least squares; the shift is ``h /
    g``. Returns the shift and a mask of the segments where it is defined
    (the two regressors told apart, ``g`` not small).
    """
    num, den, _, _ = segment_stats(xh, w, th, seg_starts, compiled=compiled)
    sxd, std_, sdd = quadrature_sums(xh, w, th, dh, seg_starts, compiled=compiled)
    det = den * sdd - std_ * std_
    ok = det > 1e-6 * np.maximum(den * sdd, 1e-300)
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.where(ok, (num * sdd - sxd * std_) / np.where(ok, det, 1.0), 0.0)
        h = np.where(ok, (sxd * den - num * std_) / np.where(ok, det, 1.0), 0.0)
        typical = np.median(np.abs(g), axis=-1, keepdims=True)
        ok &= np.abs(g) > 0.1 * typical
        return np.where(ok, h / np.where(ok, g, 1.0), 0.0), ok


def shift_centres(th: np.ndarray, dh: np.ndarray, w: np.ndarray, seg_starts: np.ndarray) -> np.ndarray:
    """Where each segment's fitted phase shift stands, in samples from the segment's start.

    In ``x = g t + h d + offset`` the shift ``h`` is read through the part
    of ``d`` that the template and the offset do not explain, ``d~``: a shift
    ``h(i)`` that changes within the segment is read as ``sum h d d~ / sum d
    d~``, its value at ``sum i d d~ / sum d d~``, the middle only where the
    waveform is symmetric about it (as :func:`segment_stats`'s centre for the
    gain). Read at the middles, those positions repeat every cycle and act
    as a delay (20 Hz, 2 segments a cycle, the generator's waveform: 2.8 ms,
    2 degrees of a 2 Hz heartbeat's shift).

    Parameters
    ----------
    th, dh : ndarray, shape (n_channels, n)
        The (high-passed) template and its phase derivative, as fitted.
    w : ndarray, shape (n_channels, n)
        Weights.
    seg_starts : ndarray of int
        First sample of each segment.
    """
    red = lambda v: np.add.reduceat(v, seg_starts, axis=-1)  # noqa: E731
    i = (np.arange(th.shape[-1], dtype=np.float64) - np.repeat(seg_starts, np.diff(np.append(seg_starts, th.shape[-1]))))
    sw = np.maximum(red(w), 1e-300)
    st, sd = red(w * th), red(w * dh)
    stt = red(w * th * th) - st * st / sw
    std_ = red(w * th * dh) - st * sd / sw
    with np.errstate(invalid="ignore", divide="ignore"):
        b = np.where(stt > 0, std_ / np.where(stt > 0, stt, 1.0), 0.0)  # d on the centred template
    a = (sd - b * st) / sw  # and the offset
    wd = w * dh
    dd = red(wd * dh) - a * sd - b * red(wd * th)
    idd = red(wd * dh * i) - a * red(wd * i) - b * red(wd * th * i)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(dd > 0, idd / np.where(dd > 0, dd, 1.0), np.nan)


def segment_phase(x: np.ndarray, w: np.ndarray, u: np.ndarray, fs: float, f: float,
                  per_cycle: int, segments: tuple[int, int] | None = None) -> tuple[np.ndarray, float]:
    """Phase shift (cycles) of each channel per part of a cycle against the stretch's mean cycle.

    The mean cycle ``T`` and its phase derivative, read at the samples, and
    the data are high-passed alike (:func:`phase_highpass`) and fitted per
    segment (:func:`phase_shift`): an artifact ``T(u + eta)`` is ``T + eta
    T'`` to first order. Segments where the shift is undefined take their
    neighbours'.

    ``segments`` (first segment number, count) puts the result on another
    sampling's segments (the full-rate gain's, for data averaged in blocks).

    Returns
    -------
    eta : ndarray, shape (n_channels, n_segments)
    rate : float
        Samples of ``eta`` per second.
    """
    n_bins = max(8, int(round(fs / f)))
    b = np.floor(fractional_part(u) * n_bins).astype(np.int64)
    seg = np.floor(u * per_cycle).astype(np.int64)
    starts = np.concatenate(([0], np.flatnonzero(np.diff(seg)) + 1))
    first, n_out = (int(seg[0]), starts.size) if segments is None else segments
    at = seg[starts] - first  # each fitted segment's index on the output's segments
    sos = phase_highpass(f, fs)
    eta = np.zeros((x.shape[0], n_out))
    for ch in range(x.shape[0]):
        cnt = np.bincount(b, w[ch], n_bins)
        tmpl = np.bincount(b, w[ch] * x[ch], n_bins) / np.maximum(cnt, 1e-12)
        tmpl -= tmpl.mean()
        deriv = _smooth_derivative(tmpl)
        keep = w[ch] > 0
        # read at each sample's own phase (linear between bin centres): at few bins per cycle a
        # bin's value is off by the waveform's change across the bin
        at_u = fractional_part(u) * n_bins - 0.5
        t_s, d_s = (np.interp(at_u, np.arange(n_bins), v, period=n_bins) for v in (tmpl, deriv))
        xh, th, dh = (signal.sosfiltfilt(sos, v * keep)[None] for v in (x[ch], t_s, d_s))
        e, ok = phase_shift(xh, th, dh, w[ch:ch + 1], starts)
        if ok[0].sum() >= 2:
            eta[ch] = np.interp(np.arange(n_out), at[ok[0]], e[0, ok[0]])
    return eta, f * per_cycle


def _smooth_derivative(tmpl: np.ndarray, max_harmonic: int = 20) -> np.ndarray:
    """d/du (per cycle) of a mean cycle from its harmonics up to ``max_harmonic`` above 1% of the largest.

    A DAC's mean cycle is a staircase, whose differences are spikes at the
    steps; the phase shift moves the waveform the steps hold, whose
    derivative its first harmonics give.
    """
    c = np.fft.rfft(tmpl)
    k = np.arange(c.size)
    keep = (k >= 1) & (k <= max_harmonic) & (np.abs(c) > 0.01 * np.abs(c[1:]).max(initial=0.0))
    return np.fft.irfft(np.where(keep, 2j * np.pi * k * c, 0.0), n=tmpl.size)


#: the harmonics up to this frequency (Hz; at least the 2nd) judge whether a phase shift is followed
#: (:func:`phase_helps`; this project's choice: the LFP bands the project scores reach 80 Hz)
_PHASE_JUDGE_HZ = 100.0


def phase_helps(x: np.ndarray, w: np.ndarray, u: np.ndarray, fs: float, f: float, per_cycle: int,
                gain: np.ndarray, eta: np.ndarray, response: "GainResponse", first: int | None = None) -> np.ndarray:
    """Per channel, whether following the phase shift leaves less artifact beside the fundamental, and not
    more beside its harmonics.

    An amplitude that changes within a segment also moves the fitted shift
    (at the heartbeat's lines, with no phase modulation at all), and the
    shift's response passes those lines. Here the stretch is modelled both
    ways, the mean cycle times the filtered gain with and without the
    filtered shift, and the shift is kept where it takes at least half off
    the residual power within 0.3-3 Hz of the fundamental (high-passed at
    ``f / 2``), and where, beside the harmonics up to :data:`_PHASE_JUDGE_HZ`,
    the power it takes off and puts on, each over the floor there (the
    residual's median within 0.3-3 Hz of each), sum to no more than nothing.
    A neural rhythm beside the fundamental is one line, which the gain's half
    of it turns into a phase modulation's pair of lines there (a single
    channel cannot tell them apart); a phase modulation of the artifact
    shows beside every harmonic ``h`` times the harmonic's size, the rhythm
    beside none, and following it puts it there.
    """
    n_bins = max(8, int(round(fs / f)))
    b = np.floor(fractional_part(u) * n_bins).astype(np.int64)
    first = np.floor(u[0] * per_cycle) if first is None else first  # the segments' first number
    centres = (first + np.arange(gain.shape[1]) + 0.5) / per_cycle
    sos = phase_highpass(f, fs)
    freqs = np.fft.rfftfreq(u.size, 1.0 / fs)
    near = (np.abs(freqs - f) >= 0.3) & (np.abs(freqs - f) <= 3.0)
    beside = [(np.abs(freqs - k * f) >= 0.3) & (np.abs(freqs - k * f) <= 3.0)
              for k in range(2, max(2, int(_PHASE_JUDGE_HZ // f)) + 1) if k * f + 3.0 < fs / 2]
    keep = np.zeros(x.shape[0], dtype=bool)
    for ch in range(x.shape[0]):
        taps = response.phase_taps(ch)
        if taps is None:
            continue
        cnt = np.bincount(b, w[ch], n_bins)
        tmpl = np.bincount(b, w[ch] * x[ch], n_bins) / np.maximum(cnt, 1e-12)
        tmpl -= tmpl.mean()
        deriv = _smooth_derivative(tmpl)
        g = np.interp(u, centres, ndimage.convolve1d(gain[ch], response.taps(ch), mode="nearest"))
        e = np.interp(u, centres, ndimage.convolve1d(eta[ch], taps, mode="nearest"))
        at_u = fractional_part(u) * n_bins - 0.5
        t_s, d_s = (np.interp(at_u, np.arange(n_bins), v, period=n_bins) for v in (tmpl, deriv))
        r0 = (x[ch] - g * t_s) * (w[ch] > 0)
        r1 = r0 - g * e * d_s * (w[ch] > 0)
        s0, s1 = (np.abs(np.fft.rfft(signal.sosfiltfilt(sos, r))) ** 2 for r in (r0, r1))
        keep[ch] = np.sum(s1[near]) < 0.5 * np.sum(s0[near])
        if keep[ch] and beside:
            keep[ch] = sum(np.sum(s1[band] - s0[band]) / max(float(np.median(s0[band])), 1e-300)
                           for band in beside) <= 0.0
    return keep


def design_gain_response(gain: np.ndarray, rate: float, *, max_hz: float, floor_hz: float = 2.0,
                         over_subtraction: float = 2.0, follow_hz: float = FOLLOW_HZ) -> GainResponse:
    """Response that passes the modulation lines of ``gain`` and stops its floor.

    The periodogram of each channel's gain (``scipy.signal.welch``, 4 s
    segments) is compared with its running median over ``floor_hz`` (the
    floor: narrow lines do not move a median). The response is the
    spectral-subtraction gain ``1 - a floor / P`` clipped to [0, 1], with an
    over-subtraction factor ``a`` (Berouti, Schwartz & Makhoul 1979, ICASSP,
    from memory) so that the floor's own fluctuations do not pass; 1 below
    :data:`FOLLOW_HZ` (or ``max_hz`` if lower) and 0 above ``max_hz``.

    Parameters
    ----------
    gain : ndarray, shape (n_channels, n_segments)
    rate : float
        Gain samples per second.
    max_hz : float
        Highest modulation frequency that may pass.
    floor_hz, over_subtraction : float
    follow_hz : float
        Below this everything passes (see :data:`FOLLOW_HZ` and :func:`follow_below`).

    Returns
    -------
    GainResponse
    """
    gain = np.atleast_2d(gain)
    nper = min(gain.shape[1], int(4 * rate)) // 2 * 2
    if nper < 8:
        # too short to tell lines from floor: physiology alone (heartbeat below ~3 Hz)
        freqs = np.linspace(0, rate / 2, 65)
        resp = np.repeat((freqs <= min(3.0, max_hz)).astype(float)[None], gain.shape[0], axis=0)
        return GainResponse(freqs, resp, rate)
    freqs, p = signal.welch(gain, fs=rate, nperseg=nper, detrend="linear", axis=-1)
    width = max(3, int(round(floor_hz / freqs[1])) | 1)
    floor = ndimage.median_filter(p, size=(1, width), mode="nearest")
    with np.errstate(divide="ignore", invalid="ignore"):
        resp = np.clip(1.0 - over_subtraction * floor / np.where(p > 0, p, np.inf), 0.0, 1.0)
    # a line wanders (heart rate is not constant) and the FIR smooths the response over about
    # 1 / HALF_S Hz: widen each passed line by a bin on either side so its centre passes whole
    resp = ndimage.maximum_filter1d(resp, 3, axis=-1)
    resp[:, freqs <= min(follow_hz, max_hz)] = 1.0
    resp[:, freqs > max_hz] = 0.0
    return GainResponse(freqs, resp, rate)


#: the ratio of what a side shows to what a pair would put there (:func:`sideband_support`) from which
#: a gain line passes whole, and below which it does not pass (this project's choice: a pair scatters
#: to a ratio of about 0.6 at worst over a few Welch segments; one line clear of the other side's
#: floor gives a few hundredths, and a line ten times its floor 0.1-0.2: with 0.1 and 1/3 until
#: session 14, a 15 Hz rhythm beside 10 Hz stimulation was half followed, its image at 5 Hz)
_PAIR_FULL = 0.5
_PAIR_NONE = 0.25


#: distance (Hz) from another harmonic's carrier (demodulated to a multiple of f) within which a
#: sideband is not judged: the carrier's main lobe (about 1 Hz for 4 s Blackman-Harris segments) and
#: a little of its respiration lines
_CARRIER_GUARD = 1.25
#: relative scatter of a Welch estimate over a few segments (this project's choice, about 1.3 SD of an
#: average of 7 periodograms): an excess below this fraction of its floor may be the floor's own
_SCATTER = 0.5
#: a line of the raw gain standing this far beyond its floor and its scatter (in floors) must show beside the
#: fundamental, at least :data:`_GAIN_SHOWN` times as far, on one side (this project's choice: a neural rhythm's
#: slope read as a gain line shows nothing there; with 0.05 real heartbeat lines were cut in one of the tests)
_GAIN_LINE = 1.0
_GAIN_SHOWN = 0.02


def _shown(p_other: np.ndarray, f_other: np.ndarray, line: np.ndarray) -> np.ndarray:
    """What the other side shows against what a pair would put there: its floor plus the line."""
    return p_other / np.maximum(f_other + np.maximum(line, 0.0), 1e-300)


def sideband_support(xd: np.ndarray, wd: np.ndarray, ud: np.ndarray, fsd: float, f: float, freqs: np.ndarray, *,
                     above_hz: float, floor_hz: float = 5.0, gain: np.ndarray | None = None,
                     gain_rate: float | None = None) -> np.ndarray:
    """How surely a change of the artifact at each of ``freqs`` shows on both sides of the fundamental.

    A change of the artifact's amplitude at ``d`` Hz puts a pair of sidebands
    at ``f - d`` and ``f + d`` of equal size (its phase changing in step with
    it keeps them equal: ``(1 + m) cos(wt + p)`` with ``p`` proportional to
    ``m`` has sidebands of ``sqrt(m^2 + p^2) / 2`` on each side, a textbook
    identity). A neural rhythm near the fundamental is one line, at
    ``f - d`` (or ``f + d``) only: projected on the artifact's cycle it looks
    like a modulation at ``d`` too, and a gain that follows it takes part of
    the rhythm off and puts its mirror image at ``f + d`` (a 6.75 Hz rhythm
    beside 13 Hz stimulation: 0.3-0.46 of it followed, its image at 19.25 Hz
    up to 0.9 of the neural power there).

    The data are demodulated at the stimulation phase (``z = x exp(-2 pi i
    u)``, block means of a stretch), and the two-sided spectrum of ``z``
    (``scipy.signal.welch``, 4 s Blackman-Harris segments, whose sidelobes
    keep the carrier out beyond 1 Hz) is read at ``+d`` and ``-d`` (the
    larger of each line's bin and its neighbours: lines wander), each side
    against its own floor ``F`` (its running median over ``floor_hz``, more
    than twice a line's main lobe: below the fundamental the LFP's floor is
    far higher). What one side
    holds beyond its floor and that floor's scatter (:data:`_SCATTER`), ``E``,
    a pair would put on the other side too: there it shows ``F_o + E``, and
    one line leaves ``F_o``. The smaller of the two sides' ratios of what
    they show to what a pair would put there is about 1 for a pair and
    ``F_o / (F_o + E)`` for one line: a side buried in its floor (a
    heartbeat harmonic's lower sideband within the LFP below a 5-10 Hz
    fundamental) says little either way, one clear of it decides. The line
    passes whole from a ratio of :data:`_PAIR_FULL` and not at all below
    :data:`_PAIR_NONE` (the 6.75 Hz rhythm beside 13 Hz: about 0.05). A
    side near another harmonic (``d`` within :data:`_CARRIER_GUARD` of a
    multiple of ``f``) is not judged. With ``gain`` (the raw gain the
    response is designed from, at ``gain_rate`` per second) a line that
    stands out in it (:data:`_GAIN_LINE`) but on neither side of the
    fundamental (under :data:`_GAIN_SHOWN` of its excess) does not pass
    either: that is neural signal the segments took for a change of gain (a
    6 Hz rhythm's slope over a third of a 10 Hz cycle), which the pair test
    passed as a pair of nothing. Give it only for unclipped stretches
    without a DAC: a DAC's period and a rail's edges put lines of their own
    in the raw gain. The line's own strength is judged by
    :func:`design_gain_response`.

    Parameters
    ----------
    xd, wd : ndarray, shape (n_channels, n)
        Samples (block means) and their weights (0 for lost samples).
    ud : ndarray, shape (n,)
        Stimulation phase (cycles, unwrapped) of each sample.
    fsd : float
        Their rate (Hz).
    f : float
        Stimulation frequency (Hz).
    freqs : ndarray
        Modulation frequencies (Hz) to judge (a :class:`GainResponse`'s).
    above_hz : float
        At and below this, 1 (the gain always passes there; see :func:`follow_below`).

    Returns
    -------
    ndarray, shape (n_channels, freqs.size)
        Between 0 and 1.
    """
    out = np.ones((xd.shape[0], freqs.size))
    nper = min(xd.shape[1], int(4 * fsd))
    judged = freqs > above_hz
    if nper < 16 or not judged.any() or 1.0 / (nper / fsd) > 0.5:
        return out  # too short to tell lines apart (under about 2 s)
    z = xd * (wd > 0) * np.exp(-2j * np.pi * ud)[None]
    fz, p = signal.welch(z, fs=fsd, window="blackmanharris", nperseg=nper, return_onesided=False, axis=-1)
    order = np.argsort(fz)
    fz, p = fz[order], p[:, order]
    # a median over more than twice a line's main lobe (+-1 Hz in 4 s Blackman-Harris segments): over 2 Hz
    # the lobe filled it and doubled the line's floor (a 15 Hz rhythm beside 10 Hz stimulation stood 2.2
    # times above its floor); a broad band of the LFP (3 Hz) still fills it, and stays floor
    width = max(3, int(round(floor_hz / (fz[1] - fz[0]))) | 1)
    floor = ndimage.median_filter(p, size=(1, width), mode="nearest")
    peak = ndimage.maximum_filter1d(p, 3, axis=-1)
    # the other harmonics demodulate to multiples of f: a side within _CARRIER_GUARD of one holds
    # that carrier's leakage and its own sidebands, and says nothing about this pair
    carriers = f * np.concatenate((np.arange(1, int(fsd / 2 / f) + 1), -np.arange(1, int(fsd / 2 / f) + 1)))
    d = freqs[judged]
    clear = np.all(np.abs(d[:, None] - carriers) > _CARRIER_GUARD, axis=1) \
        & np.all(np.abs(-d[:, None] - carriers) > _CARRIER_GUARD, axis=1)
    ks, d = np.flatnonzero(judged)[clear], d[clear]
    if not ks.size:
        return out
    # each line's nearest bin on either side (all lines at once: one at a time cost a 16-channel plan ~0.1 s)
    up = np.argmin(np.abs(fz - d[:, None]), axis=1)
    dn = np.argmin(np.abs(fz + d[:, None]), axis=1)
    p_up, p_dn, f_up, f_dn = peak[:, up], peak[:, dn], floor[:, up], floor[:, dn]
    # either side may hold the line; what it holds beyond its floor and that floor's scatter is what a
    # pair would put on the other side too (the floors differ: the LFP's 1/f^2 below the fundamental)
    ratio = np.minimum(_shown(p_dn, f_dn, p_up - (1 + _SCATTER) * f_up),
                       _shown(p_up, f_up, p_dn - (1 + _SCATTER) * f_dn))
    out[:, ks] = np.clip((ratio - _PAIR_NONE) / (_PAIR_FULL - _PAIR_NONE), 0.0, 1.0)
    if gain is not None:
        gain = np.atleast_2d(gain)
        nper_g = min(gain.shape[1], int(4 * gain_rate)) // 2 * 2
        if nper_g >= 8:
            fg, pg = signal.welch(gain, fs=gain_rate, nperseg=nper_g, detrend="linear", axis=-1)
            gfloor = ndimage.median_filter(pg, size=(1, max(3, int(round(2.0 / fg[1])) | 1)), mode="nearest")
            excess_g = ndimage.maximum_filter1d(pg, 3, axis=-1) / np.maximum(gfloor, 1e-300) - (1 + _SCATTER)
            # a change of the artifact shows beside the fundamental too, if less clearly than in the gain; a
            # line of the gain that neither side shows is neural signal the segments took for a change (a
            # 6 Hz rhythm's slope over a third of a 10 Hz cycle: a 6 Hz gain line 3.7 times its floor,
            # nothing at 4 or 16 Hz)
            g_ex = excess_g[:, np.argmin(np.abs(fg - d[:, None]), axis=1)]
            side = (np.maximum(p_up - (1 + _SCATTER) * f_up, 0.0) + np.maximum(p_dn - (1 + _SCATTER) * f_dn, 0.0)) \
                / np.maximum(f_up + f_dn, 1e-300)
            out[:, ks] *= np.where((g_ex >= _GAIN_LINE) & (side <= _GAIN_SHOWN * g_ex), 0.0, 1.0)
    return out


def follow_below(f: float) -> float:
    """Modulation frequency (Hz) below which the gain of an ``f`` Hz artifact always passes.

    :data:`FOLLOW_HZ`, and at most ``f / 2``: beyond half the stimulation
    frequency a sideband is nearer the next harmonic, and below a few hertz
    the neural floor the gain takes up is the strongest LFP (1 Hz
    stimulation with a 1.3 Hz heartbeat: residual within the +-3 Hz bands
    15.6x the neural power passing up to 2.75 Hz, 4.3x up to 0.5 Hz).
    """
    return float(min(FOLLOW_HZ, f / 2.0))


def ramp_cutoff(blk, fs: float, max_hz: float) -> float:
    """Highest frequency (Hz) a gain follows within the ramps of ``blk``, beyond the response's lines.

    The larger of ``2 / ramp length`` (the shorter ramp: a ramp that is not
    quite linear, or that a clipped channel's unclipped samples see
    differently, departs from the block's line smoothly over its whole
    length) and ``f / 4``, at least ``2 * KEEP_HZ`` and at most ``max_hz``.
    Whatever the gain passes of the neural floor during a ramp lands within
    the cut-off of every harmonic: where harmonics are close (5-10 Hz) that
    is the LFP between them, where they are far apart (20-40 Hz) the LFP
    there is weak and a clipped channel needs the faster gain. Both factors
    are this project's choices, measured on the built-in scenarios (LFP
    error away from the harmonics at 5 Hz: 0.04 with 2 Hz, 0.16 with 5 Hz;
    spike band next to a clipped 40 Hz ramp: 0.14 x noise with 2 Hz, 0.09
    with 10 Hz). A block without ramps gets ``max_hz``. Set from the whole
    block (:meth:`StimBlock.geometry`), so a piece filters as the whole.
    """
    start, up_stop, down_start, stop = blk.geometry()
    ramps = [r for r in (up_stop - start, stop - down_start) if r > 0]
    if not ramps:
        return float(max_hz)
    return float(np.clip(max(2.0 * fs / min(ramps), blk.freq_hz / 4.0), 2 * KEEP_HZ, max_hz))


def lowpass_taps(cutoff_hz: float, rate: float) -> np.ndarray:
    """Zero-phase FIR low-pass (``scipy.signal.firwin``) of the gain filter's length, unit gain at 0 Hz."""
    taps = signal.firwin(2 * int(HALF_S * rate) + 1, min(cutoff_hz, 0.45 * rate), fs=rate)
    return taps / taps.sum()


def filter_sequences(seq: np.ndarray, taps: np.ndarray, rate: float, envelope: np.ndarray | None = None,
                     max_hz: float | None = None, scale: float | None = None, pulse=None) -> np.ndarray:
    """Filter sequences (rows of ``seq``, sampled at ``rate``) by ``taps``, zero phase, edges held.

    With ``envelope`` (the block's ramps per sample of the sequences, 1 on
    the plateau), each sequence is split into its plateau median times the
    envelope, followed exactly, and a deviation, which is filtered; within
    the ramps (and :data:`HALF_S` / 2 around them) the deviation is
    low-passed at ``max_hz`` instead, so a ramp that is not exactly the
    linear one of the block model is followed there (the response's lines
    still pass: the heartbeat does not stop during a ramp); where the envelope
    is below 2 % (margins, ramp feet) only the envelope part is kept.

    ``pulse``, the heartbeat's harmonics in ``seq`` as fitted and as they
    must be carried (:meth:`artifactclean.pulse.PulseModel.parts`), takes
    the first out before the filter and puts the second back.
    ``max_hz`` is best set from the ramps' length (:func:`ramp_cutoff`): a
    higher one lets the neural floor through the gain beside every harmonic
    for the whole ramp.

    ``scale`` fixes the plateau level (one, or one per sequence) instead of
    the median (:func:`plateau_level`): a sequence normalised to 1 on the
    plateau (the template's gain), or one whose level was measured once per
    block, then gets a result that depends on its samples within the
    filter's reach only, so a piece of a block is filtered exactly as the
    whole block (on the plateau the level cancels anyway; within the ramps
    it does not).
    """
    seq = np.atleast_2d(seq)
    if pulse is not None:
        # the harmonics come out before the filter and go back whole; the level is the sequence's own
        fitted, whole = (np.atleast_2d(a) for a in pulse)
        if envelope is not None and scale is None:
            scale = plateau_level(seq, envelope)
        return filter_sequences(seq - fitted, taps, rate, envelope, max_hz, scale) + whole
    if envelope is None:
        return ndimage.convolve1d(seq, taps, axis=-1, mode="nearest")
    plateau = envelope > _PLATEAU
    if scale is None:
        scale = plateau_level(seq, envelope)
    scale = np.broadcast_to(np.asarray(scale, dtype=np.float64).reshape(-1, 1), (seq.shape[0], 1))
    base = scale * envelope[None, :]
    dev = seq - base
    # margins and ramp feet carry almost no artifact: a fitted value there is noise over nothing
    dev[:, envelope < _FOOT] = 0.0
    fine = ndimage.convolve1d(dev, taps, axis=-1, mode="nearest")
    if max_hz is not None and not plateau.all():
        reach = max(1, int(HALF_S / 2 * rate))
        ramp = ndimage.maximum_filter1d((~plateau).astype(np.float64), 2 * reach + 1)
        zone = ndimage.uniform_filter1d(ramp, reach, mode="nearest")
        # the ramp's own shape is followed too: what the response passes, and all below max_hz
        broad = ndimage.convolve1d(dev - fine, lowpass_taps(max_hz, rate), axis=-1, mode="nearest")
        fine = fine + zone * broad
    return base + fine


def plateau_level(seq: np.ndarray, envelope: np.ndarray) -> np.ndarray:
    """Median of each sequence (row of ``seq``) where ``envelope`` is on its plateau (1 if none is)."""
    seq = np.atleast_2d(seq)
    plateau = envelope > _PLATEAU
    if not plateau.any():
        return np.ones(seq.shape[0])
    return np.median(seq[:, plateau], axis=-1)


def smooth_gain(gain: np.ndarray, response: GainResponse, rate: float,
                envelope: np.ndarray | None = None, max_hz: float | None = None,
                scale: float | None = None, times: np.ndarray | None = None) -> np.ndarray:
    """Filter each channel's gain sequence by its ``response`` (see :func:`filter_sequences`).

    ``times`` (each gain sample's position in the recording) lets a pulse
    model with a track read the heartbeat there (:meth:`artifactclean.pulse.PulseModel.parts`).
    The sequences are segment gains (:func:`segment_gain`): the pulse's
    harmonics are taken out as segments hold them.
    """
    out = np.empty_like(gain)
    parts = None if response.pulse is None else response.pulse.parts(gain, rate, envelope, scale, times=times,
                                                                     segments=True)
    for ch in range(gain.shape[0]):
        row = min(ch, response.response.shape[0] - 1)
        taps = response.taps(row, rate, segments=True)
        out[ch] = filter_sequences(gain[ch:ch + 1], taps, rate, envelope, max_hz, scale,
                                   pulse=None if parts is None else (parts[0][ch], parts[1][ch]))[0]
    return out
