"""Spike injection: truth kept, recall in clean noise as expected for the SNR, phases as asked."""

import numpy as np
import pytest

from artifactclean.injection import detection_efficiency, inject_spikes, learn_waveform, write_truth_csv
from artifactclean.phase_stats import plv
from artifactclean.spikes import noise_sigma, spike_band
from artifactclean.synthetic import spike_waveform

FS = 30000.0


def _noise(rng, seconds=40.0):
    n = int(seconds * FS)
    return 10.0 * rng.standard_normal((1, n)), np.mod(np.arange(n) * 20.0 / FS, 1.0) * 2 * np.pi


def _expected_recall(rng, amp_sigma, sigma, threshold=4.5, trials=3000):
    # independent of the injector and detector: the filtered waveform on fresh noise crosses the
    # threshold within 0.5 ms of its trough
    lags, w = spike_waveform("narrow", FS)
    seg = 3001
    imp = np.zeros(seg)
    imp[1500 + lags] = amp_sigma * sigma * w
    fw = spike_band(imp[None], FS)[0]
    noise = spike_band(10.0 * rng.standard_normal((trials, seg)), FS)
    win = slice(1500 - 15, 1500 + 16)
    return float(np.mean(np.min((noise + fw)[:, win], axis=1) < -threshold * sigma))


@pytest.mark.parametrize("amp", [4.0, 5.0, 6.0])
def test_recall_in_clean_noise_matches_snr(rng, amp):
    x, phase = _noise(rng)
    y, truth = inject_spikes(x, FS, phase=phase, rate_hz=15.0, amplitude=amp, waveforms=("narrow",), seed=2)
    eff = detection_efficiency(truth, y, FS)
    sigma = noise_sigma(spike_band(x, FS))[0]
    expected = _expected_recall(np.random.default_rng(9), amp, sigma)
    assert abs(eff["recall_overall"] - expected) < 0.05, (eff["recall_overall"], expected)
    # in clean noise the efficiency does not depend on the phase
    r = np.asarray(eff["recall"])
    assert np.ptp(r) < 0.2


def test_truth_is_what_was_added(rng, tmp_path):
    x, phase = _noise(rng, 10.0)
    y, truth = inject_spikes(x, FS, phase=phase, rate_hz=20.0, amplitude=8.0, waveforms=("broad_positive",), seed=4)
    assert not np.shares_memory(x, y)
    lags, w = truth.waveforms[0]
    rebuilt = x.copy()
    for s, a in zip(truth.samples, truth.amplitudes_uv):
        rebuilt[0, s + lags] += a * w
    np.testing.assert_allclose(y, rebuilt, atol=1e-9)
    assert np.all(np.diff(truth.samples) >= 3e-3 * FS)  # refractory period
    assert w[lags == 0][0] > 0  # positive polarity
    path = write_truth_csv(tmp_path / "truth.csv", truth)
    lines = path.read_text().splitlines()
    assert lines[0] == "time_s,channel,unit,amplitude_uv,phase_deg" and len(lines) == truth.samples.size + 1


def test_locked_injection_has_the_asked_locking(rng):
    from scipy import special

    x, phase = _noise(rng, 60.0)
    _, truth = inject_spikes(x, FS, phase=phase, rate_hz=20.0, amplitude=6.0, kappa=1.0, preferred_phase=2.0, seed=5)
    # von Mises: mean resultant length I1/I0 (Mardia & Jupp 2000); ~1200 spikes
    assert plv(truth.phases) == pytest.approx(special.i1(1.0) / special.i0(1.0), abs=0.05)
    rate = truth.samples.size / 60.0
    assert rate == pytest.approx(20.0, rel=0.15)  # the locking keeps the mean rate


def test_learned_waveform_recovers_the_shape(rng):
    x, phase = _noise(rng, 20.0)
    y, truth = inject_spikes(x, FS, phase=phase, rate_hz=20.0, amplitude=12.0, waveforms=("broad",), seed=6)
    lags, learned = learn_waveform(y[0], FS)
    _, ref = spike_waveform("broad", FS)
    ref_f = spike_band(ref[None] * np.ones((1, 1)), FS)[0]
    assert np.corrcoef(learned, ref_f)[0, 1] > 0.9


def test_bad_injection_arguments(rng):
    x, phase = _noise(rng, 2.0)
    with pytest.raises(ValueError, match="amplitude"):
        inject_spikes(x, FS, phase=phase, amplitude=0.0)
    with pytest.raises(ValueError, match="waveform"):
        inject_spikes(x, FS, phase=phase, waveforms=("square",))
    with pytest.raises(ValueError, match="no stimulation"):
        inject_spikes(x, FS, phase=np.full(phase.size, np.nan))
