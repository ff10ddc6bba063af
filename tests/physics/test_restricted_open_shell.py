"""A restricted open shell through the field-point solver: the NH2 radical at
ROHF (Newton steps with the restricted open-shell orbital Hessian), against
central differences of ROHF energies from PySCF with the field added to its
core Hamiltonian in the test. (UHF and UKS radicals: test_scf_references and
test_check; a degenerate ROHF radical: test_degenerate_radical.)
"""

import numpy as np
import pytest

pytest.importorskip("pyscf")

from support import agree, nh2_geometry, run_job  # noqa: E402

def _rohf_energy(mol, field, origin):
    from pyscf import scf

    mf = scf.ROHF(mol)
    with mol.with_common_orig(origin):
        r = mol.intor_symmetric("int1e_r", comp=3)
    h = mf.get_hcore() + np.einsum("x,xij->ij", field, r)
    mf.get_hcore = lambda *args: h
    mf.conv_tol, mf.conv_tol_grad, mf.max_cycle, mf.verbose = 1e-13, 1e-9, 300, 0
    mf.kernel()
    if not mf.converged:
        mf = mf.newton()
        mf.kernel(mf.make_rdm1())
    assert mf.converged
    return mf.e_tot  # the nuclear term -F.sum Z(R - O) is linear: no second derivative


def test_nh2_radical_rohf_alpha_equals_central_differences_of_pyscf_energies(tmp_path):
    from pyscf import gto

    job, result = run_job(tmp_path, f"""
        [molecule]
        geometry = \"\"\"
{nh2_geometry()}
        \"\"\"
        multiplicity = 2
        [model]
        method = "hf"
        basis = "6-31g"
        reference = "restricted"
        [response]
        properties = ["alpha"]
        differentiate = "energy"
        field_au = 0.002
        """)
    alpha = result.tensors["alpha"]
    assert alpha.stable.all()
    m = job.molecule
    mol = gto.M(atom=[(a.symbol, a.coords_bohr) for a in m.atoms], unit="Bohr", basis="6-31g",
                spin=1, verbose=0)
    origin = result.molecule.origin_bohr
    e0 = _rohf_energy(mol, np.zeros(3), origin)
    # alpha_ii = -d2E/dF_i^2 by central differences at h and 2h, one Richardson
    # step: truncation O(h^4) (the sixth field derivative of E, the gamma term
    # being removed) ~ 1e-8 au; SCF noise 1e-13 Eh / h^2 ~ 3e-8 au.
    diagonal = []
    for i in range(3):
        d2 = []
        for h in (0.002, 0.004):
            f = np.zeros(3)
            f[i] = h
            d2.append(-(_rohf_energy(mol, f, origin) + _rohf_energy(mol, -f, origin) - 2 * e0)
                      / h**2)
        diagonal.append((4 * d2[0] - d2[1]) / 3)
    values = np.diag(alpha.value_au)
    errors = np.diag(alpha.error_au)
    assert agree(values, errors, np.array(diagonal), 1e-5).all(), (values, errors, diagonal)
