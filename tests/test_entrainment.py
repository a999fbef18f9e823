"""Entrainment statistics and the residue-aware null, each against its reference."""

import numpy as np
import pytest
from scipy import special

from artifactclean.entrainment import _moments, residue_p_value
from artifactclean.phase_stats import fdr_bh, mean_direction_ci, plv, ppc, ppc_across, rayleigh, tost_ind


@pytest.mark.parametrize("kappa", [0.5, 1.0, 2.0])
def test_ppc_of_von_mises_is_a_squared(rng, kappa):
    # Mardia & Jupp 2000 (Directional Statistics): E[cos] = A(kappa) = I1/I0, so PPC -> A^2
    n, reps = 400, 200
    vals = [ppc(rng.vonmises(0.7, kappa, n)) for _ in range(reps)]
    a2 = (special.i1(kappa) / special.i0(kappa)) ** 2
    se = np.std(vals) / np.sqrt(reps)
    assert abs(np.mean(vals) - a2) < 4 * se + 1e-3


def test_rayleigh_against_astropy(rng):
    from astropy.stats import circvar, rayleightest

    for kappa, n in [(0.0, 300), (0.15, 200), (0.3, 150)]:
        ph = rng.vonmises(2.0, kappa, n) if kappa else rng.uniform(0, 2 * np.pi, n)
        r = rayleigh(ph)
        # astropy.stats.circvar is 1 - R; rayleightest gives the p-value (compared where it is not tiny;
        # astropy and Zar use different series approximations, which agree to a few parts in 1e3)
        assert r["R"] == pytest.approx(1 - circvar(ph), abs=1e-12)
        assert r["z"] == pytest.approx(n * plv(ph) ** 2, rel=1e-12)
        assert r["p"] == pytest.approx(rayleightest(ph), rel=1e-2, abs=1e-4)


def test_tost_against_statsmodels(rng):
    from statsmodels.stats.weightstats import ttost_ind

    a, b = rng.normal(0.0, 1.0, 15), rng.normal(0.3, 1.2, 22)
    for low, upp in [(-0.5, 0.5), (-1.0, 0.2)]:
        ours = tost_ind(a, b, low, upp)
        p, lower, upper = ttost_ind(a, b, low, upp)  # statsmodels.stats.weightstats.ttost_ind, pooled
        assert ours["p"] == pytest.approx(p, rel=1e-10)
        assert ours["p_lower"] == pytest.approx(lower[1], rel=1e-10)
        assert ours["p_upper"] == pytest.approx(upper[1], rel=1e-10)
    with pytest.raises(ValueError, match="low < upp"):
        tost_ind(a, b, 0.5, -0.5)


def test_fdr_against_statsmodels(rng):
    from statsmodels.stats.multitest import multipletests

    p = rng.random(30) ** 3
    np.testing.assert_allclose(fdr_bh(p), multipletests(p, method="fdr_bh")[1], rtol=1e-12)
    q = fdr_bh(np.array([0.01, np.nan, 0.04]))
    assert np.isnan(q[1]) and q[0] == pytest.approx(0.02)


def test_ppc_across_blocks_is_the_mean_cosine_of_cross_pairs(rng):
    ph = rng.vonmises(0.0, 1.0, 60)
    g = rng.integers(0, 4, 60)
    i, j = np.triu_indices(60, 1)
    cross = g[i] != g[j]
    assert ppc_across(ph, g) == pytest.approx(np.mean(np.cos(ph[i] - ph[j])[cross]), rel=1e-12)
    # a unit locked within each of two blocks at phases 90 degrees apart: pairs across the blocks
    # have a mean cosine of 0, so the across-block PPC is ~0 while the pooled PPC counts within-block pairs
    ph2 = np.concatenate([rng.vonmises(m, 8.0, 400) for m in (0.0, np.pi / 2)])
    g2 = np.repeat(np.arange(2), 400)
    assert abs(ppc_across(ph2, g2)) < 0.1
    assert ppc(ph2) > 0.35


def test_mean_direction_interval_covers_at_its_level(rng):
    hits = 0
    reps = 400
    for _ in range(reps):
        lo, hi = mean_direction_ci(rng.vonmises(1.0, 1.5, 40), alpha=0.05)
        # interval on the circle from lo to hi (counter-clockwise)
        hits += np.mod(1.0 - lo, 2 * np.pi) <= np.mod(hi - lo, 2 * np.pi)
    assert 0.92 <= hits / reps <= 0.98


def test_density_moments_match_sampling(rng):
    eff = np.ones(12)
    eff[2:4] = 0.9
    mean, cov = _moments(eff)
    k = rng.choice(12, size=400000, p=eff / eff.sum())
    ph = (k + rng.random(k.size)) * 2 * np.pi / 12
    np.testing.assert_allclose(mean, [np.cos(ph).mean(), np.sin(ph).mean()], atol=3e-3)
    np.testing.assert_allclose(cov, np.cov(np.cos(ph), np.sin(ph)), atol=3e-3)


def test_residue_null_is_calibrated_where_rayleigh_is_not():
    # uniform spikes thinned by a detection efficiency with a 10% dip over a sixth of the cycle
    rng = np.random.default_rng(2024)
    eff = np.ones(12)
    eff[4:6] = 0.9
    reps, alpha = 500, 0.05
    rej_ray = rej_res = 0
    for i in range(reps):
        ph = rng.uniform(0, 2 * np.pi, 20000)
        keep = rng.random(ph.size) < eff[np.floor(ph / (2 * np.pi) * 12).astype(int)]
        p = ph[keep]
        rej_ray += rayleigh(p)["p"] < alpha
        rej_res += residue_p_value(p, eff, n_sim=2000, seed=i) < alpha
    assert rej_ray / reps > 0.5
    assert rej_res / reps <= alpha + 0.02
    # small spike sets take the direct simulation branch: calibrated too
    rej_small = 0
    for i in range(200):
        ph = rng.uniform(0, 2 * np.pi, 600)
        keep = rng.random(ph.size) < eff[np.floor(ph / (2 * np.pi) * 12).astype(int)]
        rej_small += residue_p_value(ph[keep], eff, n_sim=1000, seed=i) < alpha
    assert rej_small / 200 <= alpha + 0.04


def test_lfp_phase_of_a_known_oscillation(rng):
    from artifactclean.entrainment import lfp_phase

    fs = 1000.0
    t = np.arange(int(20 * fs)) / fs
    x = np.cos(2 * np.pi * 8.0 * t + 0.4) + 0.3 * rng.standard_normal(t.size)
    ph = lfp_phase(x, fs, (6.0, 10.0))
    inner = slice(2000, -2000)
    err = np.angle(np.exp(1j * (ph[inner] - np.mod(2 * np.pi * 8.0 * t[inner] + 0.4, 2 * np.pi))))
    # 0 at the band's positive peak (scipy.signal.hilbert convention)
    assert np.sqrt(np.mean(err ** 2)) < 0.2
    with pytest.raises(ValueError, match="band"):
        lfp_phase(x, fs, (10.0, 6.0))
