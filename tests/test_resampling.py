"""Few samples per stimulation cycle (scalp and LFP rigs at 0.5-2 kHz): blocks cleaned on an upsampled copy."""

import warnings

import numpy as np
import pytest
from scipy import signal

from artifactclean import make_estimator
from artifactclean.evaluation import _lfp_figures
from artifactclean.resampling import upsample, upsample_railed, upsampled_block, upsampled_reader, upsampling_factor
from artifactclean.stimulation import StimBlock
from artifactclean.synthetic import ArtifactSpec, NeuralSpec, simulate_recording


def test_the_factor_follows_the_samples_per_cycle():
    assert upsampling_factor(40.0, 30000.0) == 1  # 750 samples a cycle
    assert upsampling_factor(5.0002, 1000.0) == 1  # 200 a cycle, a few ppm fast: as it is
    assert upsampling_factor(10.0, 1000.0) == 2  # 100 -> 200
    assert upsampling_factor(40.0, 1000.0) == 8  # 25 -> 200
    assert upsampling_factor(40.0, 500.0) == 16
    assert upsampling_factor(40.0, 2500.0) == 4  # 62.5 -> 250
    # regression and PCA fit every harmonic of a row: they need twice as many
    assert make_estimator("regression")._upsampling(10.0, 2000.0) == 2
    assert make_estimator("template")._upsampling(10.0, 2000.0) == 1


def test_upsampling_keeps_the_samples_and_matches_the_fourier_interpolation(rng):
    fs, n, up = 1000.0, 4000, 8
    t = np.arange(n) / fs
    # periodic over the record and band-limited up to 0.9 of the Nyquist frequency: the Fourier method
    # (scipy.signal.resample) interpolates it exactly, the reference here
    x = sum(rng.uniform(0.2, 1.0) * np.cos(2 * np.pi * k * t + rng.uniform(0, 2 * np.pi))
            for k in (40.0, 80.0, 120.0, 200.0, 300.0, 450.0))
    y = upsample(x, up)
    assert y.shape == (n * up,)
    np.testing.assert_allclose(y[::up], x, rtol=0, atol=1e-12)
    ref = signal.resample(x, n * up)
    inner = slice(64 * up, -64 * up)  # the interpolator takes zeros beyond the ends
    assert np.abs(y - ref)[inner].max() <= 1e-4 * np.abs(x).max()
    # the linear interpolation this replaces is off by percents
    lin = np.interp(np.arange(n * up) / up, np.arange(n), x)
    assert np.abs(lin - ref)[inner].max() > 0.05 * np.abs(x).max()
    with pytest.raises(ValueError, match="positive"):
        upsample(x, 0)


def test_a_stretch_read_upsampled_equals_the_whole_record_upsampled(rng):
    x = rng.standard_normal((3, 2000)).cumsum(axis=1)
    x[1] = np.clip(x[1], -5.0, 5.0)  # a clipping channel
    up = 5
    whole = upsample_railed(x, up)
    read = upsampled_reader(lambda a, b, rows=None: x[slice(None) if rows is None else rows, a:b], up, x.shape[1])
    for a, b in [(1000, 2500), (3001, 7777), (4 * up * 50, 5 * up * 300)]:
        np.testing.assert_allclose(read(a, b), whole[:, a:b], rtol=0, atol=1e-9)
    np.testing.assert_allclose(read(1000, 2000, [2]), whole[[2], 1000:2000], rtol=0, atol=1e-9)


def test_upsampling_keeps_an_amplifiers_rails():
    fs, up = 1000.0, 8
    t = np.arange(2000) / fs
    x = np.clip(4000.0 * np.sin(2 * np.pi * 40.0 * t), -3600.0, 3600.0)[None]
    y = upsample_railed(x, up)[0]
    plain = upsample(x, up)[0]
    assert plain.max() > 3600.0 + 50.0  # the interpolation rings beyond the rail
    assert y.max() == 3600.0 and y.min() == -3600.0
    at = np.flatnonzero(x[0] == 3600.0)
    pairs = at[np.isin(at + 1, at)]
    # between two samples at the rail the amplifier held the rail
    assert np.all(y[(pairs[:, None] * up + np.arange(1, up)).ravel()] == 3600.0)


def test_an_upsampled_block_keeps_its_phase_and_key():
    from artifactclean.estimators.cycles import block_key

    blk = StimBlock("active", 100, 900, 200, 800, 40.0016, 0.7, 150, 1.0, edges=(50, 200, 800, 950))
    bu = upsampled_block(blk, 8)
    assert (bu.start, bu.stop, bu.ramp_up_stop, bu.ramp_down_start, bu.ref_sample) == (800, 7200, 1600, 6400, 1200)
    assert bu.geometry() == (400, 1600, 6400, 7600) and bu.upsampled_by == 8
    assert block_key(bu) == block_key(blk)
    assert not hasattr(blk, "upsampled_by")


@pytest.mark.parametrize("method", ["template", "regression", "pca"])
@pytest.mark.parametrize("fs", [500.0, 1000.0])
def test_gamma_stimulation_at_scalp_rates_leaves_its_harmonics_within_the_goal(method, fs):
    """40 Hz from 1 kHz (25 samples a cycle): before, the template left 48x the neural power within
    3 Hz of 80 Hz and regression 360x at 40 Hz; from 500 Hz the template took the repeating samples
    for a DAC staircase (1e5x)."""
    art = ArtifactSpec(freq_hz=40.0, amplitude_uv=4000.0, heart_depth=0.02, resp_depth=0.01, drift_ppm=40.0,
                       channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(16.0, fs=fs, artifact=art, neural=NeuralSpec(units=[]), seed=3)
    est = make_estimator(method)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = est.fit_transform(rec.data, fs=fs)
    info = est.report_["blocks"][0]
    assert info["upsampled_by"] == est._upsampling(info["freq_hz"], fs) > 1
    assert info.get("dac_ticks_per_cycle") is None
    stim = ~np.isnan(rec.stim_phase)
    # within +-3 Hz of each harmonic up to 80 Hz (the nominal 40 Hz, so that 80 Hz counts), worst channel
    worst = max(_lfp_figures((out[c] - rec.neural[c])[stim], rec.neural[c][stim], fs, 40.0)[0] for c in range(4))
    assert worst <= 2.0  # the goal


@pytest.mark.parametrize("fs", [500.0, 1000.0])
def test_survey_says_the_block_is_upsampled_and_finds_no_dac_in_repeating_samples(fs):
    """`survey` searched for a DAC in the samples themselves, which repeat every cycle or two at these
    rates: from 1 kHz with two clipped channels it reported 5 updates per cycle that the cleaning
    (rightly) does not model."""
    from artifactclean.io import open_recording
    from artifactclean.io.pipeline import survey_recording

    art = ArtifactSpec(freq_hz=40.0, amplitude_uv=4000.0, heart_depth=0.02, resp_depth=0.01, drift_ppm=40.0,
                       channel_gains=(1.0, -0.7, 0.45, -1.2), clip_uv=3276.8)
    rec = simulate_recording(16.0, fs=fs, artifact=art, neural=NeuralSpec(units=[]), seed=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = survey_recording(open_recording(rec.data, fs=fs))
    st = res["stimulation"]
    assert st["upsampled_by"] == upsampling_factor(st["frequency_hz"], fs) > 1
    assert not st["dac"]["locked"] and st["dac"]["updates_per_cycle"] is None


def test_known_spikes_are_refused_where_there_is_no_spike_band(tmp_path):
    """A 1 kHz recording has no spike band: `bench` injected 1 ms spikes there and ranked the methods on
    a recall of 0.007; it now says why it cannot, before any work, and writes nothing."""
    from artifactclean.demo_files import write_brainvision
    from artifactclean.injection import inject_spikes
    from artifactclean.spikes import check_spike_rate

    from test_io import cli

    x = np.zeros((2, 5000))
    with pytest.raises(ValueError, match=r"sampled at 1000 Hz.*LFP"):
        inject_spikes(x, 1000.0, phase=np.zeros(5000), seed=0)
    check_spike_rate(6700.0)  # 300 Hz - 3 kHz fits under 0.45 fs
    with pytest.raises(ValueError, match="6667 Hz or more"):
        check_spike_rate(6600.0)
    art = ArtifactSpec(freq_hz=40.0, channel_gains=(1.0, -0.7))
    rec = simulate_recording(20.0, fs=1000.0, n_channels=2, artifact=art, neural=NeuralSpec(units=[]), seed=4)
    vhdr = write_brainvision(tmp_path / "eeg", rec.data, 1000.0, resolution_uv=0.5)
    r = cli("bench", vhdr, "--out", tmp_path / "out", check=False)
    assert r.returncode != 0 and "sampled at 1000 Hz" in r.stderr
    assert not (tmp_path / "out" / "results.json").exists()


@pytest.mark.parametrize("method", ["template", "regression"])
def test_an_upsampled_block_cleaned_in_groups_of_channels_equals_it_cleaned_at_once(method, monkeypatch):
    """The copy holds up to 17x the samples (a 10 minute, 16 channel array at 1 kHz and 40 Hz peaked at
    4.1 GB with the template): channels go in groups, with one plan made on all of them, and the result
    and the report are those of one group to the bit."""
    import artifactclean.estimators.cycles as cycles

    art = ArtifactSpec(freq_hz=40.0, channel_gains=(1.0, -0.7, 0.45, -1.2, 0.8, -0.3), clip_uv=3600.0)
    rec = simulate_recording(20.0, fs=1000.0, n_channels=6, artifact=art, neural=NeuralSpec(units=[]), seed=1)
    runs = []
    for values in (2 ** 40, 2 ** 21):  # one group; four
        monkeypatch.setattr(cycles, "_UPSAMPLED_VALUES", values)
        est = make_estimator(method)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            runs.append((est.fit_transform(rec.data, fs=1000.0), est.lost_, est.report_["blocks"]))
    (y1, lost1, rep1), (y2, lost2, rep2) = runs
    assert rec.clipped.any() and lost1.any()
    np.testing.assert_array_equal(y1, y2)
    np.testing.assert_array_equal(lost1, lost2)
    assert rep1 == rep2


def test_the_adaptive_canceller_is_not_upsampled():
    """It filters the samples themselves (no phase grid), and reads a monitor channel at the recording's own
    samples."""
    est = make_estimator("adaptive")
    assert est._upsampling(40.0, 1000.0) == 1 and est._upsampling(40.0, 500.0) == 1


@pytest.mark.parametrize("fs", [1000.0, 30000.0])
def test_a_sinusoidal_monitor_does_not_wind_the_canceller_up(fs):
    """Delayed copies of a pure sine span two directions: RLS with forgetting grew without bound along the
    other seven taps (1.6e3 x the artifact at 1 kHz, 1.5e5 at 30 kHz). A short filter of a sine can follow
    the fundamental only, so what stays is the harmonics (8, 4, 2 and 1 % of it)."""
    from artifactclean import clean

    art = ArtifactSpec(freq_hz=40.0, channel_gains=(1.0, -0.7))
    rec = simulate_recording(8.0, fs=fs, n_channels=2, artifact=art, neural=NeuralSpec(units=[]), seed=5)
    stim = ~np.isnan(rec.stim_phase)
    monitor = np.where(stim, np.cos(np.nan_to_num(rec.stim_phase)), 0.0)
    est = make_estimator("adaptive", reference="monitor")  # the taps alone ("auto" adds the harmonics)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        y = est.fit_transform(rec.data, fs=fs, stim_reference=monitor)
    assert est.report_["blocks"][0]["reference"] == "monitor"
    left = np.std((y - rec.neural)[:, stim]) / np.std(rec.artifact[:, stim])
    assert np.isfinite(left) and left < 0.12


@pytest.mark.parametrize("method", ["template", "regression"])
def test_two_workers_equal_one_on_an_upsampled_block(method):
    """With workers the plans are prepared on the upsampled reader and each group's clone subsets them
    again for its own groups of channels: the same numbers as one worker."""
    from artifactclean import clean

    art = ArtifactSpec(freq_hz=40.0, channel_gains=(1.0, -0.7, 0.45, -1.2, 0.8), clip_uv=3600.0)
    rec = simulate_recording(12.0, fs=1000.0, n_channels=5, artifact=art, neural=NeuralSpec(units=[]), seed=7)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one = clean(rec.data, 1000.0, method=method)
        two = clean(rec.data, 1000.0, method=method, workers=2)
    np.testing.assert_array_equal(one, two)
