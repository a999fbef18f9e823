"""Adaptive cancelling: the RLS and NLMS recursions against references, and the estimator."""

import numpy as np
import pytest
from sklearn.base import clone

from artifactclean import clean
from artifactclean.estimators import AdaptiveCanceller
from artifactclean.estimators.adaptive import nlms_filter, rls_filter
from artifactclean.evaluation import score_cleaning


def _regression_problem(rng, n=3000, m=6, noise=0.1):
    refs = rng.standard_normal((n, m))
    w_true = rng.standard_normal(m)
    d = refs @ w_true + noise * rng.standard_normal(n)
    return refs, d, w_true


def test_rls_without_forgetting_is_least_squares(rng):
    refs, d, _ = _regression_problem(rng)
    _, w = rls_filter(refs, d, forgetting=1.0, delta=1e-9)
    # numpy.linalg.lstsq as the reference: with lambda = 1 and a vanishing initial ridge the RLS
    # weights after n samples are the least-squares (Wiener) solution (Haykin, ch. on RLS)
    w_ls = np.linalg.lstsq(refs, d, rcond=None)[0]
    np.testing.assert_allclose(w, w_ls, rtol=1e-6, atol=1e-8)


def test_nlms_converges_to_the_weights(rng):
    refs, d, w_true = _regression_problem(rng, n=20000, noise=0.0)
    _, w = nlms_filter(refs, d, step=0.5)
    np.testing.assert_allclose(w, w_true, atol=1e-6)


@pytest.mark.parametrize("fn,kw", [(rls_filter, dict(forgetting=0.99)), (nlms_filter, dict(step=0.3))])
def test_compiled_and_plain_loops_agree(rng, fn, kw):
    refs, d, _ = _regression_problem(rng, n=500, m=4)
    use = (rng.random(500) > 0.1).astype(float)
    y1, w1 = fn(refs, d, use=use, compiled=True, **kw)
    y2, w2 = fn(refs, d, use=use, compiled=False, **kw)
    np.testing.assert_allclose(y1, y2, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(w1, w2, rtol=1e-10, atol=1e-10)


def test_rls_forgetting_follows_a_change(rng):
    n = 6000
    refs = rng.standard_normal((n, 2))
    w_t = np.where(np.arange(n)[:, None] < n // 2, [1.0, -1.0], [2.0, 0.5])
    d = np.sum(refs * w_t, axis=1)
    _, w_forget = rls_filter(refs, d, forgetting=0.99)
    _, w_all = rls_filter(refs, d, forgetting=1.0)
    np.testing.assert_allclose(w_forget, [2.0, 0.5], atol=1e-6)
    assert np.abs(w_all - [2.0, 0.5]).max() > 0.3


@pytest.mark.parametrize("algorithm", ["rls", "nlms"])
def test_model_references_on_modulated_trace(mod20, algorithm):
    y = clean(mod20.data, mod20.fs, stim_freq=20.0, method="adaptive", algorithm=algorithm)
    s = score_cleaning(mod20, y)
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]
    assert s["recall_ratio"] >= 0.99
    assert abs(s["delta_ppc"]) <= 5e-4


def test_monitor_reference_cancels_a_staircase(rng):
    fs, f, n = 30000.0, 20.0, 150000
    t = np.arange(n) / fs
    # a 1 kHz DAC staircase on the stimulator side, seen through a short filter by the electrode
    held = np.floor(t * 1000.0) / 1000.0
    monitor = np.sin(2 * np.pi * f * held)
    h = np.array([0.2, 1.0, -0.3])
    seen = 3000.0 * np.convolve(monitor, h, mode="same")
    noise = 10.0 * rng.standard_normal(n)
    est = AdaptiveCanceller(reference="monitor", tracking_hz=2.0)
    y = est.fit_transform((seen + noise)[None], fs=fs, stim_freq=f, stim_reference=monitor)
    assert est.report_["blocks"][0]["reference"] == "monitor"
    inner = slice(int(fs), n - int(fs))
    from artifactclean.spikes import spike_band

    resid = spike_band((y[0] - noise)[None], fs)[0, inner]
    assert np.sqrt(np.mean(resid ** 2)) <= 0.1 * 10.0


def test_monitor_reference_needs_a_monitor(mod20):
    with pytest.raises(ValueError, match="stim_reference"):
        AdaptiveCanceller(reference="monitor").fit(mod20.data[:, :300000], fs=mod20.fs, stim_freq=20.0)


@pytest.mark.parametrize("bad", [dict(algorithm="kalman"), dict(step=2.5), dict(n_taps=4), dict(reference="x")])
def test_bad_parameters_are_named(bad):
    with pytest.raises(ValueError, match=list(bad)[0]):
        AdaptiveCanceller(**bad).fit(np.zeros((1, 3000)), fs=3000.0, stim_freq=20.0)


def test_clone():
    est = AdaptiveCanceller(algorithm="nlms", step=0.1)
    assert clone(est).get_params() == est.get_params()


@pytest.mark.parametrize("fs", [1000.0, 30000.0])
def test_auto_takes_the_harmonics_a_sinusoidal_monitor_lacks(fs):
    """A stimulator's monitor is often a pure sine; the amplifier adds harmonics no short filter of it makes.
    "auto" fits the monitor's taps and the model's harmonics together: what the model's references leave
    (0.003-0.006 x the artifact here), where the taps alone left the harmonics (0.086-0.091)."""
    import warnings

    from artifactclean.synthetic import ArtifactSpec, NeuralSpec, simulate_recording

    rec = simulate_recording(8.0, fs=fs, n_channels=2, artifact=ArtifactSpec(freq_hz=40.0, channel_gains=(1.0, -0.7)),
                             neural=NeuralSpec(units=[]), seed=5)
    stim = ~np.isnan(rec.stim_phase)
    monitor = np.where(stim, np.cos(np.nan_to_num(rec.stim_phase)), 0.0)
    left = {}
    for ref in ("auto", "monitor", "model"):
        est = AdaptiveCanceller(reference=ref)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            y = est.fit_transform(rec.data, fs=fs, stim_reference=monitor)
        left[ref] = np.std((y - rec.neural)[:, stim]) / np.std(rec.artifact[:, stim])
        if ref == "auto":
            info = est.report_["blocks"][0]
            assert info["reference"] == "monitor+model" and info["taps"] == 9 and min(info["harmonics"]) >= 2
    assert left["monitor"] > 0.05
    assert left["auto"] < 0.01 and left["auto"] <= 1.2 * left["model"]
