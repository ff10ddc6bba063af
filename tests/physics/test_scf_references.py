"""Finite-field mu and alpha against PySCF's analytic SCF quantities.

Outside references: PySCF's SCF dipole (``mf.dip_moment``) and an analytic
coupled-perturbed (CPHF/CPKS) polarizability solved in tests/physics/analytic_reference.py
with PySCF's ``cphf``/``ucphf`` solvers. Molecules are rotated off their symmetry
axes so that off-diagonal components are non-zero.
"""

import numpy as np
import pytest

from analytic_reference import cphf_polarizability
from support import agree, mean_field, nh2_geometry, rotated_water, run_job


def water_job(method_lines: str, props: str, route: str, field_au: float = 0.002) -> str:
    return f"""
        [molecule]
        geometry = \"\"\"
{rotated_water()}
        \"\"\"
        [model]
        {method_lines}
        basis = "6-31g*"
        [response]
        properties = {props}
        differentiate = "{route}"
        field_au = {field_au}
        [scf]
        {'grid_level = 3' if 'dft' in method_lines else ''}
        """


@pytest.mark.parametrize("method_lines", [
    'method = "hf"',
    'method = "dft"\n        functional = "pbe0"',
], ids=["hf", "dft-pbe0"])
def test_energy_route_dipole_equals_analytic_scf_dipole(tmp_path, method_lines):
    job, result = run_job(tmp_path, water_job(method_lines, '["dipole"]', "energy"))
    mf = mean_field(job)
    reference = mf.dip_moment(unit="AU", verbose=0)  # neutral: origin-independent
    dipole = result.tensors["dipole"]
    # Issue requirement: 1e-6 au. The analytic side is converged to an orbital
    # gradient of 1e-9, which moves mu by ~1e-9 au.
    assert np.max(np.abs(dipole.value_au - reference)) < 1e-6
    assert np.all(agree(dipole.value_au, dipole.error_au, reference, 1e-8))
    assert np.min(np.abs(reference)) > 0.05  # rotated: every component is non-zero


@pytest.mark.parametrize("route", ["energy", "dipole"])
def test_hf_alpha_equals_cphf_full_tensor(tmp_path, route):
    job, result = run_job(tmp_path, water_job('method = "hf"', '["alpha"]', route))
    reference = cphf_polarizability(mean_field(job), result.molecule.origin_bohr)
    alpha = result.tensors["alpha"]
    assert np.min(np.abs(reference)) > 0.01  # off-diagonal components present
    rel = np.max(np.abs(alpha.value_au - reference)) / np.max(np.abs(reference))
    assert rel < 1e-5
    # The error bar must cover the difference (floor: CPHF residual 1e-10 relative).
    assert np.all(agree(alpha.value_au, alpha.error_au, reference, 1e-8))


def test_dft_alpha_equals_cpks_full_tensor(tmp_path):
    job, result = run_job(tmp_path, water_job('method = "dft"\n        functional = "b3lyp"',
                                              '["alpha"]', "dipole"))
    reference = cphf_polarizability(mean_field(job), result.molecule.origin_bohr)
    alpha = result.tensors["alpha"]
    rel = np.max(np.abs(alpha.value_au - reference)) / np.max(np.abs(reference))
    assert rel < 1e-5
    assert np.all(agree(alpha.value_au, alpha.error_au, reference, 1e-7))


def test_open_shell_uhf_alpha_equals_ucphf(tmp_path):
    geometry = nh2_geometry()
    job, result = run_job(tmp_path, f"""
        [molecule]
        geometry = \"\"\"
{geometry}
        \"\"\"
        multiplicity = 2
        [model]
        method = "hf"
        basis = "6-31g*"
        [response]
        properties = ["dipole", "alpha"]
        field_au = 0.002
        """)
    assert job.model.reference == "unrestricted" and result.plan.route == "dipole"
    mf = mean_field(job)
    reference = cphf_polarizability(mf, result.molecule.origin_bohr)
    alpha = result.tensors["alpha"]
    assert np.min(np.abs(reference)) > 0.01
    rel = np.max(np.abs(alpha.value_au - reference)) / np.max(np.abs(reference))
    assert rel < 1e-5
    assert np.all(agree(alpha.value_au, alpha.error_au, reference, 1e-7))
    assert np.max(np.abs(result.tensors["dipole"].value_au
                         - mf.dip_moment(unit="AU", verbose=0))) < 1e-6


@pytest.mark.parametrize("xc", [None, "pbe"], ids=["uhf", "uks-pbe"])
def test_the_newton_step_measures_an_open_shell_dipole_error(xc):
    # An open-shell SCF stopped at orbital gradient 1e-8 (far looser than
    # fieldprop's): the dipole change of one Newton step must be its error against
    # an SCF converged to 1e-10 or better (PySCF alone) to 10 %, and adding it
    # must remove all but 1 % of that error: the step is exact to first order.
    from pyscf import dft, gto, scf

    from fieldprop.backend import newton_dipole_step

    mol = gto.M(atom=nh2_geometry(), basis="6-31g", spin=1, verbose=0)
    r = mol.intor("int1e_r")
    field = np.array([0.003, -0.002, 0.004])

    def solver(gradient_tol):
        mf = scf.UHF(mol) if xc is None else dft.UKS(mol)
        if xc:
            mf.xc, mf.grids.level = xc, 3
        hcore = mf.get_hcore() + np.einsum("x,xij->ij", field, r)
        mf.get_hcore = lambda *args: hcore
        mf.conv_tol, mf.conv_tol_grad, mf.max_cycle = 1e-14, gradient_tol, 300
        return mf

    def dipole(mf):
        dm = mf.make_rdm1()
        return -np.einsum("xij,ji->x", r, dm[0] + dm[1])

    loose = solver(1e-8)
    loose.conv_tol = 1e-9
    loose.kernel()
    tight = solver(1e-12)
    tight.max_cycle = 500
    tight.kernel(loose.make_rdm1())
    assert loose.converged
    assert np.linalg.norm(tight.get_grad(tight.mo_coeff, tight.mo_occ)) < 1e-10
    before = np.linalg.norm(dipole(loose) - dipole(tight))
    step = newton_dipole_step(loose, r)
    after = np.linalg.norm(dipole(loose) + step - dipole(tight))
    assert before > 1e-9, "the loose SCF was already converged: the test lost its premise"
    assert abs(np.linalg.norm(step) - before) < 0.1 * before, (before, np.linalg.norm(step))
    assert after < 1e-2 * before, (before, after)


def test_effective_core_potentials_enter_the_hamiltonian_and_the_dipole(tmp_path):
    # HI in def2-SVP (our geometry, 1.609 A, near the usual bond length): iodine's
    # 28 core electrons are the basis set's effective core potential, as PySCF's
    # basis library defines it. The zero-field energy must be PySCF's own with that
    # potential, and the finite-field dipole the analytic SCF dipole: a nuclear
    # dipole with the full Z = 53 of iodine would be off by 28 (R_I - O), ~9 au.
    from pyscf import gto, scf

    job, result = run_job(tmp_path, """
        [molecule]
        geometry = \"\"\"
        H 0 0 0
        I 0.3 -0.2 1.55
        \"\"\"
        [model]
        method = "hf"
        basis = "def2-svp"
        [response]
        properties = ["dipole", "alpha"]
        differentiate = "energy"
        field_au = 0.002
        """)
    assert result.molecule.core_electrons == (0, 28)
    mol = gto.M(atom="H 0 0 0; I 0.3 -0.2 1.55", basis="def2-svp", ecp={"I": "def2-svp"},
                verbose=0)
    mf = scf.RHF(mol)
    mf.conv_tol, mf.conv_tol_grad = 1e-12, 1e-10
    mf.kernel()
    assert result.energy_au == pytest.approx(mf.e_tot, abs=1e-9)
    dipole = mf.dip_moment(unit="au", verbose=0)  # neutral: origin independent
    t = result.tensors["dipole"]
    assert agree(t.value_au, t.error_au, dipole, 1e-7).all(), (t.value_au, dipole)
    alpha = result.tensors["alpha"]
    reference = cphf_polarizability(mf)
    assert agree(alpha.value_au, alpha.error_au, reference, 1e-5).all(), (alpha.value_au,
                                                                          reference)
