"""The heartbeat's harmonics in the gain, modelled from its fundamental's phase (artifactclean.pulse)."""

import dataclasses
import warnings

import numpy as np
import pytest
from scipy import signal

from artifactclean.evaluation import score_cleaning
from artifactclean.modulation import to_middles
from artifactclean.estimators import TemplateSubtraction
from artifactclean.pulse import (PulseModel, _amplitude_phase, _analytic, _pooled_variance, _slow_basis, _smooth_fundamental,
                                 fit_pulse,
                                 fundamental, fundamental_of_rows, harmonic_phase, heart_rate, join_tracks,
                                 phase_information, pool_weights)
from artifactclean.scenarios import SCENARIOS, locked_units
from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, simulate_recording

RATE = 30.0


def _pulse_gain(seconds, depths, harmonics, *, heart_hz=2.0, noise=0.002, seed=0):
    """Gain sequences ``1 + d (cos phi + sum rel cos(h phi + ph))`` with a wandering rate, plus white noise."""
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE)
    wander = np.interp(np.arange(n), np.linspace(0, n, 8), rng.normal(0, 0.03, 8))
    phi = 2 * np.pi * np.cumsum(heart_hz * (1 + wander)) / RATE + rng.uniform(0, 2 * np.pi)
    shape = np.cos(phi) + sum(rel * np.cos(h * phi + ph) for h, (rel, ph) in enumerate(harmonics, start=2))
    harm = shape - np.cos(phi)
    gain = 1 + np.asarray(depths)[:, None] * shape[None] + noise * rng.standard_normal((len(depths), n))
    return gain, np.asarray(depths)[:, None] * harm[None]


def test_the_fundamental_reads_as_the_analytic_signal():
    # reference: scipy.signal.hilbert gives the analytic signal x + i H[x]; a cosine of amplitude A
    # is A exp(i phi), so the positive-frequency band-pass must read A/2 and the same phase
    n = int(20 * RATE)
    t = np.arange(n) / RATE
    x = 0.01 * np.cos(2 * np.pi * 1.7 * t + 0.4)
    amp, ph = _amplitude_phase(x, RATE, 1.7)
    ref = signal.hilbert(x)
    mid = slice(int(5 * RATE), n - int(5 * RATE))
    np.testing.assert_allclose(amp[mid], np.abs(ref[mid]) / 2, rtol=0.01)
    dphi = np.angle(np.exp(1j * (ph[mid] - np.angle(ref[mid]))))
    assert np.max(np.abs(dphi)) < 0.01


def test_a_pulse_shape_is_found_and_pooled_over_channels():
    harmonics = [(0.5, 0.3), (0.25, 0.6)]
    gain, truth = _pulse_gain(20, [0.02, 0.01, 0.015], harmonics)
    model = fit_pulse(gain, RATE, max_hz=10.0, ref=0)
    assert model is not None
    assert model.heart_hz == pytest.approx(2.0, abs=0.15)
    fitted, whole = model.parts(gain, RATE)
    mid = slice(int(4 * RATE), gain.shape[1] - int(4 * RATE))
    # each channel's harmonics within a few per cent of their power, on every channel
    err = np.sum((fitted - truth)[:, mid] ** 2, axis=1) / np.sum(truth[:, mid] ** 2, axis=1)
    assert np.all(err < 0.03), err
    # what the gain must carry is larger: segment means and interpolation take sinc^3 off
    assert np.all(np.std(whole, axis=1) > np.std(fitted, axis=1))


def test_pooled_channels_read_the_heartbeat_through_a_shared_floor():
    # four channels carry one heartbeat (the same relative modulation) over floors that are mostly one
    # signal divided by each channel's artifact gain (signs differ), as nearby contacts share their LFP
    rng = np.random.default_rng(41)
    n = int(20 * RATE)
    wander = np.interp(np.arange(n), np.linspace(0, n, 8), rng.normal(0, 0.03, 8))
    phi = 2 * np.pi * np.cumsum(2.0 * (1 + wander)) / RATE + rng.uniform(0, 2 * np.pi)
    g = np.array([1.0, -0.7, 0.45, -1.2])
    common, own = rng.standard_normal(n), rng.standard_normal((4, n))
    depth, floor = 0.01, 0.012
    dev = depth * np.cos(phi)[None] + floor * (0.9 * common[None] + 0.3 * own) / g[:, None]
    w = pool_weights(dev, RATE, 2.0, ref=3)
    assert w is not None and np.count_nonzero(w) == 4
    mid = slice(int(4 * RATE), n - int(4 * RATE))

    def phase_error(ph):
        d = np.angle(np.exp(1j * (ph - phi)))[mid]
        return float(np.sqrt(np.mean(np.angle(np.exp(1j * (d - np.angle(np.mean(np.exp(1j * d)))))) ** 2)))

    amp_ref, ph_ref = fundamental(dev[3], RATE, 2.0)
    amp, ph = fundamental(dev, RATE, 2.0, w)
    assert phase_error(ph) < 0.5 * phase_error(ph_ref), (phase_error(ph), phase_error(ph_ref))
    # read one channel at a time (the block track's way): the weighted sum of the band-passed rows, to rounding
    _, amp_rows, ph_rows = fundamental_of_rows(((None, RATE, d) for d in dev), 2.0, w)
    amp_sum, ph_sum = _smooth_fundamental(np.conj(w) @ _analytic(dev, RATE, 2.0), RATE)
    np.testing.assert_allclose(amp_rows, amp_sum, rtol=1e-9)
    np.testing.assert_allclose(ph_rows, ph_sum, rtol=0, atol=1e-9)
    # w^H k = 1: the pooled fundamental reads the reference's (the common loading here), A/2 of a cosine
    assert np.median(amp[mid]) == pytest.approx(depth / 2, rel=0.1)
    # against the minimum-variance weights of the true floor covariance (Capon 1969, Proc. IEEE 57,
    # 1408-1418: w = S^-1 k / k^H S^-1 k, by numpy.linalg.solve): estimated from a few bins of 20 s, the
    # weights pass on less than twice the least floor possible (the reference alone: 21 times, equal
    # weights 3.3 times)
    u = 1.0 / g
    cov = 0.81 * np.outer(u, u) + 0.09 * np.diag(u ** 2)
    best = np.linalg.solve(cov, np.ones(4))
    best /= np.ones(4) @ best
    w_unit = w / np.conj(np.vdot(w, np.ones(4)))
    assert np.real(np.conj(w_unit) @ cov @ w_unit) < 2.0 * np.real(best @ cov @ best)
    # a reference alone, or channels that may not be pooled (clipped), give no weights
    assert pool_weights(dev[:1], RATE, 2.0, ref=0) is None
    assert pool_weights(dev, RATE, 2.0, ref=3, pool=[3]) is None


def test_the_pooled_harmonic_variance_follows_the_floors_cross_spectrum():
    # Monte Carlo against numpy.linalg.lstsq's own fits (its pseudo-inverse): three channels whose floors are
    # one white sequence, shifted by two samples on one and of the other sign on another, plus their own
    # noise. A pooled coefficient sum_c a_c beta_c with complex a_c has the variance of the positive-frequency
    # density of sum_c a_c floor_c; the negative frequency (the conjugate convention) reads 4.7 times the
    # spread, the channels taken as independent 3.1 times
    rng = np.random.default_rng(7)
    n = int(20 * RATE)
    t = np.arange(n) / RATE
    phi = 2 * np.pi * 2.0 * t + 0.4 * np.sin(2 * np.pi * 0.1 * t)
    amp, hs = 0.01, np.array([1, 2, 3])
    r = amp * np.exp(1j * hs[:, None] * phi[None])
    pinv = np.linalg.pinv(np.concatenate((r.real, r.imag)).T)
    a = np.array([1.0, 0.5 - 0.8j, 0.3j])[:, None] * np.ones((1, 2))
    pooled, predicted = [], []
    for _ in range(200):
        common = rng.standard_normal(n + 2)
        floor = np.stack([common[2:], common[:-2], -common[2:]]) + 0.3 * rng.standard_normal((3, n))
        sol = pinv @ floor.T
        b = sol[:3] - 1j * sol[3:]  # as fit_pulse reads its solution
        pooled.append(a[:, 0] @ b[1])
        resid = floor - np.real(np.einsum("hc,hn->cn", b, r))
        predicted.append(_pooled_variance(resid, a, RATE, 2.0 * hs[1:], n / RATE, amp ** 2, int(4 * RATE))[0])
    ratio = np.mean(predicted) / np.var(np.array(pooled))
    assert 0.75 < ratio < 1.25, ratio


def test_a_sinusoidal_heartbeat_over_a_shared_floor_gives_no_harmonics():
    # nearby contacts share their LFP, and with gains of one sign their floors add: taken as independent
    # (the variance of each channel's fit summed as if they were), four channels' pooled harmonics stood out
    # of the floor on 7 of 12 seeds (1 with their cross-spectrum)
    n = int(20 * RATE)
    found = 0
    for seed in range(12):
        rng = np.random.default_rng(100 + seed)
        phi = 2 * np.pi * 2.0 * np.arange(n) / RATE + rng.uniform(0, 2 * np.pi)
        g = np.array([1.0, 0.7, 0.45, 1.2])
        floor = 0.004 * (0.9 * rng.standard_normal(n)[None] + 0.3 * rng.standard_normal((4, n))) / g[:, None]
        found += fit_pulse(1 + 0.01 * np.cos(phi)[None] + floor, RATE, max_hz=10.0, ref=3) is not None
    assert found <= 1, found


def test_a_harmonic_that_wanders_across_the_limit_is_modelled():
    # a 2.5 Hz heart's 4th harmonic at 10 Hz, the default tracking limit: with the rate read a little high
    # (2.508 for 2.493) it was left out, and its sidebands left 11x the neural power 10 Hz from a 40 Hz
    # fundamental (LFP error away from the +-3 Hz bands 0.096, 0.039 with it; this project's sweep, draw 124)
    harmonics = [(0.5, 0.3), (0.3, 0.6), (0.25, 0.9)]
    gain, truth = _pulse_gain(20, [0.02, 0.01], harmonics, heart_hz=2.52)
    model = fit_pulse(gain, RATE, max_hz=10.0, ref=0)
    assert model is not None and model.coefs.shape[1] >= 3
    fitted, _ = model.parts(gain, RATE)
    mid = slice(int(4 * RATE), gain.shape[1] - int(4 * RATE))
    err = np.sum((fitted - truth)[:, mid] ** 2, axis=1) / np.sum(truth[:, mid] ** 2, axis=1)
    assert np.all(err < 0.05), err
    # the limit still holds beyond the wander where nothing beyond it is asked for: at 2.7 Hz the 4th harmonic
    # (10.8 Hz) is not modelled
    gain, truth = _pulse_gain(20, [0.02, 0.01], harmonics, heart_hz=2.7)
    model = fit_pulse(gain, RATE, max_hz=10.0, ref=0, beyond=False)
    assert model is not None and model.coefs.shape[1] == 2
    # by default it is, as the gain's 30 samples a second hold it and the harmonics below it stand out
    model = fit_pulse(gain, RATE, max_hz=10.0, ref=0)
    assert model is not None and model.coefs.shape[1] >= 3 and np.all(np.abs(model.coefs[:, 2]) > 0)
    fitted, _ = model.parts(gain, RATE)
    err = np.sum((fitted - truth)[:, mid] ** 2, axis=1) / np.sum(truth[:, mid] ** 2, axis=1)
    assert np.all(err < 0.05), err


@pytest.mark.parametrize("third", [0.3, 0.0])
def test_harmonics_beyond_the_limit_are_modelled_while_they_run_unbroken(third):
    # a 2 Hz pulse with the tracking limit at 5 Hz: its 3rd and 4th harmonics (6 and 8 Hz) lie beyond it, where
    # the gain's filter takes everything off. A pulse's harmonics fall off smoothly, so the 4th is modelled
    # only after a 3rd that stands out; a strong line after a gap is taken for the floor's (a sinusoidal
    # heart's chance lines, tested one by one, passed as harmonics; DEVELOPERS.md, session 28)
    harmonics = [(0.5, 0.3), (third, 0.6), (0.3, 0.9)]
    gain, truth = _pulse_gain(20, [0.02, 0.01], harmonics)
    model = fit_pulse(gain, RATE, max_hz=5.0, ref=0)
    assert model is not None and model.coefs.shape[1] >= 3
    fourth = np.abs(model.coefs[:, 2])
    if third:
        assert np.all(np.abs(model.coefs[:, 1]) > 0) and np.all(fourth > 0)
        fitted, _ = model.parts(gain, RATE)
        mid = slice(int(4 * RATE), gain.shape[1] - int(4 * RATE))
        err = np.sum((fitted - truth)[:, mid] ** 2, axis=1) / np.sum(truth[:, mid] ** 2, axis=1)
        assert np.all(err < 0.05), err
    else:
        assert np.all(model.coefs[:, 1:] == 0)


def test_a_sinusoidal_heartbeat_gives_no_harmonics():
    gain, _ = _pulse_gain(20, [0.02, 0.01], [], noise=0.003, seed=1)
    model = fit_pulse(gain, RATE, max_hz=10.0)
    if model is not None:
        fitted, _ = model.parts(gain, RATE)
        # at most what the floor gives a fit over 20 s: well under the noise
        assert np.std(fitted) < 0.1 * 0.003


def test_no_heartbeat_gives_no_model():
    rng = np.random.default_rng(2)
    assert fit_pulse(1 + 0.003 * rng.standard_normal((2, int(20 * RATE))), RATE, max_hz=10.0) is None


def test_a_slow_heart_is_taken_at_its_fundamental_not_its_harmonic():
    # the second harmonic stands higher than the fundamental; a search for the single highest line
    # takes 2.4 Hz for the heart rate, the harmonic sum its fundamental
    gain, _ = _pulse_gain(20, [0.006, 0.006], [(1.8, 0.2), (0.5, 0.9)], heart_hz=1.2, seed=3)
    model = fit_pulse(gain, RATE, max_hz=10.0)
    assert model is not None
    assert model.heart_hz == pytest.approx(1.2, abs=0.15)


def test_the_model_of_some_channels_keeps_its_reference():
    model = PulseModel(2.0, np.arange(6, dtype=complex).reshape(3, 2), ref=2)
    sub = model.rows([1, 2])
    assert sub.ref == 1
    np.testing.assert_array_equal(sub.coefs, model.coefs[[1, 2]])


def _moved_pulse_gain(pattern, harmonics, *, seed, seconds=20.0, heart_hz=2.0, depths=(0.02, 0.01, 0.015)):
    """Gains of segments (3 a cycle at 10 Hz) that stand ``pattern`` segments from their middles, moved to the
    middles by a cycle's slope as ``segment_gain`` moves them; and those shifts."""
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE)
    shift = np.resize(np.asarray(pattern, dtype=float), n)
    t = (np.arange(n) + 0.5 + shift) / RATE
    phi = 2 * np.pi * heart_hz * (t - 0.03 / (2 * np.pi * 0.2) * np.cos(2 * np.pi * 0.2 * t)) + 1.0  # 3% wander
    shape = np.cos(phi) + sum(rel * np.cos(h * phi + ph) for h, (rel, ph) in enumerate(harmonics, start=2))
    gain = 1 + np.asarray(depths)[:, None] * shape[None] + 0.002 * rng.standard_normal((len(depths), n))
    shifts = np.repeat(shift[None], len(depths), axis=0)
    return to_middles(gain, shifts, len(pattern)), shifts


@pytest.mark.parametrize("pattern", [(0.2, 0.2, 0.2), (0.3, -0.1, 0.25), (-0.3, 0.1, 0.1)])
@pytest.mark.parametrize("seed", [0, 1])
def test_the_pulse_shape_is_fitted_where_the_gains_stand(pattern, seed):
    # a gain stands off its segment's middle and is moved back by a cycle's slope, which a cycle's mean
    # takes mostly off a 6 Hz harmonic at 10 Hz: fitted at the middles, the 3rd harmonic's phase was
    # 0.15-0.17 rad behind with shifts of 0.2 segments; fitted as the move leaves it, within the error the
    # same fit has without any shift (0.015-0.037 here)
    harmonics = [(0.5, 0.3), (0.25, 0.6)]
    gain, shifts = _moved_pulse_gain(pattern, harmonics, seed=seed)
    model = fit_pulse(gain, RATE, max_hz=10.0, ref=0, shift=shifts, per_cycle=3)
    assert model is not None
    # B_h = 2 rel_h exp(i ph_h) relative to half the fundamental (PulseModel.coefs)
    err = [abs(np.angle(model.coefs[0, h - 2] * np.exp(-1j * ph))) for h, (_, ph) in enumerate(harmonics, start=2)]
    assert max(err) < 0.05, err
    if len(set(pattern)) == 1:
        plain = fit_pulse(gain, RATE, max_hz=10.0, ref=0)
        assert abs(np.angle(plain.coefs[0, 1] * np.exp(-0.6j))) > 0.1  # the bias this removes


@pytest.mark.parametrize("seed", [0, 1])
def test_the_pulse_shape_is_fitted_as_the_segments_see_it(seed):
    # three channels of a 5 Hz artifact whose cycle has harmonics, modulated 2 % by a pulse (harmonics at half
    # and a quarter of the fundamental), gains of 5 segments a cycle: fitted on the regressors as each
    # segment's weights see them (segment_transfer, from the stretch's mean cycle) the harmonics' sizes are
    # within 4 % of the truth and their phases off by one delay, h times the fundamental's (the track
    # reads its phase from the same gains); taken for plain means moved to first order the 3rd harmonic was
    # 8-9 % too large and the two phases did not share a delay (0.022 and 0.047 rad per harmonic number)
    from artifactclean.modulation import segment_gain

    harmonics = [(0.5, 0.3), (0.25, 0.6)]
    rng = np.random.default_rng(seed)
    fs, f, per_cycle = 6000.0, 5.0, 5
    n = int(30 * fs)
    t = np.arange(n) / fs
    u = t * f * (1 + 40e-6) + 0.1234
    cyc = np.sin(2 * np.pi * u) + 0.3 * np.sin(4 * np.pi * u + 1.0) + 0.15 * np.sin(6 * np.pi * u + 0.4)
    phi = 2 * np.pi * 2.0 * (t - 0.03 / (2 * np.pi * 0.2) * np.cos(2 * np.pi * 0.2 * t)) + 1.0
    shape = np.cos(phi) + sum(rel * np.cos(h * phi + ph) for h, (rel, ph) in enumerate(harmonics, start=2))
    x = 1000 * np.array([1.0, -0.7, 0.45])[:, None] * ((1 + 0.02 * shape) * cyc)[None]
    x += 3.0 * rng.standard_normal(x.shape)
    gain, rate, shift, cycle = segment_gain(x, np.ones_like(x), u, fs, f, per_cycle, return_shift=True,
                                            return_cycle=True)
    truth = np.array([2 * rel * np.exp(1j * ph) for rel, ph in harmonics])

    def fitted(**kw):
        model = fit_pulse(gain, rate, max_hz=10.0, ref=0, shift=shift, per_cycle=per_cycle, **kw)
        assert model is not None
        return model, model.coefs[0, :2] / truth

    model, ratio = fitted(cycle=cycle, first=int(np.floor(u[0] * per_cycle)))
    assert np.all(np.abs(np.abs(ratio) - 1) < 0.04), ratio
    delay = np.angle(ratio) / np.array([2, 3])
    assert abs(delay[0] - delay[1]) < 0.01, delay
    # the model keeps how the segments see each channel's harmonics; the sequences hold coefs times that
    assert model.seen is not None and model.seen.shape == model.coefs.shape
    np.testing.assert_allclose(model.seen_coefs(rate), model.coefs * model.seen)
    _, plain = fitted()
    assert abs(abs(plain[1]) - 1) > 0.06 and abs(np.angle(plain[0]) / 2 - np.angle(plain[1]) / 3) > 0.015, plain


@pytest.mark.parametrize("seed", [0, 1])
def test_the_parts_images_of_a_harmonic_come_off_the_raw_gains(seed):
    # 10 Hz, 3 segments a cycle, a cycle with harmonics, a 2.04 Hz pulse with a 2nd harmonic only: each part of
    # the cycle sees the 4.08 Hz harmonic through its own weights and is moved to its middle by a cycle's slope,
    # and that pattern puts an image at 10 - 4.08 = 5.92 Hz in the raw gains. The parts' mean
    # (PulseModel.parts) leaves it whole; the harmonic as each part holds it (PulseModel.as_held, what the
    # fit saw) takes it to the floor (the line's power above the median beside it)
    from artifactclean.modulation import segment_gain

    rng = np.random.default_rng(seed)
    fs, f, per_cycle, heart = 6000.0, 10.0, 3, 2.04
    t = np.arange(int(30 * fs)) / fs
    u = t * f * (1 + 40e-6) + 0.1234
    cyc = np.sin(2 * np.pi * u) + 0.3 * np.sin(4 * np.pi * u + 1.0) + 0.15 * np.sin(6 * np.pi * u + 0.4)
    phi = 2 * np.pi * heart * (t - 0.03 / (2 * np.pi * 0.2) * np.cos(2 * np.pi * 0.2 * t)) + 1.0
    pulse = np.cos(phi) + 0.5 * np.cos(2 * phi + 0.3)
    x = 1000 * np.array([1.0, -0.7, 0.45])[:, None] * ((1 + 0.02 * pulse) * cyc)[None]
    x += 0.5 * rng.standard_normal(x.shape)
    gain, rate, shift, cycle = segment_gain(x, np.ones_like(x), u, fs, f, per_cycle, return_shift=True,
                                            return_cycle=True)
    first = int(np.floor(u[0] * per_cycle))
    model = fit_pulse(gain, rate, max_hz=10.0, ref=0, shift=shift, per_cycle=per_cycle, cycle=cycle, first=first)
    assert model is not None and model.harmonics() == [2]

    def excess(g):
        fr, p = signal.welch(g - g.mean(axis=1, keepdims=True), fs=rate, nperseg=int(8 * rate), window=("kaiser", 10))
        image = f - 2 * model.heart_hz
        near, beside = np.abs(fr - image) <= 0.3, (np.abs(fr - image) > 0.5) & (np.abs(fr - image) <= 1.0)
        return p[:, near].sum(axis=1) - near.sum() * np.median(p[:, beside], axis=1)

    whole = excess(gain)
    assert np.all(excess(gain - model.parts(gain, rate, segments=True)[0]) > 0.9 * whole)
    left = excess(gain - model.as_held(gain, rate, shift, first, per_cycle)) / whole
    assert np.abs(left).max() < 0.25, left


@pytest.mark.parametrize("seed", [1, 3])
def test_a_pulses_image_in_the_gain_does_not_pass_beside_a_dac(seed):
    # a 1 kHz DAC turns off the raw gain's check against the data (its period puts lines of its own there), and
    # the 2nd harmonic of a 2 Hz pulse put an image at f - 4 Hz in the plan's raw gains (the parts' pattern,
    # test above); its "sidebands" f +- (f - 4) are 4 Hz and 2 f - 4 Hz, where the artifact has lines of its own
    # (the harmonic on the waveform's offset and on its 2nd harmonic), so the sideband test passed it, and the
    # gain put a line at 2 f - 4 Hz: 0.95-1.43 x the neural power there on two channels. With the image taken
    # off the raw gains, under 0.01.
    art = ArtifactSpec(freq_hz=10.0, amplitude_uv=5000.0, channel_gains=(0.6, -0.35, 1.1, 1.3),
                       harmonics=((0.045, 3.6), (0.037, 2.8), (0.031, 0.2), (0.025, 5.9)), heart_rate_hz=2.0,
                       heart_depth=0.023, heart_harmonics=((0.5, 4.5),), resp_rate_hz=0.4, resp_depth=0.011,
                       drift_ppm=-50.0, dac_rate_hz=1000.0)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=[], oscillation_hz=9.0, lfp_uv=36.0),
                             blocks=[BlockSpec(1.0, 18.0, ramp_s=1.25)], seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = TemplateSubtraction()
        out = est.fit_transform(rec.data, fs=rec.fs)
    block = est.report_["blocks"][0]
    assert block["dac_ticks_per_cycle"] == 100 and 2 in block["heartbeat_harmonics_modelled"]
    seg = slice(int(2.5 * rec.fs), int(17.5 * rec.fs))
    fr, pr = signal.welch((out - rec.neural)[:, seg], fs=rec.fs, nperseg=int(5 * rec.fs))
    _, pn = signal.welch(rec.neural[:, seg], fs=rec.fs, nperseg=int(5 * rec.fs))
    at = np.abs(fr - (20.0 - 2 * block["heart_rate_hz"])) <= 0.4
    ratio = pr[:, at].sum(axis=1) / pn[:, at].sum(axis=1)
    assert ratio.max() < 0.05, ratio


def test_the_carried_harmonics_slope_is_their_derivative():
    # reference: a central difference over a hundredth of an element, against the slope the model gives
    # from its fundamental's amplitude and phase (numpy.gradient of the harmonics themselves at 30 a second
    # takes sin(x) / x, 0.76, of a 6 Hz harmonic's slope)
    fs, rate, heart = 30000.0, 30.0, 2.0
    t = np.arange(0.0, 20 * fs, fs / 100)
    track = (t, 0.01 * (1 + 0.2 * np.sin(t / fs)), 2 * np.pi * heart * t / fs + 0.5 * np.sin(0.4 * t / fs))
    model = PulseModel(heart, np.array([[0.8 * np.exp(0.3j), 0.5 * np.exp(0.6j)]]), 0, track)
    times = np.arange(60.0, 540.0) * fs / rate
    _, whole, slope = model.relative(None, rate, times=times, slope=True)
    step = fs / rate / 100
    fd = (model.relative(None, rate, times=times + step)[1] - model.relative(None, rate, times=times - step)[1]) * 50
    np.testing.assert_allclose(slope, fd, atol=2e-3 * np.abs(fd).max())
    assert np.abs(np.gradient(whole[0]) - fd[0]).max() > 0.1 * np.abs(fd).max()


def test_a_blocks_heartbeat_is_read_through_its_ramps():
    # a block's gain deviation is the modulation times its envelope (1 s ramps): read through the ramps
    # (normalised convolution, moved back from the weights' centroid), the phase of a heartbeat whose rate
    # wanders 3% stays within a few hundredths of a radian there, where the plain band-pass, a mean over a
    # one-sided window, stood 0.1 rad off; on the plateau the two read the same
    rate = 30.0
    t = (np.arange(int(20 * rate)) + 0.5) / rate
    env = np.maximum(np.clip(np.minimum(t - 1.0, 19.0 - t), 0.0, 1.0), 1e-3)
    phi = 2 * np.pi * 2.0 * (t - 0.03 / (2 * np.pi * 0.2) * np.cos(2 * np.pi * 0.2 * t)) + 1.0
    dev = np.where(env >= 0.02, env * 0.01 * np.cos(phi), 0.0)
    _, amp, ph = fundamental_of_rows([(t, rate, dev, env)], 2.0)
    _, amp0, ph0 = fundamental_of_rows([(t, rate, dev)], 2.0)
    ramps = ((t > 1.2) & (t < 2.0)) | ((t > 18.0) & (t < 18.8))
    err = lambda p: np.sqrt(np.mean(np.angle(np.exp(1j * (p - phi)[ramps])) ** 2))  # noqa: E731
    assert err(ph) < 0.04 < 0.08 < err(ph0), (err(ph), err(ph0))
    np.testing.assert_allclose(amp[ramps], 0.005 * env[ramps], rtol=0.03)
    plateau = (t > 6.2) & (t < 13.8)  # beyond both filters' reach (2 s each) of the ramps
    np.testing.assert_allclose(np.angle(np.exp(1j * (ph - ph0)[plateau])), 0.0, atol=1e-9)
    np.testing.assert_allclose(amp[plateau], amp0[plateau], rtol=1e-9)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_the_pulses_harmonics_sharpen_its_phase(seed):
    # three channels carry one pulsatile heartbeat (harmonics at half and a quarter of the fundamental) over
    # floors of their own: read from the fundamental alone, then refined with the fitted harmonics, the
    # phase is nearer the truth (here 0.55-0.78 of its error); without harmonics in the model, or above
    # up_to_hz, it is left as it was
    rng = np.random.default_rng(seed)
    n = int(40 * RATE)
    t = np.arange(n) / RATE
    phi = 2 * np.pi * 2.0 * (t - 0.03 / (2 * np.pi * 0.2) * np.cos(2 * np.pi * 0.2 * t)) + 1.0
    shape = np.cos(phi) + 0.5 * np.cos(2 * phi + 0.3) + 0.25 * np.cos(3 * phi + 0.6)
    depths = np.array([0.02, -0.014, 0.01])[:, None]
    gain = 1 + depths * shape[None] + 0.006 * rng.standard_normal((3, n))
    model = fit_pulse(gain, RATE, max_hz=10.0, ref=0)
    assert model is not None and model.harmonics()[:2] == [2, 3]
    chans = model.pooled()
    rows = [(t, RATE, gain[c] - gain[c].mean()) for c in chans]
    weights = None if model.weights is None else model.weights[chans]
    _, _, ph = fundamental_of_rows(rows, model.heart_hz, weights)
    refined = harmonic_phase(rows, model, ph)
    mid = slice(int(5 * RATE), n - int(5 * RATE))

    def rms(p):
        d = np.angle(np.exp(1j * (p - phi)[mid]))
        return np.sqrt(np.mean(np.angle(np.exp(1j * (d - np.angle(np.mean(np.exp(1j * d)))))) ** 2))

    assert rms(refined) < 0.9 * rms(ph), (rms(refined), rms(ph))
    plain = PulseModel(model.heart_hz, np.zeros_like(model.coefs), model.ref, weights=model.weights)
    np.testing.assert_array_equal(harmonic_phase(rows, plain, ph), ph)
    # harmonics above up_to_hz are not read (the 2nd is at 4 Hz)
    np.testing.assert_array_equal(harmonic_phase(rows, model, ph, up_to_hz=3.9), ph)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_heartbeat_read_through_a_strong_floor_is_smoothed_more(seed):
    # three channels carry a pulse whose rate wanders 3% over 10 s: over a floor of 0.2% the fundamental
    # knows much of the phase (information 1200-1600 Hz) and the track keeps the 0.6 Hz that follows a
    # breathing heart rate; over 2% (information 13-18) the floor's wander is the error, and the track
    # smoothed as track_smoothing says (0.24-0.26 Hz) is 0.13-0.14 rad RMS off where 0.6 Hz was 0.18
    n = int(40 * RATE)
    t = np.arange(n) / RATE
    phi = 2 * np.pi * 2.0 * (t - 0.03 / (2 * np.pi * 0.1) * np.cos(2 * np.pi * 0.1 * t)) + 1.0
    shape = np.cos(phi) + 0.5 * np.cos(2 * phi + 0.3) + 0.25 * np.cos(3 * phi + 0.6)
    depths = np.array([0.02, -0.014, 0.01])[:, None]
    mid = slice(int(5 * RATE), n - int(5 * RATE))
    for noise in (0.002, 0.02):
        rng = np.random.default_rng(seed)
        gain = 1 + depths * shape[None] + noise * rng.standard_normal((3, n))
        model = fit_pulse(gain, RATE, max_hz=10.0, ref=0)
        assert model is not None
        chans = model.pooled()
        rows = [(t, RATE, gain[c] - gain[c].mean()) for c in chans]
        weights = None if model.weights is None else model.weights[chans]

        def rms(smooth_hz):
            _, _, ph = fundamental_of_rows(rows, model.heart_hz, weights, smooth_hz)
            d = np.angle(np.exp(1j * (ph - phi)[mid]))
            return np.sqrt(np.mean(np.angle(np.exp(1j * (d - np.angle(np.mean(np.exp(1j * d)))))) ** 2))

        if noise < 0.01:
            assert model.smooth_hz == 0.6
        else:
            assert 0.2 <= model.smooth_hz < 0.35, model.smooth_hz
            assert rms(model.smooth_hz) < 0.85 * rms(0.6), (rms(model.smooth_hz), rms(0.6))


def test_the_pulse_is_read_back_at_every_sample_and_alike_in_pieces():
    # the template's gain takes the heartbeat's harmonics at every sample from a grid anchored at the
    # block's reference sample: a piece of the block reads what the whole block reads there, and the
    # grid's interpolation stays within half a per cent of the harmonics' size (its images lie above 200 Hz)
    fs, seg_rate, heart = 30000.0, 30.0, 2.0
    t = np.arange(-60000.0, 600000.0, 300.0)
    track = (t, np.full(t.size, 0.01), 2 * np.pi * heart * t / fs + 0.3 * np.sin(t / fs))
    model = PulseModel(heart, np.array([[0.8 * np.exp(0.3j), 0.5 * np.exp(0.6j)],
                                        [-0.5 * np.exp(0.3j), -0.3 * np.exp(0.6j)]]), 0, track)
    t0, n, step = 1234.0, 90000, fs / (8 * seg_rate)
    whole = np.zeros((2, n))
    model.add_at_samples(whole, seg_rate, (t0, step))
    piece = np.zeros((2, 20000))
    model.add_at_samples(piece, seg_rate, (t0 + 31000, step))
    np.testing.assert_allclose(piece, whole[:, 31000:51000], rtol=0, atol=1e-15)
    exact = model.at_times(t0 + np.arange(n), seg_rate)
    assert np.abs(whole - exact).max() < 5e-3 * np.abs(exact).max()  # (2 pi 6 Hz / 240)^2 / 8 of the 3rd


def test_parts_of_a_track_join_into_one_unwrapped_phase():
    # a phase read in parts, each unwrapped on its own (each off by whole turns), joins into the
    # continuous phase; positions and amplitudes are kept in order
    fs, heart = 1000.0, 1.3
    t = np.arange(0.0, 20_000.0, 25.0)
    phase = 2 * np.pi * heart * t / fs + 0.3 * np.sin(t / 3000.0)
    amp = 1 + 0.1 * np.cos(t / 5000.0)
    cuts = [0, 170, 333, 600, t.size]
    parts = [(t[a:b], amp[a:b], phase[a:b] + 2 * np.pi * k) for k, (a, b) in zip((0, 5, -3, 11), zip(cuts, cuts[1:]))]
    parts.insert(2, (t[:0], amp[:0], phase[:0]))  # an empty part changes nothing
    jt, ja, jp = join_tracks(parts, heart, fs)
    np.testing.assert_array_equal(jt, t)
    np.testing.assert_array_equal(ja, amp)
    np.testing.assert_allclose(jp, phase, atol=1e-9)
    assert join_tracks([(t[:0], amp[:0], phase[:0])], heart, fs) is None


def test_the_block_track_frees_file_tasks_of_the_reference(monkeypatch):
    # the heartbeat's phase is read once over the block (in parts of _TRACK_S s, here 6 s): a task on
    # one channel needs neither the reference channel nor the band-pass's context, and the track read
    # in parts is the track read at once
    from artifactclean.estimators import cycles
    from artifactclean.stimulation import fit_stimulation

    rec = simulate_recording(20.0, artifact=SCENARIOS["modulated_20hz"][0], neural=NeuralSpec(units=[]), seed=1)
    model = fit_stimulation(rec.data, rec.fs, stim_freq=20.0)
    tracks = {}
    for part_s in (6.0, 60.0):
        monkeypatch.setattr(cycles, "_TRACK_S", part_s)
        est = TemplateSubtraction()
        est.prepare(cycles.array_reader(rec.data), model, rec.fs)
        plan, = [p for p in est._plans.values() if p.response is not None and p.response.pulse is not None]
        tracks[part_s] = plan.response.pulse.track
        blk, = [b for b in model.blocks if b.kind == "active"]
        other = next(c for c in range(4) if c != plan.ref)
        assert est.for_channels([other])[1] == [other]
        assert est.block_context_seconds(blk) == est.context_seconds(blk.freq_hz)
    (t6, a6, p6), (t60, a60, p60) = tracks[6.0], tracks[60.0]
    np.testing.assert_array_equal(t6, t60)
    assert np.all(np.diff(t6) > 0)
    # the parts overlap by twice the band-pass's reach; each part's gain is relative to its own mean
    # cycle and plateau level, which differ from the whole block's by a few parts in a thousand
    np.testing.assert_allclose(a6, a60, rtol=0.01)
    np.testing.assert_allclose(p6, p60, rtol=0, atol=0.01)
    # and the phase advances at the heart rate the plan found
    rate = np.polyfit(t60 / rec.fs, p60, 1)[0] / (2 * np.pi)
    assert rate == pytest.approx(plan.response.pulse.heart_hz, rel=0.05)


@pytest.mark.parametrize("freq, seed, gain, bound", [(10.0, 1, 0.4, 0.06), (20.0, 1, 0.75, 0.04), (5.0, 3, 0.5, 0.1)])
def test_a_pulsatile_heartbeat_leaves_the_lfp_away_from_the_harmonics(freq, seed, gain, bound):
    # the built-in modulated scenario: a 2 Hz pulse with harmonics at 4 and 6 Hz, whose sidebands
    # (10 +- 4, 10 +- 6 Hz; 20 +- 4, 20 +- 6 Hz; at 5 Hz, 1 Hz) lie away from the +-3 Hz bands. Filtered,
    # they left 0.197 (10 Hz) and 0.072 (20 Hz); modelled from the reference channel's heartbeat 0.082,
    # 0.046 and 0.311 (5 Hz, seed 3); from the four channels pooled 0.064, 0.043 and 0.125; with the shape
    # pooled over the floors' cross-spectrum 0.070, 0.043 and 0.142; fitted where the gains stand, read
    # through the ramps and its phase refined with the harmonics 0.049, 0.033 and 0.108; fitted as the
    # segments see it, put back once and its track smoothed by what it knows 0.048, 0.029 and 0.087
    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=freq)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        away, said = {}, {}
        for on in (True, False):
            est = TemplateSubtraction(model_pulse=on)
            away[on] = max(score_cleaning(rec, est.fit_transform(rec.data, fs=rec.fs))["lfp_error_away"])
            block = [b for b in est.report_["blocks"] if b["kind"] == "active"][0]
            said[on] = (block["heart_rate_hz"], block["heartbeat_harmonics_modelled"])
    # the report says what was modelled: the generator's 2 Hz heart, its 2nd and 3rd harmonics
    assert said[True][0] == pytest.approx(2.0, abs=0.15) and {2, 3} <= set(said[True][1])
    assert said[False] == (None, [])
    assert away[True] < gain * away[False], away
    assert away[True] < bound



def test_the_gain_response_stops_where_the_pulse_model_puts_its_harmonics_back():
    # the model puts its harmonics back whole: a response passing them as well brought them back twice
    from artifactclean.estimators.cycles import stop_pulse
    from artifactclean.modulation import GainResponse

    freqs = np.linspace(0, 15, 121)
    response = GainResponse(freqs, np.ones((2, freqs.size)), 30.0)
    model = PulseModel(2.0, np.array([[0.8, 0.5], [0.4, 0.0]], dtype=complex), 0)
    stop_pulse(response, model)
    for h, rows in ((2, [0, 1]), (3, [0])):
        near = np.abs(freqs - 2.0 * h) <= 0.5
        assert np.all(response.response[np.ix_(rows, near)] == 0)
    assert np.all(response.response[1, np.abs(freqs - 6.0) <= 0.5] == 1)  # channel 1 carries no 3rd harmonic
    assert np.all(response.response[:, freqs < 3.0] == 1)  # the fundamental passes as before
    # where everything passes, nothing is stopped: a 1.2 Hz heart taken for 0.6 Hz (10 Hz stimulation, seed 1)
    # got harmonics the model does not hold at 2.4 Hz, and stopped there its +-3 Hz residue went 0.26 -> 0.82
    slow = GainResponse(freqs, np.ones((1, freqs.size)), 30.0)
    stop_pulse(slow, PulseModel(0.6, np.array([[0.8, 0.5, 0.3, 0.2]], dtype=complex), 0), above_hz=2.75)
    assert np.all(slow.response[0, freqs <= 2.75] == 1)
    assert np.all(slow.response[0, (freqs > 2.75) & (freqs <= 3.5)] == 0)  # the 5th harmonic (3 Hz), above it


def test_a_modelled_hearts_own_line_passes_whole_above_what_the_gain_always_follows():
    from artifactclean.estimators.cycles import pass_heart
    from artifactclean.modulation import GainResponse

    freqs = np.linspace(0, 15, 61)
    response = GainResponse(freqs, np.full((2, freqs.size), 0.3), 30.0)
    pass_heart(response, PulseModel(3.0, np.array([[0.8], [0.4]], dtype=complex), 0), above_hz=2.75)
    near = (np.abs(freqs - 3.0) <= 0.25) & (freqs > 2.75)
    assert np.all(response.response[:, near] == 1.0)
    assert np.all(response.response[:, ~near] == 0.3)
    # end to end: a 3 Hz heart at 5 Hz stimulation, its line passed at 0.08-0.64 by spectral subtraction, left
    # 0.44 of the LFP away from the harmonics (seed 1); passed whole, 0.27
    scores, block = _generator_heart(5.0, 3.0, 1)
    assert block["heart_rate_hz"] == pytest.approx(3.0, abs=0.1)
    assert max(scores["lfp_error_away"]) < 0.35, scores["lfp_error_away"]


def test_the_pulses_sidebands_folded_onto_1_hz_are_taken_off_at_5_hz():
    # 5 Hz stimulation, a 2 Hz pulse: the lower sidebands of its 2nd and 3rd harmonics fall at 1 Hz, where
    # the LFP is strongest. On the artifact alone the line there kept 0.11-0.40 of its size (seeds 1-3)
    # with the harmonics fitted on plain segment means and passed by the gain's response as well; fitted
    # as the segments see them and put back once, 0.03-0.05 (0.04-0.07 with the track smoothed to what it knows)
    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=5.0)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=[], lfp_uv=0.0, oscillation_uv=0.0,
                                                                  noise_uv=0.1), seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = TemplateSubtraction().fit_transform(rec.data, fs=rec.fs)
    stim = np.flatnonzero(~np.isnan(rec.stim_phase))
    seg = slice(stim[0], stim[-1] + 1)
    # 16 s Kaiser windows: the 5 Hz carrier's leakage stays far below the line (scipy.signal.welch)
    kw = dict(fs=rec.fs, nperseg=int(16 * rec.fs), window=("kaiser", 14))
    fr, pr = signal.welch((out - rec.neural)[:, seg], **kw)
    _, pa = signal.welch(rec.artifact[:, seg], **kw)
    near = np.abs(fr - 1.0) <= 0.25
    left = np.sqrt(pr[:, near].sum(axis=1) / pa[:, near].sum(axis=1))
    assert left.max() < 0.1, left
    # at 4 Hz the artifact has no line: the residual's comes from the pulse's images in the gain at 1 Hz
    # (6 Hz less the parts' 5 Hz pattern), which pass where everything does; with the parts' pattern taken
    # off the raw gains (PulseModel.part_pattern) it is 0.02-0.03 of the heartbeat's own sideband at 3 Hz
    # (seeds 1-3), 0.10-0.11 with it left in
    at4, at3 = np.abs(fr - 4.0) <= 0.25, np.abs(fr - 3.0) <= 0.25
    images = np.sqrt(pr[:, at4].sum(axis=1) / pa[:, at3].sum(axis=1))
    assert images.max() < 0.05, images


def test_a_line_beside_a_harmonic_holds_none_of_the_heartbeats_phase():
    # a harmonic's information is h^2 times its power over its floor's density (Kay 1993, Fundamentals of
    # Statistical Signal Processing I, the Cramer-Rao bound of a sinusoid's phase, from memory): only power
    # locked to h times the phase counts. A line 0.05 Hz off the 6th harmonic passed the smoothing and read
    # as a third of a locked harmonic's information; it holds none of the phase
    t = np.arange(int(40 * RATE)) / RATE
    rng = np.random.default_rng(2)
    phi = 2 * np.pi * 1.0 * t + 0.4
    model = PulseModel(1.0, np.array([[0.0, 0.0, 0.0, 0.0, 0.01]], dtype=complex), 0)
    info = {}
    for name, line in (("locked", np.cos(6 * phi + 0.3)), ("beside", np.cos(2 * np.pi * 6.05 * t))):
        dev = 0.02 * np.cos(phi) + 0.004 * line + 0.0005 * rng.standard_normal(t.size)
        info[name] = phase_information([(None, RATE, dev)], model, phi)[0]
    assert info["beside"][5] < 0.01 * info["locked"][5], (info["beside"][5], info["locked"][5])
    # the fundamental's own is the same either way
    assert info["beside"][0] == pytest.approx(info["locked"][0], rel=0.1)


@pytest.mark.parametrize("heart_hz, depth, breath_hz", [(2.0, 0.04, 0.3), (1.2, 0.06, 0.25)])
def test_the_heartbeats_phase_follows_a_rate_that_changes_with_breathing(heart_hz, depth, breath_hz):
    # respiratory sinus arrhythmia: the heart rate rises and falls with each breath (heart-rate variability's
    # high-frequency band, 0.15-0.4 Hz; Task Force of the ESC and NASPE 1996, Circulation 93:1043, from
    # memory). The phase smoothed to 0.3 Hz lagged it by 0.086-0.094 rad rms (twice and thrice that on the
    # 2nd and 3rd harmonics); smoothed to 0.6 Hz 0.014 and 0.042. Truth: the phase the sequence is built from.
    rng = np.random.default_rng(5)
    t = np.arange(int(40 * RATE)) / RATE
    theta = 2 * np.pi * np.cumsum(heart_hz * (1 + depth * np.sin(2 * np.pi * breath_hz * t))) / RATE
    dev = 0.01 * (np.cos(theta) + 0.5 * np.cos(2 * theta + 0.3)) + 0.0005 * rng.standard_normal(t.size)
    _, ph = fundamental(dev, RATE, heart_hz)
    err = np.angle(np.exp(1j * (ph - theta)))
    err = np.angle(np.exp(1j * (err - np.angle(np.mean(np.exp(1j * err))))))
    inner = slice(int(4 * RATE), -int(4 * RATE))  # the band-pass holds edge values near the ends
    assert np.sqrt(np.mean(err[inner] ** 2)) < 0.05


def _breathing_heart(freq, heart_hz, depth, seed, seconds=24.0):
    """The modulated scenario with its heartbeat replaced by a pulse whose rate rises and falls with each breath.

    Built here, apart from the generator: harmonics 0.6 / 0.3 / 0.1 of the pulse, 2% of the artifact, the
    rate modulated by ``depth`` at a 0.22-0.28 Hz breath plus 2% at 0.05 Hz.
    """
    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=freq, dac_rate_hz=None, heart_depth=0.0)
    rec = simulate_recording(seconds, artifact=art, neural=NeuralSpec(units=locked_units()), seed=seed)
    rng = np.random.default_rng(seed)
    t = np.arange(rec.data.shape[1]) / rec.fs
    rate = heart_hz * (1 + depth * np.sin(2 * np.pi * (0.22 + 0.06 * rng.uniform()) * t + rng.uniform(0, 2 * np.pi))
                       + 0.02 * np.sin(2 * np.pi * 0.05 * t))
    theta = 2 * np.pi * np.cumsum(rate) / rec.fs
    shape = np.cos(theta) + 0.6 * np.cos(2 * theta + 0.2) + 0.3 * np.cos(3 * theta + 0.9) + 0.1 * np.cos(4 * theta + 1.5)
    artifact = rec.artifact * (1 + 0.02 * shape / np.abs(shape).max())[None, :]
    return dataclasses.replace(rec, data=rec.neural + artifact, artifact=artifact)


def _cleaned_scores(rec):
    """The template's scores of ``rec`` and what its report says of the active block."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = TemplateSubtraction()
        scores = score_cleaning(rec, est.fit_transform(rec.data, fs=rec.fs))
    return scores, [b for b in est.report_["blocks"] if b["kind"] == "active"][0]


def test_a_resting_heart_that_speeds_up_with_each_breath_is_found():
    # a person's resting heart (1.2 Hz) with 6% respiratory sinus arrhythmia, 10 Hz stimulation: the gain's
    # line at the heart rate stood 3.5 times its floor, under the former threshold of 4, so nothing was
    # modelled and the pulse's harmonics left 0.25 of the LFP away from the +-3 Hz bands (0.08 once found)
    scores, block = _cleaned_scores(_breathing_heart(10.0, 1.2, 0.06, 11))
    assert block["heart_rate_hz"] == pytest.approx(1.2, abs=0.05)
    assert max(scores["lfp_error_away"]) < 0.12, scores["lfp_error_away"]


def test_a_slow_heart_is_not_taken_for_its_second_harmonic():
    # a 0.9 Hz heart with 8% breathing arrhythmia, 40 Hz stimulation: its fundamental's line stood 2.6 times
    # its floor, its 2nd harmonic's 4.4, and the pulse was modelled at 1.79 Hz, leaving 4.6 times the neural
    # power within +-3 Hz of a harmonic (goal 2); from the fundamental 0.6
    scores, block = _cleaned_scores(_breathing_heart(40.0, 0.9, 0.08, 13))
    assert block["heart_rate_hz"] == pytest.approx(0.9, abs=0.05)
    assert max(scores["lfp_band_ratio"]) < 2.0, scores["lfp_band_ratio"]


def _generator_heart(freq, heart_hz, seed):
    """The modulated scenario at ``freq`` with the generator's own pulse at ``heart_hz``, cleaned."""
    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=freq, heart_rate_hz=heart_hz)
    return _cleaned_scores(simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=seed))


def test_respiration_beside_half_a_resting_heart_does_not_make_it_a_candidate():
    # a 1.2 Hz heart at 10 Hz: half of it (0.6 Hz) was read over a bin on either side, which took in
    # respiration's 0.25 Hz line; it passed for a fundamental and the pulse was modelled at 0.6 Hz with
    # spurious odd harmonics (seeds 1 and 3), LFP error away from the harmonics 0.24-0.26 (0.04 at 1.2 Hz)
    scores, block = _generator_heart(10.0, 1.2, 1)
    assert block["heart_rate_hz"] == pytest.approx(1.2, abs=0.05)
    assert max(scores["lfp_error_away"]) < 0.08, scores["lfp_error_away"]


@pytest.mark.parametrize("heart_hz, seed", [(1.0, 1), (1.2, 3)])
def test_a_resting_heart_is_found_at_5_hz(heart_hz, seed):
    # at 5 Hz the floor beside a 1.0-1.2 Hz line is the strong LFP at 5 -+ 1 Hz, and the floor's 2 Hz window
    # holds respiration and the pulse's own harmonic: the line stood 2.2-2.8 times its floor, under the former
    # threshold of 3, and the pulse's 3rd harmonic, beyond what the gain always follows, left 0.19-0.24 of
    # the LFP away from the harmonics (0.05-0.09 once found)
    scores, block = _generator_heart(5.0, heart_hz, seed)
    assert block["heart_rate_hz"] == pytest.approx(heart_hz, abs=0.05)
    assert max(scores["lfp_error_away"]) < 0.12, scores["lfp_error_away"]


def test_a_rodents_heart_is_modelled_when_its_band_is_given():
    # a rat's heart (5.5 Hz) at 40 Hz: outside the default band (people and monkeys) nothing is modelled,
    # its harmonics at 11 and 16.5 Hz are beyond the default tracking_hz, and 0.47 of the LFP away from
    # the harmonics is left; looked for in 4-12 Hz and followed to 20 Hz, 0.04-0.06
    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=40.0, heart_rate_hz=5.5)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = TemplateSubtraction(heart_band_hz=(4.0, 12.0), tracking_hz=20.0)
        away = max(score_cleaning(rec, est.fit_transform(rec.data, fs=rec.fs))["lfp_error_away"])
        default = TemplateSubtraction().fit(rec.data, fs=rec.fs)
    block = [b for b in est.report_["blocks"] if b["kind"] == "active"][0]
    assert block["heart_rate_hz"] == pytest.approx(5.5, abs=0.1)
    assert [b for b in default.report_["blocks"] if b["kind"] == "active"][0]["heart_rate_hz"] is None
    assert away < 0.1, away


def test_the_heart_rate_is_read_where_its_line_peaks():
    # a strong 1.2 Hz line beside respiration over a low floor, 4 s Hann segments: the floor's running
    # median falls steeply above the line, so the ratio to it peaked in the line's leakage a bin up, and the
    # rate was read there (1.28 Hz); the line's power peaks at 1.25 Hz, and read around it, 1.20
    t = np.arange(int(20 * 20.0)) / 20.0
    for seed in range(3):
        rng = np.random.default_rng(seed)
        dev = (0.01 * np.cos(2 * np.pi * 1.2 * t + rng.uniform(0, 2 * np.pi))
               + 0.005 * np.sin(2 * np.pi * 0.25 * t))[None] + 1e-4 * rng.standard_normal((3, t.size))
        assert heart_rate(dev - dev.mean(axis=1, keepdims=True), 20.0) == pytest.approx(1.2, abs=0.01)


def test_the_slow_basis_is_the_dct_ii():
    # reference: scipy.fft.dct (type II, unnormalised) of the identity holds 2 cos(pi k (2 m + 1) / (2 n))
    # in row k; its rows up to below_hz (k / (2 n) cycles a sample) are the basis
    from scipy import fft

    n, rate = 240, 30.0
    basis = _slow_basis(n, rate, 0.9)
    assert basis.shape == (15, n)  # k / (2 n / rate) <= 0.9 Hz: k <= 14
    np.testing.assert_allclose(basis, fft.dct(np.eye(n), type=2, axis=0)[:15] / 2, atol=1e-12)


def test_respiration_does_not_lend_a_sinusoidal_heart_harmonics():
    # a sinusoidal 1.58 Hz heart at 10 Hz with respiration at 0.32 Hz (3 gain segments a cycle): over the
    # 16 s fitted, respiration (thousands of times the floor) was not orthogonal to the harmonics'
    # regressors, and the fit gave the heart harmonics 2-6, the 6th (9.55 Hz) at 0.39 of its fundamental;
    # its sideband at 19.55 Hz left 18 times the neural power within 3 Hz of 20 Hz (0.8 with respiration
    # fitted beside them)
    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=10.0, amplitude_uv=6000.0,
                              channel_gains=(1.26, -1.46, -0.54, -0.71), harmonics=((0.025, 4.1),),
                              heart_rate_hz=1.58, heart_depth=0.018, heart_harmonics=(), resp_rate_hz=0.32,
                              resp_depth=0.014, drift_ppm=-23.0)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units(), oscillation_hz=9.9),
                             blocks=[BlockSpec(1.0, 18.0, ramp_s=1.8)], seed=111)
    scores, block = _cleaned_scores(rec)
    assert max(scores["lfp_band_ratio"]) < 2.0, scores["lfp_band_ratio"]
    assert max(scores["lfp_error_away"]) < 0.15, scores["lfp_error_away"]


def test_respirations_main_lobe_is_not_taken_for_half_a_heart():
    # respiration at 0.32 Hz, 0.8 of a sinusoidal 1.58 Hz heart in the gain: read over a bin on either side,
    # respiration's main lobe in 4 s Hann segments lent half the heart rate its score, and the pulse was
    # modelled at 0.77 Hz with harmonics 5-6 times its fundamental (fitted: 2.3 times the noise)
    n = int(20 * RATE)
    for seed in (209, 210, 211):
        rng = np.random.default_rng(seed)
        wander = np.interp(np.arange(n), np.linspace(0, n, 8), rng.normal(0, 0.03, 8))
        phi = 2 * np.pi * np.cumsum(1.58 * (1 + wander)) / RATE + rng.uniform(0, 2 * np.pi)
        resp = np.sin(2 * np.pi * 0.32 * np.arange(n) / RATE + rng.uniform(0, 2 * np.pi))
        depth = np.array([0.02, 0.012])[:, None]
        gain = 1 + depth * (np.cos(phi) + 0.8 * resp)[None] + 0.002 * rng.standard_normal((2, n))
        rate = heart_rate(gain - gain.mean(axis=1, keepdims=True), RATE)
        assert rate == pytest.approx(1.58, abs=0.05), (seed, rate)


@pytest.mark.parametrize("seed", [4, 5])
def test_a_line_in_the_gain_without_a_heartbeat_is_not_modelled_as_a_pulse(seed):
    # no heartbeat: the gain's strongest line in the heart band (a neural rhythm beside the fundamental,
    # 3.5 and 9 times its floor at 10 Hz) passes the line test, but no harmonic of it stands out
    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=10.0, heart_depth=0.0)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = TemplateSubtraction()
        est.fit(rec.data, fs=rec.fs)
    block = [b for b in est.report_["blocks"] if b["kind"] == "active"][0]
    assert block["heartbeat_harmonics_modelled"] == []

def test_a_sinusoidal_heartbeat_on_channels_of_one_sign_is_not_modelled_as_a_pulse():
    # gains of one sign, the gain segments a sixth of a cycle off the model's phase origin: the channels'
    # floors (one LFP over four positive gains) add, and taken as independent they made a 2nd harmonic of
    # the heart rate out of them (0.21-0.24 of half the fundamental), whose sidebands at 5 +- 4 Hz left 0.145
    # of the LFP away from the +-3 Hz bands; with the floors' cross-spectrum counted, 0.02 and 0.026
    from artifactclean.estimators import cycles
    from artifactclean.stimulation import fit_stimulation

    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=5.0, channel_gains=(1.0, 0.7, 0.45, 1.2),
                              heart_harmonics=())
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=1)
    model = fit_stimulation(rec.data, rec.fs)
    for blk in model.blocks:
        blk.phase_ref += 2 * np.pi / 6
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = TemplateSubtraction()
        est.prepare(cycles.array_reader(rec.data), model, rec.fs)
        away = max(score_cleaning(rec, est.fit_transform(rec.data, fs=rec.fs, stim_model=model))["lfp_error_away"])
    pulses = [p.response.pulse for p in est._plans.values() if p.response is not None]
    assert all(p is None or np.abs(p.coefs).max() < 0.05 for p in pulses)
    assert away < 0.05, away


@pytest.mark.parametrize("method", ["regression", "pca"])
@pytest.mark.parametrize("freq, bound", [(20.0, 0.05), (10.0, 0.12)])
def test_row_estimators_model_the_pulse_in_their_envelope(method, freq, bound):
    # regression and PCA carry the modulation in the lead harmonic's envelope per cycle: with the
    # pulse's harmonics modelled there, 20 Hz seed 1 went 0.106 -> 0.077 (regression) and
    # 0.103 -> 0.073 (PCA). Read between the rows' centres, the harmonics put their images at 20 less
    # each (14 and 16 Hz), whose sidebands at 4-6 and 34-36 Hz stood 1.3-1.6x the neural power there:
    # 0.070 and 0.066 (issue goal: 0.05); added at every sample from the track, 0.038 and 0.031. At 10 Hz
    # rows of one cycle fold the 6 Hz harmonic onto the 4 Hz one (0.235 for both); what they hold of it
    # taken off with the rest (PulseModel.held_beyond) and the harmonic put back at every sample, 0.076
    from artifactclean.estimators import make_estimator

    art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=freq)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        away = {on: max(score_cleaning(rec, make_estimator(method, model_pulse=on).fit_transform(
            rec.data, fs=rec.fs))["lfp_error_away"]) for on in (True, False)}
    assert away[True] < 0.85 * away[False]
    assert away[True] <= bound, away
