import numpy as np
import pytest
from astropy.stats import circstats

from artifactclean.phase_stats import plv, ppc, preferred_phase
from artifactclean.spikes import detect_spikes, match_spikes, noise_sigma, spike_band


def test_plv_and_mean_against_astropy(rng):
    ph = rng.vonmises(0.7, 1.5, 500)
    # astropy.stats.circvar = 1 - R
    assert plv(ph) == pytest.approx(1 - circstats.circvar(ph), rel=1e-9)
    assert preferred_phase(ph) == pytest.approx(np.mod(circstats.circmean(ph), 2 * np.pi), abs=1e-9)


def test_ppc_equals_mean_pairwise_cosine(rng):
    # definition in Vinck et al. 2010: mean over pairs of cos(theta_i - theta_j)
    ph = rng.vonmises(0.0, 0.8, 60)
    i, j = np.triu_indices(ph.size, 1)
    assert ppc(ph) == pytest.approx(np.mean(np.cos(ph[i] - ph[j])), rel=1e-9)
    assert np.isnan(ppc([1.0]))


def test_mad_noise_estimate_is_unbiased_for_gaussian(rng):
    # Quiroga et al. 2004: median(|x|)/0.6745 estimates sigma
    x = 7.0 * rng.standard_normal(200000)
    assert noise_sigma(x) == pytest.approx(7.0, rel=0.01)


def test_detection_and_matching(rng):
    fs = 30000.0
    x = 10.0 * rng.standard_normal(int(2 * fs))
    truth = np.arange(1000, x.size - 1000, 3000)
    for t in truth:
        x[t - 10:t + 10] -= 150.0 * np.hanning(20)
    y = spike_band(x, fs)
    det = detect_spikes(y, fs, threshold=5.0)
    hit = match_spikes(det, truth, tolerance=15)
    assert hit.all()
    assert det.size <= truth.size + 2
    assert not match_spikes(det + 100, truth, tolerance=15).any()
