"""The Taylor continuity check on synthetic field points (no PySCF): smooth states
pass at every field of the automatic window, a kink, a jump or a flagged point is
caught at the right field vector, and everything beyond it on its line is left out."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldprop.numerics.continuity import RELATIVE_DEPARTURE, check_continuity, lagrange_weights
from fieldprop.engine.analyse import NoiseModel, extrapolate_components
from fieldprop.numerics.plan import plan_fields
from fieldprop.points.records import PointRecord
from fieldprop.numerics.tensors import assemble


def taylor_energy(f, mu, alpha, beta, gamma):
    """E(F) in the Taylor convention, for an (n, 3) array of field vectors."""
    return (-76.0 - f @ mu - 0.5 * np.einsum("pi,ij,pj->p", f, alpha, f)
            - np.einsum("pi,ijk,pj,pk->p", f, beta, f, f) / 6.0
            - np.einsum("pi,ijkl,pj,pk,pl->p", f, gamma, f, f, f) / 24.0)


def random_tensors(rng, scale_beta=100.0, scale_gamma=3000.0):
    """Typical small-molecule magnitudes (common practice): |mu| ~ 1, alpha ~ 10,
    beta ~ 10-100, gamma ~ 1e3 au; symmetric in all indices."""
    import itertools
    import math

    def sym(t):
        return sum(np.transpose(t, p) for p in itertools.permutations(range(t.ndim))) \
            / math.factorial(t.ndim)

    mu = rng.normal(size=3)
    a = rng.normal(size=(3, 3))
    alpha = 8.0 * np.eye(3) + a @ a.T
    beta = sym(rng.normal(scale=scale_beta, size=(3, 3, 3)))
    gamma = sym(rng.normal(scale=scale_gamma, size=(3, 3, 3, 3))) + scale_gamma * np.einsum(
        "ij,kl->ijkl", np.eye(3), np.eye(3))
    return mu, alpha, beta, gamma


def energy_plan():
    # The automatic window of beta and gamma on the energy route: h0 = 5e-4, six levels.
    return plan_fields(("dipole", "alpha", "beta", "gamma"), 5e-4, 2.0, 6, "energy")


def fields(plan):
    return np.array([p.field_vector_au for p in plan.points])


def test_lagrange_weights_reproduce_polynomials():
    nodes = [0.0, -0.5, 0.5, -0.25, 0.25]
    w = lagrange_weights(nodes, 1.0)
    for degree in range(len(nodes)):
        assert w @ np.power(nodes, degree) == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("seed", range(5))
def test_a_smooth_state_passes_over_the_whole_automatic_window(seed):
    plan = energy_plan()
    f = fields(plan)
    energy = taylor_energy(f, *random_tensors(np.random.default_rng(seed)))
    noise = np.full(len(f), 1e-12)
    energy = energy + np.random.default_rng(seed + 100).normal(scale=1e-12, size=len(f))
    report = check_continuity(plan.points, energy[:, None], noise)
    assert report.departures == () and not report.excluded
    assert report.checked > 0.7 * (len(plan.points) - 1)
    # A quartic Taylor series is reproduced by the predicting polynomials once
    # five nodes are in: what remains is far below the threshold.
    assert report.largest_relative < RELATIVE_DEPARTURE / 10


def test_noise_alone_never_departs():
    # A nonpolar, isotropic state with SCF noise of 1e-9 Eh: the residuals at the
    # smallest fields are noise, which the noise test must absorb.
    plan = energy_plan()
    f = fields(plan)
    rng = np.random.default_rng(3)
    energy = -0.5 * 5.0 * (f ** 2).sum(axis=1) + rng.normal(scale=1e-9, size=len(f))
    report = check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-9))
    assert report.departures == ()


def test_a_crossing_to_a_state_with_another_dipole_is_caught_where_it_happens():
    # Beyond |F| = 0.01 along +x the lower state has a dipole larger by 1 au: the
    # energy is continuous at the crossing, its slope is not (a real crossing).
    plan = energy_plan()
    f = fields(plan)
    mu, alpha, beta, gamma = random_tensors(np.random.default_rng(1))
    energy = taylor_energy(f, mu, alpha, beta, gamma)
    along_x = (f[:, 0] > 0.01) & (np.abs(f[:, 1]) < 1e-15) & (np.abs(f[:, 2]) < 1e-15)
    energy[along_x] -= 1.0 * (f[along_x, 0] - 0.01)
    report = check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-12))
    labels = [d.label for d in report.departures]
    assert labels == ["L5(+1,0,0)"], labels
    first = report.departures[0]
    assert first.field_vector_au == (0.016, 0.0, 0.0) and first.kind == "taylor"
    excluded = {plan.points[i].label for i in report.excluded}
    assert excluded == {"L5(+1,0,0)", "L5(-1,0,0)", "L5(+2,0,0)", "L5(-2,0,0)"}


def test_a_jump_to_an_excited_state_excludes_its_line_beyond_it():
    plan = energy_plan()
    f = fields(plan)
    energy = taylor_energy(f, *random_tensors(np.random.default_rng(2)))
    labels = [p.label for p in plan.points]
    energy[labels.index("L2(0,+1,0)")] += 0.2  # an excited state 0.2 Eh up
    report = check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-12))
    assert [d.label for d in report.departures] == ["L2(0,+1,0)"]
    excluded = {plan.points[i].label for i in report.excluded}
    assert {"L2(0,+1,0)", "L2(0,-1,0)", "L3(0,+1,0)", "L5(0,-1,0)"} <= excluded
    assert not any("(+1,0,0)" in e or "(0,0,+1)" in e for e in excluded)


def test_the_dipole_route_checks_the_dipole_vector():
    plan = plan_fields(("alpha", "beta"), 2.5e-4, 2.0, 6, "dipole")
    f = fields(plan)
    mu, alpha, beta, gamma = random_tensors(np.random.default_rng(4))
    dipole = (mu + f @ alpha + 0.5 * np.einsum("ijk,pj,pk->pi", beta, f, f)
              + np.einsum("ijkl,pj,pk,pl->pi", gamma, f, f, f) / 6.0)
    noise = np.full(len(f), 1e-10)
    assert check_continuity(plan.points, dipole, noise).departures == ()
    labels = [p.label for p in plan.points]
    dipole[labels.index("L4(0,0,-1)")] += [0.0, 0.0, 0.5]  # a jump of the dipole
    report = check_continuity(plan.points, dipole, noise)
    assert [d.label for d in report.departures] == ["L4(0,0,-1)"]


def test_flagged_points_depart_even_on_a_line_with_one_strength():
    plan = plan_fields(("alpha",), 1e-3, 2.0, 1, "energy")  # (+1,-1,0) pairs only
    f = fields(plan)
    energy = taylor_energy(f, *random_tensors(np.random.default_rng(5)))
    labels = [p.label for p in plan.points]
    flagged = {labels.index("L0(+1,-1,0)"): "occupied-space overlap 0.2"}
    report = check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-12), flagged)
    assert [(d.label, d.kind, d.reason) for d in report.departures] == [
        ("L0(+1,-1,0)", "state", "occupied-space overlap 0.2")]
    assert {plan.points[i].label for i in report.excluded} == {"L0(+1,-1,0)", "L0(-1,+1,0)"}


def _records(plan, energy):
    return [PointRecord(p, float(e), float(e), None, 1, ("diis",), 0.0, 1.0, 1e-9)
            for p, e in zip(plan.points, energy)]


def test_components_stop_below_the_departure_and_keep_their_accuracy():
    plan = plan_fields(("alpha",), 1e-3, 2.0, 4, "energy")
    f = fields(plan)
    tensors = random_tensors(np.random.default_rng(6))
    energy = taylor_energy(f, *tensors)
    labels = [p.label for p in plan.points]
    flagged = {labels.index("L2(0,0,+1)"): "moved"}
    report = check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-12), flagged)
    noise = NoiseModel(1e-12, 1e-10)
    estimates = extrapolate_components(plan, _records(plan, energy), noise, report.cause)
    by_name = dict(zip((c.name for c in plan.components), estimates))
    assert len(by_name["alpha_zz"].table[0]) == 2  # levels 0 and 1 only
    assert len(by_name["alpha_xx"].table[0]) == 4
    result = assemble(plan.components, estimates)["alpha"]
    err = np.abs(result.value_au - tensors[1])
    assert np.all(err <= result.error_au + 1e-9)


def test_a_component_with_every_level_excluded_has_no_number():
    plan = plan_fields(("alpha",), 1e-3, 2.0, 3, "energy")
    f = fields(plan)
    energy = taylor_energy(f, *random_tensors(np.random.default_rng(7)))
    labels = [p.label for p in plan.points]
    report = check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-12),
                              {labels.index("L0(0,+1,0)"): "moved"})
    estimates = extrapolate_components(plan, _records(plan, energy), NoiseModel(1e-12, 1e-10),
                                       report.cause)
    yy = dict(zip((c.name for c in plan.components), estimates))["alpha_yy"]
    assert yy.status.value == "unstable" and "L0(0,+1,0)" in yy.reason
    tensor = assemble(plan.components, estimates)["alpha"]
    assert not tensor.stable[1, 1] and tensor.stable[0, 0]


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), h0=st.sampled_from([2.5e-4, 5e-4, 1e-3]),
       levels=st.integers(2, 6))
def test_smooth_states_never_depart(seed, h0, levels):
    """Property: any Taylor series of typical size, on any ladder up to the
    automatic window's largest field, passes."""
    plan = plan_fields(("dipole", "alpha", "beta", "gamma"), h0, 2.0, levels, "energy")
    f = fields(plan)
    energy = taylor_energy(f, *random_tensors(np.random.default_rng(seed)))
    assert check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-11)).departures == ()
