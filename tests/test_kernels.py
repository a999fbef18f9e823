"""Compiled kernels give the numbers of their numpy twins."""

import numpy as np
import pytest

from artifactclean import TemplateSubtraction
from artifactclean.estimators import _kernels as K

pytestmark = pytest.mark.skipif(not K.HAVE_NUMBA, reason="numba not installed")


def test_kernels_match_numpy(rng):
    x = rng.standard_normal((3, 5000))
    w = (rng.uniform(size=x.shape) > 0.1).astype(float)
    gain = 1 + 0.1 * rng.standard_normal(x.shape)
    gi = np.sort(rng.integers(0, x.shape[1] - 1, 4000))
    ga = rng.uniform(size=gi.size)
    inside = rng.uniform(size=gi.size) > 0.05
    gi = np.arange(4000) + 3  # grid points read from consecutive samples, 40 rows of 100 bins
    for a, b in zip(K.phase_sums(x, w, gain, gi, ga, inside, 100, 7, 6),
                    K.phase_sums_np(x, w, gain, gi, ga, inside, 100, 7, 6)):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-10)
    key = np.sort(rng.integers(0, 700, x.shape[1]))
    for a, b in zip(K.tick_sums(x, w, gain, key, 50, 3, 5), K.tick_sums_np(x, w, gain, key, 50, 3, 5)):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-10)
    t = rng.standard_normal((3, 8 * 100))
    i0 = rng.integers(0, 7, x.shape[1])
    b0 = rng.integers(0, 100, x.shape[1])
    be, al = rng.uniform(size=i0.size), rng.uniform(size=i0.size)
    np.testing.assert_allclose(K.grouped_eval(t, 100, i0, i0 + 1, be, b0, (b0 + 1) % 100, al),
                               K.grouped_eval_np(t, 100, i0, i0 + 1, be, b0, (b0 + 1) % 100, al), rtol=1e-12)
    # the fused tick read-back does the twin's arithmetic operation for operation: equal to the bit,
    # including keys past the last group centre (held at the end group) and into a given buffer
    t = rng.standard_normal((3, 6 * 50))
    key = np.sort(rng.integers(0, 20 * 50, x.shape[1]))
    twin = K.tick_eval_np(t, key, 50, 3, 6)
    np.testing.assert_array_equal(K.tick_eval(t, key, 50, 3, 6), twin)
    buf = np.full(twin.shape, np.nan)
    assert K.tick_eval(t, key, 50, 3, 6, out=buf) is buf
    np.testing.assert_array_equal(buf, twin)
    # runs of one key (a tick's samples) in any order of ticks, keys coming back later, a lone key at each end:
    # the compiled loops reuse a run's cell and values, the twins compute every sample
    ticks = rng.permutation(np.r_[np.arange(0, 20 * 50, 7), np.arange(0, 20 * 50, 11)])
    runs = np.repeat(ticks, -(-x.shape[1] // ticks.size))
    key = np.r_[5, runs[: x.shape[1] - 2], 999]
    assert key.size == x.shape[1]
    np.testing.assert_array_equal(K.tick_eval(t, key, 50, 3, 6), K.tick_eval_np(t, key, 50, 3, 6))
    # (the sums' twin takes ticks in order; here a plain scatter-add, numpy.add.at, is the reference)
    cell = (key // 50 // 3) * 50 + key % 50
    for got, v in zip(K.tick_sums(x, w, gain, key, 50, 3, 7), (w * gain * x, w * gain * gain)):
        want = np.zeros((x.shape[0], 7 * 50))
        for ch in range(x.shape[0]):
            np.add.at(want[ch], cell, v[ch])
        np.testing.assert_allclose(got.reshape(x.shape[0], -1), want, rtol=1e-10, atol=1e-10)
    starts = np.unique(np.r_[0, rng.integers(1, x.shape[1], 50)])
    for a, b in zip(K.segment_stats(x, w, gain, starts), K.segment_stats_np(x, w, gain, starts)):
        np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-9)
    # the gain sums follow numpy.bincount addition by addition: equal to the bit
    b = rng.integers(0, 64, x.shape[1])
    seg = np.sort(rng.integers(0, 90, x.shape[1]))
    pos = rng.uniform(0, 90, x.shape[1])
    for a, c in zip(K.gain_sums(x, w, b, seg, 64, 90, pos), K.gain_sums(x, w, b, seg, 64, 90, pos, compiled=False)):
        np.testing.assert_array_equal(a, c)


def test_phase_grid_kernels_equal_the_index_arrays_they_replace(rng):
    # the grid's sums and read-back compute the sampler's and the reader's positions inline: equal to the
    # bit to phase_sums and grouped_eval on those arrays (the estimator's output must not move), and the
    # numpy twins (in pieces) agree with them
    n, n_bins, stride = 7000, 37, 3
    f_per_sample = 1 / 183.3  # cycles per sample: a cycle is not a whole number of samples
    u = 5.3 + np.arange(n) * f_per_sample
    key = np.floor(u[[0, -1]] * n_bins).astype(np.int64)
    row0 = (key[0] // n_bins) // stride * stride
    n_rows = int((key[-1] - row0 * n_bins) // n_bins) + 1
    n_groups = -(-n_rows // stride)
    grid = K.PhaseGrid(u, row0, n_bins, stride, n_groups, n_rows * n_bins)
    x = rng.standard_normal((3, n))
    w = (rng.uniform(size=x.shape) > 0.1).astype(float)
    gain = 1 + 0.1 * rng.standard_normal(x.shape)
    gi, ga, inside = grid.sampler()
    assert inside[0] == 0 and inside.sum() < inside.size  # the grid reaches past the block at both ends
    for a, b in zip(grid.sums(x, w, gain), K.phase_sums(x, w, gain, gi, ga, inside, n_bins, stride, n_groups)):
        np.testing.assert_array_equal(a, b)
    for a, b in zip(grid.sums(x, w, gain, compiled=False), grid.sums(x, w, gain)):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-10)
    t = rng.standard_normal((3, n_groups * n_bins))
    ref = K.grouped_eval(t, n_bins, *grid.reader())
    np.testing.assert_array_equal(grid.read(t), ref)
    np.testing.assert_allclose(grid.read(t, compiled=False), ref, rtol=1e-12, atol=1e-12)
    # phases that are not linear (a free-running DAC's held phases), negative, and on bin edges
    v = np.sort(np.r_[rng.uniform(-3.0, 9.0, 3000), np.arange(-2, 9) + 0.5 / n_bins, np.arange(-2, 9, dtype=float)])
    np.testing.assert_array_equal(K.phase_eval(t, n_bins, v, 0, stride, n_groups),
                                  K.grouped_eval(t, n_bins, *K.phase_position(v, 0, n_bins, stride, n_groups)))
    flags = rng.uniform(size=t.shape) > 0.97
    i0, i1, _, b0, b1, _ = grid.reader()
    half = np.full(n, 0.5)
    np.testing.assert_array_equal(grid.read_any(flags.astype(float), piece=1000),
                                  K.grouped_eval(flags.astype(float), n_bins, i0, i1, half, b0, b1, half) > 0)


def test_residual_highpass_flag_widening_and_interpolation_match_scipy_and_numpy(rng):
    from scipy import ndimage, signal

    x = rng.standard_normal((3, 4000))
    t = rng.standard_normal(x.shape)
    gain = 1 + 0.1 * rng.standard_normal(x.shape)
    w = (rng.uniform(size=x.shape) > 0.05).astype(float)
    sos = signal.butter(2, 300.0, btype="highpass", fs=30000.0, output="sos")
    # reference: scipy.signal.sosfilt on the residual with lost samples zeroed
    ref = np.abs(signal.sosfilt(sos, (x - gain * t) * (w > 0), axis=1))
    np.testing.assert_allclose(K.highpass_residual(sos, x, t, gain, w), ref, rtol=1e-12, atol=1e-12)
    ref1 = np.abs(signal.sosfilt(sos, (x - t) * (w > 0), axis=1))
    np.testing.assert_allclose(K.highpass_residual(sos, x, t, None, w), ref1, rtol=1e-12, atol=1e-12)
    # reference: scipy.ndimage.maximum_filter1d (a running maximum of the flags)
    bad = rng.uniform(size=x.shape) > 0.995
    bad[0, :2] = bad[1, -1] = True  # flags at both ends
    np.testing.assert_array_equal(K.widen_flags(bad, 30),
                                  ndimage.maximum_filter1d(bad, 61, axis=1, mode="constant", cval=False))
    # reference: numpy.interp row by row, knots unevenly spaced, points beyond both ends
    xp = np.sort(rng.uniform(0, 10, 40))
    pts = np.sort(rng.uniform(-1, 11, 3000))
    fp = rng.standard_normal((3, xp.size))
    got = K.lerp_rows(fp, *K.lerp_positions(xp, pts))
    for row, g in zip(fp, got):
        np.testing.assert_allclose(g, np.interp(pts, xp, row), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(K.lerp_rows(fp, *K.lerp_positions(xp, pts), compiled=False), got, rtol=1e-12)


def _outlier_flags_by_numpy_quantile(hp, w, bounds, scale):
    # reference: numpy.quantile (default "linear" method, Hyndman & Fan 1996 definition 7) per stretch
    bad = np.zeros(hp.shape, dtype=bool)
    thr = np.full((hp.shape[0], len(bounds) - 1), np.nan)
    for ch in range(hp.shape[0]):
        for s, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
            ok = w[ch, a:b] > 0
            if ok.sum() >= 16:
                med, q99 = np.quantile(hp[ch, a:b][ok], [0.5, 0.99])
                thr[ch, s] = max(scale * med, q99, 1e-12)
                bad[ch, a:b] = (hp[ch, a:b] > thr[ch, s]) & ok
    return bad, thr


@pytest.mark.parametrize("draw", ["spread", "ties", "zeros", "constant", "short stretches", "non-finite"])
def test_outlier_flags_find_numpys_quantiles_to_the_bit(rng, draw):
    n = 60000
    hp = np.abs(rng.standard_normal((3, n))) * 10.0 ** rng.uniform(-3, 3, size=(3, 1))
    w = (rng.uniform(size=hp.shape) > 0.2).astype(float)
    bounds = np.concatenate(([0], np.sort(rng.choice(np.arange(1, n), 12, replace=False)), [n]))
    if draw == "ties":  # many samples share a value, so a rank's bin holds equal values
        hp = np.round(hp / hp.mean(), 1)
    elif draw == "zeros":
        hp[:, ::3] = 0.0
    elif draw == "constant":
        hp = np.full(hp.shape, 2.5)
        hp[:, ::7] = 3.5
    elif draw == "short stretches":  # around the 16 counted samples a stretch needs: wide gaps between ranks
        bounds = np.concatenate(([0], np.cumsum(rng.integers(12, 40, size=400)), [n]))
    elif draw == "non-finite":  # numpy's own handling (nan: no threshold) is kept for such stretches
        hp[0, 100] = np.nan
        hp[1, 30000] = np.inf
    # 4.5 robust SDs (the median above it decides), then a scale under it (the 99th percentile decides)
    for scale in (4.5 * 1.4826, 1.0):
        got, thr = K.outlier_flags(hp, w, bounds, scale, return_thresholds=True)
        ref, ref_thr = _outlier_flags_by_numpy_quantile(hp, w, bounds, scale)
        np.testing.assert_array_equal(thr, ref_thr)  # bitwise, nan where a stretch is too short
        np.testing.assert_array_equal(got, ref)
        np.testing.assert_array_equal(K.outlier_flags(hp, w, bounds, scale, compiled=False), got)
        assert not got[w == 0].any()
        if draw == "spread" and scale == 1.0:  # about 1% of the counted samples above the 99th percentile
            assert 0.009 < got.sum() / (w > 0).sum() < 0.011


def test_settled_keys_are_numpys_running_maximum_of_the_choices(rng):
    # reference: numpy.maximum.accumulate after the choices are put in turn (the later wins on a shared sample)
    base = np.sort(rng.integers(0, 500, 5000))
    base[2000:2010] = base[2000:2010][::-1]  # stretches that run backwards: the maximum carries over them
    base[-1] = 0
    lo = np.sort(rng.choice(5000, 300, replace=False))
    hi = np.concatenate((lo[:50], np.sort(rng.choice(5000, 200, replace=False))))  # 50 samples on both sides
    chosen = [(lo, base[lo] - 1), (hi, base[hi] + 1)]
    new = base.copy()
    new[lo] = base[lo] - 1
    new[hi] = base[hi] + 1
    expected = np.maximum.accumulate(new)
    for dtype in (np.int64, np.int32):
        got = K.settled_keys(base.astype(dtype), [(s, v.astype(dtype)) for s, v in chosen])
        assert got.dtype == dtype
        np.testing.assert_array_equal(got, expected)
    np.testing.assert_array_equal(K.settled_keys(base, chosen, compiled=False), expected)
    np.testing.assert_array_equal(K.settled_keys(base, []), np.maximum.accumulate(base))


@pytest.mark.parametrize("mode", ["put", "add", "subtract"])
def test_interp_sorted_is_numpy_interp_to_the_bit(rng, mode):
    from artifactclean._numeric import interp_sorted

    # reference: numpy.interp row by row (end values outside the knots, a knot's own value on it)
    for trial in range(40):
        m = int(rng.integers(2, 40))
        xp = np.sort(rng.uniform(-5, 5, m))
        if trial % 3 == 0:
            xp[m // 2] = xp[m // 2 - 1]  # a repeated knot
        fp = rng.standard_normal((3, m)) * 10.0 ** rng.uniform(-3, 5)
        if trial % 4 == 0:
            fp[:, 1] = np.inf  # slopes that are not finite: numpy's nan rules
            fp[:, 1 + (trial % 8 == 0 and m > 2)] = np.inf  # two infinite knots: their own value between them
        x = np.sort(rng.uniform(-7, 7, 3000))
        x[::40] = xp[rng.integers(0, m, x[::40].size)]  # points on the knots
        x.sort()
        if trial % 5 == 0:
            x[30] = np.nan  # numpy's path
        if trial % 7 == 0:
            x = rng.permutation(x)  # unsorted: numpy's path
        base = rng.standard_normal((3, x.size))
        got = interp_sorted(x, xp, fp, None if mode == "put" else base.copy(), mode=mode)
        for r in range(3):
            v = np.interp(x, xp, fp[r])
            ref = v if mode == "put" else base[r] + v if mode == "add" else base[r] - v
            np.testing.assert_array_equal(got[r], ref)
    one = interp_sorted(np.arange(10.0), np.array([2.0, 7.0]), np.array([1.0, -1.0]))  # a single row
    np.testing.assert_array_equal(one, np.interp(np.arange(10.0), [2.0, 7.0], [1.0, -1.0]))
    with pytest.raises(ValueError, match="mode"):
        interp_sorted(x, xp, fp, mode="times")
    # a scalar or a 2-D array of points: numpy.interp's own shapes
    assert interp_sorted(4.5, np.array([2.0, 7.0]), np.array([1.0, -1.0])) == np.interp(4.5, [2.0, 7.0], [1.0, -1.0])
    grid = np.arange(12.0).reshape(3, 4)
    np.testing.assert_array_equal(interp_sorted(grid, [2.0, 7.0], [1.0, -1.0]), np.interp(grid, [2.0, 7.0], [1.0, -1.0]))
    with pytest.raises(ValueError, match="1-D fp"):
        interp_sorted(grid, xp, fp)


def test_linear_envelope_is_the_numpy_trapezoid_to_the_bit(rng):
    # reference: the ramps written with numpy.minimum, numpy.clip and numpy.maximum (the estimator's former form)
    i = np.sort(np.r_[rng.uniform(-500.0, 12500.0, 20000), np.arange(-3.0, 12004.0)])  # every sample, and between
    for start, up_stop, down_start, stop in ((0, 3000, 9000, 12000), (100, 101, 11000, 11999), (0, 6000, 6000, 12000)):
        up = (i - start) / max(up_stop - start, 1)
        down = (stop - i) / max(stop - down_start, 1)
        ref = np.maximum(np.clip(np.minimum(up, down), 0.0, 1.0), 1e-3)
        got = K.linear_envelope(i, start, up_stop, down_start, stop, 1e-3)
        np.testing.assert_array_equal(got, ref)
        np.testing.assert_array_equal(K.linear_envelope(i, start, up_stop, down_start, stop, 1e-3, compiled=False), ref)
        assert got.min() == 1e-3 and got.max() == 1.0
    j = i.copy()
    j[5] = np.nan  # numpy's nan rules
    np.testing.assert_array_equal(K.linear_envelope(j, 0, 3000, 9000, 12000, 1e-3),
                                  K.linear_envelope_np(j, 0, 3000, 9000, 12000, 1e-3))


def test_floor_runs_are_the_changes_of_numpy_floor(rng):
    from artifactclean._numeric import floor_runs

    # reference: numpy.floor, numpy.diff and numpy.flatnonzero (the segment starts the template used to build)
    for u in (0.3 + np.arange(50000) * (20 / 30000), np.sort(rng.uniform(-7.0, 9.0, 20000)),
              np.r_[np.arange(-2.0, 3.0, 0.25), 3.0, 3.0, 2.9]):  # on the edges, equal and falling values
        for scale in (1, 5, 7.5):
            seg = np.floor(u * scale).astype(np.int64)
            starts = np.concatenate(([0], np.flatnonzero(np.diff(seg)) + 1))
            got_starts, got_values = floor_runs(u, scale)
            np.testing.assert_array_equal(got_starts, starts)
            np.testing.assert_array_equal(got_values, seg[starts])
            assert got_starts.dtype == got_values.dtype == np.int64
    bad = np.array([0.1, np.nan, 2.0])  # nan: numpy's path, whatever it gives
    with np.errstate(invalid="ignore"):  # numpy's cast of nan to an integer
        np.testing.assert_array_equal(floor_runs(bad, 2)[0], floor_runs(bad, 2, compiled=False)[0])


@pytest.mark.parametrize("fixture", ["rec20", "rec10_dac"])
def test_estimator_same_with_and_without_compiled_loops(fixture, request):
    rec = request.getfixturevalue(fixture)
    x = rec.data[:, : int(8 * rec.fs)]
    f = rec.blocks[0]["nominal_freq_hz"]
    a = TemplateSubtraction(compiled=True).fit_transform(x, fs=rec.fs, stim_freq=f)
    b = TemplateSubtraction(compiled=False).fit_transform(x, fs=rec.fs, stim_freq=f)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-6 * np.abs(x).max())


def test_median_of_positive_bins_is_numpy_nanmedian(rng):
    from artifactclean.estimators.template import _median_of_positive

    g = rng.uniform(0.1, 2.0, (2, 5, 64))
    g[1, 2, :40] = 0.0  # a template with empty bins
    g[1, 3] = 0.0  # one with none usable
    # reference: numpy.nanmedian with the empty bins as NaN (0 where a row has none)
    with np.errstate(invalid="ignore"), pytest.warns(RuntimeWarning, match="All-NaN"):
        ref = np.nan_to_num(np.nanmedian(np.where(g > 0, g, np.nan), axis=-1, keepdims=True), nan=0.0)
    np.testing.assert_array_equal(_median_of_positive(g), ref)
    np.testing.assert_array_equal(_median_of_positive(g[:1]), np.median(g[:1], axis=-1, keepdims=True))


def test_fold_concentration_is_the_direct_circular_mean(rng):
    from artifactclean.staircase import _fold_concentration

    u = np.cumsum(rng.uniform(0.001, 0.01, 700))
    ms = np.arange(7, 300)
    # the definition: resultant length of the step phases folded on m ticks per cycle
    direct = np.abs(np.exp(2j * np.pi * np.outer(ms, np.mod(u, 1.0))).mean(axis=1))
    np.testing.assert_allclose(_fold_concentration(u, ms), direct, rtol=0, atol=1e-12)
