"""Template subtraction against the acceptance figures of the spine issue."""

import dataclasses
import warnings
import numpy as np
import pytest
from sklearn.base import clone

from artifactclean import TemplateSubtraction, clean
from artifactclean.evaluation import score_cleaning
from artifactclean.stimulation import fit_stimulation
from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, UnitSpec, simulate_recording

from conftest import units4


def _check_acceptance(rec, stim_freq):
    y = clean(rec.data, rec.fs, stim_freq=stim_freq, method="template")
    s = score_cleaning(rec, y)
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]
    assert s["recall_ratio"] >= 0.99
    assert s["sixth_recall_min_over_max"] >= 0.95
    assert abs(s["delta_ppc"]) <= 2e-4
    return s


def test_acceptance_20hz_modulated_drifting(rec20):
    s = _check_acceptance(rec20, 20.0)
    assert max(s["harmonic_residual"]) < 5.0
    # heartbeat sidebands within +-3 Hz followed; a gain low-passed at 4 Hz left 1.6 here and
    # 0.36 LFP error away from the bands (the goal there, 0.05, is not yet met)
    assert max(s["lfp_band_ratio"]) <= 2.0, s["lfp_band_ratio"]
    assert max(s["lfp_error_away"]) <= 0.15, s["lfp_error_away"]


def test_acceptance_10hz_dac_staircase(rec10_dac):
    _check_acceptance(rec10_dac, 10.0)
    est = TemplateSubtraction().fit(rec10_dac.data, fs=rec10_dac.fs, stim_freq=10.0)
    assert est.report_["blocks"][0]["dac_ticks_per_cycle"] == 100


@pytest.mark.parametrize("kind", ["off", "sham"])
def test_no_stimulation_no_change(kind):
    if kind == "off":
        rec = simulate_recording(8.0, artifact=ArtifactSpec(amplitude_uv=0.0), seed=21)
        keep = slice(None)
    else:
        rec = simulate_recording(12.0, blocks=[BlockSpec(3.0, 0.0, kind="sham", ramp_s=2.0)], seed=22)
        keep = np.r_[0:int(2.5 * rec.fs), int(7.5 * rec.fs):rec.n_samples]  # away from the sham's ramps
    if kind == "off":
        with pytest.warns(UserWarning, match="no stimulation found"):
            y = clean(rec.data, rec.fs, stim_freq=20.0)
    else:
        y = clean(rec.data, rec.fs, stim_freq=20.0)
    noise = rec.spec["neural"]["noise_uv"]
    assert np.max(np.abs(y[:, keep] - rec.data[:, keep])) <= 0.01 * noise


def test_sham_ramps_are_cleaned():
    rec = simulate_recording(12.0, blocks=[BlockSpec(3.0, 0.0, kind="sham", ramp_s=2.0)], seed=23)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs, stim_freq=20.0)
    assert [b.kind for b in est.stim_model_.blocks] == ["sham"]
    y = est.transform(rec.data)
    ramp = slice(int(3.5 * rec.fs), int(6.5 * rec.fs))
    assert np.std((y - rec.neural)[:, ramp]) < 0.05 * np.std(rec.artifact[:, ramp])


@pytest.mark.parametrize("freq, ramp_s, most", [(5.0, 0.1, 0.09), (20.0, 0.1, 0.025), (20.0, 0.3, 0.01),
                                                (40.0, 0.1, 0.02)])
def test_short_ramps_are_followed(freq, ramp_s, most):
    """0.1-0.3 s ramps: a gain read from segment values rounds each corner over a segment and
    the decimated envelope put the ramps 4-110 ms off; 2-31% of the artifact's peak was left
    within 0.2 s of the edges (6-7% at 20-40 Hz, 31% for half a 5 Hz cycle). Placed at the full
    rate and followed sample by sample: 0.4-1.3% at 20-40 Hz, 6% at 5 Hz."""
    rec = simulate_recording(8.0, artifact=ArtifactSpec(freq_hz=freq, drift_ppm=40.0),
                             blocks=[BlockSpec(start_s=2.0, duration_s=4.0, ramp_s=ramp_s)], seed=5)
    fs = rec.fs
    resid = clean(rec.data, fs, stim_freq=freq) - rec.neural
    edges = np.r_[int(1.8 * fs):int((2.2 + ramp_s) * fs), int((5.8 - ramp_s) * fs):int(6.2 * fs)]
    assert np.max(np.abs(resid[:, edges])) < most * np.max(np.abs(rec.artifact))


@pytest.mark.parametrize("method", ["template", "regression", "pca"])
@pytest.mark.parametrize("freq, ramp_s, most", [(5.0, 0.3, 0.03), (20.0, 0.3, 0.012), (40.0, 1.0, 0.012)])
def test_raised_cosine_ramps_are_followed(method, freq, ramp_s, most):
    """Raised-cosine ramps read as straight ones left 1.5-3% of the artifact's peak beside the
    edges (14% from regression on 1.5 cycles of a 5 Hz ramp, whose feet were scaled up by as
    much as 50 in each row); fitted as raised cosines: 0.4-0.8% at 20-40 Hz, 1.4-2.2% at 5 Hz."""
    rec = simulate_recording(9.0, artifact=ArtifactSpec(freq_hz=freq, drift_ppm=40.0),
                             blocks=[BlockSpec(start_s=2.0, duration_s=5.0, ramp_s=ramp_s, ramp_shape="cosine")],
                             seed=12)
    fs = rec.fs
    resid = clean(rec.data, fs, stim_freq=freq, method=method) - rec.neural
    edges = np.r_[int(1.8 * fs):int((2.2 + ramp_s) * fs), int((6.8 - ramp_s) * fs):int(7.2 * fs)]
    assert np.max(np.abs(resid[:, edges])) < most * np.max(np.abs(rec.artifact))


@pytest.mark.parametrize("shape", ["cosine", "linear"])
def test_sham_ramps_are_placed_at_the_full_rate(shape):
    """A sham block's feet and peak, and its ramps' shape, are fitted on the full-rate reference.
    From the decimated envelope, 3 s raised-cosine sham ramps began 0.5 s late: 5.5% of the
    artifact's peak was left before them (now 0.5%); straight ones 0.9% (now 0.6%)."""
    rec = simulate_recording(10.0, artifact=ArtifactSpec(freq_hz=20.0, drift_ppm=40.0),
                             blocks=[BlockSpec(2.0, 0.0, kind="sham", ramp_s=3.0, ramp_shape=shape)], seed=3)
    fs = rec.fs
    model = fit_stimulation(rec.data, fs, stim_freq=20.0)
    (blk,) = model.blocks
    assert (blk.kind, blk.ramp_shape) == ("sham", shape)
    assert abs(blk.start / fs - 2.0) < 0.05 and abs(blk.ramp_up_stop / fs - 5.0) < 0.1 and abs(blk.stop / fs - 8.0) < 0.05
    resid = clean(rec.data, fs, stim_freq=20.0) - rec.neural
    assert np.max(np.abs(resid[:, int(1.8 * fs):int(8.2 * fs)])) < 0.01 * np.max(np.abs(rec.artifact))


@pytest.mark.parametrize("freq", [5.0, 20.0])
@pytest.mark.parametrize("ramp_s, most", [(1.0, 1.5), (0.3, 3.0)])
def test_samples_beside_a_block_stay_as_recorded(freq, ramp_s, most):
    """Before and after a ramped block the output is the input within a few noise SDs (10 uV here).
    With ramps from the decimated envelope, subtraction started up to 100 ms early: 3-6 SD next
    to 1 s ramps, 9-14 SD next to 0.3 s ones; placed at the full rate, 0.5-1.1 and 1.5-2.6."""
    rec = simulate_recording(10.0, artifact=ArtifactSpec(freq_hz=freq), blocks=[BlockSpec(2.0, 6.0, ramp_s=ramp_s)],
                             seed=7)
    fs = rec.fs
    off = np.r_[:int(2.0 * fs), int(8.0 * fs):rec.n_samples]
    changed = clean(rec.data, fs, stim_freq=freq)[:, off] - rec.data[:, off]
    assert np.abs(changed).max() < most * 10.0


def test_dense_firing_stays_out_of_the_template():
    # four units of 60-160 uV at 15 spikes/s on each channel, 'broad' spikes: the template's share of the spikes
    # the outlier pass leaves in lies at 0.3-3 kHz, where the median of all the template's harmonics (mostly the
    # white noise above) put it out of the noise: 0.16-0.18 x noise in the spike band; judged against the
    # harmonics beside each, 0.007
    units = [UnitSpec(channel=c, rate_hz=15.0, amplitude_uv=a, shape="broad")
             for c in range(2) for a in (60, 90, 120, 160)]
    rec = simulate_recording(10.0, n_channels=2, artifact=ArtifactSpec(freq_hz=20.0, channel_gains=(1.0, -0.7)),
                             neural=NeuralSpec(noise_uv=5.0, units=units), blocks=[BlockSpec(1.0, 9.0, ramp_s=1.0)], seed=1)
    s = score_cleaning(rec, clean(rec.data, rec.fs))
    assert max(s["spikeband_residual"]) < 0.05, s["spikeband_residual"]
    assert s["recall_ratio"] >= 0.99


def test_residue_at_every_dac_edge_does_not_starve_the_fits(monkeypatch):
    # a 1 kHz DAC through an amplifier's 7.5 kHz low-pass with the samples beside each edge settled into one tick
    # (the steps' response not modelled, as before session 38): the residue after every edge, which the outlier
    # pass took for spikes, and its widened flags took a third of the samples: 20-134x the neural power within 3
    # Hz of the harmonics at 20 Hz. A stretch whose flags would cover more than a fifth of it keeps its samples
    import artifactclean.estimators.template as template_module
    from artifactclean.scenarios import locked_units

    monkeypatch.setattr(template_module, "_EDGE_GAIN", 1.0)  # no response is ever kept: the edges are settled
    art = ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0, lowpass_hz=7500.0)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=1)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs)
    s = score_cleaning(rec, est.transform(rec.data))
    assert max(s["lfp_band_ratio"]) <= 2.0, s["lfp_band_ratio"]
    blk = est.report_["blocks"][0]
    assert blk["dac_ticks_per_cycle"] == 50 and not blk["dac_step_response"]
    assert blk["outliers_left_out"] < 0.01 * rec.data.size


@pytest.mark.parametrize("freq, lowpass", [(10.0, 7500.0), (40.0, 7500.0), (20.0, 3000.0)])
def test_a_dacs_steps_through_the_amplifiers_lowpass_are_modelled(freq, lowpass, monkeypatch):
    # behind a 7.5 kHz low-pass every step of a 1 kHz DAC reaches the samples as the filter's step response; the
    # block's plan learns what a step leaves beside the tick levels (step_response.py) and the spike band is clean.
    # Settled into ticks instead: 0.6-3.5 x noise (session 38, the generator's analog filter). A 3 kHz filter's
    # transition starts 3 samples before the grid's edge and rings for 20 (the response's reach)
    import artifactclean.estimators.template as template_module
    from artifactclean.scenarios import locked_units

    art = ArtifactSpec(freq_hz=freq, dac_rate_hz=1000.0, lowpass_hz=lowpass, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(12.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=2)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs)
    s = score_cleaning(rec, est.transform(rec.data))
    assert est.report_["blocks"][0]["dac_step_response"]
    assert max(s["spikeband_residual"]) < 0.06, s["spikeband_residual"]  # 0.016-0.038 over seeds 1-2 at 5-40 Hz
    assert max(s["lfp_band_ratio"]) <= 2.0 and abs(s["delta_ppc"]) < 1e-3
    monkeypatch.setattr(template_module, "_EDGE_GAIN", 1.0)
    settled = score_cleaning(rec, TemplateSubtraction().fit_transform(rec.data, fs=rec.fs))
    assert max(settled["spikeband_residual"]) > 0.3


def test_a_dac_the_amplifier_does_not_filter_keeps_its_edges_settled():
    # the same DAC recorded without the low-pass: its steps are sharp, the response is not kept (settling the
    # samples beside each edge does as well or better), and the result is the settled one to the bit
    import artifactclean.estimators.template as template_module

    rec = simulate_recording(8.0, artifact=ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0), seed=2)
    est = TemplateSubtraction()
    y = est.fit_transform(rec.data, fs=rec.fs)
    assert not est.report_["blocks"][0]["dac_step_response"]
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(template_module, "_EDGE_GAIN", 1.0)
        np.testing.assert_array_equal(TemplateSubtraction().fit_transform(rec.data, fs=rec.fs), y)


def test_a_free_running_dac_behind_the_amplifiers_lowpass_is_found_and_modelled():
    # 13.37 Hz from a 1 kHz DAC (ticks at any phase) behind a 7.5 kHz low-pass: the fast-DAC search took the
    # alias of the staircase's 4th harmonic for a 26 kHz DAC and the template averaged spikes away (recall 0.2-0.34,
    # 6.9-7.1 x noise in the spike band); its line is now a harmonic (lines at 1-3 kHz) and the step search's
    # clock, with one step kept within two samples, finds the 74.79 ticks a cycle
    from artifactclean.scenarios import locked_units

    art = ArtifactSpec(freq_hz=13.37, dac_rate_hz=1000.0, lowpass_hz=7500.0, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(12.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=1)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs)
    s = score_cleaning(rec, est.transform(rec.data))
    blk = est.report_["blocks"][0]
    assert blk["dac_free_running"] and blk["dac_ticks_per_cycle"] == pytest.approx(1000.0 / 13.37, rel=1e-4)
    assert max(s["spikeband_residual"]) < 0.06 and s["recall_ratio"] > 0.99  # 0.023 and 1.0


def test_the_margins_beyond_a_blocks_feet_stay_as_recorded():
    # the cycles beyond a block's detected feet are cleaned in case a foot was found late; where the ramps have
    # not started, the envelope's floor (1e-3 until session 37) left 0.1% of the artifact subtracted there:
    # 1.4-4.4 uV at 5 Hz on a 4 mV artifact, periodic with the stimulation
    rec = simulate_recording(10.0, artifact=ArtifactSpec(freq_hz=5.0), blocks=[BlockSpec(3.0, 5.0, ramp_s=1.0)],
                             neural=NeuralSpec(noise_uv=1.0, units=[]), seed=3)
    est = TemplateSubtraction()
    y = est.fit_transform(rec.data, fs=rec.fs)
    first = est.report_["blocks"][0]["start"]  # the margin's first sample
    assert first < int(2.9 * rec.fs)  # two 5 Hz cycles before the foot at 3 s
    change = np.abs(y - rec.data)[:, first:int(2.99 * rec.fs)]
    assert change.max() < 0.5, change.max()


def test_input_not_modified_and_shape_kept(rec20):
    x = rec20.data[:2, : int(5 * rec20.fs)].copy()
    before = x.copy()
    y = clean(x, rec20.fs, stim_freq=20.0)
    np.testing.assert_array_equal(x, before)
    assert y.shape == x.shape and y.dtype == np.float64
    y1 = clean(x[0], rec20.fs, stim_freq=20.0)
    assert y1.shape == x[0].shape


def test_clipped_samples_are_blanked_and_reported():
    rec = simulate_recording(8.0, artifact=ArtifactSpec(clip_uv=3500.0), neural=NeuralSpec(units=units4()), seed=24)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs, stim_freq=20.0)
    y = est.transform(rec.data)
    assert np.isfinite(y).all()
    assert est.lost_[rec.clipped].all()  # every clipped sample is reported
    assert np.all(y[est.lost_] == 0.0)
    # outside the lost stretches the cleaning still works, on clipped channels too
    s = score_cleaning(rec, y, lost=est.lost_)
    assert max(s["spikeband_residual"]) < 0.12, s["spikeband_residual"]
    assert s["recall"] >= 0.97
    # lost = clipped plus the phases clipped nearby; never a large part of an unclipped channel
    unclipped = [ch for ch in range(4) if not rec.clipped[ch].any()]
    assert unclipped and not est.lost_[unclipped].any()


def test_sklearn_conventions():
    est = TemplateSubtraction(n_cycles=10, robust=False)
    c = clone(est)
    assert c.get_params() == est.get_params()
    c.set_params(tracking_hz=2.0)
    assert c.tracking_hz == 2.0 and est.tracking_hz == TemplateSubtraction().tracking_hz
    assert not hasattr(c, "artifact_")
    with pytest.raises(ValueError, match="n_cycles"):
        TemplateSubtraction(n_cycles=0).fit(np.zeros((1, 3000)), fs=1000.0, stim_freq=10.0)
    with pytest.raises(ValueError, match="dac"):
        TemplateSubtraction(dac="maybe").fit(np.zeros((1, 3000)), fs=1000.0, stim_freq=10.0)
    with pytest.raises(RuntimeError, match="not fitted"):
        TemplateSubtraction().transform(np.zeros((1, 10)))


def test_robust_option_keeps_spikes_out_of_template():
    units = units4()
    for u in units:
        u.amplitude_uv = 400.0
        u.rate_hz = 40.0
    rec = simulate_recording(8.0, neural=NeuralSpec(units=units), seed=25)
    res = {}
    # without the harmonic clean-up, which since session 37 also keeps the spikes' share out of the subtracted
    # template (each harmonic judged against those beside it): 0.0033-0.0058 x noise with or without the outliers
    for robust in (False, True):
        y = TemplateSubtraction(robust=robust, denoise=False).fit_transform(rec.data, fs=rec.fs, stim_freq=20.0)
        res[robust] = np.array(score_cleaning(rec, y)["spikeband_residual"])
    assert np.all(res[True] < 0.6 * res[False]), res
    y = TemplateSubtraction().fit_transform(rec.data, fs=rec.fs, stim_freq=20.0)
    assert max(score_cleaning(rec, y)["spikeband_residual"]) < 0.02


def test_a_dac_of_few_ticks_keeps_a_waveform_rich_in_harmonics():
    """25 ticks per cycle (40 Hz from 1 kHz), harmonics to the 7th: the harmonic clean-up once took
    the 4th-7th for noise (their amplitudes are half the DFT's), 0.9-2.5 x noise in the spike band."""
    from artifactclean.scenarios import _modulated, locked_units

    art = dataclasses.replace(_modulated(40.0, 1000.0), harmonics=((0.08, 0.4), (0.04, 1.1), (0.02, 2.0), (0.01, 0.7),
                                                                  (0.008, 1.5), (0.005, 0.2)))
    rec = simulate_recording(8.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=2)
    s = score_cleaning(rec, clean(rec.data, rec.fs))
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]


def test_rail_samples_take_their_truncated_normal_expectation():
    """The E-step of the censored fit against scipy.stats.truncnorm.mean (the same residual SD)."""
    from scipy import stats

    rng = np.random.default_rng(31)
    n = 3000
    mu = np.full((1, n), 1000.0)
    x = mu + rng.normal(0.0, 40.0, (1, n))
    hi_rail, lo_rail = 1050.0, 960.0
    up, down = x >= hi_rail, x <= lo_rail
    x = np.clip(x, lo_rail, hi_rail)
    wb = (~(up | down)).astype(float)
    at = up | down
    est = TemplateSubtraction()
    xb = x.copy()
    # one stretch (span longer than the data's cycles): one residual SD, the unclipped samples' RMS
    est._fill_rails(xb, wb, np.ones((1, n)), mu, (at, up[at], x[at].copy()), np.linspace(0.0, 1.0, n), 8)
    sd = np.sqrt(np.mean((x - mu)[~at] ** 2))
    expect_up = stats.truncnorm.mean((hi_rail - 1000.0) / sd, np.inf, loc=1000.0, scale=sd)
    expect_down = stats.truncnorm.mean(-np.inf, (lo_rail - 1000.0) / sd, loc=1000.0, scale=sd)
    np.testing.assert_allclose(xb[up], expect_up, rtol=1e-9)
    np.testing.assert_allclose(xb[down], expect_down, rtol=1e-9)
    assert np.all(xb[~at] == x[~at])  # the data themselves are untouched


def test_clipped_phases_are_completed_from_a_harmonic_series():
    from artifactclean.estimators.template import _complete_holes

    n_bins = 50
    ph = 2 * np.pi * (np.arange(n_bins) + 0.5) / n_bins
    rel = [(1, 1.0, 0.0), (2, 0.08, 0.4), (3, 0.04, 1.1), (4, 0.02, 2.0), (5, 0.01, 0.7)]
    truth = 4000.0 * sum(a * np.cos(k * ph + p) for k, a, p in rel)
    holes = np.zeros((1, 1, n_bins), dtype=bool)
    holes[0, 0, 5:20] = True  # the peak's arc, 30% of the cycle
    t = np.where(holes, 0.0, truth)
    failed = _complete_holes(t, np.ones_like(t), holes, order=5)
    assert not failed.any()
    np.testing.assert_allclose(t[0, 0], truth, atol=1e-6)
    # a series that needs more bins than are left is not trusted: the row is left and reported
    holes[0, 0, 5:42] = True
    t = np.where(holes, 0.0, truth)
    failed = _complete_holes(t, np.ones_like(t), holes, order=5)
    assert np.array_equal(failed, holes) and np.all(t[holes] == 0.0)


def test_waveform_harmonics_counts_what_stands_out():
    from artifactclean.estimators.cycles import waveform_harmonics

    fs, f = 30000.0, 20.0
    u = np.arange(int(2 * fs)) * f / fs
    rng = np.random.default_rng(32)
    x = 4000 * np.cos(2 * np.pi * u) + 320 * np.cos(4 * np.pi * u + 0.4) + 40 * np.cos(10 * np.pi * u + 0.7)
    x = x + rng.normal(0.0, 40.0, u.size)
    assert waveform_harmonics(x, u, fs, f) == 5
    assert waveform_harmonics(x, u, fs, f, below=4) == 2
    assert waveform_harmonics(rng.normal(0.0, 40.0, u.size) + 4000 * np.cos(2 * np.pi * u), u, fs, f) == 1


@pytest.mark.parametrize("seed, freq", [(1, 20.0), (1, 40.0), (0, 20.0)])
def test_heavily_clipped_channel_with_a_dac(seed, freq):
    """The strongest channel clipped on ~45% of its samples (rail 3600 uV, 4.8 mV peak) with a
    1 kHz DAC: outside the lost stretches the spike band stays at the goal. Once failed at the
    block start (0.46 x noise at 20 Hz, seed 1): with over half the bins of a template clipped
    somewhere in its window, the hole rule's median weight was 0 and nothing was a hole."""
    from artifactclean.scenarios import _modulated, locked_units

    rec = simulate_recording(12.0, artifact=_modulated(freq, 1000.0, clip=3600.0),
                             neural=NeuralSpec(units=locked_units()), seed=seed)
    est = TemplateSubtraction()
    y = est.fit_transform(rec.data, fs=rec.fs)
    s = score_cleaning(rec, y, lost=est.lost_)
    assert rec.clipped[3].mean() > 0.28  # it really is heavily clipped
    assert max(s["spikeband_residual"]) <= 0.1
    assert s["recall_ratio"] >= 0.97
    # scored outside the rail samples only (the generator's clipped mask): the phases clipped in some
    # cycles are completed, not blanked (goal 0.1; 0.072-0.0996 here, 0.5-0.7 when they were blanked)
    rails = score_cleaning(rec, y)
    assert max(rails["spikeband_residual"]) <= 0.105, rails["spikeband_residual"]
    assert rails["recall_ratio"] >= 0.97
    assert np.all(est.lost_.mean(axis=1) <= rec.clipped.mean(axis=1) + 0.01)  # little beyond the rails


def test_a_channel_held_at_its_rails_for_whole_parts_of_a_cycle_keeps_a_sane_gain():
    """5 Hz, the strongest channel (5.8 mV peak) clipped at 3.6 mV on 47% of its samples: its mean cycle
    holds one of the gain's 5 parts of the cycle flat at the rail. That part's transfer (how it sees a
    modulation) was rounding error over nothing, and with the pulse model it gave the channel a gain of
    1e11: outputs of 1e12 uV on every unclipped sample, found by traces drawn at random (session 26)."""
    from artifactclean.scenarios import locked_units

    art = ArtifactSpec(freq_hz=5.0, amplitude_uv=4000.0, channel_gains=(-0.86, 0.75, -1.44, -0.69),
                       heart_rate_hz=1.86, drift_ppm=3.0, clip_uv=3600.0)
    rec = simulate_recording(22.0, artifact=art, neural=NeuralSpec(units=locked_units()),
                             blocks=[BlockSpec(1.0, 20.0)], seed=1)
    est = TemplateSubtraction()
    y = est.fit_transform(rec.data, fs=rec.fs)
    assert rec.clipped[2].mean() > 0.4
    assert np.abs(y).max() < 1000.0  # the neural signal is a few hundred uV at most
    s = score_cleaning(rec, y)  # outside the rails
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]
    assert s["recall_ratio"] >= 0.97


@pytest.mark.parametrize("freq", [5.0, 10.0, 20.0, 40.0])
def test_lfp_away_from_the_harmonics_with_a_sinusoidal_heartbeat(freq):
    """Issue 3's LFP figure (relative error <= 5% away from +-3 Hz of each harmonic below 80 Hz), on a
    4 mV artifact with harmonics, a 1 kHz DAC, 2% heartbeat (sinusoidal, ~2 Hz), 1% respiration,
    40 ppm drift, 1 s ramps and 4 channels of different gains and signs. The error sat at the ramps
    (0.21 at 5 Hz, 0.08 at 10 Hz): plateau corners taken at the 90% points, and a gain following
    everything below 10 Hz there. A pulsatile heartbeat's harmonics put lines at f +- 4 and f +- 6 Hz,
    outside the +-3 Hz bands, where a single channel's gain cannot follow them without passing the
    neural floor (see the contributor guide)."""
    art = ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, heart_depth=0.02, heart_harmonics=(), resp_depth=0.01,
                       drift_ppm=40.0, dac_rate_hz=1000.0, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4()), seed=1)
    s = score_cleaning(rec, clean(rec.data, rec.fs))
    assert max(s["lfp_error_away"]) <= 0.05, s["lfp_error_away"]
    assert max(s["lfp_band_ratio"]) <= 2.0, s["lfp_band_ratio"]
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]


@pytest.mark.parametrize("seed", [1, 2])
def test_a_rhythm_beside_the_fundamental_leaves_no_mirror_image(seed):
    """A 7 Hz neural oscillation beside 13 Hz stimulation projects on the artifact's cycle as a change
    at 6 Hz; the gain used to follow a third of it, which took part of the rhythm off and put its
    mirror image at 2 f - 7 = 19 Hz, up to 0.9 of the neural power there (LFP error away from the
    harmonics 0.07; now 0.015, the image 0.03). The gain now passes a line only as far as both its
    sidebands show (artifactclean.modulation.sideband_support)."""
    art = ArtifactSpec(freq_hz=13.0, amplitude_uv=4000.0, heart_depth=0.02, heart_harmonics=(), resp_depth=0.01,
                       drift_ppm=40.0, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4(), oscillation_hz=7.0,
                                                                   oscillation_uv=15.0), seed=seed)
    y = clean(rec.data, rec.fs)
    s = score_cleaning(rec, y)
    assert max(s["lfp_error_away"]) <= 0.05, s["lfp_error_away"]
    # the mirror image: residual power near 19 Hz against the neural power there (scipy.signal.welch)
    from scipy import signal

    fr, pr = signal.welch(y - rec.neural, rec.fs, nperseg=int(4 * rec.fs))
    _, pn = signal.welch(rec.neural, rec.fs, nperseg=int(4 * rec.fs))
    near = (fr >= 18.5) & (fr <= 20.0)
    ratio = pr[:, near].sum(axis=1) / pn[:, near].sum(axis=1)
    assert ratio.max() < 0.1, ratio


@pytest.mark.parametrize("seed", [2, 3])
def test_a_rhythm_on_one_side_is_not_followed_for_its_floor(seed):
    """10 Hz stimulation with a sinusoidal heartbeat and a 15 uV rhythm at 15 Hz (f + f / 2): the rhythm's
    own main lobe filled the 2 Hz median that gave its side's floor, it stood only 2.2 times above it,
    and the gain followed it by half: its image at 5 Hz, LFP error away from the harmonics 0.17-0.20.
    The floor is now a median over 5 Hz, and a pair's ratio passes from 0.25 (whole from 0.5)."""
    freq, rhythm_hz = 10.0, 15.0
    art = ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, heart_depth=0.02, heart_harmonics=(), resp_depth=0.01,
                       drift_ppm=40.0, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4(), oscillation_hz=rhythm_hz,
                                                                   oscillation_uv=15.0), seed=seed)
    s = score_cleaning(rec, clean(rec.data, rec.fs))
    assert max(s["lfp_error_away"]) <= 0.05, s["lfp_error_away"]
    assert max(s["lfp_band_ratio"]) <= 2.0, s["lfp_band_ratio"]


@pytest.mark.parametrize("freq, heart_hz", [(20.0, 1.2), (40.0, 1.0)])
def test_a_resting_human_heartbeat_leaves_no_sidebands(freq, heart_hz):
    """Issue 3's +-3 Hz figure (<= 2x the neural power) with a person's resting heart rate: the
    pulsatile heartbeat's fundamental and harmonics sit at f +- 1, 2, 3 Hz, among the respiration
    lines. A gain response judging each line against a running median of the gain's spectrum passed
    the fundamental at about 0.65 (those lines fill most of a 2 Hz window) and left 5.9x (20 Hz,
    1.2 Hz heart) and 42x (40 Hz, 1.0 Hz heart) within the bands; everything below 2.75 Hz now
    passes (artifactclean.modulation.FOLLOW_HZ)."""
    art = ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, heart_rate_hz=heart_hz, heart_depth=0.02, resp_depth=0.01,
                       drift_ppm=40.0, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4()), seed=5)
    s = score_cleaning(rec, clean(rec.data, rec.fs))
    assert max(s["lfp_band_ratio"]) <= 2.0, s["lfp_band_ratio"]
    assert max(s["lfp_error_away"]) <= 0.06, s["lfp_error_away"]
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]


def test_the_heartbeat_is_not_brought_down_to_low_frequencies():
    """A gain fitted per part of a cycle stands for the template-weighted centre of that part, not
    its middle; placed at the middles it carried a pattern repeating every cycle times the gain's
    slope (lines at the heart rate +- multiples of f), which the fundamental brought back to the
    heart rate itself: LFP-band residue with no LFP in the recording (4.0 uV at 5 Hz with a 2 Hz
    heartbeat, 1.1 uV now; the white noise alone leaves about 0.2 uV in this band)."""
    from scipy import signal

    art = ArtifactSpec(freq_hz=5.0, amplitude_uv=4000.0, heart_rate_hz=2.0, heart_depth=0.02, heart_harmonics=(),
                       resp_depth=0.0, drift_ppm=40.0, channel_gains=(1.0,))
    rec = simulate_recording(20.0, n_channels=1, artifact=art, seed=3,
                             neural=NeuralSpec(lfp_uv=0.0, oscillation_uv=0.0, units=[]))
    res = (clean(rec.data, rec.fs) - rec.neural)[0]
    low = signal.sosfiltfilt(signal.butter(4, [0.5, 4.0], "bandpass", fs=rec.fs, output="sos"), res)
    plateau = slice(int(4 * rec.fs), int(16 * rec.fs))
    assert np.std(low[plateau]) < 2.0, np.std(low[plateau])


def test_a_locked_unit_does_not_empty_the_ticks_of_a_dac_period():
    """17 Hz from a 1 kHz DAC: the template's rows are periods of 17 cycles (1 s), one bin per tick
    from a few samples. The unit locked to the stimulation is flagged as spike outliers at the same
    ticks period after period, which emptied a few bins in 4 of 20 rows; such rows were kept raw,
    without the restriction to the stimulation's harmonics, and took the LFP periodic by chance with
    them: LFP error away from the harmonics 0.114 on that channel (0.016-0.019 on the others),
    spike band 0.068. The few empty ticks are now filled along the row, which is then whole."""
    from artifactclean.scenarios import locked_units

    art = ArtifactSpec(freq_hz=17.0, amplitude_uv=4000.0, heart_depth=0.02, heart_harmonics=(), resp_depth=0.01,
                       drift_ppm=40.0, dac_rate_hz=1000.0, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=2)
    est = TemplateSubtraction()
    y = est.fit_transform(rec.data, fs=rec.fs)
    assert est.report_["blocks"][0]["dac_cycles_per_period"] == 17
    s = score_cleaning(rec, y)
    assert max(s["lfp_error_away"]) <= 0.05, s["lfp_error_away"]
    assert max(s["spikeband_residual"]) <= 0.06, s["spikeband_residual"]


@pytest.mark.parametrize("freq, ticks, cycles", [(13.0, 1000, 13), (6.0, 500, 3), (13.37, None, None)])
def test_a_dac_whose_ticks_repeat_every_few_cycles(freq, ticks, cycles):
    """13 Hz and 6 Hz from a 1 kHz DAC: 76.9 and 166.7 updates per cycle, so no grid locked to the
    cycle exists and the staircase was left in the spike band (6x the noise, recall 0.09 at 13 Hz).
    The DAC and the waveform share the stimulator's clock: the ticks repeat every 13 (3) cycles, and
    the template's rows become those periods. A grid of 500 slots per 6 Hz cycle also fits every
    tick (each third slot, turning from cycle to cycle) and was taken before; the ticks' own spacing
    rules it out. 13.37 Hz repeats only every 1337 cycles: the template reads each sample at the phase
    its tick held (a free-running clock)."""
    art = ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, heart_depth=0.02, resp_depth=0.01, drift_ppm=40.0,
                       dac_rate_hz=1000.0, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4(kappa0=1.0)), seed=1)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no "not locked" warning: it is modelled
        est = TemplateSubtraction().fit(rec.data, fs=rec.fs, stim_freq=freq)
    info = est.report_["blocks"][0]
    if ticks is None:
        assert info["dac_free_running"] and info["dac_ticks_per_cycle"] == pytest.approx(1000 / freq, rel=1e-5)
    else:
        assert (info["dac_ticks_per_cycle"], info["dac_cycles_per_period"]) == (ticks, cycles)
    s = score_cleaning(rec, est.transform(rec.data), lost=est.lost_)
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]
    assert s["recall_ratio"] >= 0.99 and s["sixth_recall_min_over_max"] >= 0.95
    assert max(s["lfp_band_ratio"]) <= 2.0


@pytest.mark.parametrize("freq, dac_clock_ppm, seed, band", [(20.0, 0.0, 3, 2.0), (40.0, -20.0, 1, 10.0),
                                                              (7.3, None, 1, 2.0)])
def test_nearly_whole_updates_per_cycle_are_a_grid_whose_offset_moves(freq, dac_clock_ppm, seed, band):
    """A DAC on a clock of its own, the waveform 40 ppm off (a stimulator that sets its frequency with
    finite resolution): 49.998 updates per 20 Hz cycle. Binned by the phase each tick held, those phases
    form one cluster per tick in the template's window: spike band 0.2-1.8x the noise and 50-500x the
    neural power within +-3 Hz before (an independent generator's traces). 7.3 Hz from a 1 kHz DAC on the
    stimulator's clock (136.99 a cycle, repeating every 73 cycles): the fast-DAC search took the DAC's
    fourth harmonic as 9863 ticks every 18 cycles, 4x the noise and recall 0.38. The same ticks are 50
    (137) slots a cycle whose offset moves along a line (``staircase.clock_as_grid``). At 40 Hz with
    the DAC 60 ppm from the waveform (24.9985 a cycle) the spike band is clean, but within +-3 Hz of the
    harmonics 7-8x the neural power is left (21-101x before): above the goal, and open."""
    art = ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, heart_depth=0.02, heart_harmonics=(), resp_depth=0.01,
                       drift_ppm=40.0, dac_rate_hz=1000.0, dac_clock_ppm=dac_clock_ppm,
                       channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(16.0, artifact=art, neural=NeuralSpec(units=units4(kappa0=1.0)), seed=seed)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs)
    info = est.report_["blocks"][0]
    assert not info["dac_free_running"] and info["dac_ticks_per_cycle"] == round(1000 / freq)
    s = score_cleaning(rec, est.transform(rec.data), lost=est.lost_)
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]
    assert max(s["lfp_band_ratio"]) <= band, s["lfp_band_ratio"]
    assert s["recall_ratio"] >= 0.99 and s["sixth_recall_min_over_max"] >= 0.95


def test_a_free_running_dac_is_found_when_the_strongest_channels_are_clipped():
    """The DAC search pools the steps of the four strongest channels, between their rails: the
    unclipped reference (0.7 of the strongest) alone showed too few steps above the noise, and a
    clipped channel's flat rails made its step statistic's spread 0 (every noise sample a step)."""
    art = ArtifactSpec(freq_hz=13.37, amplitude_uv=4000.0, drift_ppm=40.0, dac_rate_hz=1000.0, clip_uv=3600.0,
                       channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4()), seed=2)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs, stim_freq=13.37)
    assert est.report_["blocks"][0]["dac_free_running"]
    s = score_cleaning(rec, est.transform(rec.data), lost=est.lost_)
    assert max(s["spikeband_residual"][1:3]) <= 0.1, s["spikeband_residual"]  # the unclipped channels


@pytest.mark.parametrize("freq, dac, heart_hz, degrees", [(20.0, None, 2.0, 2.0), (20.0, 1000.0, 2.0, 2.0),
                                                       (40.0, None, 1.2, 1.0), (10.0, None, 2.0, 2.0)])
def test_a_heartbeat_that_shifts_the_artifacts_phase(freq, dac, heart_hz, degrees):
    """The electrode-tissue interface is partly capacitive: the pulse shifts the artifact's phase
    as well as its amplitude (Noury & Siegel 2017). A gain follows amplitude only: 2 degrees left
    287x the neural power within 3 Hz of the harmonics (1 degree with a resting 1.2 Hz heartbeat at
    40 Hz: 258x). The phase shift is fitted per gain segment
    on data and regressors high-passed at f / 2 (the slow LFP's slope projects on the derivative),
    filtered to its own lines, and kept where it takes artifact off beside the fundamental: 2.68,
    2.80, 1.26 and 1.90 (10 Hz). Read where each shift stands (not at the segments' middles: a
    delay of 2.8 ms at 20 Hz) and with the gain fitted again on the template with its shift (the
    shift's term leaks into a gain fitted on the template alone): 1.58, 1.63, 1.12 and 1.07."""
    art = ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, heart_rate_hz=heart_hz, heart_depth=0.02, resp_depth=0.01,
                       drift_ppm=40.0, heart_phase_deg=degrees, dac_rate_hz=dac, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4()), seed=1)
    est = TemplateSubtraction().fit(rec.data, fs=rec.fs)
    assert est.report_["blocks"][0]["phase_shift_followed"]
    s = score_cleaning(rec, est.transform(rec.data), lost=est.lost_)
    assert max(s["lfp_band_ratio"]) <= 2.0, s["lfp_band_ratio"]  # 258-287 without
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]
    # without a phase modulation the shift is not followed and nothing changes
    plain = simulate_recording(20.0, artifact=dataclasses.replace(art, heart_phase_deg=0.0),
                               neural=NeuralSpec(units=units4()), seed=1)
    a = TemplateSubtraction().fit(plain.data, fs=plain.fs)
    b = TemplateSubtraction(track_phase=False).fit(plain.data, fs=plain.fs)
    assert not a.report_["blocks"][0]["phase_shift_followed"]
    np.testing.assert_array_equal(a.artifact_, b.artifact_)


def test_a_rhythm_beside_the_fundamental_is_not_followed_as_a_phase_shift():
    """A neural rhythm 0.9 Hz below a 10 Hz fundamental is one line; the gain takes the half of it that reads
    as a change of amplitude and leaves a pair of lines that read as a phase modulation, which following the
    phase shift took off beside the fundamental (a single channel cannot tell them apart). Its derivative then
    put the rhythm beside every harmonic ``h`` times the harmonic's size, where the LFP is weak: 2.97x the
    neural power within 3 Hz of 50 Hz on a channel carrying a weak artifact with a strong 5th harmonic. The
    harmonics now judge too: a phase modulation of the artifact shows beside them, the rhythm does not."""
    art = ArtifactSpec(freq_hz=10.0, amplitude_uv=4400.0, channel_gains=(0.7, -1.5, 0.6, 1.15),
                       harmonics=((0.042, 6.2), (0.023, 5.7), (0.017, 3.7), (0.042, 0.7)), heart_rate_hz=1.8,
                       heart_harmonics=(), resp_rate_hz=0.39, drift_ppm=30.0)
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=[], oscillation_hz=9.1, lfp_uv=36.0),
                             blocks=[BlockSpec(1.0, 18.0, ramp_s=1.1)], seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # no units: the sixths have nothing to count
        est = TemplateSubtraction().fit(rec.data, fs=rec.fs)
        s = score_cleaning(rec, est.transform(rec.data), lost=est.lost_)
    assert not est.report_["blocks"][0]["phase_shift_followed"]
    assert max(s["lfp_band_ratio"]) <= 1.0, s["lfp_band_ratio"]


def test_a_dacs_ramps_are_held_with_its_waveform():
    """The stimulator computes its ramps with the waveform and the DAC holds both through a tick: read
    at the samples themselves, the block's envelope left a sawtooth of the ramp's rise per tick (0.5 s
    ramps from a 1 kHz DAC: 0.2 x noise in the spike band on the ramps, 0.085 over the trace; now 0.03)."""
    from scipy.signal import butter, sosfiltfilt

    from artifactclean.scenarios import locked_units

    art = ArtifactSpec(freq_hz=20.0, amplitude_uv=4000.0, channel_gains=(-1.3, -1.2, 0.45, 1.0), heart_rate_hz=1.6,
                       drift_ppm=40.0, dac_rate_hz=1000.0)
    rec = simulate_recording(8.0, artifact=art, neural=NeuralSpec(units=locked_units()),
                             blocks=[BlockSpec(1.0, 6.0, ramp_s=0.5)], seed=2)
    y = TemplateSubtraction().fit_transform(rec.data, fs=rec.fs)
    sos = butter(4, [300, 6000], btype="band", fs=rec.fs, output="sos")
    err = sosfiltfilt(sos, y - rec.neural, axis=-1)
    fs = int(rec.fs)
    ramps = np.zeros(y.shape[1], dtype=bool)
    ramps[fs:int(1.5 * fs)] = ramps[int(6.5 * fs):7 * fs] = True
    on_ramps = np.sqrt(np.mean(err[:, ramps] ** 2, axis=1)) / rec.spec["neural"]["noise_uv"]
    assert on_ramps.max() <= 0.06, on_ramps
    assert max(score_cleaning(rec, y)["spikeband_residual"]) <= 0.05


@pytest.mark.parametrize("freq", [5.0, 10.0])
def test_a_sham_that_clips_at_its_peak_learns_its_peak(freq):
    """A sham's 2 s reach the active block's amplitude and clip for a few cycles at its peak (3-5% of its
    samples). Counted alike, those cycles were 2-3 of the 14 its window holds, under the share that
    completes a clipped phase, so their rail samples entered the fits at their expectation beyond the
    rail, from a template the rails had cut: its peaks stayed 1-2 mV short, 0.5-1.8 x noise in the spike
    band over the sham. Counted as the fit weighs them (the sham's envelope squared) they are most of it."""
    from scipy.ndimage import binary_dilation
    from scipy.signal import butter, sosfiltfilt

    from artifactclean.scenarios import locked_units

    art = ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, channel_gains=(-0.54, -1.41, 1.36, -0.42),
                       heart_rate_hz=2.0, drift_ppm=20.0, clip_uv=4800.0)
    rec = simulate_recording(12.0, artifact=art, neural=NeuralSpec(units=locked_units()),
                             blocks=[BlockSpec(0.5, 7.0, ramp_s=1.0), BlockSpec(9.0, 2.0, kind="sham", ramp_s=1.0)],
                             seed=1)
    est = TemplateSubtraction()
    y = est.fit_transform(rec.data, fs=rec.fs)
    sos = butter(4, [300, 6000], btype="band", fs=rec.fs, output="sos")
    err = sosfiltfilt(sos, y - rec.neural, axis=-1)
    near = binary_dilation(est.lost_ | rec.clipped, structure=np.ones((1, 121), dtype=bool))  # 2 ms either side
    sham = slice(int(9 * rec.fs), int(11 * rec.fs))
    assert rec.clipped[:, sham].any(axis=1).tolist() == [False, True, True, False]
    rms = [np.sqrt(np.mean(err[c, sham][~near[c, sham]] ** 2)) / rec.spec["neural"]["noise_uv"] for c in range(4)]
    assert max(rms) <= 0.2, rms


def test_samples_beside_a_dacs_edges_are_judged_on_every_strong_channel():
    """The strongest channel clipped (15% of its samples), the reference for the DAC's edges is the
    strongest unclipped one, at half its artifact. Judged on that channel alone, samples within a quarter
    sample of an edge took the wrong tick for about two of every 3.5 s (9.4 ppm: the edges cross a sample
    that often), 0.09 x noise in the spike band; judged on the four strongest channels at once, where
    each is not at a rail (settle_edges), 0.02-0.03."""
    from artifactclean.scenarios import locked_units

    art = ArtifactSpec(freq_hz=5.0, amplitude_uv=4000.0, channel_gains=(0.7, 1.4, -0.6, 0.5), heart_rate_hz=2.26,
                       drift_ppm=9.4, dac_rate_hz=1000.0, clip_uv=5200.0)
    rec = simulate_recording(12.0, artifact=art, neural=NeuralSpec(units=locked_units()),
                             blocks=[BlockSpec(1.0, 10.0, ramp_s=1.0)], seed=1)
    est = TemplateSubtraction()
    y = est.fit_transform(rec.data, fs=rec.fs)
    assert rec.clipped.any(axis=1).tolist() == [False, True, False, False]
    s = score_cleaning(rec, y, lost=est.lost_)
    assert max(s["spikeband_residual"]) <= 0.05, s["spikeband_residual"]
    assert s["recall_ratio"] >= 0.99


@pytest.mark.parametrize("method", ["template", "regression", "pca"])
def test_a_dc_offset_is_taken_off_before_the_fits(method):
    """A DC-coupled amplifier holds tens of millivolts of electrode offset. The fits were blind to it only
    where every bin weighed the same: 20 mV at 40 Hz left the template 4000x the neural power within
    3 Hz of the harmonics and 5 x noise in the spike band, regression and PCA 110-200 x noise. The
    block's level (the plan's mean) comes off first: the same result, offset or not."""
    from artifactclean import clean

    rec = simulate_recording(12.0, artifact=ArtifactSpec(freq_hz=40.0, heart_depth=0.02, resp_depth=0.01,
                                                         drift_ppm=40.0, channel_gains=(1.0, -0.7, 0.45, -1.2)),
                             neural=NeuralSpec(units=[]), seed=1)
    offset = np.array([20000.0, -10000.0, 6000.0, 40000.0])[:, None]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        plain = clean(rec.data, rec.fs, method=method)
        shifted = clean(rec.data + offset, rec.fs, method=method) - offset
    assert np.abs(shifted - plain).max() <= 1e-6 * np.ptp(rec.data)


@pytest.mark.parametrize("method", ["template", "regression", "pca"])
def test_a_drifting_level_is_followed_before_the_fits(method):
    """An electrode's offset drifts (millivolts over tens of seconds on a DC-coupled amplifier). Taken off
    as one level per block, 2 mV at 0.02 Hz left the template 0.11, regression 1.8 and PCA 0.7 x noise in
    the spike band (the gain multiplied the drift in the template's bins; the rows divided it by the
    envelope at the ramps' feet and it swayed their choices). The level is now followed at every sample:
    the spike band and the LFP as without the drift."""
    from artifactclean import clean

    rec = simulate_recording(12.0, artifact=ArtifactSpec(freq_hz=40.0, heart_depth=0.02, resp_depth=0.01,
                                                         drift_ppm=40.0, channel_gains=(1.0, -0.7, 0.45, -1.2)),
                             neural=NeuralSpec(units=units4()), seed=1)
    t = np.arange(rec.data.shape[1]) / rec.fs
    phases = np.random.default_rng(3).uniform(0, 2 * np.pi, (4, 1))
    drift = 2000.0 * np.sin(2 * np.pi * 0.05 * t + phases)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        plain = score_cleaning(rec, clean(rec.data, rec.fs, method=method))
        drifted = score_cleaning(rec, clean(rec.data + drift, rec.fs, method=method) - drift)
    assert max(drifted["spikeband_residual"]) <= max(plain["spikeband_residual"]) + 0.01, \
        (drifted["spikeband_residual"], plain["spikeband_residual"])
    assert max(drifted["lfp_error_away"]) <= max(plain["lfp_error_away"]) + 0.01
    assert drifted["recall_ratio"] >= 0.99


def test_stretch_bounds_read_a_chunk_at_a_time_number_the_samples_as_the_whole_block():
    # the straightforward numbering: floor(u / span) over the whole block, a stretch starting where it changes
    from artifactclean.estimators.cycles import _STRETCH_CHUNK, stretch_bounds

    rng = np.random.default_rng(12)
    for n in (1, 7, _STRETCH_CHUNK, _STRETCH_CHUNK + 1, 3 * _STRETCH_CHUNK + 5):
        u = np.arange(n) * rng.uniform(1e-4, 1e-2) + rng.uniform(-5, 5)
        for span in (0.7, 3.0, 30.0):
            whole = np.concatenate(([0], np.flatnonzero(np.diff(np.floor(u / span).astype(np.int64))) + 1, [n]))
            assert np.array_equal(stretch_bounds(u, span), whole)
    # a stretch starting exactly at a chunk's first sample is found
    u = np.arange(2 * _STRETCH_CHUNK) / _STRETCH_CHUNK
    assert _STRETCH_CHUNK in stretch_bounds(u, 1.0).tolist()


@pytest.mark.parametrize("compiled", [True, False])
def test_segment_positions_read_a_chunk_at_a_time_equal_numpy_interp(compiled):
    # reference: numpy.interp row by row (held at the end knots as numpy.interp holds them)
    from artifactclean.estimators._kernels import SegmentPositions

    rng = np.random.default_rng(13)
    n = 3 * SegmentPositions.chunk + 17
    x = np.sort(rng.uniform(-1.0, 41.0, n))
    xp = np.sort(rng.uniform(0.0, 40.0, 90))
    fp = rng.normal(size=(3, xp.size))
    got = SegmentPositions(xp, x).read(fp, compiled=compiled)
    want = np.stack([np.interp(x, xp, row) for row in fp])
    assert np.abs(got - want).max() < 1e-12
    out = np.zeros((3, n))
    assert SegmentPositions(xp, x).read(fp, out=out, compiled=compiled) is out and np.array_equal(out, got)


def test_segment_positions_compiled_walk_equals_the_numpy_search_to_the_bit():
    # the compiled read walks samples and knots together; the numpy twin searches per sample: the same bits,
    # for samples on the knots, beyond both ends and out of order
    from artifactclean.estimators._kernels import HAVE_NUMBA, SegmentPositions

    if not HAVE_NUMBA:
        pytest.skip("numba not installed")
    rng = np.random.default_rng(14)
    xp = np.sort(rng.uniform(0.0, 40.0, 300))
    x = np.sort(np.concatenate([xp, rng.uniform(-2.0, 42.0, 50_000)]))
    fp = rng.normal(size=(2, xp.size))
    for pts in (x, rng.permutation(x)):
        walk = SegmentPositions(xp, pts).read(fp, compiled=True)
        assert np.array_equal(walk, SegmentPositions(xp, pts).read(fp, compiled=False))


@pytest.mark.parametrize("shape", [(1, 1, 300), (2, 57, 300), (3, 10, 7), (1, 400, 25)])
def test_group_window_sums_the_clamped_windows(shape):
    # reference: the window's groups added one by one; and, to the bit, the running sum of numpy.cumsum read
    # at index arrays (the form the slices and the row-by-row sum replaced)
    from artifactclean.estimators.template import _group_window

    rng = np.random.default_rng(15)
    grp = rng.normal(size=shape) * 10.0 ** rng.uniform(-3, 3, size=shape)
    n = shape[1]
    for k in (0, 1, 2, 9, 60):
        got = _group_window(grp, k)
        plain = np.stack([grp[:, max(0, i - k):min(n, i + k + 1)].sum(axis=1) for i in range(n)], axis=1)
        np.testing.assert_allclose(got, plain, rtol=1e-9, atol=1e-9 * np.abs(grp).sum())
        c = np.zeros((shape[0], n + 1, shape[2]))
        np.cumsum(grp, axis=1, out=c[:, 1:])
        idx = np.arange(n)
        assert np.array_equal(got, c[:, np.minimum(idx + k + 1, n)] - c[:, np.maximum(idx - k, 0)])


def test_every_probe_of_the_steps_response_sees_the_stretchs_own_weights(monkeypatch):
    # the plan learns the steps' response from several fits of one stretch (TemplateSubtraction._edge_plan); a fit
    # writes its outlier flags into the weights it is given, and the probes shared one array until session 38:
    # each saw the flags of the ones before it as lost samples
    from artifactclean.scenarios import locked_units

    seen = []
    block = TemplateSubtraction._block

    def recording(self, xb, wb, *args, **kwargs):
        if getattr(self, "_edge_probe", None) is not None:
            seen.append(wb.copy())
        return block(self, xb, wb, *args, **kwargs)

    monkeypatch.setattr(TemplateSubtraction, "_block", recording)
    art = ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0, lowpass_hz=7500.0)
    rec = simulate_recording(8.0, artifact=art, neural=NeuralSpec(units=locked_units()), seed=2)
    TemplateSubtraction().fit(rec.data, fs=rec.fs)
    assert len(seen) >= 3  # the settled fit, two rounds, the judgement
    for wb in seen[1:]:
        np.testing.assert_array_equal(wb, seen[0])
