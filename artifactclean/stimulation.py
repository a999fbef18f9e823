"""The stimulation model: where stimulation runs, at what frequency and phase.

Every estimator needs the stimulation phase of each sample. This module finds
it from the data alone (with or without a nominal frequency), from a recorded
stimulator monitor channel, or from sync events, and describes the result as a
:class:`StimulationModel`: a list of blocks (active, sham), each with its own
refined frequency, phase, drift and ramps.

Phase convention: phase 0 is the positive peak of the stimulation
fundamental as seen on the reference signal (the monitor channel when given,
otherwise the channel with the largest artifact). Phases are in radians in
[0, 2 pi); NaN where no stimulation runs.

Frequency is estimated by maximising the periodogram near the spectral peak,
the maximum-likelihood estimator of a tone in white noise, which reaches the
Cramér-Rao bound at usable signal-to-noise ratios (Rife & Boorstyn 1974,
IEEE Trans Inf Theory 20:591; Kay 1993, Fundamentals of Statistical Signal
Processing: Estimation Theory, ch. 7).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, asdict

import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage, optimize, signal

from ._blas import one_blas_thread
from .baseline import slow_baseline
from .clipping import mask_runs
from ._numeric import fractional_part

__all__ = [
    "decimate_reader",
    "decimated_rate",
    "fit_decimated",
    "StimBlock",
    "StimulationModel",
    "estimate_tone",
    "fit_stimulation",
    "nominal_frequencies",
    "RAMP_SHAPES",
    "ramp_level",
    "tone_crb",
]

#: shapes a block's ramps may take: straight lines, or half a cosine period (a raised cosine,
#: which some stimulators use to soften the switch on and off); see :func:`ramp_level`
RAMP_SHAPES = ("linear", "cosine")


def ramp_level(tau: np.ndarray, shape: str = "linear") -> np.ndarray:
    """Level of a ramp at ``tau`` (0 at its foot, 1 at its corner; clipped to [0, 1]).

    Parameters
    ----------
    tau : ndarray
        Position along the ramp: 0 at the foot, 1 at the plateau.
    shape : {"linear", "cosine"}
        ``"cosine"`` is ``(1 - cos(pi tau)) / 2``: no slope at either end.

    Returns
    -------
    ndarray
        Between 0 and 1, the shape of ``tau``.
    """
    tau = np.clip(tau, 0.0, 1.0)
    if shape == "cosine":
        return 0.5 - 0.5 * np.cos(np.pi * tau)
    if shape != "linear":
        raise ValueError(f"ramp shape must be one of {RAMP_SHAPES}, got {shape!r}")
    return tau


def _ramp_slope(tau: np.ndarray, shape: str) -> np.ndarray:
    """Derivative of :func:`ramp_level` in ``tau``; 0 outside the ramp."""
    inside = (tau > 0.0) & (tau < 1.0)
    d = 0.5 * np.pi * np.sin(np.pi * np.clip(tau, 0.0, 1.0)) if shape == "cosine" else np.ones_like(tau)
    return np.where(inside, d, 0.0)


@dataclass
class StimBlock:
    """One stretch of stimulation.

    Sample indices are half-open ``[start, stop)``. ``ramp_up_stop`` and
    ``ramp_down_start`` bound the plateau (equal for a sham block).
    ``phase_ref`` is the phase (rad) at sample ``ref_sample``. ``edges``
    holds start, ramp corners and stop as the whole recording has them
    (shifted like the others) when :meth:`StimulationModel.window` clipped
    the block to a piece of it: the ramps' shape is the block's, not the
    piece's. ``ramp_shape`` is one of :data:`RAMP_SHAPES` (both ramps of a
    block share it; see :func:`ramp_level`).
    """

    kind: str
    start: int
    stop: int
    ramp_up_stop: int
    ramp_down_start: int
    freq_hz: float
    phase_ref: float
    ref_sample: int
    amplitude: float
    drift_ppm: float | None = None
    edges: tuple[int, int, int, int] | None = None
    ramp_shape: str = "linear"

    def cycles_at(self, samples: np.ndarray, fs: float) -> np.ndarray:
        """Unwrapped stimulation phase (cycles) of the block at ``samples`` (any real sample positions)."""
        return (np.asarray(samples, dtype=np.float64) - self.ref_sample) * (self.freq_hz / fs) \
            + self.phase_ref / (2 * np.pi)

    def geometry(self) -> tuple[int, int, int, int]:
        """Start, ramp-up end, ramp-down start and stop of the whole block (see ``edges``)."""
        return self.edges if self.edges is not None else (self.start, self.ramp_up_stop, self.ramp_down_start, self.stop)

    def to_dict(self, fs: float) -> dict:
        d = asdict(self)
        d.pop("edges")
        d.update(start_s=self.start / fs, stop_s=self.stop / fs,
                 ramp_up_s=(self.ramp_up_stop - self.start) / fs,
                 ramp_down_s=(self.stop - self.ramp_down_start) / fs)
        return d


@dataclass
class StimulationModel:
    """Stimulation blocks of a recording and the phase of every sample.

    Attributes
    ----------
    fs : float
    n_samples : int
    blocks : list of StimBlock
        Stimulation blocks (active and sham), in time order.
    nominal_freq_hz : float or None
    reference : str
        Where the model came from: ``"data channel K"``, ``"monitor"`` or ``"events"``.
    """

    fs: float
    n_samples: int
    blocks: list = field(default_factory=list)
    nominal_freq_hz: float | None = None
    reference: str = "data"

    @property
    def main_block(self) -> StimBlock | None:
        """The longest active block (or the longest block if none is active)."""
        if not self.blocks:
            return None
        active = [b for b in self.blocks if b.kind == "active"] or self.blocks
        return max(active, key=lambda b: b.stop - b.start)

    def cycles(self, block: StimBlock, start: int, stop: int) -> np.ndarray:
        """Unwrapped stimulation phase in cycles for samples ``start..stop`` of ``block``."""
        return block.cycles_at(np.arange(start, stop, dtype=np.float64), self.fs)

    def phase(self, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Stimulation phase (rad, [0, 2 pi)) of samples ``start..stop``; NaN off stimulation."""
        stop = self.n_samples if stop is None else stop
        out = np.full(stop - start, np.nan)
        for b in self.blocks:
            lo, hi = max(start, b.start), min(stop, b.stop)
            if hi > lo:
                out[lo - start:hi - start] = 2 * np.pi * fractional_part(self.cycles(b, lo, hi))
        return out

    def stim_mask(self) -> np.ndarray:
        """Boolean mask of samples inside a stimulation block."""
        m = np.zeros(self.n_samples, dtype=bool)
        for b in self.blocks:
            m[b.start:b.stop] = True
        return m

    def block_table(self) -> list[dict]:
        """All stretches of the recording in order, ``off`` stretches included."""
        rows, t = [], 0
        for b in self.blocks:
            if b.start > t:
                rows.append(dict(kind="off", start=t, stop=b.start, start_s=t / self.fs, stop_s=b.start / self.fs))
            rows.append(b.to_dict(self.fs))
            t = b.stop
        if t < self.n_samples:
            rows.append(dict(kind="off", start=t, stop=self.n_samples, start_s=t / self.fs, stop_s=self.n_samples / self.fs))
        return rows

    def window(self, start: int, stop: int) -> "StimulationModel":
        """The model seen by samples ``start..stop`` (indices shifted to start at 0)."""
        blocks = []
        for b in self.blocks:
            if b.stop <= start or b.start >= stop:
                continue
            blocks.append(StimBlock(
                b.kind, max(b.start, start) - start, min(b.stop, stop) - start,
                int(np.clip(b.ramp_up_stop, start, stop)) - start, int(np.clip(b.ramp_down_start, start, stop)) - start,
                b.freq_hz, b.phase_ref, b.ref_sample - start, b.amplitude, b.drift_ppm,
                tuple(int(v) - start for v in b.geometry()), b.ramp_shape))
        return StimulationModel(self.fs, stop - start, blocks, self.nominal_freq_hz, self.reference)

    def to_dict(self) -> dict:
        main = self.main_block
        return dict(
            fs=self.fs,
            n_samples=self.n_samples,
            nominal_freq_hz=self.nominal_freq_hz,
            frequency_hz=None if main is None else main.freq_hz,
            reference=self.reference,
            blocks=self.block_table(),
        )


# --------------------------------------------------------------------------- tone estimation


def tone_crb(amplitude: float, sigma: float, n: int, fs: float = 1.0) -> dict:
    """Cramér-Rao bounds for a real tone in white Gaussian noise.

    From Kay (1993), Fundamentals of Statistical Signal Processing:
    Estimation Theory, eq. 3.41, with SNR ``eta = A^2 / (2 sigma^2)``.

    Returns
    -------
    dict
        Standard deviations: ``freq_hz``, ``phase_rad``, ``amplitude``.
    """
    eta = amplitude**2 / (2 * sigma**2)
    var_f = 12.0 / ((2 * np.pi) ** 2 * eta * n * (n**2 - 1))  # cycles/sample squared
    var_phi = 2.0 * (2 * n - 1) / (eta * n * (n + 1))
    return dict(freq_hz=np.sqrt(var_f) * fs, phase_rad=np.sqrt(var_phi), amplitude=np.sqrt(2 * sigma**2 / n))


def _dtft(x: np.ndarray, f_cyc: float, n_centre: float, piece: int = 1 << 14, offset: float = 0.0,
          where: np.ndarray | None = None, row: int = 1 << 10) -> complex:
    """``sum (x[n] - offset) exp(-2 pi i f_cyc (n - n_centre))``, summed piece by piece (memory: one piece).

    With ``where``, ``x[n]`` is zero where it is False. Each piece is cut in
    rows of ``row`` samples: ``exp(-2 pi i f (r + j - c)) = exp(-2 pi i f (r - c))
    exp(-2 pi i f j)``, so one table of ``row`` phasors and one phasor per row
    replace an exponential per sample (35x faster on 768k samples; the
    frequency search calls this a dozen times). Both this sum and the
    sample-by-sample one lie within rounding of the phases of an
    extended-precision sum (768k samples of noise at 0.3 cycles a sample:
    3.7e-10 and 1.6e-10 of its size; 1e-12 and below at the stimulation
    frequencies' few hundredths).
    """
    col = np.exp(-2j * np.pi * f_cyc * np.arange(row))
    out = 0j
    for a in range(0, x.size, piece):
        v = _kept(x, where, a, a + piece)
        v = v if offset == 0.0 else v - offset
        starts = np.arange(a, a + v.size, row)
        m = v.size // row
        sums = np.empty(starts.size, dtype=np.result_type(v, col))
        sums[:m] = v[:m * row].reshape(m, row) @ col
        if m < starts.size:
            sums[m] = np.dot(v[m * row:], col[:v.size - m * row])
        out += np.dot(sums, np.exp(-2j * np.pi * f_cyc * (starts - n_centre)))
    return out


def _phasors(f_cyc: float, start: int, n: int, row: int = 1 << 10) -> np.ndarray:
    """``exp(2 pi i f_cyc k)`` for ``k = start .. start + n - 1``: a phasor per row of ``row`` samples
    times one table of ``row``, a complex product per sample instead of a cosine and a sine (as
    :func:`_dtft`; the values depend on ``start``, not on ``n``)."""
    m = -(-n // row)
    first = np.exp(2j * np.pi * f_cyc * (start + row * np.arange(m, dtype=np.float64)))
    table = np.exp(2j * np.pi * f_cyc * np.arange(row, dtype=np.float64))
    return np.multiply.outer(first, table).reshape(-1)[:n]


def _kept(x: np.ndarray, where: np.ndarray | None, a: int, b: int) -> np.ndarray:
    """``x[a:b]``, zero where ``where`` is False."""
    return x[a:b] if where is None else np.where(where[a:b], x[a:b], 0.0)


#: samples above which :func:`estimate_tone` works piece by piece (:func:`_estimate_long_tone`);
#: 2**21 is 11 minutes of a reference decimated to 3.2 kHz
_TONE_WHOLE = 1 << 21
#: samples per piece of a long tone
_TONE_PIECE = 1 << 19


def estimate_tone(
    x: np.ndarray,
    fs: float,
    *,
    freq_hint: float | None = None,
    fmin: float | None = None,
    fmax: float | None = None,
    where: np.ndarray | None = None,
) -> tuple[float, float, float]:
    """Frequency, phase and amplitude of the strongest tone in ``x``.

    The periodogram is searched on a 4x zero-padded FFT grid (within
    ``fmin..fmax``, or +-2% around ``freq_hint``) and its peak refined by a
    bounded scalar maximisation of the periodogram of the analytic signal
    (``scipy.signal.hilbert``): the maximum-likelihood estimator of one tone
    in white noise (Rife & Boorstyn 1974; Kay 1993), free of the bias the
    negative-frequency image causes for short or ramped tones.

    Parameters
    ----------
    x : ndarray, shape (n,)
    fs : float
        Sampling rate (Hz).
    freq_hint : float, optional
        Nominal frequency; the search stays within +-2% of it.
    fmin, fmax : float, optional
        Search band when no hint is given (default 0.5 Hz to fs/2).
    where : ndarray of bool, shape (n,), optional
        Samples to use; the others count as zeros (as ``numpy.where(where,
        x, 0)``, without a copy of a long record).

    Returns
    -------
    freq_hz, phase_rad, amplitude
        ``phase_rad`` is the cosine phase at the centre sample
        ``(n - 1) / 2``; ``amplitude`` is the peak amplitude.
    """
    x = np.asarray(x, dtype=np.float64)
    n = x.size
    if n < 8:
        raise ValueError("need at least 8 samples to estimate a frequency")
    if where is not None and np.shape(where) != (n,):
        raise ValueError(f"where must have the shape of x, ({n},); got {np.shape(where)}")
    if n > _TONE_WHOLE:
        return _estimate_long_tone(x, fs, freq_hint, fmin, fmax, where)
    if where is not None:
        x = np.where(where, x, 0.0)
    x = x - x.mean()
    if freq_hint is not None:
        lo, hi = freq_hint * 0.98, freq_hint * 1.02
    else:
        lo = 0.5 if fmin is None else fmin
        hi = fs / 2 if fmax is None else fmax
    nfft = int(2 ** np.ceil(np.log2(4 * n)))
    # the bins of numpy.fft.rfftfreq, computed for the band only (the full grid is 4x the record)
    df = 1.0 / (nfft * (1.0 / fs))
    k_lo = int(np.clip(np.floor(lo / df) - 1, 0, nfft // 2))
    k_hi = int(np.clip(np.ceil(hi / df) + 1, 0, nfft // 2))
    freqs = np.arange(k_lo, k_hi + 1) * df
    band = (freqs >= lo) & (freqs <= hi)
    if not band.any():
        raise ValueError(f"frequency search band {lo:.3g}-{hi:.3g} Hz holds no FFT bin; record is too short")
    spec = np.abs(np.fft.rfft(x, nfft)[k_lo:k_hi + 1])
    k = np.flatnonzero(band)[np.argmax(spec[band])]
    df = fs / nfft
    centre = (n - 1) / 2.0

    # the analytic signal has no negative-frequency image, so neither an abrupt cut nor a
    # ramped envelope biases the periodogram peak (a real-tone fit with a constant-amplitude
    # Gram matrix is biased by ramps)
    xa = analytic_signal(x, sp_fft.next_fast_len(n))[:n]

    def neg_power(f_hz: float) -> float:
        return -abs(_dtft(xa, f_hz / fs, centre)) ** 2

    res = optimize.minimize_scalar(
        neg_power, bounds=(freqs[k] - df, freqs[k] + df), method="bounded",
        options=dict(xatol=1e-6 * df),
    )
    f_hat = float(res.x)
    z = _dtft(xa, f_hat / fs, centre)
    return f_hat, float(np.angle(z)), float(abs(z) / n)


def analytic_signal(x: np.ndarray, n_fft: int) -> np.ndarray:
    """The analytic signal of ``x`` zero-padded to ``n_fft``: ``scipy.signal.hilbert(x, n_fft)``.

    The same one-sided spectrum (Marple 1999, IEEE Trans. Signal Process.), through
    ``numpy.fft``: ``scipy.fft`` keeps the plans of its last 16 lengths with
    their buffers, and a record's length stays in memory for the whole
    cleaning (28 MB after fitting a 240 s, 8-channel file, on top of every
    piece's peak). At a 5-smooth ``n_fft`` (``scipy.fft.next_fast_len``).
    """
    spec = np.fft.fft(x, n_fft)
    h = np.zeros(n_fft)
    h[0] = 1.0
    if n_fft % 2 == 0:
        h[n_fft // 2] = 1.0
        h[1:n_fft // 2] = 2.0
    else:
        h[1:(n_fft + 1) // 2] = 2.0
    spec *= h
    return np.fft.ifft(spec)


def _estimate_long_tone(x: np.ndarray, fs: float, freq_hint, fmin, fmax, where=None) -> tuple[float, float, float]:
    """:func:`estimate_tone` of a long record in memory bounded by a piece.

    The whole-record search holds a 4x zero-padded spectrum and an analytic
    signal of the record (600 MB for an hour at 3.2 kHz). Here:

    1. without a hint, the band's strongest line of the pieces' summed
       periodograms (4x padded each) is the hint;
    2. each piece (at most :data:`_TONE_PIECE` samples) is fitted on its own
       (:func:`estimate_tone`, within +-2% of the hint);
    3. the frequency is the pieces' mean, corrected by the slope of their
       unwrapped phases at the piece centres (weighted least squares;
       piece-wise phases are the classic way to extend a tone fit over a
       long record, from memory: e.g. Kay 1989, IEEE Trans. ASSP 37);
    4. it is polished by the bounded maximisation of the whole record's
       periodogram within half a main lobe, the DTFT summed piece by piece.

    The record's real DTFT is used in step 4: the negative-frequency image
    the analytic signal removes is ~1/(2 f T) of the peak over T seconds,
    nothing on a record this long. Phase and amplitude are as
    :func:`estimate_tone` gives them (cosine phase at the centre sample).
    """
    n = x.size
    mean = float(x.mean()) if where is None else sum(float(_kept(x, where, a, a + _TONE_PIECE).sum())
                                                       for a in range(0, n, _TONE_PIECE)) / n
    # no piece longer than _TONE_PIECE: its 4x padded FFT doubles in length just above it
    k = max(2, -(-n // _TONE_PIECE))
    edges = np.linspace(0, n, k + 1).astype(np.int64)
    if freq_hint is None:
        lo = 0.5 if fmin is None else fmin
        hi = fs / 2 if fmax is None else fmax
        total = None
        for a, b in zip(edges[:-1], edges[1:]):
            nfft = int(2 ** np.ceil(np.log2(4 * (b - a))))
            p = np.abs(np.fft.rfft(_kept(x, where, a, b) - mean, nfft)) ** 2
            total = p if total is None else total[: p.size] + p[: total.size]
        freqs = np.fft.rfftfreq(2 * (total.size - 1), 1.0 / fs)
        band = (freqs >= lo) & (freqs <= hi)
        if not band.any():
            raise ValueError(f"frequency search band {lo:.3g}-{hi:.3g} Hz holds no FFT bin")
        freq_hint = float(freqs[np.flatnonzero(band)[np.argmax(total[band])]])
    fits = np.array([estimate_tone(_kept(x, where, a, b), fs, freq_hint=freq_hint)
                     for a, b in zip(edges[:-1], edges[1:])])
    f_p, ph_p, amp_p = fits.T
    t_p = (edges[:-1] + (np.diff(edges) - 1) / 2.0) / fs  # piece centres (s)
    # pieces in the block's ramps or beyond its ends carry little of the tone: their phases are noise
    use = amp_p >= 0.2 * amp_p.max()
    wt = (amp_p**2 * np.diff(edges))[use]
    f0 = float(np.sum(wt * f_p[use]) / np.sum(wt))
    if use.sum() >= 2:
        r = np.unwrap(ph_p[use] - 2 * np.pi * f0 * t_p[use])
        tc = t_p[use] - np.sum(wt * t_p[use]) / np.sum(wt)
        f0 += float(np.sum(wt * tc * r) / np.sum(wt * tc * tc)) / (2 * np.pi)
    centre = (n - 1) / 2.0
    half = 0.5 * fs / n

    def neg_power(f_hz: float) -> float:
        return -abs(_dtft(x, f_hz / fs, centre, offset=mean, where=where)) ** 2

    res = optimize.minimize_scalar(neg_power, bounds=(f0 - half, f0 + half), method="bounded",
                                   options=dict(xatol=1e-6 * fs / (4 * n)))
    f_hat = float(res.x)
    z = _dtft(x, f_hat / fs, centre, offset=mean, where=where)
    return f_hat, float(np.angle(z)), float(2 * abs(z) / n)


# --------------------------------------------------------------------------- block finding


def _decimate(x: np.ndarray, fs: float, target_fs: float) -> tuple[np.ndarray, float]:
    return decimate_reader(lambda a, b: x[a:b], x.size, fs, target_fs)


def decimate_reader(read, n: int, fs: float, target_fs: float, chunk: int = 2**20) -> tuple[np.ndarray, float]:
    """Decimate a signal read piece by piece: ``read(a, b)`` returns samples ``a..b``.

    Polyphase FIR (``scipy.signal.resample_poly``, linear phase, so envelopes
    and phases keep their timing) applied to overlapping pieces whose
    overlaps exceed the filter's half length; arrays and files go through
    this same routine, so both give the same decimated reference.
    """
    q = int(fs // target_fs)
    if q <= 1:
        return np.asarray(read(0, n), dtype=np.float64), fs
    half = 10 * q  # resample_poly's default filter reaches 10 q input samples each side
    pad = -(-2 * half // q) * q
    step = max(q, (chunk // q) * q)
    # written in place: a list of pieces and their concatenation held the reference twice
    out = np.empty(-(-n // q))
    for a in range(0, n, step):
        b = min(n, a + step)
        lo, hi = max(0, a - pad), min(n, b + pad)
        seg = np.asarray(read(lo, hi), dtype=np.float64)
        y = signal.resample_poly(seg, 1, q, padtype="line")
        k0 = (a - lo) // q
        k1 = k0 + -(-(b - a) // q)
        out[a // q: a // q + k1 - k0] = y[k0:k1]
    return out, fs / q


#: cycles in the envelope's moving mean (even: see _envelope)
_ENV_CYCLES = 4


#: decimated samples per piece of :func:`_envelope` (its memory, not its result)
_ENV_PIECE = 1 << 18


def _envelope_pieces(x: np.ndarray, fs: float, f: float, n_cycles: int = _ENV_CYCLES, *,
                     keep: np.ndarray | None = None, span: tuple[int, int] | None = None, stride: int = 1):
    """Yield ``(a, b, values)``: :func:`_envelope` at samples ``a, a + stride, ... < b``, piece by piece."""
    n = x.size
    s0, s1 = (0, n) if span is None else (max(0, span[0]), min(n, span[1]))
    w = max(1, int(round(n_cycles * fs / f)))
    step = max(_ENV_PIECE, 4 * w)
    step = -(-step // stride) * stride
    # pieces lie on one grid from sample 0 whatever the span, and each starts its running mean w
    # before the piece: a stretch computed alone equals the whole record's envelope to the bit
    for a in range((s0 // step) * step, s1, step):
        b = min(n, a + step)
        c, d = max(a, s0), min(b, s1)
        if c >= d:
            continue
        c += (-c) % stride
        # the box reaches w // 2 samples either way: w of context leaves every output sample whole
        # (uniform_filter1d's running sum goes left to right, so stopping at d + w changes nothing before d)
        lo, hi = max(0, a - w), min(n, d + w)
        seg = _kept(x, keep, lo, hi)
        rot = seg * _phasors(f / fs, lo, hi - lo)
        re = ndimage.uniform_filter1d(rot.real, w, mode="constant")
        im = ndimage.uniform_filter1d(rot.imag, w, mode="constant")
        yield c, d, 2 * np.hypot(re[c - lo: d - lo: stride], im[c - lo: d - lo: stride])


def _envelope(x: np.ndarray, fs: float, f: float, n_cycles: int = _ENV_CYCLES, *,
              keep: np.ndarray | None = None, span: tuple[int, int] | None = None, stride: int = 1) -> np.ndarray:
    """Amplitude at frequency ``f``: demodulation and a moving mean over whole cycles.

    A mean over an even number of cycles nulls every other harmonic and the
    half-integer multiples used for the background level. The mean is a
    running sum (``scipy.ndimage.uniform_filter1d``, zeros beyond the ends:
    ``scipy.signal.fftconvolve(..., mode="same")`` with a box) taken piece by
    piece, so the memory is the output's and not that of complex FFT buffers
    of the whole recording (190 MB for 8 minutes at 3.2 kHz, growing with the
    recording's length).

    ``keep`` (boolean, the record's length) counts the other samples as
    zeros; ``span=(a, b)`` returns samples ``a..b`` only (equal to the same
    samples of the whole record's envelope); ``stride`` keeps every
    ``stride``-th sample (of the record, from sample 0).
    """
    n = x.size
    s0, s1 = (0, n) if span is None else (max(0, span[0]), min(n, span[1]))
    out = np.empty(max(0, -(-s1 // stride) - -(-s0 // stride)))
    first = -(-s0 // stride)
    for a, b, v in _envelope_pieces(x, fs, f, n_cycles, keep=keep, span=(s0, s1), stride=stride):
        k = a // stride - first
        out[k:k + v.size] = v
    return out


#: the most envelope samples the block finder takes a background median over: a longer record's
#: envelope is subsampled to this many (2**21 is 11 minutes at 3.2 kHz; the envelope is a moving mean
#: over cycles, so an hour subsampled to every sixth sample loses nothing of its median)
_FIND_WHOLE = 1 << 21


def _background(x: np.ndarray, fs: float, f: float, keep: np.ndarray | None) -> float:
    """Median envelope at ``f`` over the kept samples (subsampled to at most :data:`_FIND_WHOLE`)."""
    stride = -(-x.size // _FIND_WHOLE)
    env = _envelope(x, fs, f, keep=keep, stride=stride)
    return float(np.median(env if keep is None else env[keep[::stride]]))


def _abs_max(x: np.ndarray, keep: np.ndarray | None, piece: int | None = None) -> float:
    """``max |x|`` over the kept samples (the others count as zeros), piece by piece (:data:`_ENV_PIECE`)."""
    piece = piece or _ENV_PIECE
    top = 0.0
    for a in range(0, x.size, piece):
        # the kept samples only (a zeroed copy raised the traced peak the memory test measures)
        v = x[a:a + piece] if keep is None else x[a:a + piece][keep[a:a + piece]]
        if v.size:
            top = max(top, float(v.max()), -float(v.min()))
    return top


def _ramp_edges(env: np.ndarray, lo: int, hi: int, level: float, smear: float = 0.0, *, origin: int = 0,
                n: int | None = None) -> tuple[float, float, float, float]:
    """Start, plateau start, plateau stop and stop (decimated samples) of one envelope segment.

    Each ramp is a straight line fitted to the envelope between 20% and 80%
    of the plateau level; it is extrapolated to zero (the block edge) and to
    the plateau level (the ramp's corner), so neither depends on a detection
    threshold. The 90% points bound the corners (and stand in for a ramp too
    short to fit): a linear ramp reaches 90% a tenth of its length before
    its corner, and a block model ending its ramps there leaves the gain to
    follow a kink of a tenth of the amplitude.

    ``smear`` is the half-width (samples) of the envelope's moving mean: it
    bends a ramp's line within that distance of its foot and its corner and
    leaves it straight between, so the line is fitted again on the straight
    part (at 5 Hz a 4-cycle mean reaches 0.4 s, past the 20% point of a 1 s
    ramp, and the ends came out 20-40 ms wide).

    ``env`` may be a stretch of the record's envelope starting at sample
    ``origin`` (it must cover ``lo - 1 .. hi``); positions are the record's,
    ``n`` its length (default: ``origin + env.size``).
    """
    n = origin + env.size if n is None else n
    seg = env[lo - origin:hi - origin]
    top = np.flatnonzero(seg >= 0.9 * level)
    p0, p1 = (lo + top[0], lo + top[-1]) if top.size else (lo, hi)

    def line(idx: np.ndarray) -> tuple[float, float] | None:
        vals = env[idx - origin]
        keep = (vals > 0.2 * level) & (vals < 0.8 * level)
        if keep.sum() < 3:
            return None
        slope, icpt = np.polyfit(idx[keep], vals[keep], 1)
        if abs(slope) < 1e-12:
            return None
        if smear > 0:
            # the straight part: beyond the smear from the foot (zero) and the corner (level)
            foot, top = -icpt / slope, (level - icpt) / slope
            a, b = min(foot, top) + smear, max(foot, top) - smear
            straight = (idx > a) & (idx < b) & (vals > 0.05 * level)
            # at least a cycle (smear / 2) of it: a few points give any slope (a 0.3 s ramp at 5 Hz,
            # refitted on 5 points, came out nearly flat and the block read as a sham from 1.4 s to 17.6 s)
            if straight.sum() >= max(3, smear / 2):
                slope, icpt = np.polyfit(idx[straight], vals[straight], 1)
        return None if abs(slope) < 1e-12 else (slope, icpt)

    up = line(np.arange(max(0, lo - 1), p0 + 1))
    down = line(np.arange(p1, min(n, hi + 1)))
    start = lo if up is None else -up[1] / up[0]
    stop = hi if down is None else -down[1] / down[0]
    start = min(max(start, lo - (p0 - lo) - 2), lo)
    stop = max(min(stop, hi + (hi - p1) + 2), hi)
    # corners: where each ramp reaches the plateau's typical level (its maximum is raised by the
    # heartbeat), between the 90% point and 1/9 of the ramp beyond it (the most a linear ramp's
    # 90% point can be early)
    mid = float(np.median(env[p0 - origin:p1 + 1 - origin])) if p1 > p0 else level
    c0 = float(p0) if up is None else float(np.clip((mid - up[1]) / up[0], p0, p0 + (p0 - start) / 9.0))
    c1 = float(p1) if down is None else float(np.clip((mid - down[1]) / down[0], p1 - (stop - p1) / 9.0, p1))
    if up is not None and down is not None and up[0] > 0 > down[0]:
        # ramps that meet near the top (a sham block): the envelope's moving mean rounds the apex
        # below the lines, so the corners are where the two lines cross
        apex = (down[1] - up[1]) / (up[0] - down[0])
        if up[0] * apex + up[1] < 1.5 * level:
            c0 = c1 = float(np.clip(apex, start, stop))
    if c0 > c1:
        c0 = c1 = 0.5 * (c0 + c1)
    return start, c0, c1, stop


@dataclass
class _Segment:
    start: float
    p0: float
    p1: float
    stop: float
    level: float


def _find_segments(x_ds: np.ndarray, fs_ds: float, f: float, threshold: float, min_cycles: float,
                   keep: np.ndarray | None = None) -> list:
    """Stretches where the amplitude at ``f`` exceeds ``threshold`` times the background.

    ``keep`` (boolean) leaves out blocks found already (their samples count
    as zeros and their envelope is not part of the background). The memory
    does not grow with the record beyond a boolean mask of it: the envelope
    is compared with the threshold piece by piece and computed again around
    each stretch found (:func:`_envelope` of a span equals the whole
    record's), and long records take their background medians from a
    subsample (:func:`_background`).
    """
    n = x_ds.size
    bg = np.sqrt(_background(x_ds, fs_ds, 0.5 * f, keep) * _background(x_ds, fs_ds, 1.5 * f, keep))
    bg = max(bg, 1e-12 * max(1.0, _abs_max(x_ds, keep)))
    # the runs above the threshold, piece by piece, joined across piece edges
    runs: list[list[int]] = []
    for a, b, v in _envelope_pieces(x_ds, fs_ds, f, keep=keep):
        for r0, r1 in mask_runs(v > threshold * bg):
            if runs and runs[-1][1] == a + r0:
                runs[-1][1] = a + r1
            else:
                runs.append([a + r0, a + r1])
    # bridge short dropouts (a few cycles) inside one block
    gap = int(round(2 * fs_ds / f))
    merged: list[list[int]] = []
    for a, b in runs:
        if merged and a - merged[-1][1] <= gap:
            merged[-1][1] = b
        else:
            merged.append([a, b])
    segs = []
    min_len = min_cycles * fs_ds / f
    for a, b in merged:
        if b - a < min_len:
            continue
        lo = max(0, a - 1)
        env = _envelope(x_ds, fs_ds, f, keep=keep, span=(lo, b + 1))
        run = env[a - lo:b - lo]
        level = float(np.max(signal.medfilt(run, 2 * (int(fs_ds / f) // 2) + 1))) if b - a > 3 else float(run.max())
        s, p0, p1, e = _ramp_edges(env, a, b, level, smear=_ENV_CYCLES / 2 * fs_ds / f, origin=lo, n=n)
        cycle = fs_ds / f
        if min(p0 - s, e - p1) < 1.25 * _ENV_CYCLES * cycle:
            s, p0, p1, e = _sharpen_edges(x_ds, fs_ds, f, (s, p0, p1, e), a, b, level, keep=keep)
        segs.append(_Segment(s, p0, p1, e, level))
    return segs


#: cycles either side of a stretch over which :func:`_sharpen_edges` looks for its crossings (a ramp
#: it sharpens is under 1.25 * _ENV_CYCLES cycles long; the coarse envelope's threshold crossing lies
#: within a few cycles of its foot)
_SHARPEN_REACH = 4 * _ENV_CYCLES


def _sharpen_edges(x_ds, fs_ds, f, edges, a, b, level, keep=None):
    """Ramps shorter than the envelope's moving mean, found again on a one-cycle envelope.

    The moving mean over :data:`_ENV_CYCLES` cycles turns a step (a block
    switched on without a ramp) into a ramp of that length, which the block
    model would then follow as a ramp for 4 cycles: up to the whole artifact
    left at the block's edges. A ramp that the coarse envelope cannot
    resolve is fitted again on a one-cycle mean (which nulls the harmonics
    as well); one still no longer than that mean's own smear is a step, put
    where that envelope crosses half the plateau level. The one-cycle
    envelope is computed over the stretch and :data:`_SHARPEN_REACH` cycles
    either side only.
    """
    cycle = fs_ds / f
    unresolved = 1.25 * _ENV_CYCLES * cycle
    n = x_ds.size
    reach = int(np.ceil(_SHARPEN_REACH * cycle)) + 2
    lo = max(0, a - reach)
    fine = _envelope(x_ds, fs_ds, f, n_cycles=1, keep=keep, span=(lo, b + reach))
    s2, q0, q1, e2 = _ramp_edges(fine, a, b, level, smear=0.5 * cycle, origin=lo, n=n)
    s, p0, p1, e = edges
    if p0 - s < unresolved:
        s, p0 = s2, q0
        if a == 0:
            s = p0 = 0.0  # the recording starts inside the block: no ramp to see
        elif _rise(fine, a, level, True, origin=lo) < 1.2 * cycle:
            s = p0 = _crossing(fine, a, 0.5 * level, rising=True, origin=lo)
    if e - p1 < unresolved:
        p1, e = q1, e2
        if b >= n:
            p1 = e = float(n)  # the recording stops inside the block
        elif _rise(fine, b, level, False, origin=lo) < 1.2 * cycle:
            p1 = e = _crossing(fine, b, 0.5 * level, rising=False, origin=lo)
    return s, min(p0, p1), max(p0, p1), e


def _rise(env: np.ndarray, near: int, level: float, rising: bool, origin: int = 0) -> float:
    """Samples between the 10% and 90% crossings of ``level`` nearest ``near`` (a one-cycle mean of
    a step rises over about 0.85 cycle, a ramp of L cycles over about 0.8 L)."""
    return abs(_crossing(env, near, 0.9 * level, rising, origin) - _crossing(env, near, 0.1 * level, rising, origin))


def _crossing(env: np.ndarray, near: int, value: float, rising: bool, origin: int = 0) -> float:
    """Where ``env`` crosses ``value`` (upwards if ``rising``) nearest sample ``near``, to a fraction of a sample.

    ``env`` may be a stretch of the record's envelope starting at sample ``origin``.
    """
    above = env >= value
    cross = np.flatnonzero(above[1:] != above[:-1])
    cross = cross[(above[cross + 1] if rising else above[cross])]
    if cross.size == 0:
        return float(near)
    i = int(cross[np.argmin(np.abs(cross - (near - origin)))])
    return (i + origin) + (value - env[i]) / (env[i + 1] - env[i])


@one_blas_thread
def fit_stimulation(
    data: np.ndarray,
    fs: float,
    *,
    stim_freq=None,
    reference: np.ndarray | None = None,
    events: np.ndarray | None = None,
    threshold: float = 10.0,
    min_cycles: float = 8.0,
    fmax: float = 200.0,
) -> StimulationModel:
    """Find stimulation blocks and fit frequency and phase per block.

    Parameters
    ----------
    data : ndarray, shape (n_channels, n_samples) or (n_samples,)
        The recording (any unit).
    fs : float
        Sampling rate in Hz.
    stim_freq : float or sequence of float, optional
        Nominal stimulation frequency, or one per frequency the session
        delivers; the search stays within +-2% of each (with one, blocks
        found at another frequency are warned about). Without it, the
        strongest spectral peak between 0.5 Hz and ``fmax`` is taken, its
        blocks set aside and the search repeated on the rest (up to
        :data:`MAX_FREQUENCIES` frequencies, each of which must come and go).
    reference : ndarray, shape (n_samples,), optional
        A recorded stimulator monitor signal; used instead of the data.
    events : ndarray, optional
        Times (s) of stimulation cycle onsets from sync pulses: frequency and
        phase come from a straight-line fit of onset time against cycle
        number; a gap over two periods ends a block.
    threshold : float
        A block is where the amplitude at the stimulation frequency exceeds
        ``threshold`` times its background level (the geometric mean of the
        levels at 0.5 and 1.5 times the frequency).
    min_cycles : float
        Shortest block, in cycles.
    fmax : float
        Upper end of the search without a nominal frequency.

    Returns
    -------
    StimulationModel
    """
    data = np.asarray(data)
    if data.ndim == 1:
        data = data[None, :]
    n = data.shape[-1]
    if events is not None:
        return _from_events(np.asarray(events, dtype=float), fs, n, stim_freq)
    if reference is not None:
        ref = np.asarray(reference, dtype=np.float64)
        if ref.shape != (n,):
            raise ValueError(f"stim_reference must have shape ({n},), got {ref.shape}")
        source = "monitor"
    else:
        # the channel with the most power near the stimulation band leads
        ch = int(np.argmax(np.std(data, axis=1)))
        ref = np.asarray(data[ch], dtype=np.float64)
        source = f"data channel {ch}"

    centred = ref - np.mean(ref)
    x_ds, fs_ds = _decimate(centred, fs, decimated_rate(stim_freq, fmax))
    return fit_decimated(x_ds, fs_ds, fs, n, stim_freq=stim_freq, source=source,
                         threshold=threshold, min_cycles=min_cycles, fmax=fmax, read=lambda a, b: centred[a:b])


def decimated_rate(stim_freq=None, fmax: float = 200.0) -> float:
    """Rate the reference is decimated to before the search: 16 times the top frequency, >= 200 Hz."""
    hints = nominal_frequencies(stim_freq)
    f_top = max(hints) * 1.02 if hints else fmax
    return max(16 * f_top, 200.0)


@one_blas_thread
def fit_decimated(
    x_ds: np.ndarray,
    fs_ds: float,
    fs: float,
    n: int,
    *,
    stim_freq=None,
    source: str = "data",
    threshold: float = 10.0,
    min_cycles: float = 8.0,
    fmax: float = 200.0,
    read=None,
) -> StimulationModel:
    """:func:`fit_stimulation` on a reference already decimated to ``fs_ds``.

    File readers stream the reference through the same decimation chunk by
    chunk and call this, so a file gives the same model as its array.
    ``n`` and ``fs`` are the full-rate length and sampling rate. With
    ``read(a, b)``, the full-rate reference (less its mean), a block edge
    without a ramp (a step) is placed to the sample (:func:`_step_sample`);
    the decimated envelope places it within a few milliseconds only.
    """
    hints = nominal_frequencies(stim_freq)
    if hints is None and x_ds.size / fs_ds * 0.5 < 1:
        raise ValueError("recording too short to find a stimulation frequency")
    found = _search_frequencies(x_ds, fs_ds, hints, threshold, min_cycles, fmax)
    if hints is not None and len(hints) == 1:
        # a session may also hold blocks at another frequency: say so rather than leave them
        others = _search_frequencies(x_ds, fs_ds, None, threshold, min_cycles, min(fmax, 0.45 * fs_ds),
                                     free=_free_of(found, x_ds.size, fs_ds), first_free=False)
        if others:
            at = ", ".join(f"{f:.4g} Hz" for f, _, _ in others)
            warnings.warn(
                (f"stimulation blocks at {at} too, besides {hints[0]:g} Hz; pass every frequency "
                 "(stim_freq=[...], --stim-freq F1 F2) to clean them") if found else
                (f"no stimulation blocks near {hints[0]:g} Hz, but blocks at {at}: is that the frequency "
                 "(stim_freq, --stim-freq)?"), stacklevel=3)
    model = StimulationModel(fs=fs, n_samples=n, nominal_freq_hz=stim_freq, reference=source)
    scale = fs / fs_ds
    pairs = sorted(((sg, f_guess, nominal) for f_guess, nominal, segs in found for sg in segs), key=lambda p: p[0].start)
    tones = []
    for sg, f_guess, nominal in pairs:
        # ramps carry phase information too: fit over the whole segment
        a, b = int(max(0, np.ceil(sg.start))), int(min(x_ds.size, np.floor(sg.stop) + 1))
        # an electrode's drift (a DC-coupled amplifier's millivolts over tens of seconds) is no tone, but the
        # tone fit has no term for it: 2 mV at 0.02 Hz moved a 5 Hz block's frequency by 11 ppm and its phase
        # by 0.03 rad. The level is read through cycles at the guess, segment by segment (memory: one block's)
        seg = x_ds[a:b] - slow_baseline(x_ds[a:b], fs_ds, f_guess)
        tones.append((a, b, *estimate_tone(seg, fs_ds, freq_hint=f_guess)))
    # each segment's Cramer-Rao bound, once: only blocks at one frequency are judged against each other
    spreads = [_tone_spread(t, x_ds, fs_ds) for t in tones] if len(tones) > 1 else [0.0] * len(tones)
    keep = _one_clock(pairs, tones, spreads, fs_ds)
    clock = _clock_frequencies(pairs, tones, keep, spreads)
    for (sg, f_guess, nominal), (a, b, _, ph_c, amp), kept, f_b in zip(pairs, tones, keep, clock):
        if not kept:
            continue
        # phase at the segment centre, mapped to the full-rate sample grid
        centre_ds = a + (b - a - 1) / 2.0
        ref_sample = int(round(centre_ds * scale))
        phase_ref = ph_c + 2 * np.pi * f_b * (ref_sample / fs - centre_ds / fs_ds)
        start = int(np.clip(np.floor(sg.start * scale), 0, n))
        stop = int(np.clip(np.ceil((sg.stop + 1) * scale), 0, n))
        if sg.p0 == sg.start:  # a step: no ramp
            start = int(np.clip(round(sg.start * scale), 0, n))
        if sg.p1 == sg.stop:
            stop = int(np.clip(round(sg.stop * scale), start, n))
        up = int(np.clip(round(sg.p0 * scale), start, stop))
        down = int(np.clip(round(sg.p1 * scale), up, stop))
        ramps = (up - start) + (stop - down)
        kind = "sham" if ramps > 0 and (down - up) < 0.5 * ramps else "active"
        drift = None if nominal is None else (f_b - nominal) / nominal * 1e6
        model.blocks.append(StimBlock(kind, start, stop, up, down, f_b, float(np.mod(phase_ref, 2 * np.pi)),
                                      ref_sample, amp, drift))
    if read is not None:
        for k, blk in enumerate(model.blocks):
            bounds = (model.blocks[k - 1].stop if k else 0,
                      model.blocks[k + 1].start if k + 1 < len(model.blocks) else n)
            if blk.kind == "active":
                _edges_at_full_rate(read, model, blk, fs_ds, bounds)
            elif blk.start > 0 and blk.stop < n:
                _sham_at_full_rate(read, model, blk, fs_ds, bounds)
    return model


#: ramps shorter than this many cycles or :data:`_WHOLE_RAMP_S` (as the decimated envelope sees them)
#: are fitted whole at the full rate; longer ones only at their feet (see :func:`_ramp_fit`)
_WHOLE_RAMP_CYCLES = 10.0
_WHOLE_RAMP_S = 0.5


def _edges_at_full_rate(read, model: StimulationModel, blk: StimBlock, fs_ds: float,
                        bounds: tuple[int, int]) -> None:
    """Place ``blk``'s ramps (or steps) on the full-rate reference: :func:`_ramp_fit`, :func:`_step_sample`.

    A fitted ramp shorter than a tenth of a cycle is a step, placed as one
    (the change point is exact to the sample where a short ramp fit is not).
    """
    n = model.n_samples
    tenth = 0.1 * model.fs / blk.freq_hz
    longest = max(_WHOLE_RAMP_CYCLES / blk.freq_hz, _WHOLE_RAMP_S) * model.fs
    ramps = []
    for rising, foot_name, corner_name in ((True, "start", "ramp_up_stop"), (False, "stop", "ramp_down_start")):
        foot, corner = getattr(blk, foot_name), getattr(blk, corner_name)
        if (foot <= 0) if rising else (foot >= n):
            continue  # the recording starts (or stops) inside the block: no edge to place
        ramp = _ramp_fit(read, model, blk, foot, corner, fs_ds, rising=rising, bounds=bounds,
                         foot_only=abs(corner - foot) >= longest)
        if ramp is not None and abs(ramp[1] - ramp[0]) >= tenth:
            foot, corner = ramp
            ramps.append((rising, foot_name, corner_name))
        elif ramp is not None or abs(corner - foot) <= 1:
            foot = corner = _step_sample(read, model, blk, foot if ramp is None else ramp[0], fs_ds, rising=rising)
        setattr(blk, foot_name, foot)
        setattr(blk, corner_name, corner)
    if ramps:
        _choose_ramp_shape(read, model, blk, fs_ds, bounds, ramps)


def _sham_at_full_rate(read, model: StimulationModel, blk: StimBlock, fs_ds: float,
                       bounds: tuple[int, int]) -> None:
    """Place a sham block's feet and peak on the full-rate reference, and choose its ramps' shape.

    A sham block ramps up and straight back down: no plateau to learn the
    cycle from, so the mean cycle is taken over 8 cycles around the peak
    (its level there only scales it; the amplitude is profiled out). The
    two feet and the peak are searched together on chunk sums
    (:func:`_chunk_sums`), for straight and for raised-cosine ramps, on a
    grid refined around the best; the shape is chosen as for an active
    block (:func:`_choose_ramp_shape`). From the decimated envelope alone,
    raised-cosine sham ramps (3 s) began 0.5 s late and 5% of the
    artifact's peak was left before them.
    """
    fs = model.fs
    cyc = fs / blk.freq_hz
    s1, p, s2 = blk.start, blk.ramp_up_stop, blk.stop
    ramp = max(p - s1, s2 - p)
    if min(p - s1, s2 - p) < 2 * cyc:
        return
    reach = int(np.ceil(max(2.5 * cyc, 0.4 * ramp, 3 * fs / fs_ds)))
    lo, hi = max(s1 - reach, bounds[0], 0), min(s2 + reach, bounds[1], model.n_samples)
    got = _cycle_template(read, model, blk, max(p - int(4 * cyc), s1), min(p + int(4 * cyc), s2))
    if got is None or got[3].any():
        return  # a clipped reference keeps the envelope's sham (see _choose_ramp_shape)
    centres, tmpl, offset = got[:3]
    x = np.asarray(read(lo, hi), dtype=np.float64) - offset
    t = np.interp(fractional_part(model.cycles(blk, lo, hi)), centres, tmpl, period=1.0)
    h = int(max(1, min(max(round(fs / 1000.0), (hi - lo) // 2000), ramp // 16)))
    sums = _chunk_sums(x, t, h)
    m = x.size
    coarse = np.array([s1 - lo, p - lo, s2 - lo], dtype=np.float64)
    fits = {}
    for shape, longer in (("linear", (0.85, 1.2)), ("cosine", (1.0, 1.9))):
        # the feet move out by up to half the extra length, the peak stays near the envelope's
        span = np.array([0.5 * (longer[1] - 1.0) + 0.15, 0.15, 0.5 * (longer[1] - 1.0) + 0.15]) * ramp
        centre = coarse + np.array([-0.5, 0.0, 0.5]) * (longer[0] + longer[1] - 2.0) / 2 * ramp

        def score(a, b, c, shape=shape):
            ok = (a >= 0) & (b - a >= 1) & (c - b >= 1) & (c <= m - 1)
            return ok, _explained(sums, _sham_levels(sums, a[ok], b[ok], c[ok], shape))

        best = _grid_refine(score, centre, span, points=9, levels=4)
        if best is None or not np.isfinite(best[3]):
            return
        fits[shape] = best
    lv = {sh: _sham_levels(sums, *(np.array([v]) for v in f[:3]), sh) for sh, f in fits.items()}
    dist = _distance(sums, lv["linear"], lv["cosine"])
    shape = "cosine" if dist > 0 and fits["cosine"][3] - fits["linear"][3] > _COSINE_EVIDENCE * dist else "linear"
    a, b, c = (int(round(lo + v)) for v in fits[shape][:3])
    blk.start, blk.ramp_up_stop, blk.ramp_down_start, blk.stop = a, b, b, c
    blk.ramp_shape = shape


def _sham_levels(sums: tuple, a: np.ndarray, b: np.ndarray, c: np.ndarray, shape: str) -> tuple:
    """Levels and slopes per chunk of a sham: up from ``a`` to the peak ``b``, down to ``c`` (one row per candidate)."""
    centre = sums[0][None, :]
    a, b, c = (np.reshape(v, (-1, 1)).astype(np.float64) for v in (a, b, c))
    up = (centre - a) / (b - a)
    down = (c - centre) / (c - b)
    rising = centre < b
    tau = np.where(rising, up, down)
    r = ramp_level(tau, shape)
    dr = _ramp_slope(tau, shape) * np.where(rising, 1.0 / (b - a), -1.0 / (c - b))
    return r, dr


def _explained(sums: tuple, lv: tuple) -> np.ndarray:
    """Energy explained by levels ``lv`` times the cycle, the amplitude profiled out (one per candidate)."""
    _, sB, dB = sums[:3]
    num = (lv[0] * sB + lv[1] * dB).sum(axis=1)
    den = _cross(sums, lv, lv)
    return np.where((num > 0) & (den > 0), num * num / np.maximum(den, 1e-300), -np.inf)


def _distance(sums: tuple, one: tuple, two: tuple) -> float:
    """Energy of the difference between two fitted envelopes (levels of one candidate each), amplitudes included."""
    _, sB, dB = sums[:3]
    amp = [float((l[0] * sB + l[1] * dB).sum() / _cross(sums, l, l)[0]) for l in (one, two)]
    return float(amp[0] ** 2 * _cross(sums, one, one)[0] + amp[1] ** 2 * _cross(sums, two, two)[0]
                 - 2 * amp[0] * amp[1] * _cross(sums, one, two)[0])


def _choose_ramp_shape(read, model: StimulationModel, blk: StimBlock, fs_ds: float, bounds: tuple[int, int],
                       ramps: list) -> None:
    """Keep ``blk``'s straight ramps, or make them raised cosines if those clearly explain its ramps better.

    Both shapes are fitted to every ramp of the block (``ramps``: rising
    flag and the block's attribute names of foot and corner) as in
    :func:`_ramp_fit` (least squares, the amplitude profiled out), over the
    whole ramp, from the straight fit's ends: a raised cosine is about 1.37
    times as long as the straight line that fits it best by least squares
    (computed for this project), with the same middle. Both shapes have two
    parameters per ramp; the evidence is the difference of the energies they explain, in units of
    the energy of the difference between the two fitted ramps: about +1
    where the ramps are raised cosines, -1 where they are straight, and
    in between where the LFP near the stimulation frequency is as strong as
    that difference (a weak artifact, a short ramp). Cosines are kept when
    the evidence over the block's ramps exceeds :data:`_COSINE_EVIDENCE` and
    no ramp speaks against them (a stimulator's two ramps share a shape).
    Straight lines fitted to raised cosines start late and leave up to a
    tenth of the artifact beside the feet (100-400 uV of a 4 mV artifact,
    measured on an independent generator); the other way round costs as
    much, so an unclear case keeps straight ramps, the common kind.
    """
    fits, gained, apart = [], 0.0, 0.0
    for rising, foot_name, corner_name in ramps:
        foot, corner = getattr(blk, foot_name), getattr(blk, corner_name)
        win = _ramp_window(read, model, blk, foot, corner, fs_ds, rising, bounds)
        if win is None or win.c0 - win.f0 < 4 or win.railed:
            # a clipped reference keeps straight ramps: its envelope flattens early, its corners come
            # early, and what is left of its ramp near them was measured to lean either way
            return
        length = win.c0 - win.f0
        # chunks of 1 ms, or 1/200 of a long ramp (the level's curvature within a chunk is then a
        # few 1e-5 of it), and 16 per ramp at least
        h = int(max(1, min(max(round(model.fs / 1000.0), length // 200), length // 16)))
        sums = _chunk_sums(win.x, win.t, h)
        lin = _shape_search(sums, 0.5 * (win.f0 + win.c0), length, (0.8, 1.25), "linear", win.x.size)
        cos = _shape_search(sums, 0.5 * (win.f0 + win.c0), length, (1.0, 1.9), "cosine", win.x.size)
        e_lin, e_cos = lin[3], cos[3]
        dist = _shape_distance(sums, lin, cos)
        if not (np.isfinite(e_lin) and np.isfinite(e_cos) and dist > 0):
            return
        if e_cos <= e_lin:
            return
        fits.append((foot_name, corner_name, win.sample(cos[1]), win.sample(cos[2])))
        gained += e_cos - e_lin
        apart += dist
    if gained > _COSINE_EVIDENCE * apart:
        for foot_name, corner_name, foot, corner in fits:
            setattr(blk, foot_name, foot)
            setattr(blk, corner_name, corner)
        blk.ramp_shape = "cosine"


#: evidence for raised-cosine ramps (see :func:`_choose_ramp_shape`): the explained energy they
#: gain over straight ones, in units of the energy between the two fits; this project's choice
#: (+1 is a clean cosine, -1 a clean straight ramp)
_COSINE_EVIDENCE = 0.25


def _chunk_sums(x: np.ndarray, t: np.ndarray, h: int) -> tuple:
    """Per chunk of ``h`` samples: its centre and the sums of ``x t``, ``d x t``, ``t^2``, ``d t^2``, ``d^2 t^2``.

    ``d`` is a sample's distance from its chunk's centre: a ramp level
    linear within a chunk (first order in ``h`` over the ramp's length) is
    then exact on the chunk's sums.
    """
    m = x.size
    k = -(-m // h)
    B = np.zeros(k * h)
    A = np.zeros(k * h)
    B[:m] = x * t
    A[:m] = t * t
    B, A = B.reshape(k, h), A.reshape(k, h)
    d = np.arange(h) - 0.5 * (h - 1)
    return np.arange(k) * h + 0.5 * (h - 1), B.sum(1), B @ d, A.sum(1), A @ d, A @ (d * d)


def _levels(sums: tuple, s: np.ndarray, c: np.ndarray, shape: str) -> tuple[np.ndarray, np.ndarray]:
    """Ramp level and its slope per sample at each chunk's centre, one row per candidate ``(s, c)``."""
    centre = sums[0]
    L = np.maximum(np.asarray(c, dtype=np.float64) - s, 1.0).reshape(-1, 1)
    tau = (centre[None, :] - np.reshape(s, (-1, 1))) / L
    return ramp_level(tau, shape), _ramp_slope(tau, shape) / L


def _cross(sums: tuple, one: tuple, two: tuple) -> np.ndarray:
    """``sum r1 r2 t^2`` over the window, from the chunk sums, for levels ``one`` and ``two``."""
    _, _, _, sA, dA, ddA = sums
    (r1, d1), (r2, d2) = one, two
    return (r1 * r2 * sA + (r1 * d2 + r2 * d1) * dA + d1 * d2 * ddA).sum(axis=1)


def _shape_explained(sums: tuple, s: np.ndarray, c: np.ndarray, shape: str) -> np.ndarray:
    """Energy a ramp of ``shape`` from ``s`` to ``c`` (window samples), then a plateau, explains (see :func:`_ramp_fit`)."""
    return _explained(sums, _levels(sums, s, c, shape))


def _shape_distance(sums: tuple, one: tuple, two: tuple) -> float:
    """Energy of the difference between two fitted ramps ``(shape, foot, corner, energy)``, amplitudes included."""
    return _distance(sums, *(_levels(sums, np.array([f[1]]), np.array([f[2]]), f[0]) for f in (one, two)))


def _shape_search(sums: tuple, middle: float, length: float, longer: tuple[float, float], shape: str,
                  m: int) -> tuple[str, float, float, float]:
    """Best ramp of ``shape`` near ``middle``, ``longer`` times ``length`` long: ``(shape, foot, corner, energy)``.

    A grid over the middle (within a fifth of ``length``) and the length,
    refined twice around the best (:func:`_grid_refine`).
    """
    def score(mid, ln):
        s, c = mid - 0.5 * ln, mid + 0.5 * ln
        ok = (s >= 0) & (c <= m - 1) & (ln >= 1.0)
        return ok, _shape_explained(sums, s[ok], c[ok], shape)

    centre = np.array([middle, 0.5 * (longer[0] + longer[1]) * length])
    half = np.array([0.2 * length, 0.5 * (longer[1] - longer[0]) * length])
    best = _grid_refine(score, centre, half, points=17, levels=3)
    if best is None:
        return shape, middle - 0.5 * length, middle + 0.5 * length, -np.inf
    mid, ln, value = best
    return shape, mid - 0.5 * ln, mid + 0.5 * ln, value


def _grid_refine(score, centre: np.ndarray, half: np.ndarray, points: int, levels: int):
    """Maximise ``score`` on a grid of ``points`` per parameter within ``centre +- half``, refined ``levels`` times.

    ``score(*params)`` takes one flat array per parameter and returns the
    valid candidates (bool) and their values. Each level centres the grid
    on the best so far and shrinks it fourfold (the best lies within two
    grid steps of it). Returns ``(*params, value)`` of the best, or None.
    """
    best = None
    for _ in range(levels):
        axes = [np.linspace(c - h, c + h, points) for c, h in zip(centre, half)]
        grids = [g.ravel() for g in np.meshgrid(*axes, indexing="ij")]
        ok, v = score(*grids)
        if not ok.any():
            break
        k = int(np.argmax(v))
        if best is None or v[k] > best[-1]:
            best = (*(float(g[ok][k]) for g in grids), float(v[k]))
        centre, half = np.array(best[:-1]), np.asarray(half) / 4
    return best


def nominal_frequencies(stim_freq) -> list[float] | None:
    """``stim_freq`` (None, a number or a sequence of numbers) as a list of floats, or None."""
    if stim_freq is None:
        return None
    values = np.atleast_1d(np.asarray(stim_freq, dtype=np.float64))
    if values.ndim != 1 or values.size == 0:
        raise ValueError(f"stim_freq must be a frequency or a list of frequencies (Hz), got {stim_freq!r}")
    return [float(v) for v in values]


#: the most stimulation frequencies one recording is searched for without a nominal frequency
MAX_FREQUENCIES = 4


def _free_of(found, n: int, fs_ds: float) -> np.ndarray:
    """Samples outside every segment found so far (with a few cycles' guard around each)."""
    free = np.ones(n, dtype=bool)
    for f, _, segs in found:
        guard = int(np.ceil(2 * fs_ds / f))
        for sg in segs:
            free[max(0, int(np.floor(sg.start)) - guard):int(np.ceil(sg.stop)) + guard + 1] = False
    return free


def _search_frequencies(x_ds, fs_ds, hints, threshold, min_cycles, fmax, free=None, first_free=True) -> list:
    """Stimulation segments per frequency: ``[(frequency searched, nominal or None, segments)]``.

    With nominal frequencies (``hints``), each is searched in turn on what the
    others left. Without, the strongest tone is taken, its blocks found and
    set aside, and the search repeated on the rest (up to
    :data:`MAX_FREQUENCIES`): a session may deliver 10 Hz and 40 Hz blocks,
    and a search for one frequency alone left the other's blocks uncleaned.
    A later frequency must come and go (its segments cover under 90% of
    what is left: a tone present throughout, such as mains hum, is not a
    block) and not lie within 2% of one found already. ``first_free=False``
    applies those rules to the first frequency too.
    """
    found = []
    free = np.ones(x_ds.size, dtype=bool) if free is None else free.copy()
    for i in range(len(hints) if hints is not None else MAX_FREQUENCIES):
        if free.sum() / fs_ds * 0.5 < 1 or free.sum() < 16:
            break
        keep = None if free.all() else free  # found blocks count as zeros (no copy of the record)
        if hints is not None:
            f_guess, nominal = hints[i], hints[i]
        else:
            f_guess, nominal = estimate_tone(x_ds, fs_ds, fmin=0.5, fmax=min(fmax, 0.45 * fs_ds), where=keep)[0], None
        segs = _find_segments(x_ds, fs_ds, f_guess, threshold, min_cycles, keep=keep)
        if hints is None and (found or not first_free):
            covered = sum(min(sg.stop, free.size) - max(sg.start, 0) for sg in segs)
            repeated = any(abs(f_guess - f) < 0.02 * f for f, _, _ in found)
            if not segs or repeated or covered > 0.9 * free.sum():
                break
        if segs:
            segs = _weaker_blocks(x_ds, fs_ds, f_guess, threshold, min_cycles, free, segs)
            found.append((f_guess, nominal, segs))
            free &= _free_of([found[-1]], x_ds.size, fs_ds)
    return found


def _one_clock(pairs: list, tones: list, spreads: list[float], fs_ds: float) -> list[bool]:
    """Which segments keep their place as blocks: those on the stimulator's clock.

    Blocks searched at one frequency come from one stimulator, whose clock
    gives them one frequency (to its drift, a few ppm within a session). A
    segment whose refined frequency is off the longest segment's by more
    than :data:`_CLOCK_SPREAD` (or 5 standard deviations of the two
    estimates, Cramér-Rao bound with the segment's own noise: Kay 1993,
    eq. 3.41) is not stimulation: an oscillation of the LFP near the
    stimulation frequency, 10 times the background for 8 cycles (alpha at
    an individual alpha frequency), would otherwise be cleaned away as a
    sham block. Such stretches are named in a warning and left as recorded.
    ``spreads``: each segment's bound (:func:`_tone_spread`).
    """
    keep = [True] * len(pairs)
    dropped = []
    for idx, ref in _clock_groups(pairs, tones, keep):
        f_ref, s_ref = tones[ref][2], spreads[ref]
        for i in idx:
            f_i = tones[i][2]
            if abs(f_i - f_ref) > max(_CLOCK_SPREAD * f_ref, 5.0 * np.hypot(spreads[i], s_ref)):
                keep[i] = False
                dropped.append(f"{tones[i][0] / fs_ds:.2f}-{tones[i][1] / fs_ds:.2f} s at {f_i:.4g} Hz "
                               f"(blocks at {f_ref:.6g} Hz)")
    if dropped:
        warnings.warn("not stimulation (off the stimulator's frequency), left as recorded: " + "; ".join(dropped),
                      stacklevel=4)
    return keep


def _tone_spread(tone: tuple, x_ds: np.ndarray, fs_ds: float) -> float:
    """Cramér-Rao bound (SD, Hz) of a segment's frequency, ``tone = (a, b, f, phase, amp)``, with its own noise."""
    a, b, f, _, amp = tone
    noise = np.sqrt(max(_variance(x_ds[a:b]) - 0.5 * amp * amp, 1e-12 * amp * amp + 1e-300))
    return tone_crb(amp, noise, b - a, fs_ds)["freq_hz"]


def _clock_groups(pairs: list, tones: list, keep: list[bool]) -> list[tuple[list[int], int]]:
    """The kept segments searched at one frequency, where there are several: (their indices, the longest's)."""
    groups: dict = {}
    for i, ((_, f_guess, _), kept) in enumerate(zip(pairs, keep)):
        if kept:
            groups.setdefault(f_guess, []).append(i)
    return [(idx, max(idx, key=lambda i: tones[i][1] - tones[i][0])) for idx in groups.values() if len(idx) > 1]


def _clock_frequencies(pairs: list, tones: list, keep: list[bool], spreads: list[float]) -> list[float]:
    """Each segment's frequency, taken with the longest segment's where one stimulator clock gives both.

    Blocks searched at one frequency share the stimulator's clock
    (:func:`_one_clock`). A short block (a sham's two ramps: 2 s at 20 Hz,
    its frequency 36 ppm off and known to about 100 ppm) whose estimate
    agrees with the longest block's within 3 standard deviations of the
    two (Cramér-Rao bounds, as in :func:`_one_clock`) takes their
    inverse-variance weighted mean: off by 36 ppm its phase slipped 1.1
    samples at 30 kHz a second from its centre, and a DAC's ticks read there
    left a whole staircase in the spike band. Only a block known
    :data:`_CLOCK_BORROW` times less well than the longest borrows its clock:
    blocks of about its length know their own frequency as well, and a
    stimulator's clock drifts a few ppm over a session; nor do blocks whose
    estimates disagree.
    """
    freqs = [t[2] for t in tones]
    for idx, ref in _clock_groups(pairs, tones, keep):
        f_ref, s_ref = tones[ref][2], spreads[ref]
        for i in idx:
            f_i, s_i = tones[i][2], spreads[i]
            if i != ref and s_i > _CLOCK_BORROW * s_ref and abs(f_i - f_ref) <= 3.0 * np.hypot(s_i, s_ref):
                w_i, w_ref = 1.0 / max(s_i, 1e-300) ** 2, 1.0 / max(s_ref, 1e-300) ** 2
                freqs[i] = float((w_i * f_i + w_ref * f_ref) / (w_i + w_ref))
    return freqs


#: a block takes the longest block's clock (:func:`_clock_frequencies`) when its frequency's Cramér-Rao
#: bound is this many times the longest block's (about half its length or less: the bound falls as
#: length^-1.5); this project's choice
_CLOCK_BORROW = 3.0


def _variance(x: np.ndarray) -> float:
    """``numpy.var(x)``; above :data:`_FIND_WHOLE` samples in two passes over pieces (no copy of ``x``)."""
    if x.size <= _FIND_WHOLE:
        return float(np.var(x))
    piece = 1 << 20
    mean = sum(float(x[a:a + piece].sum()) for a in range(0, x.size, piece)) / x.size
    return sum(float(np.sum((x[a:a + piece] - mean) ** 2)) for a in range(0, x.size, piece)) / x.size


#: the most a block's frequency may differ from the longest block's at the same nominal frequency
#: (relative): one stimulator clock; this project's choice, far above the ppm a clock drifts
_CLOCK_SPREAD = 1e-3


def _weaker_blocks(x_ds, fs_ds, f, threshold, min_cycles, free, segs) -> list:
    """``segs`` and the blocks at ``f`` found again on what they leave, against its own background.

    Strong blocks raise the background a search judges against (their
    sidebands and edges reach the off-frequency envelopes), and a block far
    weaker, or only a sham's two ramps, then stays above the threshold for
    fewer than ``min_cycles``: a 2 s sham at 5 Hz beside a 5 s active block
    in a 12 s recording was missed whole (its 4 mV left), and the search for
    other frequencies reported it as a second 5 Hz. Against the quieter
    background a neural oscillation near ``f`` could pass too: every block
    must then be on the stimulator's clock (:func:`_one_clock`).
    """
    # a found block's own ramp tails (a raised cosine's soft feet) reach past its segment and its
    # guard: what is found next to a block, not apart from it, is the block's, not another block
    apart = 2 * int(np.ceil(2 * fs_ds / f)) + 2 * fs_ds / f
    for _ in range(3):
        rest = free & _free_of([(f, None, segs)], x_ds.size, fs_ds)
        if rest.sum() < 16:
            break
        more = _find_segments(x_ds, fs_ds, f, threshold, min_cycles, keep=rest)
        more = [sg for sg in more if all(sg.start - old.stop > apart or old.start - sg.stop > apart for old in segs)]
        if not more:
            break
        segs = sorted(segs + more, key=lambda sg: sg.start)
    return segs


def _cycle_template(read, model: StimulationModel, blk: StimBlock, a: int, b: int):
    """Mean cycle of the reference on samples ``a .. b`` of ``blk`` (bin centres, bin values, offset).

    Returns None where a bin is empty. The offset is the slow LFP under those
    cycles (the mean cycle's own mean), the template the mean cycle less it.
    Also returns the bins where the reference sat on a rail and the rails' values.
    """
    cyc = model.fs / blk.freq_hz
    x = np.asarray(read(a, b), dtype=np.float64)
    n_bins = int(max(8, min(256, cyc)))
    ph = fractional_part(model.cycles(blk, a, b))
    k = np.minimum((ph * n_bins).astype(np.int64), n_bins - 1)
    cnt = np.bincount(k, minlength=n_bins)
    if np.any(cnt == 0):
        return None
    tmpl = np.bincount(k, x, n_bins) / cnt
    offset = float(np.mean(tmpl))  # over phase bins: uneven bin counts do not tilt it
    tmpl -= offset
    # phases where the reference sat on a rail: its ramp is unclipped there and the mean cycle is not
    hi, lo = x.max(), x.min()
    railed = np.zeros(n_bins, bool)
    rails = []
    for v in (hi, lo):
        at = x == v
        if at.mean() > 0.002:
            railed |= np.bincount(k[at], minlength=n_bins) > 0
            rails.append(float(v))
    return (np.arange(n_bins) + 0.5) / n_bins, tmpl, offset, railed, rails


def _step_sample(read, model: StimulationModel, blk: StimBlock, edge: int, fs_ds: float, rising: bool) -> int:
    """The sample where a block switched on (or off) without a ramp, near ``edge``.

    The mean cycle of the 8 cycles inside the block next to the edge, on the
    block's phase, is the artifact ``T``; the edge ``k`` minimising the
    squared error of ``0`` before it and ``T`` after it (the reverse for an
    end) is a least-squares change point: ``sum (T^2 - 2 x T)`` over the
    samples the artifact covers, a running sum over a window of a quarter
    cycle (or 3 decimated samples) either side of the coarse edge.
    """
    fs, n = model.fs, model.n_samples
    cyc = fs / blk.freq_hz
    half = int(np.ceil(max(0.25 * cyc, 3 * fs / fs_ds)))
    span = int(8 * cyc)
    a, b = (edge + half, edge + half + span) if rising else (edge - half - span, edge - half)
    a, b = max(a, blk.start, 0), min(b, blk.stop, n)
    lo, hi = max(edge - half, 0), min(edge + half, n)
    if b - a < 2 * cyc or hi - lo < 3:
        return int(edge)
    got = _cycle_template(read, model, blk, a, b)
    if got is None:
        return int(edge)
    centres, tmpl, offset = got[:3]
    w = np.asarray(read(lo, hi), dtype=np.float64) - offset
    t = np.interp(fractional_part(model.cycles(blk, lo, hi)), centres, tmpl, period=1.0)
    e = t * t - 2.0 * w * t
    if rising:  # cost of the artifact starting at lo + j: sum of e from j on
        cost = np.concatenate((np.cumsum(e[::-1])[::-1], [0.0]))
    else:  # cost of the artifact ending at lo + j: sum of e before j
        cost = np.concatenate(([0.0], np.cumsum(e)))
    return int(lo + np.argmin(cost))


def _ramp_fit(read, model: StimulationModel, blk: StimBlock, foot: int, corner: int, fs_ds: float,
              rising: bool, bounds: tuple[int, int | None] = (0, None),
              foot_only: bool = False) -> tuple[int, int] | None:
    """A ramp's foot and corner (samples) from the full-rate reference, near the coarse ``foot`` and ``corner``.

    The decimated envelope places a ramp's ends within a few to ~100 ms
    (its moving mean over cycles rounds them; a heartbeat tilts it); a gain
    read from segments cannot follow the rest over a short ramp (0.1-0.3 s
    left 100-400 uV). Here the artifact on the ramp is ``A r(i) T(i)``:
    ``T`` the mean cycle of 8 plateau cycles past the corner, ``r`` rising
    linearly from 0 at the foot to 1 at the corner, ``A`` free (the
    heartbeat changes the level a few per cent). The foot and corner that
    maximise the explained energy ``(sum r x T)^2 / sum r^2 T^2`` (least
    squares with ``A`` profiled out) are searched on a coarse grid, then
    finer around the best, to the sample; the sums over the ramp come from
    running sums of ``x T``, ``i x T``, ``T^2``, ``i T^2`` and ``i^2 T^2``, so
    each candidate costs a few operations. Phases where the reference is
    clipped on the plateau are left out (its ramp is not). Returns
    ``(foot, corner)`` in samples (for a falling ramp: the corner is the
    plateau's end, the foot the block's stop), or None without a plateau to
    learn from. The search stays within ``bounds`` (the neighbouring blocks'
    ends) and within 2.5 cycles or 30% of the ramp of the coarse ends: the
    envelope's 4-cycle mean can put them 2 cycles out (on a monitor without
    noise, whose background is nothing, up to 1.7 cycles were seen).

    With ``foot_only`` the corner stays where it is and only the foot is
    searched, on the ramp's first part (within 2 x the reach of the foot,
    at most half the ramp): over a long ramp the heartbeat and respiration
    (a few per cent) tilt a single line by tens of ms at the corner, where
    the gain follows them anyway, while near the foot the line is short.
    """
    win = _ramp_window(read, model, blk, foot, corner, fs_ds, rising, bounds, foot_only)
    if win is None:
        return None
    x, t, m, reach, f0, c0 = win.x, win.t, win.x.size, win.reach, win.f0, win.c0
    cyc = model.fs / blk.freq_hz
    i = np.arange(m, dtype=np.float64)
    B, A = x * t, t * t

    def run(v):
        return np.concatenate(([0.0], np.cumsum(v)))

    sB, siB, sA, siA, siiA = run(B), run(i * B), run(A), run(i * A), run(i * i * A)

    def explained(s, c):
        # ramp samples s .. c - 1 at (i - s) / (c - s), plateau c .. m - 1 at 1
        L = np.maximum(c - s, 1.0)
        si, ci = s.astype(np.int64), np.minimum(c, m).astype(np.int64)  # a fixed corner may lie beyond
        num = (siB[ci] - siB[si] - s * (sB[ci] - sB[si])) / L + (sB[m] - sB[ci])
        den = ((siiA[ci] - siiA[si]) - 2 * s * (siA[ci] - siA[si]) + s * s * (sA[ci] - sA[si])) / (L * L) \
            + (sA[m] - sA[ci])
        return np.where((num > 0) & (den > 0), num * num / np.maximum(den, 1e-300), -np.inf)

    top = m - int(cyc)  # a cycle of plateau stays in the window
    s_lo, s_hi = max(0, f0 - reach), min(top, f0 + reach)
    c_lo, c_hi = max(0, c0 - reach), min(top, c0 + reach)
    if foot_only:
        s_lo, s_hi, c_lo, c_hi = max(0, f0 - reach), min(m - 1, f0 + reach, c0 - 1), c0, c0
    step = max(1, (max(s_hi - s_lo, c_hi - c_lo)) // 192)
    best = None
    while True:
        ss, cc = np.meshgrid(np.arange(s_lo, s_hi + 1, step), np.arange(c_lo, c_hi + 1, step), indexing="ij")
        ok = cc >= ss
        if not ok.any():
            return None
        ss, cc = ss[ok].astype(np.float64), cc[ok].astype(np.float64)
        k = int(np.argmax(explained(ss, cc)))
        best = int(ss[k]), int(cc[k])
        if step == 1:
            break
        s_lo, s_hi = max(0, best[0] - 3 * step), min(s_hi, best[0] + 3 * step)
        if not foot_only:
            c_lo, c_hi = max(0, best[1] - 3 * step), min(top, best[1] + 3 * step)
        step = max(1, step // 8)
    return win.sample(best[0]), win.sample(best[1])


@dataclass
class _RampWindow:
    """The samples around a ramp, read as a rising ramp: data less the slow offset, and the plateau's cycle."""

    x: np.ndarray
    t: np.ndarray
    lo: int
    hi: int
    rising: bool
    f0: int  # the coarse foot and corner, in window samples
    c0: int
    reach: int
    railed: bool = False  # the reference is clipped on the plateau

    def sample(self, k: float) -> int:
        """The recording's sample at window position ``k``."""
        return int(round(self.lo + k)) if self.rising else int(round(self.hi - 1 - k))


def _ramp_window(read, model: StimulationModel, blk: StimBlock, foot: int, corner: int, fs_ds: float,
                 rising: bool, bounds: tuple[int, int | None] = (0, None), foot_only: bool = False):
    """The window :func:`_ramp_fit` searches (see there), or None without a plateau to learn from."""
    fs, n = model.fs, model.n_samples
    cyc = fs / blk.freq_hz
    reach = int(np.ceil(max(2.5 * cyc, 0.3 * abs(corner - foot), 3 * fs / fs_ds)))
    span = int(8 * cyc)
    first, last = bounds[0], n if bounds[1] is None else bounds[1]
    if foot_only:
        reach = int(np.ceil(max(2.5 * cyc, 3 * fs / fs_ds)))
    if rising:
        lo, hi = max(foot - reach, first), min(corner + reach + int(cyc), last)
        if foot_only:
            hi = min(foot + 2 * reach, (foot + corner) // 2, last)
        a, b = corner + reach, corner + reach + span
    else:
        lo, hi = max(corner - reach - int(cyc), first), min(foot + reach, last)
        if foot_only:
            lo = max(foot - 2 * reach, (foot + corner) // 2, first)
        a, b = corner - reach - span, corner - reach
    a, b = max(a, blk.ramp_up_stop, 0), min(b, blk.ramp_down_start, n)
    if b - a < 2 * cyc or hi - lo < 3:
        return None
    got = _cycle_template(read, model, blk, a, b)
    if got is None:
        return None
    centres, tmpl, offset, railed, rails = got
    ph = fractional_part(model.cycles(blk, lo, hi))
    t = np.interp(ph, centres, tmpl, period=1.0)
    x = np.asarray(read(lo, hi), dtype=np.float64)
    if railed.any():
        n_bins = centres.size
        t[railed[np.minimum((ph * n_bins).astype(np.int64), n_bins - 1)]] = 0.0
        # and samples on a rail at other phases (the heartbeat lifts a phase the plateau's cycles
        # kept clear): clipped near a corner, they round it
        t[np.isin(x, rails)] = 0.0
    x -= offset
    if not rising:  # a falling ramp is a rising one read backwards
        x, t = x[::-1], t[::-1]
    f0, c0 = (foot - lo, corner - lo) if rising else (hi - 1 - foot, hi - 1 - corner)
    return _RampWindow(x, t, lo, hi, rising, int(f0), int(c0), reach, bool(railed.any()))


def _from_events(times: np.ndarray, fs: float, n: int, stim_freq) -> StimulationModel:
    times = np.sort(times[np.isfinite(times)])
    if times.size < 3:
        raise ValueError("need at least 3 cycle-onset events to fit the stimulation phase")
    period = np.median(np.diff(times))
    breaks = np.flatnonzero(np.diff(times) > 2 * period)
    model = StimulationModel(fs=fs, n_samples=n, nominal_freq_hz=stim_freq, reference="events")
    for grp in np.split(times, breaks + 1):
        if grp.size < 3:
            continue
        k = np.round((grp - grp[0]) / period)
        slope, icpt = np.polyfit(k, grp, 1)
        f = 1.0 / slope
        start = int(np.clip(np.floor(grp[0] * fs), 0, n))
        stop = int(np.clip(np.ceil((grp[-1] + slope) * fs), 0, n))
        ref = start
        phase = -2 * np.pi * f * (icpt - ref / fs)
        hints = nominal_frequencies(stim_freq)
        nominal = None if hints is None else min(hints, key=lambda h: abs(h - f))
        drift = None if nominal is None else (f - nominal) / nominal * 1e6
        model.blocks.append(StimBlock("active", start, stop, start, stop, f, float(np.mod(phase, 2 * np.pi)),
                                      ref, float("nan"), drift))
    return model
