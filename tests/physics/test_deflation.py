"""The deflated conjugate gradients of the Newton steps: the same solution as a
direct solve, fewer Hessian products where the directions are the slow ones,
directions turned into a field point's orbitals, and field points whose
numbers do not depend on the preconditioner beyond their convergence."""

import textwrap

import numpy as np
import pytest

pytest.importorskip("pyscf")

from fieldprop.backend import context as backend_context  # noqa: E402
from fieldprop.backend import solver as backend_solver  # noqa: E402
from fieldprop.backend.orbital_hessian import (_deflated, _orbital_hessian,  # noqa: E402
                                               _pcg)
from fieldprop.engine.prepare import prepare  # noqa: E402
from fieldprop.engine.run import compute  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402
from fieldprop.points.store import reference_from_bytes, reference_to_bytes  # noqa: E402
from support import WATER_ANGSTROM, geometry_text  # noqa: E402

WATER = geometry_text("OHH", WATER_ANGSTROM)


def _spd(n=200, seed=3):
    """A symmetric positive definite matrix with a few slow modes (eigenvalues
    1e-3..1e-2) under a spread 0.5..5, and its eigenvectors."""
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.normal(size=(n, n)))
    values = np.concatenate([np.geomspace(1e-3, 1e-2, 6), rng.uniform(0.5, 5.0, n - 6)])
    return (q * values) @ q.T, q, values


def test_deflated_conjugate_gradients_solve_exactly_and_drop_the_slow_modes():
    a, q, values = _spd()
    b = np.random.default_rng(5).normal(size=a.shape[0])
    diagonal = np.diag(a).copy()

    def plain(v):
        return v / diagonal

    counted = []

    def operator(v):
        counted.append(1)
        return a @ v

    exact = np.linalg.solve(a, b)
    x, ok = _pcg(operator, plain, b, 1e-10)
    plain_products = len(counted)
    assert ok and np.linalg.norm(x - exact) <= 1e-7 * np.linalg.norm(exact)
    # Deflating the six slow eigenvectors (exact products) leaves a well
    # conditioned problem: far fewer products, the same solution.
    w = q[:, :6].T
    counted.clear()
    x, ok = _pcg(operator, _deflated(plain, w, w @ a), b, 1e-10)
    assert ok and np.linalg.norm(x - exact) <= 1e-7 * np.linalg.norm(exact)
    assert len(counted) < 0.6 * plain_products, (len(counted), plain_products)
    # Approximate products (the Hessian of a nearby problem) still give the
    # exact solution: the preconditioner stays symmetric positive definite.
    rng = np.random.default_rng(11)
    nearby = a + 0.05 * np.diag(rng.uniform(0.0, 1.0, a.shape[0]))
    x, ok = _pcg(operator, _deflated(plain, w, w @ nearby), b, 1e-10)
    assert ok and np.linalg.norm(x - exact) <= 1e-7 * np.linalg.norm(exact)
    # Dependent directions (a row twice) are left out, not inverted.
    twice = np.vstack([w, w[:1]])
    x, ok = _pcg(operator, _deflated(plain, twice, twice @ a), b, 1e-10)
    assert ok and np.linalg.norm(x - exact) <= 1e-7 * np.linalg.norm(exact)


def _water_job(tmp_path, model='method = "hf"\nbasis = "6-31g"'):
    path = tmp_path / "water.toml"
    path.write_text(textwrap.dedent(f"""
        [molecule]
        geometry = \"\"\"
{WATER}
        \"\"\"
        [model]
        {model}
        [response]
        properties = ["dipole", "alpha", "beta"]
        field_au = 0.002
        symmetry = false
        """))
    return load_job(path)


def _context_with_reference(job):
    from fieldprop.backend.points import compute_reference

    prepared = prepare(job)
    context = backend_context.ModelContext(prepared.molecule, job.model, job.scf)
    compute_reference(context, prepared.tasks[0])
    return context, prepared


def test_the_subspace_turned_into_a_field_points_orbitals_solves_its_newton_step(tmp_path):
    context, _ = _context_with_reference(_water_job(tmp_path))
    subspace = context.subspace
    ref = context.reference
    assert subspace is not None and subspace.directions.shape[0] >= 3
    # Turned into the zero-field orbitals themselves, the subspace is itself.
    mf = context.mean_field((0.0, 0.0, 0.0))
    mf.mo_coeff, mf.mo_occ = ref.mo_coeff, ref.mo_occ
    mf.mo_energy = backend_context._orbital_energies(mf)
    w, z = subspace.mapped(_orbital_hessian(mf, context.response), context.overlap)
    assert np.allclose(w, subspace.directions, atol=1e-12)
    assert np.allclose(z, subspace.products, atol=1e-12)
    # At a field point's start (the response start), the Newton step solved
    # with the deflation is the step solved without it.
    field = np.array([0.004, -0.003, 0.005])
    mf = context.mean_field(field)
    start, _ = backend_solver._start_orbitals(context, field)
    fock = mf.get_fock(dm=mf.make_rdm1(start, ref.mo_occ))
    c, energies = backend_solver._semicanonical(start, ref.mo_occ, fock)
    mf.mo_coeff, mf.mo_occ, mf.mo_energy = c, ref.mo_occ, energies
    hessian = _orbital_hessian(mf, context.response)
    rhs = -hessian.vo(fock)
    plain = hessian.solve(rhs, 1e-10, "test")
    plain_products = hessian.products
    deflated = hessian.solve(rhs, 1e-10, "test",
                             subspace=subspace.mapped(hessian, context.overlap))
    assert np.linalg.norm(deflated - plain) <= 1e-8 * np.linalg.norm(plain)
    assert hessian.products - plain_products < plain_products


def test_a_reference_read_from_a_store_solves_its_subspace_again(tmp_path):
    """The store keeps no subspace: a process that reads the reference back
    solves the zero-field response again, from the same orbitals (without the
    zero field's Newton directions, which only the process that converged it
    has: the same solves as the reference's own without them)."""
    from fieldprop.backend.response import zero_field_response

    context, prepared = _context_with_reference(_water_job(tmp_path))
    zero = prepared.tasks[0]
    stored = reference_from_bytes(reference_to_bytes(context.reference))
    assert stored.response_subspace is None
    assert stored.gradient_floor == context.reference.gradient_floor
    other = backend_context.ModelContext(zero.molecule, zero.model, zero.scf, stored)
    with_newton = context.subspace
    assert context.newton_pairs, "the zero field's Newton solves are kept"
    context.newton_pairs = []
    mf = context.mean_field((0.0, 0.0, 0.0))
    mf.mo_coeff, mf.mo_occ = stored.mo_coeff, stored.mo_occ
    mf.mo_energy = backend_context._orbital_energies(mf)
    own = zero_field_response(mf, context)[1]
    again = other.subspace
    assert with_newton.directions.shape[0] > own.directions.shape[0]
    assert again.directions.shape == own.directions.shape
    # The first direction (the preconditioned right-hand side) is the same;
    # later ones follow the orbital energies' last digits (the reference's own
    # from the SCF, these from the Fock matrix), but span the same space.
    assert np.allclose(again.directions[0], own.directions[0], atol=1e-12)
    basis = np.linalg.qr(again.directions.T)[0]
    left = own.directions.T - basis @ (basis.T @ own.directions.T)
    assert np.linalg.norm(left) < 1e-6 * np.linalg.norm(own.directions)


def test_field_points_give_the_same_tensors_with_and_without_the_deflation(
        tmp_path, monkeypatch):
    job = _water_job(tmp_path)
    deflated = compute(job, progress=False)
    monkeypatch.setattr(backend_solver, "_deflation", lambda *args: None)
    plain = compute(job, progress=False)
    cycles = [sum(r.scf_cycles for r in run.records[1:]) for run in (deflated, plain)]
    assert cycles[0] < cycles[1], cycles
    for name in ("dipole", "alpha", "beta"):
        for a, b in zip(deflated.tensors[name].components, plain.tensors[name].components):
            bound = a.estimate.error_au + b.estimate.error_au + 1e-9
            assert abs(a.estimate.value_au - b.estimate.value_au) <= bound, (name, a.plan.name)


def test_the_gradient_floor_travels_with_the_reference_and_bounds_the_points_aim():
    from fieldprop.points.records import ZeroFieldReference

    ref = ZeroFieldReference(np.eye(2), (np.eye(2),), 0.0, gradient_floor=2.5e-12)
    assert reference_from_bytes(reference_to_bytes(ref)).gradient_floor == 2.5e-12
    # A reference stored before the floor was kept reads back without one.
    assert ZeroFieldReference(np.eye(2), (np.eye(2),), 0.0).gradient_floor == 0.0
    aim = backend_solver._point_target
    assert aim(1e-12, 6e-11, 0.0) == 1e-12  # no stall at zero field: the job's target
    assert aim(1e-12, 6e-11, 2.5e-12) == backend_solver.FLOOR_MARGIN * 2.5e-12
    assert aim(1e-12, 6e-11, 1e-9) == 6e-11  # never above what the derivatives accept
