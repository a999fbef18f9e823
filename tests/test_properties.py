"""Properties that must hold for any input (hypothesis draws the cases; seeds are fixed)."""

import json
import subprocess
import sys

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import artifactclean as ac
from artifactclean.demo_files import write_openephys_binary
from artifactclean.synthetic import ArtifactSpec, NeuralSpec, simulate_recording

FAST = settings(max_examples=8, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


def _trace(seed, freq, amp, dur=5.0, fs=10000.0):
    return simulate_recording(dur, fs=fs, n_channels=2, artifact=ArtifactSpec(freq_hz=freq, amplitude_uv=amp),
                              neural=NeuralSpec(units=[]), seed=seed)


@FAST
@given(seed=st.integers(0, 10_000), a=st.floats(-3, 3), b=st.floats(-3, 3))
def test_comb_is_linear(seed, a, b):
    # the notch comb is a linear filter: clean(a x + b y) = a clean(x) + b clean(y) for a fixed model
    x = _trace(seed, 20.0, 2000.0).data
    y = _trace(seed + 1, 20.0, 1500.0).data
    model = ac.fit_stimulation(x, 10000.0, stim_freq=20.0)
    est = ac.NotchComb()
    fx = est.fit(x, fs=10000.0, stim_model=model).transform(x)
    fy = est.fit(y, fs=10000.0, stim_model=model).transform(y)
    z = a * x + b * y
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a = b = 0 gives flat channels, warned about elsewhere
        fz = est.fit(z, fs=10000.0, stim_model=model).transform(z)
    np.testing.assert_allclose(fz, a * fx + b * fy, atol=1e-6 * (1 + np.abs(z).max()))


@FAST
@given(seed=st.integers(0, 10_000), freq=st.sampled_from([5.0, 10.0, 20.0, 40.0]))
def test_cleaning_twice_changes_little(seed, freq):
    # a cleaned trace holds no stimulation the model can find, so a second clean leaves it as it is
    # (forcing the first pass's model on it would remove more LFP near the harmonics: the
    # amplitude-tracking trade-off documented in the template's docstring)
    rec = _trace(seed, freq, 3000.0, dur=8.0)
    once = ac.clean(rec.data, rec.fs, stim_freq=freq)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        twice = ac.clean(once, rec.fs, stim_freq=freq)
    noise = rec.spec["neural"]["noise_uv"]
    assert np.sqrt(np.mean((twice - once) ** 2)) < 0.01 * noise


@FAST
@given(seed=st.integers(0, 10_000), freq=st.sampled_from([5.0, 10.0, 20.0, 40.0]))
def test_stimulation_free_input_is_returned_unchanged(seed, freq):
    rec = _trace(seed, freq, 0.0)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        y = ac.clean(rec.data, rec.fs, stim_freq=freq)
    np.testing.assert_array_equal(y, rec.data)


@FAST
@given(seed=st.integers(0, 10_000), n_bad=st.integers(1, 50))
def test_no_nan_leaves_silently(seed, n_bad):
    rec = _trace(seed, 20.0, 3000.0)
    x = rec.data.copy()
    rng = np.random.default_rng(seed)
    x[rng.integers(0, 2, n_bad), rng.integers(0, x.shape[1], n_bad)] = np.nan
    try:
        ac.clean(x, rec.fs, stim_freq=20.0)
        raise AssertionError("NaN input was accepted without nan_policy")
    except ValueError as exc:
        assert "NaN" in str(exc)
    y = ac.clean(x, rec.fs, stim_freq=20.0, nan_policy="blank")
    assert np.isfinite(y).all()


def _clean_file(root, out, *extra):
    r = subprocess.run([sys.executable, "-m", "artifactclean.cli", "clean", str(root), "-o", str(out),
                        "--stim-freq", "20", *extra], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr


def test_same_input_same_bytes_and_chunk_size_does_not_matter(tmp_path):
    rec = simulate_recording(12.0, artifact=ArtifactSpec(clip_uv=3600.0), seed=61)
    root = write_openephys_binary(tmp_path / "s", rec.data, rec.fs)
    _clean_file(root, tmp_path / "a.dat")
    _clean_file(root, tmp_path / "b.dat")
    _clean_file(root, tmp_path / "c.dat", "--chunk-seconds", "0.7")
    a = (tmp_path / "a.dat").read_bytes()
    assert a == (tmp_path / "b.dat").read_bytes() == (tmp_path / "c.dat").read_bytes()
    sa = json.loads((tmp_path / "a.json").read_text())
    sb = json.loads((tmp_path / "b.json").read_text())
    for side in (sa, sb):
        side["provenance"].pop("created_utc")
        side["provenance"].pop("command")
    assert sa == sb


@FAST
@given(seed=st.integers(0, 10_000), method=st.sampled_from(["regression", "pca", "adaptive"]),
       freq=st.sampled_from([10.0, 20.0, 40.0]))
def test_every_method_keeps_stimulation_free_input_and_no_nan(seed, method, freq):
    import warnings

    rec = _trace(seed, freq, 0.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        y = ac.clean(rec.data, rec.fs, stim_freq=freq, method=method)
    np.testing.assert_array_equal(y, rec.data)
    rec2 = _trace(seed, freq, 2500.0)
    y2 = ac.clean(rec2.data, rec2.fs, stim_freq=freq, method=method)
    assert np.all(np.isfinite(y2)) and y2.shape == rec2.data.shape


@FAST
@given(seed=st.integers(0, 10_000), scale=st.floats(0.2, 5.0))
def test_row_models_are_scale_equivariant(seed, scale):
    # regression and PCA decide from ratios of powers to noise: scaling the input scales the output
    rec = _trace(seed, 20.0, 2500.0)
    model = ac.fit_stimulation(rec.data, rec.fs, stim_freq=20.0)
    for cls in (ac.HarmonicRegression, ac.CyclePCA):
        a = cls().fit(rec.data, fs=rec.fs, stim_model=model).artifact_
        b = cls().fit(scale * rec.data, fs=rec.fs, stim_model=model).artifact_
        np.testing.assert_allclose(b, scale * a, rtol=1e-6, atol=1e-6 * scale * np.abs(a).max())


@settings(max_examples=200, deadline=None, derandomize=True)
@given(u=st.lists(st.floats(allow_nan=False, allow_infinity=False), min_size=1, max_size=50),
       v=st.lists(st.floats(allow_nan=False, allow_infinity=False, width=32), min_size=1, max_size=50))
def test_fractional_part_is_numpy_mod_to_the_bit(u, v):
    # reference: numpy.mod(u, 1.0), which the phase arithmetic used before (plans and outputs must not move)
    from artifactclean._numeric import fractional_part

    for x, bits in ((np.asarray(u, dtype=np.float64), np.uint64), (np.asarray(v, dtype=np.float32), np.uint32),
                    (np.array([-0.0, -1e-300, -1.0, 2.0**53 + 2, -(2.0**60)]), np.uint64)):
        got, want = fractional_part(x), np.mod(x, 1.0)
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got.view(bits), want.view(bits))
