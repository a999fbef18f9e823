"""The DAC grid: ticks locked to the cycle, or repeating every few cycles, found from the steps."""

import numpy as np
import pytest

from artifactclean.staircase import find_dac_grid, find_dac_period


def _held_sine(freq, dac, fs=30000.0, seconds=6.0, ppm=40.0, seed=0):
    """A DAC staircase of a sine on a clock ``ppm`` fast, sampled by the amplifier, with white noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(seconds * fs)) / fs
    clock = 1 + ppm * 1e-6
    tick = 1.0 / (dac * clock)
    held = (np.floor(t / tick + 0.37) - 0.37) * tick
    x = 4000.0 * np.cos(2 * np.pi * freq * clock * held) + 10.0 * rng.standard_normal(t.size)
    cycles = freq * clock * t  # the unwrapped stimulation phase, as the model gives it
    return x, cycles, fs, freq * clock


@pytest.mark.parametrize("freq, ticks, period", [(13.0, 1000, 13), (6.0, 500, 3), (30.0, 100, 3), (6.5, 2000, 13)])
def test_ticks_that_repeat_every_few_cycles(freq, ticks, period):
    """1000 / 13 = 76.9 updates per cycle: the same phases every 13 cycles, 1000 updates per period."""
    x, cycles, fs, f = _held_sine(freq, 1000.0)
    grid = find_dac_period(x, cycles, fs, f)
    assert grid is not None and (grid.ticks_per_cycle, grid.cycles_per_period) == (ticks, period)
    assert grid.concentration > 0.95
    # every sample of a tick gets one key: the held value is constant within a key
    key = grid.tick_index(cycles)
    edge = grid.edge_distance(cycles)
    inner = (edge > 0.05) & (edge < 0.95)
    spread = [np.ptp(x[inner][key[inner] == k]) for k in np.unique(key[inner])[100:200]]
    assert np.median(spread) < 80.0  # the noise's range over ~30 samples, not a step of ~190 uV


def test_a_grid_of_slots_that_only_holds_every_third_tick_is_refused():
    """6 Hz from 1 kHz: 500 slots per cycle fit every tick (each third slot, turning from cycle to
    cycle; concentration 0.95), but a template per slot would mix held values; the ticks' own
    spacing (166.7 per cycle) refuses it."""
    x, cycles, fs, f = _held_sine(6.0, 1000.0)
    assert find_dac_grid(x, cycles, fs, f) is None
    x, cycles, fs, f = _held_sine(10.0, 1000.0)
    grid = find_dac_grid(x, cycles, fs, f)
    assert grid is not None and grid.ticks_per_cycle == 100 and grid.cycles_per_period == 1


def test_no_period_when_the_ticks_never_repeat_soon():
    x, cycles, fs, f = _held_sine(13.37, 1000.0)  # every 1337 cycles
    assert find_dac_grid(x, cycles, fs, f) is None
    assert find_dac_period(x, cycles, fs, f) is None


@pytest.mark.parametrize("freq", [13.37, 10.25, 7.3])
def test_a_free_running_dac_clock_is_found(freq):
    """Any number of updates per cycle (an individual alpha frequency from a 1 kHz DAC): the period
    from the steps, then the ticks' phase; every sample's tick number as the staircase has it."""
    from artifactclean.staircase import find_dac_clock

    x, cycles, fs, f = _held_sine(freq, 1000.0)
    clock = find_dac_clock(x, cycles, fs, f)
    assert clock is not None
    assert clock.ticks_per_cycle == pytest.approx(1000.0 / freq, rel=1e-6)  # the clock's drift cancels
    # the held value is the waveform at the phase of the sample's tick
    held = 4000.0 * np.cos(2 * np.pi * clock.held_cycles(clock.tick_index(cycles)))
    inner = (clock.edge_distance(cycles) > 0.02) & (clock.edge_distance(cycles) < 0.98)
    assert np.sqrt(np.mean((x - held)[inner] ** 2)) < 12.0  # the white noise (10 uV), no steps left


@pytest.mark.parametrize("freq, dac, ticks, crowded", [(40.0, 5000.0, 125, True), (20.0, 5000.0, 250, False),
                                                      (40.0, 1000.0, 25, False)])
def test_ticks_a_few_samples_apart_are_found(freq, dac, ticks, crowded):
    """A 5 kHz DAC sampled at 30 kHz steps every six samples: a step touches three windows of the step
    statistic, so half of them hold one and their MAD (46 against 22 uV of noise at 40 Hz) hid all but
    the steepest steps; no grid was found and the staircase stayed in the spike band (0.6x the noise).
    Where the MAD exceeds 1.5 times what the first differences (flat within a tick) give, theirs is the
    noise; a 1 kHz DAC keeps the MAD."""
    from artifactclean.staircase import _step_statistic

    x, cycles, fs, f = _held_sine(freq, dac)
    q, sd = _step_statistic(x)
    mad = 1.4826 * np.median(np.abs(q - np.median(q)))
    if crowded:
        # the statistic's noise alone is sqrt(5) times the white noise's 10 uV (a variance of 20 / 4)
        assert sd < 1.3 * 10.0 * np.sqrt(5.0) < mad, (sd, mad)
    else:
        # smaller steps at 20 Hz, or fewer (1 kHz): the MAD stands
        assert sd == mad
    grid = find_dac_grid(x, cycles, fs, f)
    assert grid is not None and grid.ticks_per_cycle == ticks


@pytest.mark.parametrize("dac, ticks, cycles", [(5000.0, 125, 1), (7500.0, 375, 2)])
def test_a_fast_dac_leaves_the_spike_band_clean(dac, ticks, cycles):
    """The same end to end: 40 Hz from a 5 kHz DAC (six samples a tick), 4 channels with units,
    heartbeat and drift; and from 7.5 kHz (four samples a tick, 375 ticks every 2 cycles), whose steps
    of at most 130-260 uV stay under the 8 SDs that start the search for ticks repeating every few
    cycles: 6 SDs start it now (spike band 0.27-0.33 x noise before, LFP away 0.10)."""
    from artifactclean import TemplateSubtraction
    from artifactclean.evaluation import score_cleaning
    from artifactclean.synthetic import ArtifactSpec, NeuralSpec, simulate_recording

    from conftest import units4

    art = ArtifactSpec(freq_hz=40.0, amplitude_uv=4000.0, heart_depth=0.02, heart_harmonics=(), resp_depth=0.01,
                       drift_ppm=40.0, dac_rate_hz=dac, channel_gains=(1.0, -0.7, 0.45, -1.2))
    rec = simulate_recording(20.0, artifact=art, neural=NeuralSpec(units=units4()), seed=4)
    est = TemplateSubtraction()
    s = score_cleaning(rec, est.fit_transform(rec.data, fs=rec.fs))
    blk = est.report_["blocks"][0]
    assert (blk["dac_ticks_per_cycle"], blk["dac_cycles_per_period"]) == (ticks, cycles)
    assert max(s["spikeband_residual"]) <= 0.1, s["spikeband_residual"]
    assert max(s["lfp_error_away"]) <= 0.05, s["lfp_error_away"]
