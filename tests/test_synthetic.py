"""The generator checked against its own parameters."""

import dataclasses

import numpy as np
import pytest
from scipy import signal
from scipy.special import i0, i1

from artifactclean.phase_stats import plv
from artifactclean.synthetic import (ArtifactSpec, BlockSpec, NeuralSpec, UnitSpec, _harmonic_sum, _jittered_beats,
                                     _smooth_rate_phase, alpha_pulse_harmonics, held_through_lowpass, simulate_recording,
                                     step_response_terms)


def _line(x, fs, f):
    # amplitude of a line by a Hann-windowed DTFT (coherent gain 0.5)
    n = np.arange(x.size)
    w = np.hanning(x.size)
    return 2 * abs(np.sum(w * x * np.exp(-2j * np.pi * f * n / fs))) / w.sum()


def test_harmonics_match_their_relative_amplitudes():
    spec = ArtifactSpec(freq_hz=20.0, harmonics=((0.1, 0.3), (0.05, 1.0)), heart_depth=0, resp_depth=0,
                        drift_ppm=0, lsb_uv=None)
    rec = simulate_recording(6.0, fs=2000.0, n_channels=1, artifact=spec,
                             blocks=[BlockSpec(0.0, 6.0, ramp_s=0.0)], seed=0)
    a = rec.artifact[0]
    a1, a2, a3 = (_line(a, rec.fs, k * 20.0) for k in (1, 2, 3))
    assert abs(a1 - 4000.0) / 4000.0 < 1e-3
    assert abs(a2 / a1 - 0.1) < 1e-3
    assert abs(a3 / a1 - 0.05) < 1e-3


def test_respiration_puts_sidebands_at_f_plus_minus_rate():
    # amplitude modulation by (1 + m cos) gives sidebands of m/2 (textbook AM, e.g. Oppenheim & Willsky 1997)
    spec = ArtifactSpec(freq_hz=20.0, harmonics=(), heart_depth=0.0, resp_depth=0.1, resp_rate_hz=0.5,
                        drift_ppm=0, lsb_uv=None)
    rec = simulate_recording(40.0, fs=1000.0, n_channels=1, artifact=spec,
                             blocks=[BlockSpec(0.0, 40.0, ramp_s=0.0)], seed=1)
    f, p = signal.welch(rec.artifact[0], fs=rec.fs, nperseg=20000)
    carrier = p[np.argmin(abs(f - 20.0))]
    side = max(p[(f > 20.3) & (f < 20.8)].max(), p[(f > 19.2) & (f < 19.7)].max())
    between = p[(f > 21.5) & (f < 22.5)].max()
    assert side > 1e-4 * carrier  # (m/2)^2 = 2.5e-3, smeared by the rate wander
    assert side > 100 * between


def test_heartbeat_sidebands_present():
    spec = ArtifactSpec(freq_hz=20.0, harmonics=(), heart_depth=0.05, resp_depth=0.0, drift_ppm=0, lsb_uv=None)
    rec = simulate_recording(40.0, fs=1000.0, n_channels=1, artifact=spec,
                             blocks=[BlockSpec(0.0, 40.0, ramp_s=0.0)], seed=2)
    f, p = signal.welch(rec.artifact[0], fs=rec.fs, nperseg=8000)
    side = p[(f > 21.5) & (f < 22.5)].max()
    far = p[(f > 27.5) & (f < 28.5)].max()
    assert side > 30 * far


def test_drift_sets_the_true_frequency():
    spec = ArtifactSpec(freq_hz=10.0, drift_ppm=50.0, harmonics=(), heart_depth=0, resp_depth=0, lsb_uv=None)
    rec = simulate_recording(20.0, fs=1000.0, n_channels=1, artifact=spec,
                             blocks=[BlockSpec(0.0, 20.0, ramp_s=0.0)], seed=3)
    # slope of the unwrapped true phase: 2 pi f (1 + ppm 1e-6)
    ph = np.unwrap(rec.stim_phase)
    slope = np.polyfit(np.arange(ph.size) / rec.fs, ph, 1)[0] / (2 * np.pi)
    assert abs(slope / 10.0 - 1 - 50e-6) < 1e-9
    # and the data agree: zero-padded periodogram peak (scipy.signal.periodogram)
    f, p = signal.periodogram(rec.artifact[0], fs=rec.fs, nfft=2**24)
    assert abs(f[np.argmax(p)] - 10.0005) < 2e-4


def test_clipping_mask_and_rails():
    spec = ArtifactSpec(freq_hz=20.0, clip_uv=3000.0)
    rec = simulate_recording(3.0, n_channels=2, artifact=spec, seed=4)
    assert rec.clipped.any()
    np.testing.assert_array_equal(rec.clipped, np.abs(rec.neural + rec.artifact) >= 3000.0)
    assert np.abs(rec.data).max() <= 3000.0 + spec.lsb_uv / 2 + 1e-9  # quantised after the rail


def test_quantisation_to_lsb():
    rec = simulate_recording(1.0, n_channels=1, artifact=ArtifactSpec(lsb_uv=0.5), seed=5)
    np.testing.assert_allclose(rec.data / 0.5, np.round(rec.data / 0.5), atol=1e-9)


def test_sham_block_is_ramps_only():
    rec = simulate_recording(10.0, n_channels=1, artifact=ArtifactSpec(heart_depth=0, resp_depth=0, lsb_uv=None),
                             blocks=[BlockSpec(2.0, 0.0, kind="sham", ramp_s=2.0)], seed=6)
    env = np.abs(signal.hilbert(rec.artifact[0]))
    fs = rec.fs
    assert rec.blocks[0]["stop_s"] == 6.0
    assert env[int(4.0 * fs)] > 0.9 * 4000 * 0.85
    assert env[int(3.0 * fs)] < 0.6 * 4000
    assert np.all(rec.artifact[0, int(6.01 * fs):] == 0)


def test_spikes_refractory_and_locking():
    kappa = 2.0
    units = [UnitSpec(channel=0, rate_hz=20.0, kappa=kappa, preferred_phase=2.0, refractory_s=0.003)]
    rec = simulate_recording(60.0, fs=10000.0, n_channels=1, neural=NeuralSpec(units=units),
                             blocks=[BlockSpec(0.0, 60.0, ramp_s=0.0)], seed=7)
    st = rec.spike_times[0]
    assert np.diff(st).min() >= 0.003
    assert 15.0 < st.size / 60.0 <= 21.0  # refractoriness lowers the rate a little
    ph = rec.stim_phase[(st * rec.fs).astype(int)]
    # mean resultant length of a von Mises: A(kappa) = I1/I0 (Mardia & Jupp 2000, Directional Statistics)
    assert abs(plv(ph) - i1(kappa) / i0(kappa)) < 0.04
    assert abs(np.angle(np.mean(np.exp(1j * (ph - 2.0))))) < 0.1


@pytest.mark.parametrize("name", sorted(__import__("artifactclean.scenarios", fromlist=["SCENARIOS"]).SCENARIOS))
def test_every_named_scenario_builds_with_its_blocks(name):
    from artifactclean.scenarios import make_scenario

    rec = make_scenario(name, seed=0, duration_s=8.0)
    kinds = [b["kind"] for b in rec.blocks]
    assert "active" in kinds and rec.data.shape == (4, 8 * 30000)
    if "sham" in name:
        assert kinds[0] == "sham" and np.all(np.isnan(rec.stim_phase[: int(0.9 * rec.fs)]))


@pytest.mark.parametrize("harmonics", [(), ((0.5, 0.3), (0.25, 0.6))])
def test_heartbeat_depth_is_the_peak_change_and_its_harmonics_are_sidebands(harmonics):
    # depth = peak fractional change of the artifact amplitude (ArtifactSpec docstring); a pulse with
    # cardiac harmonics k puts sidebands at f +- k * rate (AM, Oppenheim & Willsky 1997), a sinusoid only at k = 1
    spec = ArtifactSpec(freq_hz=20.0, harmonics=(), heart_depth=0.05, heart_harmonics=harmonics, resp_depth=0.0,
                        drift_ppm=0, lsb_uv=None, amplitude_uv=1000.0)
    rec = simulate_recording(40.0, fs=1000.0, n_channels=1, artifact=spec,
                             blocks=[BlockSpec(0.0, 40.0, ramp_s=0.0)], seed=2)
    env = np.abs(signal.hilbert(rec.artifact[0]))[2000:-2000] / 1000.0
    assert abs(env.max() - 1.05) < 0.003 or abs(env.min() - 0.95) < 0.003
    assert env.max() < 1.053 and env.min() > 0.947
    f, p = signal.welch(rec.artifact[0], fs=rec.fs, nperseg=8000)
    first = p[(f > 21.5) & (f < 22.5)].max()  # f + 2 Hz
    second = p[(f > 23.5) & (f < 24.5)].max()  # f + 2 x 2 Hz
    if harmonics:
        assert second > 0.1 * first  # (0.5)^2 = 0.25 in power, smeared by the rate wander
    else:
        assert second < 1e-4 * first  # window leakage only


@pytest.mark.parametrize("rate_hz, tau_s", [(2.0, 0.07), (1.25, 0.1)])
def test_alpha_pulse_harmonics_are_those_of_a_sampled_pulse_train(rate_hz, tau_s):
    # reference: numpy.fft.rfft of one period of a train of (t / tau) exp(1 - t / tau) pulses, sampled at 2 kHz
    # (the tails of earlier pulses wrapped in); its harmonics relative to the fundamental, and the waveform
    # _harmonic_sum builds from them, must match
    fs = 2000.0
    t = np.arange(int(round(fs / rate_hz))) / fs  # a whole number of samples a period
    one = sum(((t + r / rate_hz) / tau_s) * np.exp(1 - (t + r / rate_hz) / tau_s) for r in range(40))
    c = np.fft.rfft(one)
    harm = alpha_pulse_harmonics(rate_hz, tau_s, n=6)
    assert len(harm) == 6
    for k, (rel, ph) in enumerate(harm, start=2):
        ratio = c[k] / c[1] / (c[1] / abs(c[1])) ** (k - 1)  # the fundamental's phase taken off k times
        assert abs(abs(ratio) - rel) < 2e-4
        assert abs(np.angle(ratio * np.exp(-1j * ph))) < 1e-3
    wave = _harmonic_sum(2 * np.pi * rate_hz * t + np.angle(c[1]), harm)
    ref = np.fft.irfft(np.concatenate(([0], c[1:8], np.zeros(c.size - 8))), t.size)
    assert np.corrcoef(wave, ref)[0, 1] > 1 - 1e-6
    with pytest.raises(ValueError, match="positive"):
        alpha_pulse_harmonics(2.0, 0.0)


def test_the_amplifiers_lowpass_filters_what_it_records():
    # reference: scipy.signal.sosfreqz of a 3rd-order Butterworth at the cut-off (its gain there is 1 / sqrt(2)); the
    # neural truth and an artifact without a DAC go through it as a digital filter (they are smooth)
    spec = ArtifactSpec(freq_hz=20.0, lsb_uv=None)
    plain = simulate_recording(4.0, n_channels=1, artifact=spec, seed=3)
    low = simulate_recording(4.0, n_channels=1, artifact=dataclasses.replace(spec, lowpass_hz=5000.0), seed=3)
    sos = signal.butter(3, 5000.0, fs=plain.fs, output="sos")
    np.testing.assert_allclose(low.artifact, signal.sosfilt(sos, plain.artifact, axis=-1), atol=1e-9)
    np.testing.assert_allclose(low.neural, signal.sosfilt(sos, plain.neural, axis=-1), atol=1e-9)
    np.testing.assert_allclose(low.data, low.neural + low.artifact, atol=1e-9)
    _, h = signal.sosfreqz(sos, worN=[5000.0], fs=plain.fs)
    assert abs(abs(h[0]) - 2 ** -0.5) < 1e-6
    with pytest.raises(ValueError, match="lowpass_hz"):
        simulate_recording(1.0, artifact=dataclasses.replace(spec, lowpass_hz=20000.0))


def test_a_filtered_staircase_is_sampled_as_the_analog_filter_passes_it():
    # reference: scipy.signal.lsim of the analog Butterworth (scipy.signal.butter(analog=True)) on a staircase held
    # between steps at any instant (zero-order hold on a grid 64 times finer than the samples, exact there)
    fs, up, n = 30000.0, 64, 160
    rng = np.random.default_rng(0)
    edges = np.sort(rng.uniform(5, 140, 15) * up).round() / up
    steps = rng.normal(size=edges.size)
    stair = lambda t: np.array([steps[edges <= ti].sum() for ti in t])  # noqa: E731
    b, a = signal.butter(3, 2 * np.pi * 7500.0, analog=True)
    fine = np.arange(n * up) / up
    _, ref, _ = signal.lsim((b, a), stair(fine), fine / fs, interp=False)
    got = stair(np.arange(n)) + held_through_lowpass(edges, steps, n, fs, 7500.0)
    np.testing.assert_allclose(got, ref[::up], atol=1e-9)
    # the step response starts at 0 and settles at 1 (its terms from the partial fractions)
    p, c = step_response_terms(7500.0)
    assert abs(1 + c.sum()) < 1e-12 and np.all(p.real < 0)


def test_a_dacs_steps_reach_the_samples_by_where_between_them_the_edge_fell():
    # behind an analog low-pass, the share of a step the first sample after its edge reads depends on the edge's
    # place between samples (the DAC's clock slides past the amplifier's); a filter run on the samples gives every
    # edge the same share (session 37's generator did)
    spec = ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0, lsb_uv=None, heart_depth=0.0, resp_depth=0.0)
    plain = simulate_recording(4.0, n_channels=1, artifact=spec, seed=3)
    low = simulate_recording(4.0, n_channels=1, artifact=dataclasses.replace(spec, lowpass_hz=7500.0), seed=3)
    np.testing.assert_allclose(low.neural, signal.sosfilt(signal.butter(3, 7500.0, fs=plain.fs, output="sos"),
                                                          plain.neural, axis=-1), atol=1e-9)
    a, b = plain.artifact[0], low.artifact[0]
    jump = np.diff(a)
    at = np.flatnonzero(np.abs(jump) > 0.2 * np.abs(jump).max()) + 1  # first sample of each tick, large steps
    share = (b[at] - a[at - 1]) / (a[at] - a[at - 1])
    # a 7.5 kHz filter at 30 kHz reaches 2-25% of a step a sample after it (0 to 1 sample's delay)
    assert share.min() < 0.05 and share.max() > 0.15, (share.min(), share.max())
    # and the staircase settles: mid-tick (half a millisecond on) the filtered samples are the held levels, to the
    # slowest pole's exp(-pi 7500 Hz 0.5 ms) = 7.5e-6 of a step
    mid = at[(at + 15 < a.size)] + 15
    np.testing.assert_allclose(b[mid], a[mid], atol=1e-5 * np.abs(a).max())


def test_beats_jitter_by_their_own_length_one_by_one():
    # each beat's length differs from the smooth rate's by `jitter` (SD), independently: the lengths' relative SD
    # and their successive differences over sqrt(2) (RMSSD, heart-rate variability's beat-to-beat measure; Task
    # Force of the ESC and NASPE 1996, from memory) both read the jitter, within 10% (1200 beats: about 2% spread)
    fs = 500.0
    rng = np.random.default_rng(4)
    smooth = _smooth_rate_phase(int(1000 * fs), fs, 1.2, 0.0, rng)
    cycles = _jittered_beats(smooth, 0.04, rng) / (2 * np.pi)
    assert np.all(np.diff(cycles) > 0)
    beats = np.arange(np.ceil(cycles[0]), np.floor(cycles[-1]))
    lengths = np.diff(np.interp(beats, cycles, np.arange(cycles.size) / fs))
    assert abs(lengths.mean() - 1 / 1.2) < 0.01
    assert abs(lengths.std() / lengths.mean() - 0.04) < 0.004
    assert abs(np.sqrt(np.mean(np.diff(lengths) ** 2) / 2) / lengths.mean() - 0.04) < 0.004
    # without jitter the generator draws nothing more: the traces stay what they were
    a = simulate_recording(2.0, n_channels=1, seed=5)
    b = simulate_recording(2.0, n_channels=1, artifact=ArtifactSpec(heart_jitter=0.0), seed=5)
    c = simulate_recording(2.0, n_channels=1, artifact=ArtifactSpec(heart_jitter=0.04), seed=5)
    assert np.array_equal(a.data, b.data) and not np.array_equal(a.artifact, c.artifact)
    with pytest.raises(ValueError, match="heart_jitter"):
        simulate_recording(1.0, artifact=ArtifactSpec(heart_jitter=0.5))


def test_heartbeat_phase_shift_of_the_artifact():
    """heart_phase_deg shifts the artifact's phase with the pulse: the fundamental's phase
    (demodulated at the true frequency, scipy.signal.butter + filtfilt) swings by the set peak."""
    from scipy import signal

    fs, f = 30000.0, 20.0
    art = ArtifactSpec(freq_hz=f, heart_depth=0.0, resp_depth=0.0, heart_phase_deg=2.0, heart_harmonics=(),
                       harmonics=(), drift_ppm=0.0, lsb_uv=None)
    rec = simulate_recording(12.0, fs, 1, artifact=art, blocks=[BlockSpec(1.0, 10.0, ramp_s=0.5)], seed=3,
                             neural=NeuralSpec(noise_uv=0.0, lfp_uv=0.0, oscillation_uv=0.0, units=[]))
    t = np.arange(rec.n_samples) / fs
    z = rec.artifact[0] * np.exp(-2j * np.pi * f * t)
    sos = signal.butter(4, 8.0, fs=fs, output="sos")
    lp = signal.sosfiltfilt(sos, z.real) + 1j * signal.sosfiltfilt(sos, z.imag)
    plateau = slice(int(3 * fs), int(9 * fs))
    phase = np.degrees(np.unwrap(np.angle(lp[plateau])))
    assert (phase.max() - phase.min()) / 2 == pytest.approx(2.0, rel=0.1)
    # and no phase swing without it
    flat = simulate_recording(12.0, fs, 1, artifact=ArtifactSpec(freq_hz=f, heart_depth=0.0, resp_depth=0.0,
                                                                  harmonics=(), drift_ppm=0.0, lsb_uv=None),
                              blocks=[BlockSpec(1.0, 10.0, ramp_s=0.5)], seed=3,
                              neural=NeuralSpec(noise_uv=0.0, lfp_uv=0.0, oscillation_uv=0.0, units=[]))
    z0 = flat.artifact[0] * np.exp(-2j * np.pi * f * t)
    lp0 = signal.sosfiltfilt(sos, z0.real) + 1j * signal.sosfiltfilt(sos, z0.imag)
    assert np.ptp(np.degrees(np.unwrap(np.angle(lp0[plateau])))) < 0.01


def test_raised_cosine_ramps_follow_a_hann_window():
    """A raised-cosine ramp of N samples is the rising half of a 2N-sample Hann window
    (``scipy.signal.windows.hann``), and a straight one a line; the plateau is 1."""
    fs, ramp_s = 2000.0, 0.5
    spec = ArtifactSpec(freq_hz=20.0, harmonics=(), heart_depth=0, resp_depth=0, lsb_uv=None, drift_ppm=0.0)
    n_ramp = int(ramp_s * fs)
    k = np.arange(int(1.0 * fs), int(1.0 * fs) + n_ramp)
    expected = {"cosine": signal.windows.hann(2 * n_ramp + 1)[:n_ramp], "linear": np.arange(n_ramp) / n_ramp}
    for shape, want in expected.items():
        rec = simulate_recording(4.0, fs=fs, n_channels=1, artifact=spec,
                                 blocks=[BlockSpec(1.0, 2.0, ramp_s=ramp_s, ramp_shape=shape)], seed=8)
        wave = np.cos(rec.stim_phase[k])
        sure = np.abs(wave) > 0.5
        env = rec.artifact[0, k][sure] / (4000.0 * wave[sure])
        np.testing.assert_allclose(env, want[sure], atol=2e-3)
        plateau = np.arange(int(1.6 * fs), int(2.4 * fs))
        assert np.abs(np.abs(rec.artifact[0, plateau]).max() / 4000.0 - 1.0) < 2e-3
        assert rec.blocks[0]["ramp_shape"] == shape
    with pytest.raises(ValueError, match="ramp shape"):
        simulate_recording(2.0, fs=fs, n_channels=1, artifact=spec, blocks=[BlockSpec(0.5, 1.0, ramp_shape="square")])


@pytest.mark.parametrize("dac_clock_ppm, spacing", [(None, 30.0 / (1 + 40e-6)), (0.0, 30.0), (-25.0, 30.0 / (1 - 25e-6))])
def test_the_dac_ticks_on_the_clock_it_is_given(dac_clock_ppm, spacing):
    """A 1 kHz DAC at 30 kHz steps every 30 samples of its own clock: the stimulator's (40 ppm fast, the
    waveform's too) by default, or one ``dac_clock_ppm`` from the amplifier's."""
    art = ArtifactSpec(freq_hz=20.0, heart_depth=0.0, resp_depth=0.0, drift_ppm=40.0, dac_rate_hz=1000.0,
                       dac_clock_ppm=dac_clock_ppm, lsb_uv=None)
    rec = simulate_recording(40.0, n_channels=1, artifact=art, neural=NeuralSpec(units=[]),
                             blocks=[BlockSpec(1.0, 38.0, ramp_s=1.0)], seed=4)
    steps = np.flatnonzero(np.diff(rec.artifact[0]) != 0)
    steps = steps[(steps > 2.5 * rec.fs) & (steps < 37.5 * rec.fs)]  # the plateau
    assert np.all(np.isin(np.diff(steps), (29, 30, 31)))
    # a line through the step samples against tick numbers (35000 ticks of whole samples)
    assert np.polyfit(np.arange(steps.size), steps, 1)[0] == pytest.approx(spacing, abs=1e-5)
    if dac_clock_ppm == 0.0:
        assert np.all(np.diff(steps) == 30)  # on the amplifier's clock the edges never cross a sample
