"""The adaptive window on synthetic data with known derivatives and noise.

E(F) = E0 - A exp(B F_z), so -d^nE/dF_z^n = A B^n exactly and mu_z(F) =
A B exp(B F_z); B sets how fast the truncation error grows with the field,
the added uniform noise (amplitude eps) how fast the round-off grows as the
field shrinks. The replay below is the engine's (engine.stages.settle) without a
molecule: every point exists, the windows decide which enter the tables.
"""

from types import SimpleNamespace

import numpy as np
import pytest

from fieldprop.engine.analyse import NoiseModel, _tensor_scales, extrapolate_components
from fieldprop.numerics.extrapolate import ComponentEstimate, ComponentStatus
from fieldprop.inputs.job import AUTO_FIELD_AU, AUTO_LEVELS
from fieldprop.numerics.plan import plan_fields
from fieldprop.numerics.window import (SETTLED_RELATIVE, START_LEVELS, grow, initial_windows,
                              needed_points, wants)

E0, A = -40.0, 1.0


def synthetic(plan, b, eps, seed=5):
    rng = np.random.default_rng(seed)
    out = []
    for p in plan.points:
        fz = p.field_vector_au[2]
        out.append(SimpleNamespace(
            energy_au=E0 - A * np.exp(b * fz) + rng.uniform(-eps, eps),
            dipole_au=(rng.uniform(-eps, eps), rng.uniform(-eps, eps),
                       A * b * np.exp(b * fz) + rng.uniform(-eps, eps))))
    return out


def replay(plan, records, eps):
    """Stages of the window until it settles: (windows, estimates, stages)."""
    noise = NoiseModel(eps, eps)
    windows, stages = initial_windows(plan), 0
    while True:
        est = extrapolate_components(plan, records, noise, windows=windows)
        grown = grow(plan, windows, est, _tensor_scales(plan, est))
        if grown == windows:
            return windows, est, stages
        assert all(g[0] <= w[0] and g[1] >= w[1] for g, w in zip(grown, windows))
        windows, stages = grown, stages + 1


def component(plan, estimates, name):
    i = next(i for i, c in enumerate(plan.components) if c.name == name)
    return estimates[i]


@pytest.mark.parametrize("route, name, order", [("energy", "beta_zzz", 3),
                                                ("dipole", "beta_zzz", 3),
                                                ("energy", "alpha_zz", 2)])
def test_a_gentle_curve_settles_on_the_first_window(route, name, order):
    prop = {2: "alpha", 3: "beta"}[order]
    plan = plan_fields((prop,), AUTO_FIELD_AU[order], 2.0, AUTO_LEVELS, route)
    eps = 1e-12
    windows, est, stages = replay(plan, synthetic(plan, 2.0, eps), eps)
    assert stages == 0
    assert all(hi - lo + 1 == START_LEVELS for (lo, hi, _), c in zip(windows, plan.components)
               if len(c.stencils) > 1)
    e = component(plan, est, name)
    assert abs(e.value_au - A * 2.0**order) <= e.error_au
    # Fewer points than the whole ladder: what the window is for.
    assert len(needed_points(plan, windows)) < len(plan.points)


def test_a_steep_curve_grows_towards_smaller_fields():
    # B = 150: at the first window's fields (4e-3..1.6e-2 au) B h reaches 2.4,
    # the table is truncation-limited at its smallest field; the window must
    # grow down until the table settles, and the value must be right.
    plan = plan_fields(("beta",), AUTO_FIELD_AU[3], 2.0, AUTO_LEVELS, "energy")
    eps = 1e-12
    windows, est, stages = replay(plan, synthetic(plan, 150.0, eps), eps)
    i = next(i for i, c in enumerate(plan.components) if c.name == "beta_zzz")
    assert stages >= 1 and windows[i][0] < initial_windows(plan)[i][0]
    e = est[i]
    exact = A * 150.0**3
    assert abs(e.value_au - exact) <= e.error_au
    assert e.error_au < 1e-4 * exact
    # Components the field does not touch (zero here) stayed where they began.
    j = next(i for i, c in enumerate(plan.components) if c.name == "beta_xxx")
    assert windows[j] == initial_windows(plan)[j]


def test_noise_grows_the_window_towards_larger_fields():
    # Dipoles with noise 1e-7 au: at the first window's fields (2e-3..8e-3 au)
    # the round-off floor of beta_zzz dominates and its best entry reaches the
    # largest field; the window must add the next larger one.
    plan = plan_fields(("beta",), AUTO_FIELD_AU[3], 2.0, AUTO_LEVELS, "dipole")
    eps = 1e-7
    windows, est, stages = replay(plan, synthetic(plan, 2.0, eps), eps)
    i = next(i for i, c in enumerate(plan.components) if c.name == "beta_zzz")
    first = initial_windows(plan)[i]
    assert windows[i] == (first[0], AUTO_LEVELS - 1, 0) and stages >= 1
    e = est[i]
    assert abs(e.value_au - A * 2.0**3) <= e.error_au


def test_decisions():
    def est(status, error, entry, value=10.0):
        return ComponentEstimate(value, error, entry, status, error / 2, ((value,),))

    ok, floor = ComponentStatus.OK, ComponentStatus.NOISE_LIMITED
    scale = 10.0
    material = 1e3 * SETTLED_RELATIVE * scale
    # Truncation-limited at the window's smallest field: a smaller field.
    assert wants(est(ok, material, (2, 2)), (2, 4), 6, scale) == -1
    # ... but not below level 0, and not when the bar is already negligible.
    assert wants(est(ok, material, (0, 2)), (0, 2), 6, scale) == 0
    assert wants(est(ok, 0.1 * SETTLED_RELATIVE * scale, (2, 2)), (2, 4), 6, scale) == 0
    # Noise-limited up to the window's largest field: a larger one.
    assert wants(est(floor, material, (2, 2)), (2, 4), 6, scale) == 1
    assert wants(est(floor, material, (3, 2)), (3, 5), 6, scale) == 0  # no level left
    # An entry inside its window has found its balance: settled.
    assert wants(est(ok, material, (3, 1)), (2, 5), 6, scale) == 0
    assert wants(est(floor, material, (2, 1)), (2, 4), 6, scale) == 0
    # An unstable table (a departure at larger fields): smaller fields.
    assert wants(est(ComponentStatus.UNSTABLE, material, (0, 0)), (2, 4), 6, scale) == -1
    assert wants(est(ComponentStatus.ZERO_FIELD, material, (0, 0)), (0, 0), 6, scale) == 0
