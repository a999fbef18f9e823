"""The slow level under the artifact (artifactclean.baseline)."""

import numpy as np
import pytest
from scipy import ndimage

from artifactclean.baseline import SMOOTH_S, TRACK_POINTS_PER_S, baseline_reach_s, bent_corners, level_off_reader, level_track, \
    moving_mean, slow_baseline, without_corners


def test_a_whole_width_mean_equals_scipy_uniform_filter():
    # reference: scipy.ndimage.uniform_filter1d, the same centred box of an odd number of samples
    rng = np.random.default_rng(0)
    x = rng.normal(size=(3, 500))
    mean, share = moving_mean(x, 9)
    assert np.allclose(mean[:, 4:-4], ndimage.uniform_filter1d(x, 9, axis=1)[:, 4:-4], atol=1e-12)
    assert np.allclose(share[:, 4:-4], 1.0)
    # the window is cut short at the ends and the mean taken over what it holds
    assert mean[0, 0] == pytest.approx(x[0, :5].mean())
    assert share[0, 0] == pytest.approx(5 / 9)


def test_a_fractional_width_integrates_the_samples_as_steps():
    # each sample stands for the unit interval around it: the mean over a window of 6.3 samples is the
    # integral of that step function over the window, divided by 6.3 (computed here on a fine grid)
    rng = np.random.default_rng(1)
    x = rng.normal(size=60)
    width = 6.3
    fine = 1000
    steps = np.repeat(x, fine)  # sample i covers [i - 0.5, i + 0.5)
    edges = np.arange(60 * fine) / fine - 0.5
    mean, _ = moving_mean(x, width, axis=0)
    for i in (10, 25, 40):
        inside = (edges >= i - width / 2) & (edges < i + width / 2)
        assert mean[i] == pytest.approx(steps[inside].sum() / fine / width, abs=2e-3)


def test_left_out_samples_count_for_nothing():
    rng = np.random.default_rng(2)
    x = rng.normal(size=200)
    w = np.ones(200)
    x_bad = x.copy()
    x_bad[100] = np.nan
    w[100] = 0.0
    mean, share = moving_mean(x_bad, 11, weights=w)
    assert np.isfinite(mean).all()
    assert mean[100] == pytest.approx((x[95:106].sum() - x[100]) / 10)
    assert share[100] == pytest.approx(10 / 11)
    with pytest.raises(ValueError, match="width"):
        moving_mean(x, 0.0)
    with pytest.raises(ValueError, match="shape"):
        moving_mean(x, 3.0, weights=np.ones(5))


@pytest.mark.parametrize("freq", [7.3, 40.0016])
def test_a_periodic_artifact_leaves_no_level(freq):
    # harmonics of a cycle that is not a whole number of samples fall on the zeros of the one-cycle means
    fs = 30000.0
    t = np.arange(int(12 * fs)) / fs
    art = 4000 * np.sin(2 * np.pi * freq * t) + 600 * np.sin(2 * np.pi * 2 * freq * t + 1.0) \
        + 150 * np.sign(np.sin(2 * np.pi * freq * t + 0.3))  # a square wave: every odd harmonic
    inner = slice(int(3 * fs), -int(3 * fs))
    # one cycle's mean of the sine alone is nothing, where a window rounded to whole samples leaves tenths of uV
    one, _ = moving_mean(4000 * np.sin(2 * np.pi * freq * t), fs / freq)
    assert np.abs(one[inner]).max() < 1e-3
    level = slow_baseline(art, fs, freq)
    assert np.abs(level[inner]).max() < 1e-3 * 4000


@pytest.mark.parametrize("slow_hz", [0.02, 0.3, 0.8])
def test_a_slow_sine_passes_with_the_boxes_response(slow_hz):
    # a moving mean over T seconds has the amplitude response sinc(F T) (e.g. Smith 1997, The Scientist and
    # Engineer's Guide to DSP, ch. 15): two over one cycle and two over SMOOTH_S, the latter twiced (Tukey
    # 1977, Exploratory Data Analysis: 2H - H**2)
    fs, freq = 2000.0, 20.0
    t = np.arange(int(60 * fs)) / fs
    slow = 1000 * np.sin(2 * np.pi * slow_hz * t)
    level = slow_baseline(slow + 3000 * np.sin(2 * np.pi * freq * t), fs, freq)
    smooth = np.sinc(slow_hz * SMOOTH_S) ** 2
    gain = np.sinc(slow_hz / freq) ** 2 * (2 * smooth - smooth ** 2)
    inner = slice(int(5 * fs), -int(5 * fs))
    assert np.abs(level[inner] - gain * slow[inner]).max() < 2e-3 * 1000


def test_a_piece_with_the_reach_on_each_side_gives_the_whole_arrays_level():
    fs, freq = 2000.0, 7.3
    rng = np.random.default_rng(4)
    x = rng.normal(size=int(30 * fs)) + 500 * np.sin(2 * np.pi * freq * np.arange(int(30 * fs)) / fs)
    whole = slow_baseline(x, fs, freq)
    reach = int(np.ceil(baseline_reach_s(freq) * fs))
    a, b = int(12 * fs), int(15 * fs)
    piece = slow_baseline(x[a - reach:b + reach], fs, freq, origin=a - reach)[reach:-reach]
    assert np.abs(piece - whole[a:b]).max() < 1e-9
    # with less context the piece's ends differ
    short = slow_baseline(x[a - reach // 2:b + reach // 2], fs, freq, origin=a - reach // 2)[reach // 2:-(reach // 2)]
    assert np.abs(short - whole[a:b]).max() > 1e-6


def test_bad_arguments():
    x = np.zeros(1000)
    with pytest.raises(ValueError, match="freq_hz"):
        slow_baseline(x, 1000.0, 600.0)
    with pytest.raises(ValueError, match="smooth_s"):
        slow_baseline(x, 1000.0, 10.0, smooth_s=0)


def test_a_straight_drift_is_followed_to_the_ends():
    # the means of a window cut short by the array's ends lag a trend toward the middle (7-26 uV within 2 s of
    # the ends for 250 uV/s); a line fitted to what the window holds does not
    fs, freq = 2000.0, 40.0
    t = np.arange(int(12 * fs)) / fs
    drift = 250.0 * t - 1500.0
    level = slow_baseline(drift + 3000 * np.sin(2 * np.pi * freq * t), fs, freq)
    assert np.abs(level - drift).max() < 0.5


@pytest.mark.parametrize("ramp_s", [0.0, 0.1])
def test_steps_and_short_ramps_are_left_out_of_the_level(ramp_s):
    # a 5 Hz artifact switched on by a step or a half-cycle ramp: no cycle's mean around the bend averages it
    # away, and its level there was 12-100 uV off; left out with a cycle on either side, a few uV
    fs, freq = 6000.0, 5.0
    t = np.arange(int(14 * fs)) / fs
    on, off = 4.0, 10.0
    env = np.clip(np.minimum(t - on, off - t) / ramp_s, 0, 1) if ramp_s else ((t >= on) & (t < off)).astype(float)
    art = 4000 * env * np.sin(2 * np.pi * freq * t + 0.7)
    corners = bent_corners(np.array([on, on + ramp_s, off - ramp_s, off]) * fs, fs / freq)
    assert len(corners) == 4
    kept = slow_baseline(art, fs, freq)
    left = slow_baseline(art, fs, freq, weights=without_corners(t.size, corners, fs / freq))
    assert np.abs(kept).max() > 10.0
    assert np.abs(left).max() < 5.0
    # a ramp of several cycles keeps its corners: its means oscillate and average away
    assert bent_corners(np.array([on, on + 1.0, off - 1.0, off]) * fs, fs / freq) == []


def _drifting(fs, freq, seconds, seed):
    rng = np.random.default_rng(seed)
    n = int(seconds * fs)
    t = np.arange(n) / fs
    return np.vstack([2000 * np.sin(2 * np.pi * 0.05 * t) + 3000 * np.sin(2 * np.pi * freq * t) + rng.normal(0, 5, n),
                      np.clip(4000 * np.sin(2 * np.pi * freq * t), -3000, 3000)])  # the second clips


def test_a_track_read_in_parts_holds_the_whole_ranges_level_at_its_points():
    fs, freq = 2000.0, 20.0
    x = _drifting(fs, freq, 75.0, 6)  # three parts of TRACK_PART_S
    s, e = 500, x.shape[1] - 300
    read = lambda a, b, rows=None: x[slice(None) if rows is None else rows, a:b]  # noqa: E731
    track = level_track(read, fs, freq, (s, e), 2, origin=100)
    whole = slow_baseline(x[0, s:e], fs, freq, origin=s - 100)
    at = track.positions.astype(int) + 100
    assert at[0] == s and at[-1] == e - 1
    spacing = np.diff(at[1:-1])
    assert np.all(spacing == spacing[0]) and np.all((at[1:-1] - 100) % spacing[0] == 0)
    assert spacing[0] / fs == pytest.approx(1 / TRACK_POINTS_PER_S, rel=0.1)
    # at its points the track is the whole range's level (float32: 2000 uV to 1.2e-4 uV)
    assert np.abs(track.values[0] - whole[at - s]).max() < 1e-3
    # between them a line: within h**2 / 8 * max|x''| of a 2 mV drift at 0.05 Hz, h = 1/16 s (linear interpolation's
    # error bound, e.g. Burden & Faires, Numerical Analysis, ch. 3): 0.096 uV
    line = np.zeros((1, e - s))
    track.subtract(line, s - 100, [0])
    bound = (1 / TRACK_POINTS_PER_S) ** 2 / 8 * 2000 * (2 * np.pi * 0.05) ** 2
    inner = slice(int(2 * SMOOTH_S * fs), -int(2 * SMOOTH_S * fs))
    assert np.abs(-line[0] - whole)[inner].max() < bound + 0.02
    # near the ends the level bends with the lines fitted there (itself 1-9 uV off such a drift)
    assert np.abs(-line[0] - whole).max() < 0.25
    # the clipped channel's track leaves its rails out (it is not taken off by the reader below)
    assert np.isfinite(track.values[1]).all()


def test_a_reader_takes_the_tracks_level_off_the_unclipped_rows():
    fs, freq = 2000.0, 20.0
    x = _drifting(fs, freq, 40.0, 7)
    n = x.shape[1]
    read = lambda a, b, rows=None: x[slice(None) if rows is None else rows, a:b]  # noqa: E731
    track = level_track(read, fs, freq, (0, n), 2)
    from artifactclean.clipping import find_clipped
    seen = level_off_reader(read, track, (0, n), follow=lambda rows: ~find_clipped(rows).any(axis=1))
    a, b = int(15 * fs), int(18 * fs)
    got = seen(a, b)
    assert np.abs(got[0] - (x[0, a:b] - slow_baseline(x[0], fs, freq)[a:b])).max() < 0.15
    assert np.array_equal(got[1], x[1, a:b])
    # rows read alone map onto the track's channels; reads outside the range come back as read
    assert np.array_equal(seen(a, b, [0])[0], got[0])
    assert np.array_equal(seen(n - 10, n + 10), read(n - 10, n + 10))
