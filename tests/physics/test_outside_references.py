"""Tensors and field-perturbed energies against references built without any of
fieldprop's numerics (no planner, no Richardson code, no CPHF solver, no
backend): PySCF run directly in the test, with the field added to its core
Hamiltonian here, and differentiated here by central differences.

- beta of a molecule off its axes (water, rotated and shifted) from central
  differences of PySCF's SCF dipole, full tensor, both routes: a wrong stencil
  weight in the planner or a wrong Richardson step would show (beta = 0 of a
  centrosymmetric molecule cannot: any antisymmetric stencil gives it);
- MP2 and CCSD(T) energies at a field off every axis, point by point;
- the MP2 alpha of water from central differences of PySCF MP2 energies.
"""

import dataclasses

import numpy as np
import pytest

pytest.importorskip("pyscf")

from support import (WATER_ANGSTROM, agree, geometry_text, rotated_water,  # noqa: E402
                     run_job)

from fieldprop.backend import ModelContext, compute_point, compute_reference  # noqa: E402
from fieldprop.engine.prepare import prepare  # noqa: E402
from fieldprop.numerics.plan import FieldPoint  # noqa: E402


def _pyscf_mol(job, basis):
    from pyscf import gto

    m = job.molecule
    return gto.M(atom=[(a.symbol, a.coords_bohr) for a in m.atoms], unit="Bohr", basis=basis,
                 charge=m.charge, spin=m.multiplicity - 1, verbose=0)


def _perturbed_rhf(mol, field, origin):
    """RHF with +F.(r - O) in the core Hamiltonian, converged to g = 1e-11."""
    from pyscf import scf

    mf = scf.RHF(mol)
    with mol.with_common_orig(origin):
        r = mol.intor_symmetric("int1e_r", comp=3)
    h = mf.get_hcore() + np.einsum("x,xij->ij", field, r)
    mf.get_hcore = lambda *args: h
    mf.conv_tol, mf.conv_tol_grad, mf.max_cycle = 1e-13, 1e-11, 200
    mf.kernel()
    assert mf.converged and np.linalg.norm(mf.get_grad(mf.mo_coeff, mf.mo_occ)) < 1e-10
    return mf, r


def _nuclear_term(mol, field, origin):
    """-F.sum_A Z_A (R_A - O): the field's energy with the nuclei."""
    charges = mol.atom_charges()
    return -float(field @ (charges @ (mol.atom_coords() - origin)))


def _dipole(mol, field, origin):
    mf, r = _perturbed_rhf(mol, field, origin)
    charges = mol.atom_charges()
    return charges @ (mol.atom_coords() - origin) - np.einsum("xij,ji->x", r, mf.make_rdm1())


def _beta_from_dipoles(mol, origin, h):
    """beta_ijk = d2 mu_i / dF_j dF_k by central differences of PySCF dipoles:
    the three-point second difference on the axes, the four-point mixed one off
    them; error O(h^2)."""
    mu0 = _dipole(mol, np.zeros(3), origin)
    beta = np.zeros((3, 3, 3))
    e = np.eye(3)
    for j in range(3):
        beta[:, j, j] = (_dipole(mol, h * e[j], origin) + _dipole(mol, -h * e[j], origin)
                         - 2 * mu0) / h**2
        for k in range(j + 1, 3):
            d = sum(s * t * _dipole(mol, h * (s * e[j] + t * e[k]), origin)
                    for s in (1, -1) for t in (1, -1))
            beta[:, j, k] = beta[:, k, j] = d / (4 * h**2)
    return beta


@pytest.fixture(scope="module")
def water_beta_reference(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("beta")
    jobs = {}
    for name, route, extra in (("dipole", "dipole", ""),
                               ("dipole, index symmetry tested", "dipole",
                                'index_symmetry = "test"'),
                               ("energy", "energy", "")):
        jobs[name] = run_job(tmp, f"""
            [molecule]
            geometry = \"\"\"
{rotated_water()}
            \"\"\"
            [model]
            method = "hf"
            basis = "6-31g"
            [response]
            properties = ["beta"]
            field_au = 0.002
            levels = 3
            differentiate = "{route}"
            {extra}
            """, f"{name.replace(' ', '_').replace(',', '')}.toml")
    job, result = jobs["dipole"]
    mol = _pyscf_mol(job, "6-31g")
    origin = np.asarray(result.molecule.origin_bohr)
    # One Richardson step over h = 0.004, 0.008 removes the h^2 term. Measured
    # once: the raw estimates at the two steps differ by 1.3e-2 au (largest
    # |beta| 27.7 au); extrapolations from (0.002, 0.004) and (0.004, 0.008)
    # differ by 2.6e-6 au, the reference's own error: the floor 2e-5 is 8x it.
    small, large = (_beta_from_dipoles(mol, origin, h) for h in (0.004, 0.008))
    return jobs, (4 * small - large) / 3


@pytest.mark.parametrize("route", ["dipole", "dipole, index symmetry tested", "energy"])
def test_beta_of_a_molecule_off_its_axes_equals_central_differences_of_pyscf_dipoles(
        water_beta_reference, route):
    jobs, reference = water_beta_reference
    beta = jobs[route][1].tensors["beta"]
    assert beta.stable.all()
    assert np.abs(reference).max() > 1.0  # off its axes, every entry mixes: a real test
    assert agree(beta.value_au, beta.error_au, reference, 2e-5).all(), (
        np.abs(beta.value_au - reference).max(), beta.error_au.max())


def test_assumed_index_symmetry_fills_permutations_from_fewer_points(water_beta_reference):
    """With the index symmetry assumed (the dipole route's default), each unique
    beta component is one derivative of one mu_i and fills every permutation
    of its indices: the tensor is symmetric by construction, and water in its
    C2v frame needs no diagonal line at all (beta_xxz from mu_z on the x
    axis), where the tested symmetry computes d2 mu_x/dF_x dF_z on one."""
    jobs, _ = water_beta_reference
    assumed = jobs["dipole"][1]
    tested = jobs["dipole, index symmetry tested"][1]
    beta = assumed.tensors["beta"].value_au
    for perm in ((1, 0, 2), (2, 1, 0), (0, 2, 1)):
        assert np.array_equal(beta, np.transpose(beta, perm))
    assert len(assumed.records) < len(tested.records), (len(assumed.records),
                                                        len(tested.records))
    assert len(assumed.tensors["beta"].components) == 10
    assert len(tested.tensors["beta"].components) == 18


@pytest.mark.parametrize("method", ["mp2", "ccsd(t)"])
def test_correlated_energy_at_a_field_off_every_axis_equals_pyscf(tmp_path, method):
    """fieldprop's backend at F = (0.003, -0.002, 0.004) au against PySCF's MP2
    or CCSD(T) on an RHF whose core Hamiltonian the test perturbs; both
    converged far below the 1e-9 Eh compared."""
    from pyscf import cc, mp

    path = tmp_path / "job.toml"
    path.write_text(f"""
[molecule]
geometry = \"\"\"
{rotated_water()}
\"\"\"
[model]
method = "{method}"
basis = "sto-3g"
frozen_core = false
[response]
properties = ["alpha"]
""")
    from fieldprop.inputs.job import load_job

    job = load_job(path)
    prepared = prepare(job)
    zero = next(t for t in prepared.tasks if t.is_zero_field)
    context = ModelContext(zero.molecule, zero.model, zero.scf)
    compute_reference(context, zero)
    field = np.array([0.003, -0.002, 0.004])
    task = dataclasses.replace(zero, point=FieldPoint(99, (1, 1, 1), 0, tuple(field)))
    ours = compute_point(context, task).energy_au

    mol = _pyscf_mol(job, "sto-3g")
    origin = np.asarray(prepared.molecule.origin_bohr)
    mf, _ = _perturbed_rhf(mol, field, origin)
    if method == "mp2":
        theirs = mf.e_tot + mp.MP2(mf).run().e_corr
    else:
        solver = cc.CCSD(mf)
        solver.conv_tol, solver.conv_tol_normt = 1e-12, 1e-8
        solver.kernel()
        theirs = solver.e_tot + solver.ccsd_t()
    theirs += _nuclear_term(mol, field, origin)
    assert ours == pytest.approx(theirs, abs=1e-9)


def test_mp2_alpha_equals_central_differences_of_pyscf_mp2_energies(tmp_path):
    from pyscf import mp

    job, result = run_job(tmp_path, f"""
        [molecule]
        geometry = \"\"\"
{rotated_water()}
        \"\"\"
        [model]
        method = "mp2"
        basis = "6-31g"
        frozen_core = false
        [response]
        properties = ["alpha"]
        field_au = 0.002
        levels = 3
        """)
    alpha = result.tensors["alpha"]
    assert alpha.stable.all()
    mol = _pyscf_mol(job, "6-31g")
    origin = np.asarray(result.molecule.origin_bohr)

    def energy(field):
        mf, _ = _perturbed_rhf(mol, field, origin)
        return mf.e_tot + mp.MP2(mf).run().e_corr + _nuclear_term(mol, field, origin)

    e0, e = energy(np.zeros(3)), np.eye(3)

    def second_differences(h):
        a = np.zeros((3, 3))
        for j in range(3):
            a[j, j] = -(energy(h * e[j]) + energy(-h * e[j]) - 2 * e0) / h**2
            for k in range(j + 1, 3):
                d = sum(s * t * energy(h * (s * e[j] + t * e[k]))
                        for s in (1, -1) for t in (1, -1))
                a[j, k] = a[k, j] = -d / (4 * h**2)
        return a

    # One Richardson step over h = 0.004, 0.008: truncation O(h^4) ~ 1e-7 au;
    # MP2 energies linear in the orbital error g = 1e-11 give ~1e-11 / h^2 ~ 1e-6.
    reference = (4 * second_differences(0.004) - second_differences(0.008)) / 3
    assert agree(alpha.value_au, alpha.error_au, reference, 1e-5).all(), (
        alpha.value_au - reference, alpha.error_au)


def test_beta_of_water_equals_the_analytic_2n_plus_1_beta_of_pyscf_properties(tmp_path):
    """The full beta of water (our geometry in its axes, HF/6-31G, dipole
    route, symmetry on) against the analytic 2n+1 beta of PySCF's properties
    extension (pyscf-properties on PyPI: SCF, CPHF, then beta from the
    first-order orbitals alone), another code's formula. That reference is
    itself precise to ~5e-7 of beta here (measured: its alpha differs from
    central differences of plain PySCF dipoles by 5e-8 relative, and its
    beta_zzz from fieldprop's by 5e-7), hence the relative floor."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # its modules announce that they are "under testing"
        prop = pytest.importorskip("pyscf.prop.polarizability.rhf")
    from pyscf import scf

    job, result = run_job(tmp_path, f"""
        [molecule]
        geometry = \"\"\"
{geometry_text("OHH", WATER_ANGSTROM)}
        \"\"\"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["alpha", "beta"]
        field_au = 0.002
        """)
    mf = scf.RHF(_pyscf_mol(job, "6-31g"))
    mf.conv_tol, mf.conv_tol_grad = 1e-13, 1e-10
    mf.kernel()
    analytic = prop.Polarizability(mf)
    analytic.conv_tol, analytic.max_cycle_cphf = 1e-12, 100
    reference = analytic.hyper_polarizability()
    beta = result.tensors["beta"]
    assert beta.stable.all()
    floor = 2e-6 * np.max(np.abs(reference))
    assert np.all(agree(beta.value_au, beta.error_au, reference, floor))
    assert np.max(np.abs(reference)) > 20.0  # far from zero: a 1e-5 relative error shows
