"""Exact results and symmetry: the hydrogen Stark series, index symmetry of static
beta and gamma, beta = 0 for a centrosymmetric molecule, and correlated methods
through the same path (CCSD = FCI for two electrons)."""

import numpy as np
import pytest

from support import agree, run_job


def even_tempered_hydrogen_basis() -> str:
    """s12 p10 d8 f6, exponents 0.01 * 2.5**i (REFERENCES sect. 5: this set gives
    alpha 4.5002 and gamma 1332.8-1333.0 for the H atom, diffuse enough for the
    Stark series), as NWChem-format text."""
    lines = []
    for shell, n in (("S", 12), ("P", 10), ("D", 8), ("F", 6)):
        lines += [f"H {shell}\n  {0.01 * 2.5**i:.10f} 1.0" for i in range(n)]
    return "\n".join(lines)


def test_hydrogen_atom_stark_series(tmp_path):
    job, result = run_job(tmp_path, f"""
        [molecule]
        geometry = "H 0.1 -0.2 0.3"
        multiplicity = 2
        [model]
        method = "hf"
        basis = {{ H = \"\"\"
{even_tempered_hydrogen_basis()}
\"\"\" }}
        [response]
        properties = ["dipole", "alpha", "beta", "gamma"]
        differentiate = "energy"
        field_au = 0.002
        levels = 4
        """)
    t = result.tensors
    # Exact: E = -1/2 - 9/4 F^2 - 3555/64 F^4, so alpha = 9/2 and gamma = 10665/8
    # (classic Rayleigh-Schroedinger perturbation theory; REFERENCES sect. 5).
    # This basis misses ~0.05% of alpha and ~0.02-0.05% of gamma (REFERENCES:
    # 4.5002 and 1332.8-1333.0), hence 0.1% tolerances.
    assert np.allclose(np.diag(t["alpha"].value_au), 4.5, rtol=1e-3)
    gamma = t["gamma"].value_au
    for i in range(3):
        assert gamma[i, i, i, i] == pytest.approx(10665 / 8, rel=1e-3)
        for j in range(3):
            if i != j:  # isotropic atom: gamma_iijj = gamma_iiii / 3
                assert gamma[i, i, j, j] == pytest.approx(10665 / 24, rel=1e-3)
    inv = {i.name: i for i in result.invariants}
    assert inv["gamma_parallel"].value_au == pytest.approx(10665 / 8, rel=1e-3)
    # An atom has no permanent dipole nor beta: zero within error bars.
    assert np.all(agree(t["dipole"].value_au, t["dipole"].error_au, 0.0, 1e-9))
    assert np.all(agree(t["beta"].value_au, t["beta"].error_au, 0.0, 1e-6))


def test_dipole_route_beta_gamma_are_index_symmetric(tmp_path):
    # Formaldehyde, our own planar geometry tilted off the axes; HF/6-31G keeps it fast.
    job, result = run_job(tmp_path, """
        [molecule]
        geometry = \"\"\"
        C  0.00  0.00  0.00
        O  0.30  0.40  1.12
        H  0.85 -0.45 -0.45
        H -0.95  0.20 -0.40
        \"\"\"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["beta", "gamma"]
        differentiate = "dipole"
        index_symmetry = "test"
        field_au = 0.002
        """)
    for name in ("beta", "gamma"):
        t = result.tensors[name]
        assert np.max(np.abs(t.value_au)) > 1.0  # a non-trivial tensor
        # On the dipole route beta_ijk = d2 mu_i / dF_j dF_k: with index_symmetry
        # = "test", beta_ijk and beta_jik come from different stencils on
        # different dipole components, so their agreement is a real test of the
        # static (Kleinman) symmetry.
        for perm in ((1, 0, 2), (2, 1, 0)) if name == "beta" else ((1, 0, 2, 3), (3, 1, 2, 0)):
            diff = np.abs(t.value_au - np.transpose(t.value_au, perm))
            bars = 3.0 * (t.error_au + np.transpose(t.error_au, perm))
            assert np.all(diff <= np.maximum(bars, 1e-6)), name


def test_beta_vanishes_for_centrosymmetric_molecule(tmp_path):
    # trans-HNNH-like planar centrosymmetric arrangement built by us: ethylene.
    job, result = run_job(tmp_path, """
        [molecule]
        geometry = \"\"\"
        C  0.000  0.000  0.667
        C  0.000  0.000 -0.667
        H  0.000  0.923  1.238
        H  0.000 -0.923  1.238
        H  0.000  0.923 -1.238
        H  0.000 -0.923 -1.238
        \"\"\"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["alpha", "beta"]
        differentiate = "energy"
        field_au = 0.002
        """)
    alpha, beta = result.tensors["alpha"], result.tensors["beta"]
    assert np.max(alpha.value_au) > 10.0
    # Inversion symmetry makes every odd-rank tensor vanish (common practice).
    assert np.all(agree(beta.value_au, beta.error_au, 0.0, 1e-5))


def test_ccsd_equals_fci_for_two_electrons(tmp_path):
    from pyscf import ao2mo, fci, gto, scf

    text = """
        [molecule]
        geometry = \"\"\"
        H  0.00  0.10  0.00
        H  0.20  0.30  0.70
        \"\"\"
        [model]
        method = "{method}"
        basis = "6-31g*"
        [response]
        properties = ["dipole", "alpha"]
        field_au = 0.004
        """
    job, ccsd = run_job(tmp_path, text.format(method="ccsd"), "ccsd.toml")
    _, ccsd_t = run_job(tmp_path, text.format(method="ccsd(t)"), "ccsd_t.toml")
    assert ccsd.plan.route == "energy"

    # FCI reference built here from PySCF's integrals, with the field applied
    # independently of fieldprop: h1 + F.r in the MO basis, nuclear term -F.Z(R-O).
    mol = gto.M(atom=[(a.symbol, a.coords_bohr) for a in job.molecule.atoms], unit="Bohr",
                basis="6-31g*", verbose=0)
    origin = np.asarray(ccsd.molecule.origin_bohr)
    with mol.with_common_orig(origin):
        r = mol.intor("int1e_r")
    mf = scf.RHF(mol).run(conv_tol=1e-12)
    c = mf.mo_coeff
    eri = ao2mo.restore(1, ao2mo.kernel(mol, c), c.shape[1])
    zr = mol.atom_charges() @ (mol.atom_coords() - origin)

    def e_fci(f):
        h1 = c.T @ (mf.get_hcore() + np.einsum("x,xij->ij", f, r)) @ c
        e, _ = fci.direct_spin1.kernel(h1, eri, c.shape[1], 2, tol=1e-13)
        return e + mol.energy_nuc() - f @ zr

    for record in ccsd.records[:7]:  # pointwise: same energies at the same fields
        assert record.energy_au == pytest.approx(e_fci(np.array(record.point.field_vector_au)),
                                                 abs=1e-8)
    # FCI alpha from a 5-point central stencil at h = 0.002 (error ~gamma h^2/12
    # ~ 1e-5 au for H2, gamma ~ 700 au: common practice magnitudes).
    h = 0.002
    for i in range(3):
        e = lambda k: e_fci(k * h * np.eye(3)[i])  # noqa: E731
        a_ii = -(-e(2) + 16 * e(1) - 30 * e(0) + 16 * e(-1) - e(-2)) / (12 * h * h)
        assert ccsd.tensors["alpha"].value_au[i, i] == pytest.approx(a_ii, abs=1e-4)
    # (T) vanishes identically for two electrons: no triples exist.
    assert np.allclose(ccsd_t.tensors["alpha"].value_au, ccsd.tensors["alpha"].value_au,
                       atol=1e-7)


def test_frozen_core_changes_the_mp2_energy_as_pyscf_frozen_core_mp2_does(tmp_path):
    """All-electron against frozen-core MP2 of water: the energy difference
    fieldprop gives is the one PySCF's own MP2 gives (frozen=1, O 1s)."""
    from pyscf import gto, mp, scf

    results = {}
    for frozen in ("true", "false"):
        job, results[frozen] = run_job(tmp_path, f"""
            [molecule]
            geometry = \"\"\"
            O  0.0000  0.0000  0.1173
            H  0.0000  0.7572 -0.4692
            H  0.0000 -0.7572 -0.4692
            \"\"\"
            [model]
            method = "mp2"
            basis = "6-31g"
            frozen_core = {frozen}
            [response]
            properties = ["dipole"]
            differentiate = "energy"
            field_au = 0.002
            levels = 2
            """, f"fc-{frozen}.toml")
    mol = gto.M(atom=[(a.symbol, a.coords_bohr) for a in job.molecule.atoms], unit="Bohr",
                basis="6-31g", verbose=0)
    mf = scf.RHF(mol).run(conv_tol=1e-12)
    change = mp.MP2(mf, frozen=1).run().e_corr - mp.MP2(mf).run().e_corr
    assert change > 1e-4  # the core's correlation is not negligible: a real test
    ours = results["true"].energy_au - results["false"].energy_au
    assert ours == pytest.approx(change, abs=1e-9)
    assert results["true"].backend_facts["correlated_electrons"] == 8
    assert results["false"].backend_facts["correlated_electrons"] == 10


def test_mp2_runs_through_the_same_path(tmp_path):
    job, result = run_job(tmp_path, """
        [molecule]
        geometry = \"\"\"
        F  0.00  0.00  0.00
        H  0.30  0.40  0.77
        \"\"\"
        [model]
        method = "mp2"
        basis = "6-31g"
        [response]
        properties = ["dipole", "alpha"]
        field_au = 0.002
        """)
    from pyscf import gto, mp, scf

    mol = gto.M(atom=[(a.symbol, a.coords_bohr) for a in job.molecule.atoms], unit="Bohr",
                basis="6-31g", verbose=0)
    mf = scf.RHF(mol).run(conv_tol=1e-12)
    # Frozen core by default (the F 1s orbital): PySCF's own frozen-core MP2.
    assert job.model.frozen_core
    e_mp2 = mf.e_tot + mp.MP2(mf, frozen=1).run().e_corr
    assert result.energy_au == pytest.approx(e_mp2, abs=1e-9)
    assert result.backend_facts["correlated_electrons"] == 8
    # Correlation lowers the HF dipole of HF (common practice: MP2 |mu| is ~5%
    # below HF for hydrogen fluoride); both within a few percent of 0.7-0.8 au.
    mu_hf = np.linalg.norm(mf.dip_moment(unit="AU", verbose=0))
    mu_mp2 = np.linalg.norm(result.tensors["dipole"].value_au)
    assert 0.85 * mu_hf < mu_mp2 < mu_hf
