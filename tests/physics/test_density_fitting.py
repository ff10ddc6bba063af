"""Density fitting as a model option: the tensors of the fitted model equal the
analytic CPHF/CPKS polarizability of the same fitted model (PySCF's
density-fitted SCF, solved in the test), differ from the exact-integral
model's by more than their error bars (the fit is a model change), and the
fitted model's points are keyed apart from the exact ones."""

import json

import numpy as np
import pytest

pytest.importorskip("pyscf")

from analytic_reference import cphf_polarizability  # noqa: E402
from support import WATER_ANGSTROM, agree, geometry_text, mean_field, run_job  # noqa: E402

WATER = """
    [molecule]
    geometry = \"\"\"
""" + geometry_text("OHH", WATER_ANGSTROM) + """
    \"\"\"
    [model]
    {model}
    basis = "cc-pvdz"
    {fit}
    [response]
    properties = ["dipole", "alpha"]
    field_au = 0.002
    """


@pytest.mark.parametrize("model", ['method = "hf"', pytest.param(
    'method = "dft"\n    functional = "pbe0"', marks=pytest.mark.slow)], ids=["hf", "pbe0"])
def test_a_fitted_model_gives_its_own_analytic_polarizability(tmp_path, model):
    job, fitted = run_job(tmp_path, WATER.format(model=model, fit='density_fit = true'),
                          name="fitted.toml")
    _, exact = run_job(tmp_path, WATER.format(model=model, fit=""), name="exact.toml")
    assert job.model.density_fit == "auto"
    assert fitted.backend_facts["auxiliary_basis"] == {"H": "cc-pvdz-jkfit",
                                                        "O": "cc-pvdz-jkfit"}
    # The reference: PySCF's own density-fitted SCF (the same auxiliary basis),
    # its CPHF/CPKS polarizability solved in the test.
    mf = mean_field(job).density_fit(auxbasis="cc-pvdz-jkfit")
    mf.conv_tol, mf.conv_tol_grad = 1e-12, 1e-9
    if hasattr(mf, "grids"):
        mf.grids.level = job.scf.grid_level
    mf.kernel()
    reference = cphf_polarizability(mf, fitted.molecule.origin_bohr)
    alpha = fitted.tensors["alpha"]
    assert np.all(agree(alpha.value_au, alpha.error_au, reference, 1e-6))
    # A model change, not noise: far beyond the error bars, within 1e-3 of alpha.
    change = np.abs(alpha.value_au - exact.tensors["alpha"].value_au)
    assert np.max(change) > 100 * np.max(alpha.error_au)
    assert np.max(change) < 1e-3 * np.max(np.abs(alpha.value_au))


def test_fitted_points_are_stored_apart_from_exact_ones(tmp_path):
    from fieldprop.cli import main

    (tmp_path / "exact.toml").write_text(WATER.format(model='method = "hf"', fit=""))
    (tmp_path / "fitted.toml").write_text(WATER.format(model='method = "hf"',
                                                       fit='density_fit = "cc-pvdz-jkfit"'))
    assert main(["run", str(tmp_path / "exact.toml"), "--quiet"]) == 0
    assert main(["run", str(tmp_path / "fitted.toml"), "--quiet"]) == 0
    doc = json.loads((tmp_path / "fitted.result.json").read_text())
    assert doc["points"]["reused"] == 0  # nothing of the exact model's reused
    assert doc["job"]["model"]["density_fit"] == "cc-pvdz-jkfit"
    assert doc["backend"]["n_auxiliary_functions"] > doc["backend"]["n_basis_functions"]
