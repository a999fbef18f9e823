import numpy as np
import pytest

from artifactclean import clean, make_estimator
from artifactclean.synthetic import simulate_recording


@pytest.fixture(scope="module")
def small():
    return simulate_recording(4.0, fs=5000.0, n_channels=2, seed=31)


@pytest.mark.parametrize(
    "kwargs, exc, match",
    [
        (dict(method="wavelet"), ValueError, "unknown method"),
        (dict(fs=0.0), ValueError, "fs must be a positive"),
        (dict(fs=-5.0), ValueError, "fs must be a positive"),
        (dict(fs="fast"), TypeError, "fs must be a number"),
        (dict(stim_freq=2500.0), ValueError, "Nyquist"),
        (dict(stim_freq=1.0), ValueError, "cycles"),
        (dict(stim_freq=-3.0), ValueError, "positive"),
        (dict(n_cycles=-2), ValueError, "n_cycles"),
        (dict(window=3), ValueError, "takes no parameter"),
        (dict(heart_band_hz=(3.5, 0.6)), ValueError, "heart_band_hz .* low below high"),
        (dict(heart_band_hz=5.0), ValueError, "heart_band_hz must be two frequencies"),
        (dict(method="pca", heart_band_hz=(0.0, 3.0)), ValueError, "heart_band_hz"),
    ],
)
def test_bad_arguments_name_the_problem(small, kwargs, exc, match):
    args = dict(fs=small.fs, stim_freq=20.0)
    args.update(kwargs)
    fs = args.pop("fs")
    with pytest.raises(exc, match=match):
        clean(small.data, fs, **args)


def test_bad_data(small):
    with pytest.raises(ValueError, match="1-D .* or 2-D"):
        clean(np.zeros((2, 2, 100)), 1000.0)
    with pytest.raises(ValueError, match="more channels than samples"):
        clean(np.zeros((1000, 4)), 1000.0)
    with pytest.raises(TypeError, match="numeric"):
        clean(np.array([["a", "b"]]), 1000.0)
    with pytest.raises(TypeError, match="complex"):
        clean(np.zeros((2, 1000), dtype=complex), 1000.0)
    x = small.data.copy()
    x[1, 100] = np.nan
    with pytest.raises(ValueError, match="NaN or inf.*channel 1, sample 100"):
        clean(x, small.fs, stim_freq=20.0)
    y = clean(x, small.fs, stim_freq=20.0, nan_policy="blank")
    assert np.isfinite(y).all() and y[1, 100] == 0.0


def test_comb_method_notches_harmonics():
    # the comb's response is zero at each harmonic and ~1 between (scipy.signal.sosfreqz)
    from scipy import signal

    est = make_estimator("comb", max_freq=100.0)
    sos = est.sos(20.0, 1000.0)
    w, h = signal.sosfreqz(sos, worN=[10.0, 20.0, 40.0, 60.0, 80.0, 100.0, 30.0], fs=1000.0)
    assert np.all(np.abs(h[1:6]) < 1e-6)
    assert abs(abs(h[0]) - 1) < 0.05 and abs(abs(h[6]) - 1) < 0.05


def test_comb_leaves_sidebands_template_does_not(small):
    rec = simulate_recording(12.0, n_channels=1, seed=32)
    from artifactclean.evaluation import score_cleaning

    yc = clean(rec.data, rec.fs, stim_freq=20.0, method="comb")
    yt = clean(rec.data, rec.fs, stim_freq=20.0, method="template")
    hc = score_cleaning(rec, yc)["harmonic_residual"][0]
    ht = score_cleaning(rec, yt)["harmonic_residual"][0]
    assert hc > 10 * ht
