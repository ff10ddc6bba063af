"""A per-element basis given as text, the way basis-set libraries export it: a
complete NWChem-format block with its BASIS ... END lines and comments, holding
more elements than the one it is given for."""

import pytest

pytest.importorskip("pyscf")

from support import run_job  # noqa: E402

#: STO-3G of H and O in NWChem format, as exported (the numbers are PySCF's own
#: library values, printed by pyscf.gto.basis.load("sto-3g", ...)).
EXPORTED = '''
#----------------------------------------------------------------------
# Basis Set Exchange-style export
#----------------------------------------------------------------------
BASIS "ao basis" SPHERICAL PRINT
#BASIS SET: (3s) -> [1s]
H    S
      3.42525091             0.15432897
      0.62391373             0.53532814
      0.16885540             0.44463454
#BASIS SET: (6s,3p) -> [2s,1p]
O    S
    130.7093200              0.15432897
     23.8088610              0.53532814
      6.4436083              0.44463454
O    SP
      5.0331513             -0.09996723             0.15591627
      1.1695961              0.39951283             0.60768372
      0.3803890              0.70011547             0.39195739
END
'''


def _job(basis_lines: str) -> str:
    return f"""
        [molecule]
        geometry = \"\"\"
        O 0.0 0.0 0.1173
        H 0.0 0.7572 -0.4692
        H 0.0 -0.7572 -0.4692
        \"\"\"
        [model]
        method = "hf"
        {basis_lines}
        [response]
        properties = ["dipole"]
        """


def test_an_exported_block_per_element_gives_the_named_basis_energy(tmp_path):
    _, named = run_job(tmp_path, _job('basis = "sto-3g"'), "named.toml")
    block = EXPORTED.replace("\n", "\n        ")
    _, given = run_job(tmp_path, _job(f'[model.basis]\n        H = """{block}"""\n'
                                      f'        O = """{block}"""'), "given.toml")
    assert given.energy_au == pytest.approx(named.energy_au, abs=1e-8)


def test_cartesian_d_functions_as_6_31g_star_was_defined(tmp_path):
    """[model] cartesian = true: six d functions per shell (water 6-31G*: 19
    functions against 18 spherical), and the energy of PySCF's own cart=True SCF."""
    from pyscf import gto, scf

    job_lines = 'basis = "6-31g*"\n        cartesian = {flag}'
    _, spherical = run_job(tmp_path, _job(job_lines.format(flag="false")), "sph.toml")
    _, cartesian = run_job(tmp_path, _job(job_lines.format(flag="true")), "cart.toml")
    assert spherical.backend_facts["n_basis_functions"] == 18
    assert cartesian.backend_facts["n_basis_functions"] == 19
    assert cartesian.backend_facts["basis_functions"] == "cartesian"
    mol = gto.M(atom="O 0 0 0.1173; H 0 0.7572 -0.4692; H 0 -0.7572 -0.4692",
                basis="6-31g*", cart=True, verbose=0)
    reference = scf.RHF(mol).run(conv_tol=1e-12).e_tot
    assert cartesian.energy_au == pytest.approx(reference, abs=1e-8)
    assert abs(cartesian.energy_au - spherical.energy_au) > 1e-4
