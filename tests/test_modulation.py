"""The gain filter: modulation lines pass, the neural floor and ramps are handled."""

import numpy as np
import pytest
from scipy import signal

from artifactclean.modulation import FOLLOW_HZ, KEEP_HZ, GainResponse, as_moved, as_seen, design_gain_response, ramp_cutoff, \
    seen_by_segments, segment_gain, segment_transfer, \
    shift_centres, sideband_support, smooth_gain, to_middles


def _gain_series(rng, rate=40.0, seconds=20.0, lines=((2.0, 0.02), (4.0, 0.01))):
    t = np.arange(int(rate * seconds)) / rate
    g = 1.0 + sum(a * np.cos(2 * np.pi * f * t + 0.3) for f, a in lines)
    return t, g, g + 0.002 * rng.standard_normal(t.size)


def test_response_passes_lines_and_stops_floor(rng):
    rate = 40.0
    lines = ((4.0, 0.02), (6.0, 0.01))
    _, truth, noisy = _gain_series(rng, rate, lines=lines)
    resp = design_gain_response(noisy[None], rate, max_hz=10.0)
    f, r = resp.freqs, resp.response[0]
    at = lambda hz: r[np.argmin(np.abs(f - hz))]  # noqa: E731
    assert at(4.0) > 0.9 and at(6.0) > 0.9
    assert at(5.0) == 0.0 and at(8.0) == 0.0 and at(12.0) == 0.0
    assert np.all(r[f <= FOLLOW_HZ] == 1.0)
    assert [round(x) for x in resp.passed_lines()] == [4, 6]
    # closer to the modulation than a fixed low-pass at the same top frequency
    # (scipy.signal.butter + sosfiltfilt): the floor between the lines is cut. As the estimators
    # use it: gain samples are segment means, read back by linear interpolation
    fine = 100
    t_fine = np.arange(truth.size * fine) / (rate * fine)
    cont = 1.0 + sum(a * np.cos(2 * np.pi * f0 * t_fine + 0.3) for f0, a in lines)
    seg = cont.reshape(-1, fine).mean(axis=1) + (noisy - truth)
    centres = (np.arange(seg.size) + 0.5) / rate
    out = np.interp(t_fine, centres, smooth_gain(seg[None], resp, rate)[0])
    fixed = np.interp(t_fine, centres, signal.sosfiltfilt(signal.butter(2, 10.0, fs=rate, output="sos"), seg))
    inner = slice(100 * fine, -100 * fine)
    assert np.std((out - cont)[inner]) < 0.7 * np.std((fixed - cont)[inner])


def test_taps_have_unit_gain_at_zero_frequency(rng):
    rate = 40.0
    _, _, noisy = _gain_series(rng, rate)
    resp = design_gain_response(noisy[None], rate, max_hz=10.0)
    taps = resp.taps(0)
    assert taps.size % 2 == 1 and np.allclose(taps, taps[::-1])
    # scipy.signal.freqz as the reference for the FIR's response
    _, h = signal.freqz(taps, worN=np.array([0.0, 2.0, 20.0 - 1e-9]), fs=rate)
    assert abs(abs(h[0]) - 1.0) < 1e-12 and abs(h[1]) > 0.7 and abs(h[2]) < 0.05


def test_envelope_ramps_are_followed_exactly(rng):
    rate = 40.0
    n = 800
    env = np.clip(np.minimum(np.arange(n) / 80.0, (n - np.arange(n)) / 80.0), 0.0, 1.0)
    _, _, noisy = _gain_series(rng, rate, seconds=n / rate)
    resp = design_gain_response(noisy[None], rate, max_hz=10.0)
    gain = 1.7 * env  # a pure ramped envelope, no modulation, scaled
    out = smooth_gain(gain[None], resp, rate, env, max_hz=10.0)[0]
    np.testing.assert_allclose(out, gain, atol=1e-9)


def test_a_resting_heartbeat_passes_whole(rng):
    """A person's heartbeat (1.2 Hz, pulsatile: harmonics at 2.4 and 3.6 Hz) with respiration
    (0.27 Hz) crowds the running median that judges each line: the fundamental passed at 0.64
    (the FIR's response, scipy.signal.freqz) and left a third of its sidebands."""
    rate = 40.0
    t = np.arange(int(20 * rate)) / rate
    g = 1.0 + 0.01 * np.sin(2 * np.pi * 0.27 * t)
    for k, a in ((1, 0.0104), (2, 0.0059), (3, 0.0025)):
        g += a * np.cos(2 * np.pi * 1.2 * k * t + k)
    g += 0.0005 * rng.standard_normal(t.size)
    resp = design_gain_response(g[None], rate, max_hz=10.0)
    _, h = signal.freqz(resp.taps(0), worN=np.array([0.27, 1.2, 2.4, 3.6]), fs=rate)
    assert np.all(np.abs(h[:3]) > 0.95), np.abs(h)
    assert abs(h[3]) > 0.8, np.abs(h)


def test_segment_gain_ignores_offsets(rng):
    fs, f = 3000.0, 10.0
    n = int(fs * 4)
    u = np.arange(n) * f / fs
    shape = np.sin(2 * np.pi * u) + 0.3 * np.sin(4 * np.pi * u + 1.0)
    g_true = 1.0 + 0.05 * np.sin(2 * np.pi * 1.5 * np.arange(n) / fs)
    offset = 50.0  # an LFP offset, larger than the modulation
    x = (100.0 * g_true * shape + offset)[None]
    g, rate = segment_gain(x, np.ones_like(x), u, fs, f, per_cycle=4)
    assert rate == 40.0
    centres = ((np.arange(g.shape[1]) + 0.5) / 4 * fs / f).astype(int)
    # the first and last two segments read the gain's slope from one side only
    np.testing.assert_allclose(g[0, 2:-2], g_true[np.minimum(centres, n - 1)][2:-2], atol=0.015)


@pytest.mark.parametrize("hz", [2.0, 6.0, 8.0])
def test_a_modulation_as_the_move_to_the_middles_leaves_it(hz):
    # gains standing off their middles by a pattern repeating every cycle (3 segments), moved back by a
    # cycle's slope (to_middles): as_moved predicts what is left, to second order in the shift, where
    # a cycle's mean takes most of a fast modulation's slope off
    rate, per_cycle = 30.0, 3
    k = np.arange(600)
    shift = np.resize([0.12, -0.05, 0.1], k.size)
    mod = lambda t: 0.02 * np.cos(2 * np.pi * hz * t + 0.4)  # noqa: E731
    moved = to_middles(mod((k + 0.5 + shift) / rate), shift, per_cycle)
    middles = mod((k + 0.5) / rate)
    exact = -0.02 * 2 * np.pi * hz / rate * np.sin(2 * np.pi * hz * (k + 0.5) / rate + 0.4)
    inner = slice(3, -3)
    err = np.abs(as_moved(middles, shift, per_cycle, exact) - moved)[inner].max()
    left = np.abs(middles - moved)[inner].max()
    # the second-order term: amplitude x (2 pi hz shift / rate)^2 / 2
    assert err <= 0.02 * (2 * np.pi * hz * np.abs(shift).max() / rate) ** 2 / 2, (err, left)
    assert err < left / 3, (err, left)


def _cycle(u):
    """A cycle with harmonics, as the generator's artifact has them."""
    return np.sin(2 * np.pi * u) + 0.3 * np.sin(4 * np.pi * u + 1.0) + 0.15 * np.sin(6 * np.pi * u + 0.4)


def test_a_part_held_at_a_rail_sees_a_modulation_as_a_plain_mean():
    # a channel clipped at its peaks holds one part of a 5 Hz cycle (5 parts) at the rail in its mean
    # cycle: that part's weights were rounding error over nothing (summing to 6e13 in absolute value), and
    # its transfer, times the pulse model, gave the channel a gain of 1e11. The other parts as before; a
    # sine's part at its peak, legitimately the largest weights, stays as its least-squares fit
    f, n_bins, per_cycle, hz = 5.0, 600, 5, [2.0, 4.0, 6.0]
    u = (np.arange(n_bins) + 0.5) / n_bins
    sine = np.cos(2 * np.pi * (u - 0.1))  # the peak in the middle of part 0
    rail = 0.8
    clipped = np.minimum(sine, rail)
    clipped[u < 0.2] = rail  # the whole of part 0 at the rail
    h = segment_transfer(np.stack([sine, clipped]), per_cycle, f, hz)
    assert np.all(np.isfinite(h)) and np.abs(h).max() < 10
    np.testing.assert_array_equal(h[1, 0], np.ones(3))
    np.testing.assert_allclose(h[1, 1:], segment_transfer(clipped[None], per_cycle, f, hz)[0, 1:])
    assert abs(h[0, 0, 0]) > 0.5  # the unclipped peak part is fitted, not replaced


@pytest.mark.parametrize("per_cycle, hz", [(5, 4.0), (5, 6.0), (3, 6.0)])
def test_a_segments_gain_sees_a_modulation_as_its_least_squares_fit(per_cycle, hz):
    # reference: numpy.linalg.lstsq of exp(2 pi i hz tau) t on [t, 1] over each part of the cycle (the
    # segment gain's definition: the mean cycle's scale about the segment's means), tau from its middle
    f, n_bins = 5.0, 600
    u = (np.arange(n_bins) + 0.5) / n_bins
    cycle = _cycle(u)[None]
    h = segment_transfer(cycle, per_cycle, f, [hz])[0, :, 0]
    for k in range(per_cycle):
        sel = np.floor(u * per_cycle) == k
        t = cycle[0, sel]
        tau = (u[sel] - (k + 0.5) / per_cycle) / f
        design = np.stack([t, np.ones_like(t)], axis=1).astype(complex)
        ref = np.linalg.lstsq(design, np.exp(2j * np.pi * hz * tau) * t, rcond=None)[0][0]
        assert abs(h[k] - ref) < 1e-9
    # a mean over a segment would see sinc(hz / rate): the segments' weights change sign and see more
    assert abs(np.mean(h)) > np.sinc(hz / (f * per_cycle))


@pytest.mark.parametrize("hz", [4.0, 6.0])
def test_a_modulation_as_segment_gains_hold_it(hz):
    # an artifact modulated at 4 or 6 Hz by 2 %, 5 Hz stimulation, 5 segments a cycle: segment_gain's gains
    # against as_seen from the stretch's own mean cycle (0.3 % of the modulation off), and against as_moved
    # (first order in the shifts, a segment taken for a plain mean about its centre: 9 % and 18 % off) and
    # the modulation at the middles (32 % and 67 %)
    fs, f, per_cycle = 6000.0, 5.0, 5
    n = int(20 * fs)
    t = np.arange(n) / fs
    u = t * f * (1 + 40e-6) + 0.1234  # samples off the bins' edges, as a drifting stimulator puts them
    mod = 0.02 * np.cos(2 * np.pi * hz * t + 0.7)
    x = (1000.0 * (1.0 + mod) * _cycle(u))[None]
    g, rate, shift, cycle = segment_gain(x, np.ones_like(x), u, fs, f, per_cycle, return_shift=True, return_cycle=True)
    # what the phase bins' width does to the gains (a few tenths of a per cent where a segment holds a flat
    # part of the cycle) is the same without the modulation: the modulation's part is the difference
    g = g - segment_gain(x / (1.0 + mod), np.ones_like(x), u, fs, f, per_cycle)[0]
    first = int(np.floor(u[0] * per_cycle))
    mid = (first + np.arange(g.shape[1]) + 0.5) / per_cycle
    reg = 0.02 * np.exp(1j * (2 * np.pi * hz * (mid - 0.1234) / (f * (1 + 40e-6)) + 0.7))[None]
    seen = np.real(as_seen(reg, segment_transfer(cycle, per_cycle, f, [hz])[0], first, shift[0], per_cycle))[0]
    slope = np.real(reg * 2j * np.pi * hz / rate)
    moved = np.real(as_moved(reg, shift, per_cycle, slope))[0]
    inner = slice(10, -10)
    # the mean cycle holds the stretch's mean gain: compared about their means
    err = lambda pred: np.std((g[0] - pred)[inner]) / 0.02  # noqa: E731
    err_seen, err_moved = err(seen), err(moved)
    assert err_seen < 0.01, err_seen
    assert err_moved > 3 * err_seen, (err_seen, err_moved)


@pytest.mark.parametrize("hz", [2.0, 6.0])
def test_segment_gains_hold_a_modulation_as_seen_by_segments_says(hz):
    # the gains of a modulated 5 Hz artifact (5 segments a cycle), less those of the same artifact unmodulated,
    # demodulated at the modulation: their mean ratio to it is seen_by_segments' (within 1 %), and is not a
    # segment's plain mean (sinc; here 1.008 + 0.053i at 2 Hz and 0.84 + 0.37i at 6 Hz against 0.99 and 0.91)
    fs, f, per_cycle = 6000.0, 5.0, 5
    n = int(20 * fs)
    t = np.arange(n) / fs
    u = t * f * (1 + 40e-6) + 0.1234
    x = (1000.0 * _cycle(u))[None]
    mod = 0.02 * np.cos(2 * np.pi * hz * t + 0.7)
    g, rate, shift, cycle = segment_gain(x * (1 + mod), np.ones_like(x), u, fs, f, per_cycle, return_shift=True,
                                         return_cycle=True)
    g = g - segment_gain(x, np.ones_like(x), u, fs, f, per_cycle)[0]
    first = int(np.floor(u[0] * per_cycle))
    mid = ((first + np.arange(g.shape[1]) + 0.5) / per_cycle - 0.1234) / (f * (1 + 40e-6))
    inner = slice(10, -10)
    measured = 2 * np.mean((g[0] * np.exp(-1j * (2 * np.pi * hz * mid + 0.7)))[inner]) / 0.02
    said = seen_by_segments(cycle, per_cycle, f, first, shift, [hz])[0, 0]
    assert abs(measured - said) < 0.01 * abs(said), (measured, said)
    assert abs(said - np.sinc(hz / rate)) > 0.05, (said, np.sinc(hz / rate))


def test_the_gain_filter_restores_what_the_segments_take_off():
    # reference: scipy.signal.freqz of the taps. Where the response passes in full, the filter's gain is
    # 1 / (seen x sinc^2) with the segments' own seen, 1 / sinc^3 without it (a segment's plain mean)
    rate = 25.0
    freqs = np.linspace(0, rate / 2, 101)
    resp = np.ones((1, freqs.size))
    plain = GainResponse(freqs, resp, rate)
    seen = GainResponse(freqs, resp, rate, seen=(1 + 0.05 * (freqs / 2.0) ** 2)[None].astype(complex))
    for hz in (2.0, 3.0):
        for r, mean in ((plain, np.sinc(hz / rate)), (seen, 1 + 0.05 * (hz / 2.0) ** 2)):
            w, h = signal.freqz(r.taps(0, segments=True), worN=[hz], fs=rate)
            assert abs(abs(h[0]) * mean * np.sinc(hz / rate) ** 2 - 1) < 0.01, (hz, abs(h[0]))
    # rows of whole cycles (segments=False) keep the plain mean's sinc
    np.testing.assert_array_equal(seen.taps(0), plain.taps(0))


def test_heartbeat_lines_pass_through_the_ramps(rng):
    """Within a ramp the gain follows the ramp's shape below max_hz and, as on the plateau, the
    response's lines: a 4 Hz heartbeat harmonic passed by the response is not cut at the ramps."""
    rate = 40.0
    n = 1600
    t = np.arange(n) / rate
    env = np.clip(np.minimum(t / 4.0, (t[-1] - t) / 4.0), 0.0, 1.0)  # 4 s ramps
    line = 0.02 * np.sin(2 * np.pi * 4.0 * t)
    freqs = np.linspace(0, rate / 2, 161)
    resp = ((freqs <= 1.0) | (np.abs(freqs - 4.0) < 0.5)).astype(float)
    response = GainResponse(freqs, resp[None], rate)
    gain = env * (1 + line)
    out = smooth_gain(gain[None], response, rate, env, max_hz=2.0)[0]
    ramp = (env > 0.3) & (env < 0.7)
    # the 4 Hz line on the ramp is followed (the old blend replaced it there by a 2 Hz low-pass)
    err = out[ramp] - gain[ramp]
    assert np.sqrt(np.mean(err ** 2)) < 0.25 * np.sqrt(np.mean((env * line)[ramp] ** 2))


def test_ramp_cutoff_follows_the_ramp_length():
    from artifactclean.stimulation import StimBlock

    fs = 30000.0

    def blk(up_s, down_s, f=5.0):
        return StimBlock("active", 0, int(20 * fs), int(up_s * fs), int((20 - down_s) * fs), f, 0.0, 0, 1.0, None)

    assert ramp_cutoff(blk(0.5, 2.0), fs, 10.0) == pytest.approx(4.0)  # 2 / shorter ramp
    assert ramp_cutoff(blk(0.1, 0.1), fs, 10.0) == 10.0  # capped at max_hz
    assert ramp_cutoff(blk(10.0, 10.0), fs, 10.0) == 2 * KEEP_HZ
    assert ramp_cutoff(blk(10.0, 10.0, f=20.0), fs, 10.0) == pytest.approx(5.0)  # f / 4
    assert ramp_cutoff(blk(0.0, 0.0), fs, 10.0) == 10.0  # abrupt edges
    # a piece of the block (window) keeps the block's ramps
    from artifactclean.stimulation import StimulationModel

    piece = StimulationModel(fs, int(20 * fs), [blk(0.5, 2.0)]).window(int(0.3 * fs), int(10 * fs)).blocks[0]
    assert piece.ramp_up_stop - piece.start < int(0.5 * fs)  # clipped to the piece ...
    assert ramp_cutoff(piece, fs, 10.0) == pytest.approx(4.0)  # ... its ramp is not


def test_segment_means_and_interpolation_are_compensated():
    """A 6 Hz modulation seen through 40 Hz segment means and read back by linear interpolation
    comes out at its full amplitude: the boxcar (sinc) and the triangle (sinc^2) kernels are textbook
    Fourier pairs (e.g. Oppenheim & Schafer, Discrete-Time Signal Processing), 11% short uncompensated."""
    fine_rate, rate, f_mod = 4000.0, 40.0, 6.0
    t = np.arange(int(20 * fine_rate)) / fine_rate
    g = 1.0 + 0.02 * np.sin(2 * np.pi * f_mod * t)
    per = int(fine_rate / rate)
    seg = g.reshape(-1, per).mean(axis=1)
    centres = (np.arange(seg.size) + 0.5) / rate
    freqs = np.linspace(0, rate / 2, 81)
    response = GainResponse(freqs, (freqs <= 10.0).astype(float)[None], rate)
    out = np.interp(t, centres, smooth_gain(seg[None], response, rate)[0])
    core = slice(int(4 * fine_rate), int(16 * fine_rate))
    amp = 2 * np.abs(np.mean((out[core] - 1.0) * np.exp(-2j * np.pi * f_mod * t[core])))
    assert abs(amp / 0.02 - 1.0) < 0.01, amp / 0.02
    assert abs(np.sinc(f_mod / rate) ** 3 - 0.894) < 0.001  # what it was short by


@pytest.mark.parametrize("compiled", [False, True])
def test_a_segment_gain_stands_at_its_weighted_centre(rng, compiled):
    """Per segment, the gain of ``x = g(i) t + offset`` fitted with an offset (least squares, checked
    against numpy.linalg.lstsq) equals g at the segment's reported centre when g is linear in i:
    not at the segment's middle, where the template is not symmetric."""
    from artifactclean.estimators._kernels import segment_stats

    n = 3000
    i = np.arange(n)
    t = np.cos(2 * np.pi * i / 600) + 0.4 * np.cos(4 * np.pi * i / 600 + 1.0)
    g = 1.0 + 2e-4 * i
    x = (g * t + 30.0)[None]
    w = (rng.uniform(size=(1, n)) > 0.05).astype(float)
    starts = np.arange(0, n, 150)
    num, den, _, centre = segment_stats(x, w, t[None], starts, compiled=compiled)
    for k, a in enumerate(starts):
        sel = slice(a, a + 150)
        ok = w[0, sel] > 0
        design = np.column_stack([t[sel][ok], np.ones(ok.sum())])
        ls_gain = np.linalg.lstsq(design, x[0, sel][ok], rcond=None)[0][0]
        assert num[0, k] / den[0, k] == pytest.approx(ls_gain, rel=1e-9)
        assert ls_gain == pytest.approx(1.0 + 2e-4 * (a + centre[0, k]), rel=1e-9)
    # the centres are not the middles: that is what a gain placed at the middles got wrong
    assert np.max(np.abs(centre[0] - 74.5)) > 10


def test_everything_below_the_follow_band_passes(rng):
    """Below follow_below(f) the response is 1 whatever the spectrum: 2.75 Hz, at most f / 2."""
    from artifactclean.modulation import follow_below

    assert follow_below(20.0) == FOLLOW_HZ == 2.75
    assert follow_below(1.0) == 0.5
    rate = 25.0  # 1 Hz stimulation, 25 gain segments per cycle
    _, _, noisy = _gain_series(rng, rate, lines=((4.0, 0.02),))
    for follow in (follow_below(1.0), follow_below(20.0)):
        resp = design_gain_response(noisy[None], rate, max_hz=10.0, follow_hz=follow)
        f, r = resp.freqs, resp.response[0]
        assert np.all(r[f <= follow] == 1.0)
        assert r[np.argmin(np.abs(f - 2.0))] == (1.0 if follow > 2.0 else 0.0)


def test_sideband_support_tells_a_modulation_from_a_rhythm(rng):
    """A heartbeat changing the artifact's amplitude (and its phase in step) puts equal sidebands on both
    sides of the fundamental; a neural rhythm near it is one line. Both look like a modulation in the
    gain. The support passes the pair and stops the single line, and a pair whose lower sideband is
    buried in a strong LFP floor is not taken for a single line."""
    f, fsd, seconds = 13.0, 416.0, 20.0
    t = np.arange(int(fsd * seconds)) / fsd
    u = f * t  # stimulation phase, cycles
    heart = 0.02 * np.cos(2 * np.pi * 4.0 * t + 0.4)
    # amplitude and phase modulated in step: sidebands of sqrt(m^2 + p^2) / 2 on each side
    x = 4000 * (1 + heart) * np.cos(2 * np.pi * u + 0.5 * heart)
    wander = np.cumsum(0.02 * rng.standard_normal(t.size))  # a rhythm's phase drifts
    x += 15 * np.sin(2 * np.pi * 6.75 * t + wander)  # at f - 6.25 Hz only
    x += 2.0 * rng.standard_normal(t.size)
    # a second pair at 8 Hz whose lower sideband (5 Hz) lies under a strong, broad LFP band
    x += 4000 * 0.002 * np.cos(2 * np.pi * 8.0 * t) * np.cos(2 * np.pi * u)
    b, a = signal.butter(2, [3.5, 6.5], btype="band", fs=fsd)
    x += signal.lfilter(b, a, 150 * rng.standard_normal(t.size))
    freqs = np.arange(0, 13.0, 0.25)
    s = sideband_support(x[None], np.ones((1, t.size)), u, fsd, f, freqs, above_hz=FOLLOW_HZ)[0]
    at = lambda hz: s[np.argmin(np.abs(freqs - hz))]  # noqa: E731
    assert np.all(s[freqs <= FOLLOW_HZ] == 1.0)
    assert at(4.0) == 1.0
    assert at(6.25) == 0.0
    assert at(8.0) > 0.9


def test_a_gain_line_that_neither_side_shows_is_not_followed(rng):
    """A neural rhythm's slope over part of a cycle reads as a line of the raw gain (a 6 Hz rhythm under
    a third of a 10 Hz cycle) with nothing at f +- 6 Hz; the pair test alone passed it, as a pair of
    nothing, and the gain put a pair at 4 and 16 Hz. A real modulation with the same gain line shows
    beside the fundamental and passes."""
    f, fsd, seconds, rate = 10.0, 320.0, 20.0, 30.0
    t = np.arange(int(fsd * seconds)) / fsd
    u = f * t
    tg = np.arange(int(rate * seconds)) / rate
    gain = 1.0 + 0.002 * np.cos(2 * np.pi * 6.0 * tg) + 2e-4 * rng.standard_normal(tg.size)
    freqs = np.arange(0, 10.01, 0.25)
    for modulated in (False, True):
        m = 0.002 * np.cos(2 * np.pi * 6.0 * t) if modulated else 0.0
        x = 4000 * (1 + m) * np.cos(2 * np.pi * u) + 2.0 * rng.standard_normal(t.size)
        s = sideband_support(x[None], np.ones((1, t.size)), u, fsd, f, freqs, above_hz=FOLLOW_HZ,
                             gain=gain[None], gain_rate=rate)[0]
        plain = sideband_support(x[None], np.ones((1, t.size)), u, fsd, f, freqs, above_hz=FOLLOW_HZ)[0]
        at = lambda v, hz: v[np.argmin(np.abs(freqs - hz))]  # noqa: E731
        assert at(plain, 6.0) == 1.0  # a pair of nothing, or a pair: the pair test passes both
        assert at(s, 6.0) == (1.0 if modulated else 0.0)
        assert np.all(s[freqs <= FOLLOW_HZ] == 1.0)


def test_a_phase_shift_stands_where_the_joint_fit_reads_it(rng):
    # per segment x = g t + h(i) d + offset with a shift h changing linearly: numpy.linalg.lstsq's h is h at
    # the position shift_centres gives, which is not the segment's middle for a waveform with harmonics
    n_seg, length = 6, 750  # half cycles of 20 Hz at 30 kHz
    i = np.arange(n_seg * length)
    phase = i / (2 * length) + 0.1
    t = np.cos(2 * np.pi * phase) + 0.3 * np.cos(4 * np.pi * phase + 0.7)
    d = -2 * np.pi * np.sin(2 * np.pi * phase) - 1.2 * np.pi * np.sin(4 * np.pi * phase + 0.7)
    h = 0.01 + 2e-6 * i
    x = 1.02 * t + h * d + 3.0
    w = np.ones_like(x)
    w[rng.random(x.size) < 0.05] = 0.0  # lost samples count as in the fits
    starts = np.arange(n_seg) * length
    centre = shift_centres(t[None], d[None], w[None], starts)[0]
    for k, s0 in enumerate(starts):
        sl = slice(s0, s0 + length)
        keep = w[sl] > 0
        a = np.column_stack((t[sl], d[sl], np.ones(length)))[keep]
        fitted = np.linalg.lstsq(a, x[sl][keep], rcond=None)[0][1]
        assert fitted == pytest.approx(0.01 + 2e-6 * (s0 + centre[k]), rel=1e-6)
    assert np.max(np.abs(centre - (length - 1) / 2)) > 20  # samples off the middle


def test_gain_lines_whose_image_falls_in_the_strongest_lfp_are_stopped():
    """Beyond what the gain always follows, a line at d Hz whose image below the fundamental (f - d) lies
    under 2 Hz does not pass: at 5 Hz stimulation the floor's lines at 3-3.3 Hz passed and took the 1.7-2 Hz
    LFP with them."""
    from artifactclean.estimators.cycles import LOW_IMAGE_HZ, pass_heart, stop_low_images
    from artifactclean.modulation import follow_below
    from artifactclean.pulse import PulseModel

    freqs = np.linspace(0, 15, 121)
    for f, first_stopped in ((5.0, 5.0 - LOW_IMAGE_HZ), (3.0, FOLLOW_HZ), (20.0, np.inf)):
        response = GainResponse(freqs, np.ones((2, freqs.size)), 30.0, phase=np.ones((2, freqs.size)))
        stopped = stop_low_images(response, f, follow_below(f))
        expected = freqs > first_stopped
        assert np.array_equal(stopped, expected), f
        for r in (response.response, response.phase):
            assert np.all(r[:, expected] == 0) and np.all(r[:, ~expected] == 1), f
    # a modelled heart's own line still passes whole, after the stop (a 3.2 Hz heart at 5 Hz)
    response = GainResponse(freqs, np.ones((1, freqs.size)), 30.0)
    stop_low_images(response, 5.0, follow_below(5.0))
    pass_heart(response, PulseModel(3.2, np.array([[0.5]], dtype=complex), 0), above_hz=follow_below(5.0))
    assert np.all(response.response[0, np.abs(freqs - 3.2) <= 0.25] == 1)


def test_a_5_hz_artifact_with_a_sinusoidal_heart_leaves_the_lowest_lfp_alone():
    # a trace drawn at random within the estimator issue's description (this project's sweep, draw 114):
    # the floor's lines at 2.8-3.3 Hz passed at 0.2-0.4 and the LFP error away from the +-3 Hz bands (1-2 Hz
    # here) was 0.18-0.47 on the four channels; 0.004-0.033 with them stopped
    from artifactclean import clean
    from artifactclean.evaluation import score_cleaning
    from artifactclean.scenarios import locked_units
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, simulate_recording

    art = ArtifactSpec(freq_hz=5.0, amplitude_uv=1964.0, channel_gains=(-1.43, -0.78, -1.31, -0.82),
                       harmonics=((0.021, 4.42), (0.043, 2.73), (0.017, 0.69), (0.016, 3.50), (0.008, 6.26)),
                       heart_rate_hz=1.72, heart_depth=0.0156, heart_harmonics=(), resp_rate_hz=0.355,
                       resp_depth=0.0051, drift_ppm=-50.0)
    neu = NeuralSpec(units=locked_units(), oscillation_hz=11.95, lfp_uv=28.9)
    rec = simulate_recording(20.0, artifact=art, neural=neu, blocks=[BlockSpec(1.0, 18.0, ramp_s=1.58)], seed=114)
    away = score_cleaning(rec, clean(rec.data, rec.fs))["lfp_error_away"]
    assert max(away) < 0.08, away
