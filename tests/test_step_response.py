"""What a DAC step leaves beside the tick levels behind an amplifier's low-pass (step_response.py)."""

import numpy as np
import pytest

from artifactclean.step_response import EdgeResponse, edge_knots, fit_edge_response, neighbour_edges, step_design


def _staircase_steps(rng, n, length, js):
    """Each sample's place in its tick and its steps at the neighbour edges ``js``, from a random staircase."""
    pos = np.arange(n) / length + rng.uniform()
    tick = np.floor(pos).astype(int)
    place = pos - tick
    levels = np.cumsum(rng.normal(size=tick[-1] + 10))  # a random walk: neighbouring steps differ
    steps = [levels[np.clip(tick + j, 0, None)] - levels[np.clip(tick + j - 1, 0, None)] for j in js]
    return place, steps


def test_the_neighbour_edges_are_every_edge_within_reach():
    # brute force: every place in a tick, every edge j whose delay (place - j) L falls within the reach
    for length in (1.2, 3.0, 6.0, 29.9988, 60.0):
        before, after = edge_knots(length)
        reach = (before[0], after[-1])
        place = np.linspace(0, 1, 2001, endpoint=False)
        seen = {j for j in range(-100, 100) if np.any(((place - j) * length >= reach[0])
                                                      & ((place - j) * length <= reach[1]))}
        assert sorted(seen) == neighbour_edges(length, reach), length


def test_the_response_jumps_at_the_edge_and_is_linear_between_knots():
    resp = EdgeResponse(30.0, np.zeros(sum(k.size for k in edge_knots(30.0))))
    before, after = resp.knots
    values = np.concatenate((np.linspace(0.0, 0.2, before.size), -1.0 + np.linspace(0.0, 1.0, after.size)))
    resp = EdgeResponse(30.0, values)
    # the two sides of 0 are separate values: the levels switch at the grid's edge, the samples do not
    assert resp(np.array([-1e-9]))[0] == pytest.approx(0.2) and resp(np.array([0.0]))[0] == pytest.approx(-1.0)
    # linear between knots (numpy.interp on each side as the reference)
    d = np.linspace(before[0], after[-1], 999)
    ref = np.where(d < 0, np.interp(d, before, values[:before.size]), np.interp(d, after, values[before.size:]))
    np.testing.assert_allclose(resp(d), ref, atol=1e-12)
    assert resp(np.array([after[-1] + 1.0, before[0] - 1.0])).tolist() == [0.0, 0.0]


@pytest.mark.parametrize("length", [29.9988, 6.0, 3.0])
def test_the_design_holds_the_response_at_every_neighbour_edge(length, rng):
    place, _ = _staircase_steps(rng, 3000, length, [0])
    resp = EdgeResponse(length, rng.normal(size=sum(k.size for k in edge_knots(length))))
    js = resp.edges
    _, steps = _staircase_steps(np.random.default_rng(5), 3000, length, js)
    direct = sum(s * w for s, w in zip(steps, resp.weights(place)))
    np.testing.assert_allclose(step_design(place, steps, length) @ resp.values, direct, atol=1e-12)


@pytest.mark.parametrize("length", [29.9988, 6.0007])
def test_a_known_response_and_drift_are_learned_back(length):
    # a smooth response (a filter's rise, overshoot and the level's bias) and edges that drift by 0.3 samples over
    # the stretch: the residual the fit sees is g(d + s(t)); g comes back within 1% of the step, and the drift's sign
    # and size (the grid must move its edges by -s)
    rng = np.random.default_rng(11)
    n = 200_000
    knots = np.concatenate(edge_knots(length))
    nb = edge_knots(length)[0].size

    def smooth(d):
        t = np.clip(d + 1.2, 0, None)
        return 1.0 - np.exp(-t / 0.8) * np.cos(1.5 * t)

    # the levels switch at the grid's edge (the jump), the samples follow the true edge (the smooth part)
    true = EdgeResponse(length, np.concatenate((smooth(knots[:nb]) + 0.01, smooth(knots[nb:]) - 1.0 + 0.01)))
    place, steps = _staircase_steps(rng, n, length, true.edges)
    drift = np.linspace(-0.15, 0.15, n)  # true delays are the grid's plus this
    resid = np.zeros(n)
    for j, s in zip(true.edges, steps):
        d = (place - j) * length
        resid += s * ((d >= knots[0]) & (d <= knots[-1])) * (smooth(d + drift) - (d >= 0) + 0.01)
    resid = resid + 0.01 * rng.normal(size=n)
    usable = np.ones(n, dtype=bool)
    learned, shift = fit_edge_response(resid, usable, place, steps, length)
    # the response where the drift is 0, at every knot
    err = np.abs(learned.values - true.values)
    assert np.max(err) < 0.02, np.max(err)
    # the grid's edges must move by -drift: later (+) at the start, earlier at the end
    np.testing.assert_allclose(shift, [0.15, -0.15], atol=0.03)
