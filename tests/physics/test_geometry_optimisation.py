"""[geometry] optimise: geomeTRIC through PySCF before the response.

Water at HF/6-31G: the textbook trend of the model (a longer bond and a wider
angle than experiment's 0.958 angstrom and 104.5 degrees: about 0.950 angstrom
and 111.5 degrees at HF/6-31G without polarisation functions; values from
memory), and a zero gradient: the largest component of PySCF's analytic
gradient, computed here at the optimised coordinates, below the criteria's
largest-gradient threshold.
"""

import math
import textwrap
from pathlib import Path

import numpy as np
import pytest

from fieldprop.cli import main
from fieldprop.inputs.job import GEOMETRY_CRITERIA

pytest.importorskip("pyscf")

JOB = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    O 0 0 0.1
    H 0 0.8 -0.45
    H 0 -0.8 -0.45
    \"\"\"
    [model]
    method = "hf"
    basis = "6-31g"
    [response]
    properties = ["dipole", "alpha"]
    [geometry]
    optimize = true
    """)


def test_optimised_water_has_the_hf_631g_shape_and_no_gradient(tmp_path, capsys):
    from pyscf import gto, scf

    path = tmp_path / "water.toml"
    path.write_text(JOB)
    assert main(["run", str(path), "--quiet"]) == 0
    capsys.readouterr()
    import json

    doc = json.loads((tmp_path / "water.result.json").read_text())
    xyz = (tmp_path / "water.optimised.xyz").read_text().splitlines()
    assert xyz[0] == "3" and "optimised at hf/6-31g" in xyz[1]
    coords = np.array([a["coords_bohr"] for a in doc["job"]["derived"]["molecule"]["atoms"]])
    o, h1, h2 = coords * 0.529177210544
    r1, r2 = np.linalg.norm(h1 - o), np.linalg.norm(h2 - o)
    angle = math.degrees(math.acos((h1 - o) @ (h2 - o) / (r1 * r2)))
    assert 0.945 < r1 < 0.955 and abs(r1 - r2) < 1e-4
    assert 110.5 < angle < 112.5
    opt = doc["job"]["derived"]["optimisation"]
    assert opt["criteria"] == "fine" and opt["thresholds"] == GEOMETRY_CRITERIA["fine"]
    # An independent gradient at the coordinates the response used.
    mol = gto.M(atom=[("O", coords[0]), ("H", coords[1]), ("H", coords[2])], unit="Bohr",
                basis="6-31g", verbose=0)
    mf = scf.RHF(mol)
    mf.conv_tol, mf.conv_tol_grad = 1e-12, 1e-9
    mf.kernel()
    gradient = mf.nuc_grad_method().kernel()
    assert np.abs(gradient).max() < GEOMETRY_CRITERIA["fine"]["gradient_max_au"]
    assert opt["largest_gradient_au"] < GEOMETRY_CRITERIA["fine"]["gradient_max_au"]
    # The geometry check at zero field finds the minimum: no warning.
    assert not any("not a minimum" in w for w in doc["warnings"]), doc["warnings"]


@pytest.mark.parametrize("workers", ["1", "2"])
def test_a_geometry_that_is_not_a_minimum_is_named_in_one_warning(tmp_path, capsys, workers,
                                                                  monkeypatch):
    """The same sketch without the optimisation: the zero-field check (the
    model's own nuclear gradient; in the reference's worker, or with two a
    waiting worker's own SCF, which a model this small does not get unless
    the size rule is lowered, as here) finds a largest component far above
    1e-3 Eh/bohr, against PySCF's gradient computed here; one warning says
    so, in the run's log, the result JSON and collect's result from the
    store."""
    import json

    from pyscf import gto, scf

    from fieldprop.engine import stages

    if workers == "2":
        monkeypatch.setattr(stages, "GEOMETRY_CHECK_FIT_ABOVE", 0)

    path = tmp_path / "sketch.toml"
    path.write_text(JOB.replace("[geometry]\noptimize = true\n", ""))
    assert main(["run", str(path), "--quiet", "--workers", workers]) == 0
    capsys.readouterr()
    doc = json.loads((tmp_path / "sketch.result.json").read_text())
    (warning,) = [w for w in doc["warnings"] if "not a minimum" in w]
    mol = gto.M(atom="O 0 0 0.1; H 0 0.8 -0.45; H 0 -0.8 -0.45", basis="6-31g", verbose=0)
    gradient = scf.RHF(mol).run(conv_tol=1e-11).nuc_grad_method().kernel()
    largest = float(np.abs(gradient).max())
    assert largest > 1e-2
    shown = float(warning.split("gradient at zero field is ")[1].split()[0])
    assert shown == pytest.approx(largest, rel=0.05)  # printed to two digits
    assert main(["collect", str(path), "--quiet", "--json", str(tmp_path / "c.json")]) == 0
    collected = json.loads((tmp_path / "c.json").read_text())
    assert [w for w in collected["warnings"] if "not a minimum" in w] == [warning]


def test_a_rerun_takes_the_optimised_geometry_from_the_store(tmp_path, capsys, monkeypatch):
    import fieldprop.backend
    from fieldprop.backend import geometry as backend_geometry

    path = tmp_path / "water.toml"
    path.write_text(JOB)
    assert main(["run", str(path), "--quiet"]) == 0
    first = (tmp_path / "water.result.json").read_text()

    def tripwire(*args, **kwargs):
        raise AssertionError("optimised again")

    # Wherever it is looked up: the engine takes it from the backend's face,
    # the screening's workers from its module.
    monkeypatch.setattr(fieldprop.backend, "optimize_geometry", tripwire)
    monkeypatch.setattr(backend_geometry, "optimize_geometry", tripwire)
    assert main(["run", str(path)]) == 0
    err = capsys.readouterr().err
    assert "the optimised geometry from" in err
    assert (tmp_path / "water.result.json").read_text().count('"coords_bohr"') == \
        first.count('"coords_bohr"')
    # collect needs no optimisation either: the store has it.
    assert main(["collect", str(path), "--quiet"]) == 0


def test_plan_before_the_optimisation_is_incomplete_and_bad_options_are_refused(tmp_path,
                                                                                  capsys):
    path = tmp_path / "water.toml"
    path.write_text(JOB)
    assert main(["point", str(path), "--zero-field", "--quiet"]) == 0  # creates the store
    capsys.readouterr()
    other = tmp_path / "other.toml"
    other.write_text(JOB.replace("optimize = true", 'optimize = true\ncriteria = "coarse"'))
    assert main(["plan", str(other), "--count"]) == 3
    assert "optimised geometry" in capsys.readouterr().err
    for extra, key in (('method = "ccsd"\nbasis = "sto-3g"', "method"),
                       ('criteria = "loose-ish"', "criteria"),
                       ('criteria = "tight"', "earlier versions")):
        bad = tmp_path / "bad.toml"
        bad.write_text(JOB.replace("optimize = true", "optimize = true\n" + extra))
        assert main(["run", str(bad)]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "[geometry]" in err[0] and key in err[0]
    bad.write_text(JOB.replace("optimize = true", 'basis = "sto-3g"'))
    assert main(["run", str(bad)]) == 2
    assert "optimise is not true" in capsys.readouterr().err


def test_an_unconverged_final_scf_is_an_error_naming_the_job(tmp_path, monkeypatch):
    """The geometry of an optimisation whose final SCF did not converge is
    never returned: the optimiser is replaced by one that reports success at
    the start, and the final SCF is allowed one cycle from the atomic guess
    (water needs ~10 to reach the gradient 1e-6 asked for)."""
    from pyscf.geomopt import geometric_solver

    from fieldprop.backend import geometry as backend_geometry
    from fieldprop.errors import FieldpropError
    from fieldprop.inputs.job import load_job
    from fieldprop.inputs.molecule import build_molecule

    path = tmp_path / "water.toml"
    path.write_text(JOB)
    job = load_job(path)
    monkeypatch.setattr(geometric_solver, "kernel",
                        lambda method, **kwargs: (True, method.mol.copy()))
    built = backend_geometry._mean_field

    def one_cycle(*args, **kwargs):
        mf = built(*args, **kwargs)
        mf.max_cycle = 1
        return mf

    monkeypatch.setattr(backend_geometry, "_mean_field", one_cycle)
    with pytest.raises(FieldpropError) as caught:
        backend_geometry.optimize_geometry(job, build_molecule(job.molecule, job.response.origin))
    message = str(caught.value)
    assert str(path) in message and "[geometry] optimise" in message
    assert "SCF" in message and "\n" not in message


def test_the_result_s_job_echo_rebuilds_the_job_that_started_the_optimisation(tmp_path,
                                                                               capsys):
    """The result's "job" without "derived", written as a job file, loads as
    the job that was run: the starting geometry (bit for bit in bohr), not
    the optimum, which is under derived.molecule.atoms."""
    import dataclasses
    import json
    import sys

    from fieldprop.inputs.job import load_job

    sys.path.insert(0, str(Path(__file__).parents[1] / "unit"))
    from toml_text import toml_document

    path = tmp_path / "water.toml"
    path.write_text(JOB)
    assert main(["run", str(path), "--quiet"]) == 0
    capsys.readouterr()
    echo = json.loads((tmp_path / "water.result.json").read_text())["job"]
    rebuilt_path = tmp_path / "rebuilt.toml"
    rebuilt_path.write_text(toml_document({k: v for k, v in echo.items() if k != "derived"}))
    job, rebuilt = load_job(path), load_job(rebuilt_path)
    assert rebuilt == dataclasses.replace(job, path=rebuilt.path, molecule=dataclasses.replace(
        job.molecule, units="bohr", source="inline"))
    optimum = [a["coords_bohr"] for a in echo["derived"]["molecule"]["atoms"]]
    assert optimum != [list(a.coords_bohr) for a in job.molecule.atoms]
    assert echo["derived"]["molecule"]["source"] == "inline, optimised"


def test_the_fitted_geometry_check_agrees_with_the_exact_gradient(tmp_path, monkeypatch):
    """Above GEOMETRY_CHECK_FIT_ABOVE basis functions the check's gradient is
    density-fitted; on the sketch (forced through that path) it agrees with
    PySCF's exact gradient far better than the 1e-3 Eh/bohr that decides."""
    from pyscf import gto, scf

    from fieldprop.backend import points as backend_points
    from fieldprop.backend.context import ModelContext
    from fieldprop.engine.prepare import prepare
    from fieldprop.inputs.job import load_job

    path = tmp_path / "sketch.toml"
    path.write_text(JOB.replace("[geometry]\noptimize = true\n", ""))
    zero = prepare(load_job(path)).tasks[0]
    context = ModelContext(zero.molecule, zero.model, zero.scf)
    exact = backend_points.compute_reference(context, zero)[1].nuclear_gradient
    monkeypatch.setattr(backend_points, "GEOMETRY_CHECK_FIT_ABOVE", 0)
    context = ModelContext(zero.molecule, zero.model, zero.scf)
    fitted = backend_points.compute_reference(context, zero)[1].nuclear_gradient
    mol = gto.M(atom="O 0 0 0.1; H 0 0.8 -0.45; H 0 -0.8 -0.45", basis="6-31g", verbose=0)
    reference = np.abs(scf.RHF(mol).run(conv_tol=1e-11).nuc_grad_method().kernel()).max()
    assert exact[0] == pytest.approx(reference, abs=1e-7)
    assert fitted[1] == exact[1] and abs(fitted[0] - exact[0]) < 1e-4
