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
    starts = np.unique(np.r_[0, rng.integers(1, x.shape[1], 50)])
    for a, b in zip(K.segment_stats(x, w, gain, starts), K.segment_stats_np(x, w, gain, starts)):
        np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-9)
    # the gain sums follow numpy.bincount addition by addition: equal to the bit
    b = rng.integers(0, 64, x.shape[1])
    seg = np.sort(rng.integers(0, 90, x.shape[1]))
    for a, c in zip(K.gain_sums(x, w, b, seg, 64, 90), K.gain_sums(x, w, b, seg, 64, 90, compiled=False)):
        np.testing.assert_array_equal(a, c)


@pytest.mark.parametrize("fixture", ["rec20", "rec10_dac"])
def test_estimator_same_with_and_without_compiled_loops(fixture, request):
    rec = request.getfixturevalue(fixture)
    x = rec.data[:, : int(8 * rec.fs)]
    f = rec.blocks[0]["nominal_freq_hz"]
    a = TemplateSubtraction(compiled=True).fit_transform(x, fs=rec.fs, stim_freq=f)
    b = TemplateSubtraction(compiled=False).fit_transform(x, fs=rec.fs, stim_freq=f)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-6 * np.abs(x).max())
