"""Synthetic contaminated recordings with ground truth.

The generator builds a multi-channel recording in microvolts as

    recorded = quantise(clip(neural + artifact))

and returns every ingredient, so tests, benchmarks and the demo can score a
cleaning method against the truth. The artifact follows the physics of a
current-controlled stimulator seen through tissue and an amplifier:

* the stimulator runs on its own clock, ``drift_ppm`` off the nominal rate;
* its waveform (fundamental plus harmonics with their own phases) is produced
  by a DAC that updates at ``dac_rate_hz`` and holds in between (a staircase);
* block envelopes ramp linearly at the edges; sham blocks are ramps only;
* tissue impedance follows heartbeat and respiration, multiplying the
  artifact by ``1 + m(t)`` (this puts sidebands beside every harmonic);
* each channel sees the artifact with its own gain and sign;
* the amplifier clips at ``clip_uv`` and quantises to ``lsb_uv``.

The data are invented; they serve the demo, the examples, tests and
benchmarks only.
"""

from __future__ import annotations

from dataclasses import dataclass, field, asdict
from typing import Sequence

import numpy as np
from scipy import signal
from scipy.special import i0

from .stimulation import ramp_level

__all__ = [
    "ArtifactSpec",
    "BlockSpec",
    "NeuralSpec",
    "UnitSpec",
    "SyntheticRecording",
    "simulate_recording",
    "spike_waveform",
    "alpha_pulse_harmonics",
]


@dataclass
class BlockSpec:
    """One stimulation block.

    Parameters
    ----------
    start_s, duration_s : float
        Block position in seconds, ramps included.
    kind : {"active", "sham"}
        A sham block ramps up and straight back down (``duration_s`` is
        ignored and taken as ``2 * ramp_s``).
    freq_hz : float or None
        Nominal frequency; None takes :attr:`ArtifactSpec.freq_hz`.
    amplitude_scale : float
        Multiplies :attr:`ArtifactSpec.amplitude_uv` in this block.
    ramp_s : float
        Duration of each ramp.
    phase0 : float
        Stimulator phase (rad) at the block start.
    ramp_shape : {"linear", "cosine"}
        Straight ramps, or raised cosines (:func:`artifactclean.stimulation.ramp_level`).
    """

    start_s: float
    duration_s: float
    kind: str = "active"
    freq_hz: float | None = None
    amplitude_scale: float = 1.0
    ramp_s: float = 1.0
    phase0: float = 0.0
    ramp_shape: str = "linear"


@dataclass
class ArtifactSpec:
    """Stimulation artifact parameters (see module docstring).

    ``harmonics`` lists ``(relative_amplitude, phase_rad)`` for harmonics
    2, 3, ... of the fundamental. Modulation depths are peak fractional
    changes of the artifact amplitude. ``channel_gains`` are signed and
    multiply ``amplitude_uv`` (the peak of the fundamental) per channel.
    ``heart_harmonics`` lists ``(relative_amplitude, phase_rad)`` for
    harmonics 2, 3, ... of the cardiac rate in the impedance pulse (the
    pulse is not a sinusoid); empty for a sinusoidal heartbeat.
    ``heart_phase_deg`` is the peak phase shift the pulse puts on the
    artifact (the electrode-tissue interface is partly capacitive), to first
    order: the waveform's phase derivative, held like it, times the shift.
    ``dac_clock_ppm`` puts the DAC on a clock of its own, that many ppm from
    the amplifier's (``None``: the stimulator's clock, ``drift_ppm``, which
    also sets the waveform's frequency, so a cycle holds a fixed number of
    updates); a waveform synthesised at a frequency the DAC's rate does not
    divide (finite frequency resolution) is the same case.
    ``heart_jitter`` makes each heartbeat's length differ from the smooth
    rate's by that fraction (SD) at random, beat by beat: heart-rate
    variability's fastest part (successive beats of a person at rest differ
    by 20-50 ms, from memory), which no smooth rate follows.
    ``lowpass_hz`` is the amplifier's anti-aliasing low-pass (a 3rd-order
    Butterworth; None: none), applied to everything it records, so the
    neural truth is what the amplifier sees of it: a DAC's steps reach the
    samples as the analog filter's step response, spread over the samples
    after each edge by where between samples the edge fell
    (:func:`held_through_lowpass`); smooth signals (the neural truth, an
    artifact without a DAC) go through its digital twin.
    """

    freq_hz: float = 20.0
    amplitude_uv: float = 4000.0
    channel_gains: Sequence[float] | None = None
    harmonics: Sequence[tuple[float, float]] = ((0.08, 0.4), (0.04, 1.1), (0.02, 2.0), (0.01, 0.7))
    heart_rate_hz: float = 2.0
    heart_depth: float = 0.02
    heart_harmonics: Sequence[tuple[float, float]] = ((0.5, 0.3), (0.25, 0.6))
    resp_rate_hz: float = 0.3
    resp_depth: float = 0.01
    heart_phase_deg: float = 0.0
    drift_ppm: float = 40.0
    dac_rate_hz: float | None = None
    dac_clock_ppm: float | None = None
    clip_uv: float | None = None
    lsb_uv: float | None = 0.195
    lowpass_hz: float | None = None
    heart_jitter: float = 0.0


@dataclass
class UnitSpec:
    """One unit: where it is, how it fires and how it locks to stimulation.

    ``kappa`` > 0 locks the firing rate to the stimulation phase with a von
    Mises profile ``exp(kappa cos(phase - preferred_phase)) / I0(kappa)``
    (mean rate unchanged) while stimulation is on.
    """

    channel: int = 0
    rate_hz: float = 10.0
    amplitude_uv: float = 120.0
    shape: str = "narrow"
    kappa: float = 0.0
    preferred_phase: float = 0.0
    refractory_s: float = 0.002


@dataclass
class NeuralSpec:
    """Neural background: 1/f^2 LFP, an ongoing oscillation, white noise, units."""

    noise_uv: float = 10.0
    lfp_uv: float = 40.0
    oscillation_hz: float = 7.0
    oscillation_uv: float = 15.0
    units: Sequence[UnitSpec] = field(default_factory=lambda: [UnitSpec()])


@dataclass
class SyntheticRecording:
    """A synthetic recording and its truth.

    Attributes
    ----------
    data : ndarray, shape (n_channels, n_samples)
        What the amplifier recorded, in microvolts.
    fs : float
    neural : ndarray
        The artifact-free neural signal (LFP + oscillation + noise + spikes).
    artifact : ndarray
        The artifact before clipping and quantisation.
    spike_times : list of ndarray
        Spike times (s) per unit.
    unit_channels : list of int
    stim_phase : ndarray, shape (n_samples,)
        True stimulator phase (rad, in [0, 2 pi)); NaN where no block runs.
    clipped : ndarray of bool, same shape as ``data``
    blocks : list of dict
        ``kind, start_s, stop_s, ramp_s, freq_hz`` (true, drift included),
        ``nominal_freq_hz, amplitude_uv``.
    spec : dict
        The parameters used, for provenance.
    """

    data: np.ndarray
    fs: float
    neural: np.ndarray
    artifact: np.ndarray
    spike_times: list
    unit_channels: list
    stim_phase: np.ndarray
    clipped: np.ndarray
    blocks: list
    spec: dict

    @property
    def n_samples(self) -> int:
        return self.data.shape[1]

    @property
    def times(self) -> np.ndarray:
        return np.arange(self.n_samples) / self.fs


def spike_waveform(shape: str, fs: float, offset: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Extracellular spike waveform with unit trough, sampled at ``fs``.

    A negative Gaussian trough followed by a slower positive repolarisation
    bump; "narrow" has a ~0.3 ms trough-to-peak time, "broad" ~0.7 ms.

    Returns
    -------
    lags : ndarray of int
        Sample offsets relative to the spike's sample.
    values : ndarray
        Waveform at those offsets, shifted by ``offset`` samples (sub-sample
        placement), normalised so the trough is -1 for ``offset = 0``.
    """
    params = {"narrow": (0.08e-3, 0.30e-3, 0.15e-3, 0.35), "broad": (0.15e-3, 0.70e-3, 0.30e-3, 0.25)}
    if shape not in params:
        raise ValueError(f"unknown spike shape {shape!r}; use 'narrow' or 'broad'")
    s1, dt, s2, b = params[shape]
    lags = np.arange(int(-1.0e-3 * fs), int(2.0e-3 * fs) + 1)
    t = (lags - offset) / fs
    w = -np.exp(-0.5 * (t / s1) ** 2) + b * np.exp(-0.5 * ((t - dt) / s2) ** 2)
    return lags, w


def _smooth_rate_phase(n: int, fs: float, rate_hz: float, variability: float, rng) -> np.ndarray:
    """Phase (rad) of a quasi-periodic physiological rhythm with slow rate wander."""
    n_knots = max(4, int(n / fs / 2.0) + 2)
    knots = rng.standard_normal(n_knots)
    wander = np.interp(np.linspace(0, n_knots - 1, n), np.arange(n_knots), knots)
    rate = rate_hz * (1.0 + variability * wander)
    return 2 * np.pi * np.cumsum(rate) / fs + rng.uniform(0, 2 * np.pi)


def _jittered_beats(phase: np.ndarray, jitter: float, rng) -> np.ndarray:
    """``phase`` (rad) with each cycle's length scaled by ``1 + jitter * N(0, 1)``, independently cycle by cycle.

    Beat ``k`` ends where cycle ``k + w_k`` of ``phase`` ends, ``w`` the sum
    of the beats' changes so far (a random walk of one step a beat), and the
    phase rises linearly in ``phase``'s cycles between those ends (so it
    keeps rising while ``jitter`` is well under 1).
    """
    cycles = phase / (2 * np.pi)
    first, last = int(np.floor(cycles.min())) - 1, int(np.ceil(cycles.max())) + 2
    ends = np.arange(first, last + 1, dtype=np.float64)
    shift = np.concatenate(([0.0], np.cumsum(jitter * rng.standard_normal(last - first))))
    return 2 * np.pi * np.interp(cycles, ends + shift, ends)


def _harmonic_sum(phase: np.ndarray, harmonics: Sequence[tuple[float, float]]) -> np.ndarray:
    """``cos(phase)`` plus ``rel * cos(k * phase + ph)`` for harmonics k = 2, 3, ... of ``harmonics``."""
    out = np.cos(phase)
    for k, (rel, ph) in enumerate(harmonics, start=2):
        out = out + rel * np.cos(k * phase + ph)
    return out


def _harmonic_derivative(phase: np.ndarray, harmonics: Sequence[tuple[float, float]]) -> np.ndarray:
    """d/dphase of :func:`_harmonic_sum`."""
    out = -np.sin(phase)
    for k, (rel, ph) in enumerate(harmonics, start=2):
        out = out - k * rel * np.sin(k * phase + ph)
    return out


def _heart_shape(phase: np.ndarray, harmonics: Sequence[tuple[float, float]]) -> np.ndarray:
    # pulsatile, not sinusoidal: harmonics of the cardiac rate, scaled to peak |1|
    peak = np.abs(_harmonic_sum(np.linspace(0, 2 * np.pi, 3600, endpoint=False), harmonics)).max()
    return _harmonic_sum(phase, harmonics) / peak


def alpha_pulse_harmonics(rate_hz: float, tau_s: float, n: int = 10) -> tuple[tuple[float, float], ...]:
    """``ArtifactSpec.heart_harmonics`` of a train of alpha-function pulses, ``(t / tau) exp(1 - t / tau)`` a beat.

    An impedance pulse that rises within ``tau_s`` and falls over a few of
    them: the Fourier transform of ``t exp(-t / tau)`` is
    ``tau^2 / (1 + i w tau)^2`` (the Laplace pair ``t e^(-at) -> 1 / (s + a)^2``
    at ``s = i w``), so harmonic ``k`` of the rate stands
    ``(1 + (w1 tau)^2) / (1 + (wk tau)^2)`` times the fundamental, at a phase
    of ``-2 atan(wk tau) + 2 k atan(w1 tau)`` from it (the fundamental's own
    phase taken off, ``k`` times, as :func:`_harmonic_sum` counts phases).
    Its harmonics fall as ``1 / k^2``: at 2 Hz and ``tau_s = 0.07`` the 6th
    stands at 0.06 of the fundamental, where the default pulse stops at the
    3rd.

    Parameters
    ----------
    rate_hz : float
        Heart rate (Hz).
    tau_s : float
        The pulse's rise time (s), > 0.
    n : int
        Harmonics 2 .. n + 1.
    """
    if not (rate_hz > 0 and tau_s > 0):
        raise ValueError(f"rate_hz and tau_s must be positive, got {rate_hz!r} and {tau_s!r}")
    w1 = 2 * np.pi * rate_hz * tau_s
    out = []
    for k in range(2, n + 2):
        wk = k * w1
        out.append((float((1 + w1 ** 2) / (1 + wk ** 2)), float(-2 * np.arctan(wk) + 2 * k * np.arctan(w1))))
    return tuple(out)


def _colored_lfp(n_channels: int, n: int, fs: float, rms: float, rng) -> np.ndarray:
    """LFP with a 1/f^2 power spectrum above 1 Hz, partly shared across channels."""
    if rms <= 0:
        return np.zeros((n_channels, n))
    f = np.fft.rfftfreq(n, 1.0 / fs)
    amp = 1.0 / np.maximum(f, 1.0)
    amp[0] = 0.0
    common = np.fft.irfft(amp * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size)), n)
    out = np.empty((n_channels, n))
    for ch in range(n_channels):
        own = np.fft.irfft(amp * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size)), n)
        out[ch] = 0.7 * common + 0.3 * own
    return out * (rms / out.std(axis=1, keepdims=True))


def _oscillation(n_channels: int, n: int, fs: float, f0: float, amp: float, rng) -> np.ndarray:
    """Narrow-band ongoing oscillation (~1 Hz wide) with fluctuating amplitude."""
    if amp <= 0 or f0 <= 0:
        return np.zeros((n_channels, n))
    f = np.fft.rfftfreq(n, 1.0 / fs)
    shape = np.exp(-0.5 * ((f - f0) / 0.5) ** 2)
    spec = shape * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size))
    osc = np.fft.irfft(spec, n)
    osc *= amp * np.sqrt(2) / osc.std()
    gains = 1.0 - 0.1 * np.arange(n_channels)
    return gains[:, None] * osc[None, :]


#: order of the amplifier's anti-aliasing low-pass (``ArtifactSpec.lowpass_hz``; common practice for neural
#: amplifiers' front ends, from memory)
LOWPASS_ORDER = 3


def step_response_terms(lowpass_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """Poles ``p`` (rad/s) and weights ``c`` of the analog low-pass's step response ``1 + sum c exp(p t)``.

    The amplifier's filter acts before its sampler, so a DAC step at any
    instant reaches each later sample as this response at the sample's
    delay after the step. From the partial fractions of the analog
    Butterworth ``H(s) = sum r / (s - p)`` (scipy.signal.residue), the step
    response is ``H(s) / s``'s inverse transform, ``1 + sum (r / p) exp(p t)``.
    """
    b, a = signal.butter(LOWPASS_ORDER, 2 * np.pi * lowpass_hz, analog=True)
    r, p, _ = signal.residue(b, a)
    return p, r / p


def held_through_lowpass(edges: np.ndarray, steps: np.ndarray, n: int, fs: float, lowpass_hz: float) -> np.ndarray:
    """What an analog low-pass adds to a staircase's samples: ``sum_k steps[k] (S(t - edges[k]) - [t >= edges[k]])``.

    ``edges`` are the steps' instants in samples (any real number), ``steps``
    their sizes; ``S`` is the filter's step response
    (:func:`step_response_terms`). The staircase sampled as it holds, plus
    this, is the filtered staircase sampled exactly: each term
    ``c exp(p t)`` is a first-order recursion from sample to sample, fed at
    the first sample after each step by the step times the term at that
    sample's delay (sub-sample, which is what a filter applied to samples
    cannot know). Returns ``n`` samples from sample 0.
    """
    p, c = step_response_terms(lowpass_hz)
    p = p / fs  # per sample
    first = np.ceil(edges).astype(np.int64)
    keep = (first >= 0) & (first < n)
    at, delay, size = first[keep], first[keep] - edges[keep], steps[keep]
    out = np.zeros(n)
    for pk, ck in zip(p, c):
        feed = np.zeros(n, dtype=np.complex128)
        np.add.at(feed, at, size * np.exp(pk * delay))
        out += (ck * signal.lfilter([1.0], [1.0, -np.exp(pk)], feed)).real
    return out


def _held_edges(t_held: np.ndarray, values: np.ndarray, i0: int, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """Instants (samples) and sizes of a held block's steps: where its tick changes, its switching on and off."""
    change = np.flatnonzero(np.diff(t_held) != 0) + 1
    edges = np.concatenate(([i0], i0 + t_held[change] * fs, [i0 + t_held.size]))
    steps = np.concatenate((values[:1], values[change] - values[change - 1], -values[-1:]))
    return edges, steps


def _stimulator(n: int, fs: float, spec: ArtifactSpec, blocks: Sequence[BlockSpec], rng):
    """Stimulator output (unit peak fundamental), true phase, block table, and the output's phase derivative.

    With a DAC and ``spec.lowpass_hz``, the output and its derivative are as
    the amplifier's analog low-pass passes them to its sampler
    (:func:`held_through_lowpass`).
    """
    out = np.zeros(n)
    quad = np.zeros(n)
    phase = np.full(n, np.nan)
    table = []
    clock = 1.0 + spec.drift_ppm * 1e-6
    for blk in blocks:
        f_nom = blk.freq_hz if blk.freq_hz is not None else spec.freq_hz
        dur = 2 * blk.ramp_s if blk.kind == "sham" else blk.duration_s
        if blk.kind not in ("active", "sham"):
            raise ValueError(f"block kind must be 'active' or 'sham', got {blk.kind!r}")
        i0_ = int(round(blk.start_s * fs))
        i1_ = min(n, int(round((blk.start_s + dur) * fs)))
        if i1_ <= i0_:
            continue
        t = (np.arange(i0_, i1_) - i0_) / fs  # time since block start, amplifier clock
        tick_offset = rng.uniform(0.05, 0.95)
        if spec.dac_rate_hz:
            # the DAC samples the waveform on the stimulator clock and holds it; its ticks
            # fall between the amplifier's samples at an offset set by the two clocks
            dac_clock = clock if spec.dac_clock_ppm is None else 1.0 + spec.dac_clock_ppm * 1e-6
            tick = 1.0 / (spec.dac_rate_hz * dac_clock)
            t_held = (np.floor(t / tick + tick_offset) - tick_offset) * tick
        else:
            t_held = t
        f_true = f_nom * clock
        ph_held = 2 * np.pi * f_true * t_held + blk.phase0
        wave = _harmonic_sum(ph_held, spec.harmonics)
        env = np.ones_like(t)
        if blk.ramp_s > 0:
            env = ramp_level(np.minimum(t_held, dur - t_held) / blk.ramp_s, blk.ramp_shape)
        out[i0_:i1_] = blk.amplitude_scale * env * wave
        quad[i0_:i1_] = blk.amplitude_scale * env * _harmonic_derivative(ph_held, spec.harmonics)
        if spec.dac_rate_hz and spec.lowpass_hz is not None:
            # the block, and the filter's ringing after it until the slowest pole's exp(-pi fc t) is 1e-12
            stop = min(n, i1_ + int(np.ceil(9.0 / spec.lowpass_hz * fs)) + 1)
            for seq in (out, quad) if spec.heart_phase_deg else (out,):
                edges, steps = _held_edges(t_held, seq[i0_:i1_], 0, fs)
                seq[i0_:stop] += held_through_lowpass(edges, steps, stop - i0_, fs, spec.lowpass_hz)
        phase[i0_:i1_] = np.mod(2 * np.pi * f_true * t + blk.phase0, 2 * np.pi)
        table.append(
            dict(
                kind=blk.kind,
                start_s=i0_ / fs,
                stop_s=i1_ / fs,
                ramp_s=blk.ramp_s,
                ramp_shape=blk.ramp_shape,
                nominal_freq_hz=f_nom,
                freq_hz=f_true,
                amplitude_uv=spec.amplitude_uv * blk.amplitude_scale,
            )
        )
    return out, phase, table, quad


def _spike_train(unit: UnitSpec, duration: float, stim_phase: np.ndarray, fs: float, rng) -> np.ndarray:
    """Poisson spikes with a refractory period, optionally locked to stimulation phase."""
    kappa = max(0.0, unit.kappa)
    peak = unit.rate_hz * (np.exp(kappa) / i0(kappa) if kappa > 0 else 1.0)
    n_cand = rng.poisson(peak * duration)
    cand = np.sort(rng.uniform(0, duration, n_cand))
    if kappa > 0:
        ph = stim_phase[np.minimum((cand * fs).astype(np.int64), stim_phase.size - 1)]
        rate = np.where(
            np.isnan(ph),
            unit.rate_hz,
            unit.rate_hz * np.exp(kappa * np.cos(np.nan_to_num(ph) - unit.preferred_phase)) / i0(kappa),
        )
        cand = cand[rng.uniform(0, peak, cand.size) < rate]
    keep = []
    last = -np.inf
    for t in cand:
        if t - last >= unit.refractory_s:
            keep.append(t)
            last = t
    return np.asarray(keep)


def simulate_recording(
    duration_s: float = 20.0,
    fs: float = 30000.0,
    n_channels: int = 4,
    *,
    artifact: ArtifactSpec | None = None,
    neural: NeuralSpec | None = None,
    blocks: Sequence[BlockSpec] | None = None,
    seed: int = 0,
) -> SyntheticRecording:
    """Generate a contaminated recording and its ground truth.

    Parameters
    ----------
    duration_s : float
        Length of the recording in seconds.
    fs : float
        Sampling rate in Hz.
    n_channels : int
    artifact : ArtifactSpec, optional
        Artifact parameters; ``amplitude_uv = 0`` gives a stimulation-free trace.
    neural : NeuralSpec, optional
    blocks : sequence of BlockSpec, optional
        Default: one active block from 1 s to ``duration_s - 1`` s with 1 s ramps.
    seed : int
        Seed of the only random generator used.

    Returns
    -------
    SyntheticRecording
    """
    if fs <= 0 or duration_s <= 0 or n_channels < 1:
        raise ValueError("fs, duration_s and n_channels must be positive")
    artifact = artifact or ArtifactSpec()
    # checked before any work is done
    if artifact.lowpass_hz is not None and not 0 < artifact.lowpass_hz < fs / 2:
        raise ValueError(f"lowpass_hz must lie between 0 and fs / 2 = {fs / 2:g}, got {artifact.lowpass_hz!r}")
    if not 0 <= artifact.heart_jitter < 0.25:
        raise ValueError(f"heart_jitter must lie in [0, 0.25), got {artifact.heart_jitter!r}")
    neural = neural or NeuralSpec()
    if blocks is None:
        blocks = [BlockSpec(start_s=min(1.0, duration_s / 10), duration_s=duration_s - 2 * min(1.0, duration_s / 10))]
    rng = np.random.default_rng(seed)
    n = int(round(duration_s * fs))

    stim, phase, table, quad = _stimulator(n, fs, artifact, blocks, rng)
    gains = np.asarray(
        artifact.channel_gains if artifact.channel_gains is not None else 1.0 - 0.15 * np.arange(n_channels),
        dtype=float,
    )
    if gains.shape != (n_channels,):
        raise ValueError(f"channel_gains needs {n_channels} values, got {gains.size}")
    mod = np.ones(n)
    if artifact.heart_depth or artifact.heart_phase_deg:
        heart_phase = _smooth_rate_phase(n, fs, artifact.heart_rate_hz, 0.03, rng)
        if artifact.heart_jitter:
            heart_phase = _jittered_beats(heart_phase, artifact.heart_jitter, rng)
        heart = _heart_shape(heart_phase, artifact.heart_harmonics)
        mod += artifact.heart_depth * heart
        if artifact.heart_phase_deg:
            # the electrode-tissue interface is partly capacitive: the pulse also shifts the
            # artifact's phase, w(phase + d) = w + d w' to first order (w' held like w by the DAC)
            stim = stim + np.deg2rad(artifact.heart_phase_deg) * heart * quad
    if artifact.resp_depth:
        mod += artifact.resp_depth * np.sin(_smooth_rate_phase(n, fs, artifact.resp_rate_hz, 0.05, rng))
    art = artifact.amplitude_uv * gains[:, None] * (mod * stim)[None, :]

    clean = _colored_lfp(n_channels, n, fs, neural.lfp_uv, rng)
    clean += _oscillation(n_channels, n, fs, neural.oscillation_hz, neural.oscillation_uv, rng)
    clean += neural.noise_uv * rng.standard_normal((n_channels, n))
    spike_times, unit_channels = [], []
    for unit in neural.units:
        if not 0 <= unit.channel < n_channels:
            raise ValueError(f"unit channel {unit.channel} outside 0..{n_channels - 1}")
        st = _spike_train(unit, n / fs, phase, fs, rng)
        lags, _ = spike_waveform(unit.shape, fs)
        if st.size:
            centre = np.round(st * fs).astype(np.int64)
            offs = st * fs - centre
            _, w = spike_waveform(unit.shape, fs, offs[:, None])
            idx = centre[:, None] + lags[None, :]
            ok = (idx >= 0) & (idx < n)
            np.add.at(clean[unit.channel], idx[ok], unit.amplitude_uv * w[ok])
        spike_times.append(st)
        unit_channels.append(unit.channel)

    if artifact.lowpass_hz is not None:
        # the analog filter as a digital one (bilinear transform) where the signal is smooth; a DAC's staircase
        # went through it in _stimulator, each step at its own instant
        sos = signal.butter(LOWPASS_ORDER, artifact.lowpass_hz, fs=fs, output="sos")
        if not artifact.dac_rate_hz:
            art = signal.sosfilt(sos, art, axis=-1)
        clean = signal.sosfilt(sos, clean, axis=-1)
    data = clean + art
    clipped = np.zeros(data.shape, dtype=bool)
    if artifact.clip_uv is not None:
        clipped = np.abs(data) >= artifact.clip_uv
        data = np.clip(data, -artifact.clip_uv, artifact.clip_uv)
    if artifact.lsb_uv:
        data = np.round(data / artifact.lsb_uv) * artifact.lsb_uv

    spec = dict(
        duration_s=duration_s,
        fs=fs,
        n_channels=n_channels,
        seed=seed,
        artifact=asdict(artifact),
        neural=dict(asdict(neural), units=[asdict(u) for u in neural.units]),
        blocks=[asdict(b) for b in blocks],
    )
    return SyntheticRecording(
        data=data,
        fs=fs,
        neural=clean,
        artifact=art,
        spike_times=spike_times,
        unit_channels=unit_channels,
        stim_phase=phase,
        clipped=clipped,
        blocks=table,
        spec=spec,
    )
