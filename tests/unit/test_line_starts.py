"""The starts of field points from the points solved on their line, the order
that hands those points on, and the field-scaled convergence targets: pure
numerics, no PySCF."""

from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldprop.backend.solver import OWN_LINEAR_TERM, _line_weights
from fieldprop.inputs.job import SCALED_TARGET_CEILING, ScfSpec, scaled_target_power
from fieldprop.points.executors import predecessors
from fieldprop.points.records import MAX_LINE_POINTS, line_preference


def _extrapolated(t, values, linear, own):
    w = _line_weights(t, own)
    if own:
        return sum(wk * v for wk, v in zip(w, values))
    return linear + sum(wk * (v - tk * linear) for wk, v, tk in zip(w, values, t))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-1.0, 0.9).filter(lambda x: abs(x) > 0.05), min_size=1,
                max_size=5, unique=True).filter(
                    lambda ts: min(abs(a - b) for a in ts + [0.0] for b in ts if a != b) > 0.05
                    if len(ts) > 1 else True),
       st.integers(0, 2 ** 31))
def test_line_weights_reproduce_every_polynomial_of_their_degree(ts, seed):
    """m points and the linear term give kappa(1) exactly for every polynomial
    kappa(t) = t L + c_2 t^2 + ... + c_{m+1} t^{m+1}; without the linear term,
    for c_1 t + ... + c_m t^m (Lagrange interpolation with a node at zero:
    the polynomial through the points is unique)."""
    rng = np.random.default_rng(seed)
    m = len(ts)
    t = np.array(ts)
    linear = rng.normal()
    c = rng.normal(size=m)
    kappa = linear * t + sum(c[j] * t ** (j + 2) for j in range(m))
    assert _extrapolated(t, kappa, linear, False) == pytest.approx(linear + c.sum(), abs=1e-6 *
                                                                   (1 + np.abs(c).sum()))
    kappa = sum(c[j] * t ** (j + 1) for j in range(m))
    assert _extrapolated(t, kappa, 0.0, True) == pytest.approx(c.sum(), abs=1e-6 *
                                                               (1 + np.abs(c).sum()))


def test_the_old_line_and_mirror_starts_are_special_cases():
    """A pair +-a alone: kappa_1 F + even part / t^2 + odd cubic term (the
    third-order line start); the opposite point and a pair: kappa(-F) +
    2 kappa_1 F + 2 kappa_3 F^3, the even terms cancelling (fourth order)."""
    rng = np.random.default_rng(7)
    linear, x, partner, mirror = rng.normal(size=4)
    t = 0.5
    cubic = ((x - partner) / 2 - t * linear) / t ** 3
    line = linear + (x + partner) / (2 * t * t) + cubic
    assert _extrapolated([t, -t], [x, partner], linear, False) == pytest.approx(line)
    assert _extrapolated([-1.0, t, -t], [mirror, x, partner], linear, False) == \
        pytest.approx(mirror + 2 * linear + 2 * cubic)
    assert OWN_LINEAR_TERM > 3  # both keep the response's linear term


def _task(index, field):
    return SimpleNamespace(point=SimpleNamespace(index=index, field_vector_au=tuple(field)))


def test_predecessors_are_the_opposite_point_and_the_farthest_inner_points():
    h = 0.001
    fields = [(0, 0, 0)]
    for level in (1, 2, 4, 8, 16):
        fields += [(-level * h, 0, 0), (level * h, 0, 0), (0, -level * h, 0)]
    tasks = [_task(i, f) for i, f in enumerate(fields)]
    before = predecessors(tasks)
    at = {f: i for i, f in enumerate(fields)}
    assert before[0] == () and before[at[(-h, 0, 0)]] == ()
    assert before[at[(h, 0, 0)]] == (at[(-h, 0, 0)],)
    # +16h: its mirror first, then MAX_LINE_POINTS of the inner ones, the
    # farthest out first, the far side before the near one at equal distance.
    expected = [(-16 * h, 0, 0), (-8 * h, 0, 0), (8 * h, 0, 0), (-4 * h, 0, 0), (4 * h, 0, 0),
                (-2 * h, 0, 0), (2 * h, 0, 0)][:1 + MAX_LINE_POINTS]
    assert before[at[(16 * h, 0, 0)]] == tuple(at[f] for f in expected)
    # A point waits only for points before it in the plan, on its own line.
    for i, pred in before.items():
        assert all(j < i for j in pred)
        f = np.array(fields[i], dtype=float)
        for j in pred:
            g = np.array(fields[j], dtype=float)
            assert abs(abs(f @ g) - np.linalg.norm(f) * np.linalg.norm(g)) < 1e-15


def test_a_point_inside_solved_points_waits_for_the_nearest_of_them():
    """The adaptive window adds a smaller step after the larger ones are
    found (they come first in the stage: engine.stages.settle): the new
    point's predecessors are its mirror, if it comes first, and the solved
    points nearest to it on a log scale, outside it, the nearer side first."""
    h = 0.001
    fields = [(0, 0, 0)]
    for level in (2, 4, 8):
        fields += [(-level * h, 0, 0), (level * h, 0, 0)]
    fields += [(-h, 0, 0), (h, 0, 0)]
    tasks = [_task(i, f) for i, f in enumerate(fields)]
    before = predecessors(tasks)
    at = {f: i for i, f in enumerate(fields)}
    # -h: +-2h (log distance ln 2), then +-4h, the opposite side first at
    # equal size (as for inner points); +h: its mirror -h first.
    assert before[at[(-h, 0, 0)]] == tuple(
        at[f] for f in [(2 * h, 0, 0), (-2 * h, 0, 0), (4 * h, 0, 0), (-4 * h, 0, 0)])
    assert before[at[(h, 0, 0)]] == (at[(-h, 0, 0)],) + tuple(
        at[f] for f in [(-2 * h, 0, 0), (2 * h, 0, 0), (-4 * h, 0, 0), (4 * h, 0, 0)])
    # Inside points keep their old order: farthest out first, the far side first.
    assert line_preference(0.5) < line_preference(0.25)
    assert line_preference(-0.5) < line_preference(0.5)
    # Outside, the nearest first; at equal log distance the outer one.
    assert line_preference(2.0) < line_preference(4.0)
    assert line_preference(2.0) < line_preference(0.5)


def test_targets_scale_with_the_field_by_the_noise_power_of_the_route():
    """On the dipole route a point's noise enters the order-n derivative over
    h^(n-1): beta's stencils (n = 3, offsets +-1) let a point at 4 h0 be 16
    times looser; jobs with gamma keep one target."""
    assert scaled_target_power("dipole", 3) == (2, 1)
    assert scaled_target_power("dipole", 2) == (1, 1)
    assert scaled_target_power("dipole", 4) == (0, 1)
    assert scaled_target_power("dipole", 1) == (0, 1)
    assert scaled_target_power("energy", 4) == (0, 1)
    spec = ScfSpec(1e-12, 1e-12, 200, None, 6e-11, target_power=2, target_step_au=0.0005)
    assert spec.at_field((0.0005, 0.0, -0.0005)) is spec
    far = spec.at_field((0.0, -0.002, 0.0))
    assert far.gradient_target == pytest.approx(16e-12)
    assert far.gradient_accepted == pytest.approx(16 * 6e-11)
    assert spec.at_field((1.0, 0.0, 0.0)).gradient_accepted == SCALED_TARGET_CEILING
    plain = ScfSpec(1e-12, 1e-12, 200, None)
    assert plain.at_field((0.01, 0.0, 0.0)) is plain
