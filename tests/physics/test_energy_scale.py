"""The energy's rounding scale a point records, against PySCF's own SCF of the
same molecule (the unit tests of the noise model use synthetic records; this
checks what the backend puts in them)."""

import numpy as np
import pytest

pytest.importorskip("pyscf")


def test_the_backend_records_the_energy_terms_scale(tmp_path):
    """energy_scale_au = |tr(h D)| + |E - tr(h D) - E_nuc| + |E_nuc| of PySCF's own
    SCF of the same molecule (water, HF/6-31G: 170 Eh)."""
    from pyscf import gto, scf

    from fieldprop.engine.run import compute
    from fieldprop.inputs.job import load_job

    path = tmp_path / "water.toml"
    path.write_text('[molecule]\ngeometry = """\nO 0 0 0.1173\nH 0 0.7572 -0.4692\n'
                    'H 0 -0.7572 -0.4692\n"""\n[model]\nmethod = "hf"\nbasis = "6-31g"\n'
                    '[response]\nproperties = ["dipole"]\n')
    result = compute(load_job(path), progress=False)
    mol = gto.M(atom="O 0 0 0.1173; H 0 0.7572 -0.4692; H 0 -0.7572 -0.4692", basis="6-31g",
                verbose=0)
    mf = scf.RHF(mol).run(conv_tol=1e-12)
    e1 = float(np.einsum("ij,ji->", mf.get_hcore(), mf.make_rdm1()))
    scale = abs(e1) + abs(mf.e_tot - e1 - mol.energy_nuc()) + abs(mol.energy_nuc())
    assert result.records[0].energy_scale_au == pytest.approx(scale, rel=1e-9)
    assert 160 < scale < 180
