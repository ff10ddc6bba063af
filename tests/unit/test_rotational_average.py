"""Rotational averages of a degenerate open shell's tensors
(fieldprop.tensors.rotational_average), without PySCF.

Against closed forms written here: the cylindrical average of a rank-2 tensor
about n is a_perp (1 - n n) + a_par n n with a_par = n.a.n and a_perp =
(tr a - a_par) / 2; the spherical average of a rank-2 tensor is tr(a)/3 times
the unit tensor, of a rank-3 tensor its totally antisymmetric part (zero for
one symmetric in two indices), and of a rank-4 tensor its projection onto the isotropic
tensors d_ij d_kl, d_ik d_jl, d_il d_jk (Gram matrix solved here), whose
ZZZZ element is gamma_parallel. The averages are exact, so invariant under any
turn they average over; error bars carry each component's bar linearly.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from fieldprop.numerics import tensors as ft
from fieldprop.numerics.extrapolate import ComponentEstimate, ComponentStatus, mark_unstable
from fieldprop.numerics.plan import plan_fields
from fieldprop.points.records import Orientation

RNG = np.random.default_rng(20240611)
#: A tilted linear molecule's frame (u, v, n), as MoleculeSpec.orientation_frame builds it.
N = np.array([1.0, 2.0, 2.0]) / 3.0
U = np.array([1.0, 0.0, 0.0]) - N[0] * N
U /= np.linalg.norm(U)
FRAME = np.array([U, np.cross(N, U), N])


def _symmetric(order: int) -> np.ndarray:
    t = RNG.standard_normal((3,) * order)
    return sum(np.transpose(t, p) for p in itertools.permutations(range(order)))


def _tensor(name: str, value: np.ndarray, route: str = "energy", error: float = 1e-3,
            unstable: str | None = None) -> ft.TensorResult:
    """The TensorResult whose components take their values from ``value`` at
    their own indices, each with bar ``error`` (``unstable``: that component
    has no number)."""
    plan = plan_fields([name], 0.001, 2.0, 2, route)
    estimates = []
    for c in plan.components:
        v = float(value[c.indices])
        est = ComponentEstimate(v, error, (0, 0), ComponentStatus.OK, 0.0, ((v,),))
        if c.name == unstable:
            est = mark_unstable(est, "for the test")
        estimates.append(est)
    return ft.assemble(plan.components, estimates)[name]


def _turn(t: np.ndarray, r: np.ndarray) -> np.ndarray:
    for axis in range(t.ndim):
        t = np.moveaxis(np.tensordot(r, t, axes=([1], [axis])), 0, axis)
    return t


def _rotation(axis, angle) -> np.ndarray:
    from scipy.spatial.transform import Rotation

    return Rotation.from_rotvec(angle * np.asarray(axis) / np.linalg.norm(axis)).as_matrix()


@pytest.mark.parametrize("route", ["energy", "dipole"])
def test_cylindrical_average_of_alpha_is_the_mean_of_the_perpendicular_pair(route):
    alpha = _symmetric(2)
    t = _tensor("alpha", alpha, route)
    average = ft.rotational_average(t, "cylindrical", FRAME, ("u", "v", "n"))
    parallel = N @ alpha @ N
    perpendicular = (np.trace(alpha) - parallel) / 2.0
    closed = perpendicular * np.eye(3) + (parallel - perpendicular) * np.outer(N, N)
    assert np.allclose(average.value_au, closed, atol=1e-12)
    rows = {c.name: c for c in average.in_frame}
    in_frame = FRAME @ alpha @ FRAME.T
    assert rows["alpha_uu"].value_au == pytest.approx(in_frame[0, 0], abs=1e-12)
    assert rows["alpha_vv"].value_au == pytest.approx(in_frame[1, 1], abs=1e-12)
    for name in ("alpha_uu", "alpha_vv"):
        assert rows[name].average_au == pytest.approx((in_frame[0, 0] + in_frame[1, 1]) / 2,
                                                      abs=1e-12)
    assert rows["alpha_nn"].average_au == pytest.approx(parallel, abs=1e-12)
    # Structural zeros of the average are exact zeros with no bar.
    assert rows["alpha_un"].average_au == 0.0 and rows["alpha_un"].average_error_au == 0.0


@pytest.mark.parametrize("name, order", [("dipole", 1), ("alpha", 2), ("beta", 3),
                                         ("gamma", 4)])
def test_the_averages_are_exact_invariant_under_every_turn_they_average(name, order):
    """Eight equal turns average a rank <= 7 tensor exactly about n, the
    icosahedral group a rank <= 5 tensor over all turns: turns at angles the
    averages did not sample leave them unchanged."""
    value = RNG.standard_normal((3,) * order)
    t = _tensor(name, value, "dipole" if order > 1 else "energy")
    cylinder = ft.rotational_average(t, "cylindrical", FRAME, ("u", "v", "n")).value_au
    sphere = ft.rotational_average(t, "spherical", np.eye(3), ("x", "y", "z")).value_au
    for angle in (0.3, 1.234, 2.9):
        assert np.allclose(_turn(cylinder, _rotation(N, angle)), cylinder, atol=1e-12)
        assert np.allclose(_turn(sphere, _rotation([0.3, -0.8, 0.5], angle)), sphere,
                           atol=1e-12)
    # And an average is a projection: averaging again changes nothing.
    again = _tensor(name, cylinder, "dipole" if order > 1 else "energy", 0.0)
    assert np.allclose(ft.rotational_average(again, "cylindrical", FRAME, "uvn").value_au,
                       cylinder, atol=1e-12)


def test_spherical_averages_against_their_closed_forms():
    d = np.eye(3)
    assert np.allclose(ft.rotational_average(_tensor("dipole", RNG.standard_normal(3)),
                                             "spherical", d, "xyz").value_au, 0.0, atol=1e-12)
    alpha = _symmetric(2)
    assert np.allclose(ft.rotational_average(_tensor("alpha", alpha), "spherical", d,
                                             "xyz").value_au,
                       np.trace(alpha) / 3.0 * d, atol=1e-12)
    # beta: the totally antisymmetric part only, which a beta symmetric in two
    # indices lacks (energy route: in all; dipole route: in the two field ones).
    for route in ("energy", "dipole"):
        t = _tensor("beta", RNG.standard_normal((3, 3, 3)), route)
        assert np.abs(t.value_au).max() > 0.1
        assert np.allclose(ft.rotational_average(t, "spherical", d, "xyz").value_au, 0.0,
                           atol=1e-12)
    gamma = _symmetric(4)
    basis = [np.einsum("ij,kl->ijkl", d, d), np.einsum("ik,jl->ijkl", d, d),
             np.einsum("il,jk->ijkl", d, d)]
    gram = np.array([[np.sum(a * b) for b in basis] for a in basis])
    coefficients = np.linalg.solve(gram, [np.sum(gamma * b) for b in basis])
    isotropic = sum(c * b for c, b in zip(coefficients, basis))
    average = ft.rotational_average(_tensor("gamma", gamma), "spherical", d, "xyz")
    assert np.allclose(average.value_au, isotropic, atol=1e-10)
    assert average.value_au[2, 2, 2, 2] == pytest.approx(ft.gamma_parallel(gamma), abs=1e-10)


def test_error_bars_carry_each_components_bar_linearly_and_unstable_ones_spread():
    beta = _symmetric(3)
    t = _tensor("beta", beta, error=2e-3)
    average = ft.rotational_average(t, "cylindrical", FRAME, ("u", "v", "n"))
    # Moving every component by its bar, in any signs, moves the average by at
    # most its bar (and the bound is reached by the worst signs of one entry).
    for _ in range(20):
        shifted = beta.copy()
        for c in t.components:
            sign = RNG.choice((-1.0, 1.0))
            for e in c.entries:
                shifted[e] += sign * c.estimate.error_au
        moved = ft.rotational_average(_tensor("beta", shifted), "cylindrical", FRAME,
                                      "uvn").value_au
        assert np.all(np.abs(moved - average.value_au) <= average.error_au + 1e-12)
    # A component without a number leaves every entry that draws on it without one.
    t = _tensor("beta", beta, unstable="beta_xxx")
    average = ft.rotational_average(t, "cylindrical", FRAME, ("u", "v", "n"))
    assert not average.stable.all() and np.isnan(average.value_au[~average.stable]).all()
    assert any(c.average_au is None for c in average.in_frame)
    spherical = ft.rotational_average(_tensor("alpha", _symmetric(2), unstable="alpha_xy"),
                                      "spherical", np.eye(3), "xyz")
    assert spherical.stable.all()  # the trace does not draw on alpha_xy


@pytest.mark.parametrize("document", [
    {"kind": "planar", "axes": np.eye(3).tolist(), "unpaired_second_moments_bohr2": [1, 2, 3],
     "centre_bohr": [0, 0, 0]},
    {"kind": "atom", "axes": np.eye(3).tolist()[:2], "unpaired_second_moments_bohr2": [1, 2, 3],
     "centre_bohr": [0, 0, 0]},
    {"kind": "atom", "axes": np.eye(3).tolist(), "centre_bohr": [0, 0, 0]},
    {"kind": "linear", "axes": "x", "unpaired_second_moments_bohr2": [1, 2, 3],
     "centre_bohr": [0, 0, 0]},
])
def test_a_damaged_orientation_document_is_refused(document):
    with pytest.raises(ValueError):
        Orientation.from_document(document)
