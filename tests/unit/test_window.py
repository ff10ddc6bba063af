"""The automatic field window on synthetic energies with a known noise level.

Error model (REFERENCES sect. 2): an entry D(k, m) of the Richardson table built
on the ladder h, 2h, ..., 2^m h carries a truncation error t_m(h) (what the
noise-free table leaves, computable exactly here) and a noise floor f_m(h)
proportional to eps / h^n. The optimal entry (k*, m*) of the table minimises
t_m(h_k) + f_m(h_k) over all entries; its step h_k* is the optimal step. The
automatic ladder must contain it strictly inside (not at an end of the ladder),
and fieldprop's chosen entry, selected from the noisy data alone, must start
within a factor of 2 of it.
"""

from types import SimpleNamespace

import numpy as np
import pytest

from fieldprop.engine.analyse import NoiseModel, extrapolate_components
from fieldprop.numerics.extrapolate import _table
from fieldprop.inputs.job import AUTO_FIELD_AU, AUTO_LEVELS
from fieldprop.numerics.plan import plan_fields, stencil_estimate

E0, A, B = -40.0, 0.01, 20.0  # E(F) = E0 - A exp(B F_z): -d^nE/dF_z^n = A B^n, all n


def energy(f):
    return E0 - A * np.exp(B * f[2])


def column_error(comp, h0, m, eps):
    """t_m(h0) + f_m(h0) for the component's stencil on the ladder h0 * 2^j."""
    exact = A * B ** comp.order
    raw, floors = [], []
    for j in range(m + 1):
        h = h0 * 2.0**j
        # The same stencil shape at step h: rescale the planned offsets.
        s0 = comp.stencils[0]
        value = -sum(w * (energy(h * OFFSETS[p]) - E0) for p, w in s0.terms) / h**comp.order
        raw.append(value)
        floors.append(s0.weight_norm * eps / h**comp.order)
    table, coeffs = _table(raw, 2.0)
    truncation = abs(table[m][0] - exact)
    floor = sum(abs(c) * f for c, f in zip(coeffs[m][0], floors))
    return truncation + floor


#: Point index -> offsets relative to the level-0 step (level-0 stencils may use
#: points planned on a higher level, e.g. offset 2 at level 0 = offset 1 at level 1).
OFFSETS: dict = {}


def set_offsets(plan):
    OFFSETS.clear()
    OFFSETS.update({p.index: np.array(p.field_vector_au) / plan.field_au for p in plan.points})


@pytest.mark.parametrize("prop, name, eps", [
    ("alpha", "alpha_zz", 1e-12),
    ("beta", "beta_zzz", 1e-11),
    ("gamma", "gamma_zzzz", 1e-10),
    ("gamma", "gamma_zzzz", 1e-12),
])
def test_automatic_window_lands_near_the_optimal_step(prop, name, eps):
    order = {"alpha": 2, "beta": 3, "gamma": 4}[prop]
    plan = plan_fields((prop,), AUTO_FIELD_AU[order], 2.0, AUTO_LEVELS, "energy")
    comp = next(c for c in plan.components if c.name == name)
    set_offsets(plan)
    rng = np.random.default_rng(3)
    records = [SimpleNamespace(energy_au=energy(np.array(p.field_vector_au))
                               + rng.uniform(-eps, eps), dipole_au=None)
               for p in plan.points]
    estimates = extrapolate_components(plan, records, NoiseModel(eps, 0.0))
    est = estimates[plan.components.index(comp)]
    k, m = est.chosen_entry
    chosen_h = plan.steps_au()[k]
    steps = plan.steps_au()
    model = {(kk, mm): column_error(comp, steps[kk], mm, eps)
             for mm in range(AUTO_LEVELS) for kk in range(AUTO_LEVELS - mm)}
    k_best, m_best = min(model, key=model.get)
    best_h = steps[k_best]
    assert 0 < k_best < AUTO_LEVELS - 1  # noise below, contamination above: inside
    assert steps[0] < best_h < steps[-1]
    assert 0.5 <= chosen_h / best_h <= 2.0, (chosen_h, best_h, (k, m), (k_best, m_best))
    # And the result is within its error bar of the exact derivative.
    assert abs(est.value_au - A * B**order) <= est.error_au


def test_stencil_rescaling_matches_the_plan():
    # column_error rebuilds level-0 stencils at other steps; check it against
    # the planner's own level-1 estimate (same offsets, step doubled).
    plan = plan_fields(("gamma",), 0.001, 2.0, 2, "energy")
    comp = next(c for c in plan.components if c.name == "gamma_zzzz")
    set_offsets(plan)
    energies = np.array([energy(np.array(p.field_vector_au)) for p in plan.points])
    planned = stencil_estimate(comp, comp.stencils[1], energies, None)
    s0 = comp.stencils[0]
    h = 0.002
    rebuilt = -sum(w * (energy(h * OFFSETS[p]) - E0) for p, w in s0.terms) / h**4
    assert rebuilt == pytest.approx(planned, rel=1e-9)


@pytest.mark.parametrize("prop, name, field_au", [
    ("alpha", "alpha_zz", 0.02),
    ("beta", "beta_zzz", 0.01),
])
def test_a_field_above_the_window_is_warned_with_a_better_one(prop, name, field_au):
    # A job's own field_au far above the window: the best entry starts at the
    # smallest field and its error is truncation. The warning must say so and
    # name an h0 within a factor of 2 of the step that minimises the true error of
    # that entry on the same two-level ladder (scanned on the model above).
    from fieldprop.engine.analyse import window_warnings
    from fieldprop.numerics.tensors import assemble

    eps, levels = 1e-12, 2
    plan = plan_fields((prop,), field_au, 2.0, levels, "energy")
    comp = next(c for c in plan.components if c.name == name)
    set_offsets(plan)
    records = [SimpleNamespace(energy_au=energy(np.array(p.field_vector_au)), dipole_au=None)
               for p in plan.points]
    tensors = assemble(plan.components, extrapolate_components(plan, records,
                                                               NoiseModel(eps, 0.0)))
    job = SimpleNamespace(path="job.toml", response=SimpleNamespace(field_au_source="job"))
    (text,) = [w for w in window_warnings(job, plan, tensors) if "lies above" in w]
    assert name in text
    suggested = float(text.split("field_au = ")[-1].split()[0])
    grid = field_au * np.logspace(-3, 0, 200)
    best = grid[np.argmin([column_error(comp, h, levels - 1, eps) for h in grid])]
    assert 0.5 <= suggested / best <= 2.0, (suggested, best)


def test_a_field_inside_the_window_is_not_warned():
    from fieldprop.engine.analyse import window_warnings
    from fieldprop.numerics.tensors import assemble

    plan = plan_fields(("alpha",), 0.002, 2.0, 3, "energy")
    records = [SimpleNamespace(energy_au=energy(np.array(p.field_vector_au)), dipole_au=None)
               for p in plan.points]
    tensors = assemble(plan.components, extrapolate_components(plan, records,
                                                               NoiseModel(1e-12, 0.0)))
    job = SimpleNamespace(path="job.toml", response=SimpleNamespace(field_au_source="job"))
    assert window_warnings(job, plan, tensors) == ()
