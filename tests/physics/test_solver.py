"""The field-point solver: shared integrals change no energy, the response start
and Newton finish change no tensor beyond its error bars, a point that stalls
above the gradient its derivatives need fails by name while the others are kept,
and a push-pull aromatic whose DIIS stalls converges with the Newton finish."""

import json
import textwrap

import numpy as np
import pytest

pytest.importorskip("pyscf")

from fieldprop.backend import context as backend_context  # noqa: E402
from fieldprop.backend import points as backend_points  # noqa: E402
from fieldprop.backend import solver as backend_solver  # noqa: E402
from fieldprop.cli import main  # noqa: E402
from fieldprop.engine.prepare import prepare  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402
from support import WATER_ANGSTROM, agree, geometry_text, nh2_geometry, run_job  # noqa: E402

WATER = geometry_text("OHH", WATER_ANGSTROM)


def _job(tmp_path, geometry, model, extra="", name="job.toml", multiplicity=1):
    path = tmp_path / name
    path.write_text(textwrap.dedent(f"""
        [molecule]
        geometry = \"\"\"
{geometry}
        \"\"\"
        multiplicity = {multiplicity}
        [model]
        {model}
        [response]
        properties = ["dipole", "alpha", "beta"]
        field_au = 0.002
        {extra}
        """))
    return load_job(path)


@pytest.mark.parametrize("model, geometry, multiplicity", [
    ('method = "hf"\n        basis = "6-31g*"', WATER, 1),
    ('method = "dft"\n        functional = "b3lyp"\n        basis = "6-31g"', WATER, 1),
    ('method = "hf"\n        basis = "6-31g"', None, 2),
], ids=["rhf", "rks", "uhf"])
def test_shared_integrals_give_the_energies_of_integrals_built_per_point(
        tmp_path, model, geometry, multiplicity):
    from pyscf import dft, gto, scf

    job = _job(tmp_path, geometry or nh2_geometry(), model, multiplicity=multiplicity)
    prepared = prepare(job)
    context = backend_context.ModelContext(prepared.molecule, job.model, job.scf)
    field = np.array([0.003, -0.002, 0.004])
    shared = context.mean_field(field)
    # An independent PySCF object with its own integrals (and grid), the field
    # added to its core Hamiltonian here.
    m = job.molecule
    mol = gto.M(atom=[(a.symbol, a.coords_bohr) for a in m.atoms], unit="Bohr",
                basis=job.model.basis, spin=multiplicity - 1, verbose=0)
    if job.model.method == "dft":
        own = dft.RKS(mol)
        own.xc, own.grids.level = job.model.functional, job.scf.grid_level
    else:
        own = scf.UHF(mol) if multiplicity > 1 else scf.RHF(mol)
    with mol.with_common_orig(prepared.molecule.origin_bohr):
        r = mol.intor_symmetric("int1e_r", comp=3)
    h = own.get_hcore() + np.einsum("x,xij->ij", field, r)
    own.get_hcore = lambda *args: h
    own.energy_nuc = lambda *args: mol.energy_nuc() - field @ prepared.molecule.nuclear_dipole_au()
    own.conv_tol, own.conv_tol_grad = 1e-12, 1e-9
    own.kernel()
    dm = own.make_rdm1()
    # The same density through both: energies within 1e-12 Eh (the integrals
    # are the same numbers; only the order of summation may differ).
    assert abs(shared.energy_tot(dm) - own.energy_tot(dm)) < 1e-12
    assert np.max(np.abs(shared.get_veff(mol, dm) - own.get_veff(mol, dm))) < 1e-12
    # The shared two-electron integrals are the context's, not a per-point copy.
    if job.model.method == "hf":
        assert shared._eri is context.template._eri is not None
    else:
        assert shared.grids is context.template.grids


def test_response_start_and_newton_finish_change_no_tensor_beyond_its_error_bars(tmp_path):
    results = {}
    for solver in ("newton", "diis"):
        _, results[solver] = run_job(tmp_path, f"""
            [molecule]
            geometry = \"\"\"
{WATER}
            \"\"\"
            [model]
            method = "hf"
            basis = "6-31+g*"
            [response]
            properties = ["dipole", "alpha", "beta"]
            field_au = 0.002
            [scf]
            solver = "{solver}"
            """, name=f"{solver}.toml")
    new, old = results["newton"], results["diis"]
    assert all(r.attempts[-1] == "newton" for r in new.records)
    for name in ("dipole", "alpha", "beta"):
        a, b = new.tensors[name], old.tensors[name]
        assert agree(a.value_au, a.error_au + b.error_au, b.value_au, 1e-12).all(), name
    # and with far fewer SCF cycles per point (measured ~3x; bench_points.py)
    cycles = {k: np.mean([r.scf_cycles for r in v.records[1:]]) for k, v in results.items()}
    assert cycles["newton"] < 0.6 * cycles["diis"], cycles


def test_a_stall_above_the_needed_gradient_fails_that_point_by_name(tmp_path, capsys,
                                                                     monkeypatch):
    target = np.array([0.0, 0.0, 0.004])
    real_newton, real_ladder = backend_solver._newton, backend_solver._ladder

    def at_target(mf, context):
        return np.allclose(mf.get_hcore(), context.hcore + np.einsum("x,xij->ij", target,
                                                                      context.r))

    def newton(mf, context, c, occ, goal, constraints=(), accepted=0.0):
        if at_target(mf, context):  # no Newton step: the point keeps its start
            mf.mo_coeff, mf.mo_occ = c, occ
            return 0, backend_solver._gradient_norm(mf), None
        return real_newton(mf, context, c, occ, goal, constraints, accepted)

    def ladder(mf, dm0, goal, attempts):
        if mf.mo_coeff is not None and at_target(mf, mf._fieldprop_context):
            attempts.append("diis")
            return 0  # ... and no ladder either: a stall at the start's gradient
        return real_ladder(mf, dm0, goal, attempts)

    real_mean_field = backend_context.ModelContext.mean_field

    def mean_field(self, field):
        mf = real_mean_field(self, field)
        mf._fieldprop_context = self
        return mf

    monkeypatch.setattr(backend_solver, "_newton", newton)
    monkeypatch.setattr(backend_solver, "_ladder", ladder)
    monkeypatch.setattr(backend_context.ModelContext, "mean_field", mean_field)
    job = _job(tmp_path, WATER, 'method = "hf"\n        basis = "6-31g"', name="water.toml")
    assert main(["run", job.path, "--quiet"]) == 1
    err = capsys.readouterr().err
    line = next(x for x in err.splitlines() if "did not converge" in x)
    # The point is L1(0,0,+1) (0.004 au on z), with the gradient it reached (the
    # response start's, ~1e-5) and the one its derivatives need (~1e-10 here:
    # the job's at the smallest field, scaled to this one's).
    assert "L1(0,0,+1)" in line and "need at most" in line and "reached" in line
    reached = float(line.split("orbital gradient ")[1].split()[0])
    needed = float(line.split("need at most ")[1].split()[0])
    assert needed > job.scf.gradient_accepted
    assert reached > needed == pytest.approx(job.scf.at_field(target).gradient_accepted)
    monkeypatch.undo()
    # Every other point was computed and stored; only the stalled one is missing.
    assert main(["plan", job.path, "--json-lines"]) == 0
    points = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    stored = [p["stored"] for p in points if p["stored"] != "image"]  # images: never computed
    assert stored.count("failed") == 1 and stored.count("stored") == len(stored) - 1


@pytest.mark.slow
def test_a_push_pull_aromatic_converges_on_the_dipole_route(tmp_path):
    # 4-nitroaniline at HF/6-31G (102 functions), our geometry: DIIS alone does
    # not reach the dipole route's orbital gradient of 1e-12 here; the Newton
    # finish does, or stops at the floor double precision allows, well below
    # what alpha needs.
    from pathlib import Path

    xyz = Path(__file__).resolve().parents[2] / "configs" / "molecules" / "nitroaniline.xyz"
    job, result = run_job(tmp_path, f"""
        [molecule]
        xyz = "{xyz}"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["alpha"]
        field_au = 0.001
        levels = 2
        """)
    assert all(r.gradient_norm <= job.scf.gradient_accepted for r in result.records)
    assert result.tensors["alpha"].stable.all()
    assert result.tensors["alpha"].value_au[0, 0] > 100.0  # the push-pull axis


def test_an_exception_inside_pyscf_fails_that_point_by_name_without_a_traceback(
        tmp_path, capsys, monkeypatch):
    real = backend_points._converge

    def broken(mf, context, point, *rest):
        if point.label == "L0(-1,0,0)":  # computed (L0(+1,0,0) is its mirror image)
            raise np.linalg.LinAlgError("Eigenvalues did not converge")
        return real(mf, context, point, *rest)

    monkeypatch.setattr(backend_points, "_converge", broken)
    job = _job(tmp_path, WATER, 'method = "hf"\n        basis = "6-31g"', name="water.toml")
    assert main(["run", job.path, "--quiet", "--workers", "1"]) == 1
    err = capsys.readouterr().err
    assert "Traceback" not in err
    line = next(x for x in err.splitlines() if x.startswith("fieldprop: error:"))
    assert "L0(-1,0,0)" in line and "LinAlgError: Eigenvalues did not converge" in line
    monkeypatch.undo()
    assert main(["plan", job.path, "--json-lines"]) == 0
    stored = [json.loads(x)["stored"] for x in capsys.readouterr().out.splitlines()]
    stored = [s for s in stored if s != "image"]  # images by symmetry: never computed
    assert stored.count("failed") == 1 and stored.count("stored") == len(stored) - 1


def _reference_context(job):
    """A model context with the zero-field reference of ``job`` computed, and
    its zero-field task."""
    zero = next(t for t in prepare(job).tasks if t.is_zero_field)
    context = backend_context.ModelContext(zero.molecule, zero.model, zero.scf)
    backend_points.compute_reference(context, zero)
    return context, zero


def _start_gradient(context, field):
    """The orbital gradient of the start a point at ``field`` would take now,
    and the start's name."""
    c, how = backend_solver._start_orbitals(context, field)
    mf = context.mean_field(field)
    occ = context.reference.mo_occ
    fock = mf.get_fock(dm=mf.make_rdm1(c, occ))
    return backend_solver._gradient_norm(mf, fock, (), c, occ), how


def _solve(context, zero, field, index):
    """Compute the point at ``field`` in ``context`` (its rotation is kept as a start)."""
    import dataclasses

    from fieldprop.numerics.plan import FieldPoint

    task = dataclasses.replace(zero, point=FieldPoint(index, (9, 9, 9), 0, tuple(field)))
    return backend_points.compute_point(context, task)


@pytest.mark.parametrize("reference", ["closed", "restricted-open"])
def test_mirror_and_line_starts_are_second_order(tmp_path, reference):
    """After the point at -F is solved, the start at +F (mirror) is exact to
    second order in F, and after +-a the start at F = 2a (line) to third: their
    orbital gradients are far below the response start's, which is exact to
    first order only (O(F^3) against O(F^2); measured at h = 0.004 au: mirror
    and line both 0.022 of the response start's for water HF/6-31G*; for NH2
    at ROHF/6-31G*, whose rotation from the reference is found by passes of a
    matrix logarithm, both 0.016). The pair's odd (third-order) term takes the
    line start at 2a to 0.016 (water) and 0.011 (NH2) of the even term's
    alone, and the mirror start at -2a to 0.007 and 0.003 of the plain
    mirror's."""

    job = (_job(tmp_path, WATER, 'method = "hf"\n        basis = "6-31g*"')
           if reference == "closed" else
           _job(tmp_path, nh2_geometry(), 'method = "hf"\n        basis = "6-31g*"\n'
                '        reference = "restricted"', multiplicity=2))
    context, zero = _reference_context(job)
    direction = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8])

    def start_gradient(field):
        return _start_gradient(context, field)

    def rotated_gradient(field, kappa):
        ref = context.reference
        c = backend_solver._rotate(ref.mo_coeff, ref.mo_occ, kappa)
        mf = context.mean_field(field)
        fock = mf.get_fock(dm=mf.make_rdm1(c, ref.mo_occ))
        return backend_solver._gradient_norm(mf, fock, (), c, ref.mo_occ)

    def solve(field, index):
        return _solve(context, zero, field, index)

    h = 0.004
    g_response, how = start_gradient(h * direction)
    assert how == "response_start"
    solve(-h * direction, 1)
    g_mirror, how = start_gradient(h * direction)
    assert how == "mirror_start" and g_mirror < 0.1 * g_response, (g_mirror, g_response)
    solve(h * direction, 2)
    g_line, how = start_gradient(2 * h * direction)
    assert how == "line_start"
    # The line start's odd (third-order) term from the pair +-a: without it,
    # the even term alone (exact to second order) starts farther away.
    ref, key = context.reference, backend_solver.field_key
    pair = context.solved[key(h * direction)], context.solved[key(-h * direction)]
    linear = np.einsum("j,jn->n", 2 * h * direction, ref.field_rotations)
    g_even = rotated_gradient(2 * h * direction, linear + (pair[0] + pair[1]) / 0.5)
    assert g_line < 0.1 * g_even, (g_line, g_even)
    # The mirror start at -2a with the pair's third-order term.
    solve(2 * h * direction, 3)
    g_mirror4, how = start_gradient(-2 * h * direction)
    assert how == "mirror_start"
    g_plain = rotated_gradient(-2 * h * direction,
                               context.solved[key(2 * h * direction)] - 2.0 * linear)
    assert g_mirror4 < 0.1 * g_plain, (g_mirror4, g_plain)
    context.solved.clear()
    g_line_response, _ = start_gradient(2 * h * direction)
    assert g_line < 0.1 * g_line_response, (g_line, g_line_response)


def test_a_point_inside_solved_points_starts_from_their_interpolation(tmp_path):
    """A point the adaptive window adds inside points already solved on its
    line (a smaller step) starts from the polynomial through them and zero
    field, an interpolation: far closer than the response start (water
    HF/6-31G* at 0.002 au from +-0.004 and +-0.008 au: measured 9e-11 against
    1.5e-5, 6e-6 of the response start's gradient)."""
    context, zero = _reference_context(_job(tmp_path, WATER,
                                            'method = "hf"\n        basis = "6-31g*"'))
    direction = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8])
    h = 0.002
    g_response, how = _start_gradient(context, h * direction)
    assert how == "response_start"
    for index, t in enumerate((-2, 2, -4, 4), start=1):
        _solve(context, zero, t * h * direction, index)
    g_inside, how = _start_gradient(context, h * direction)
    assert how == "line_start"
    assert g_inside < 1e-2 * g_response, (g_inside, g_response)


def test_two_workers_hand_converged_points_on_as_starts(tmp_path):
    """With two workers, points still start from the converged point at the
    opposite field or from the pair before them on their line (their
    rotations go through the parent), and the tensors equal those of one
    worker within their error bars."""
    job = _job(tmp_path, WATER, 'method = "hf"\n        basis = "6-31g*"')
    from fieldprop.engine.run import compute

    one = compute(job, workers=1, progress=False)
    two = compute(job, workers=2, progress=False)
    records = two.computed_records[1:]
    starts = [r.attempts[0] for r in records]
    # Only the first point of each line through zero field starts from the
    # linear response; every other waits for its predecessors' orbitals.
    fields = [np.asarray(r.point.field_vector_au) for r in records]
    lines = {tuple(np.round(f * np.sign(f[np.flatnonzero(f)[0]]) / np.linalg.norm(f), 9))
             for f in fields}
    assert starts.count("response_start") == len(lines), starts
    assert "mirror_start" in starts and "line_start" in starts, starts
    for name in ("alpha", "beta"):
        a, b = one.tensors[name], two.tensors[name]
        assert agree(a.value_au, np.hypot(a.error_au, b.error_au), b.value_au, 1e-9).all()
