"""``fieldprop check``: verdicts against analytic references and tensor files, the
dipole route against the energy route, and the origin shift of an ion's dipole.

Outside references: PySCF's SCF dipole and the CPHF/CPKS polarizability solved in
tests/physics/analytic_reference.py (independent of fieldprop's own CPHF solver,
which uses conjugate gradients; this one PySCF's Krylov solver with refinement).
"""

import json
import textwrap

import numpy as np
import pytest

from analytic_reference import cphf_polarizability
from support import mean_field, nh2_geometry, rotated_water, rotation, run_job

from fieldprop.cli import main


def job_text(geometry: str, model: str, multiplicity: int = 1, extra: str = "",
             props: str = '["dipole", "alpha", "beta"]') -> str:
    return textwrap.dedent("""
        [molecule]
        geometry = \"\"\"
        {geometry}
        \"\"\"
        multiplicity = {multiplicity}
        [model]
        {model}
        basis = "6-31g*"
        [response]
        properties = {props}
        field_au = 0.002
        {extra}
        """).format(geometry=geometry.replace("\n", "\n        "), model=model,
                    multiplicity=multiplicity, props=props, extra=extra)


def run_check(tmp_path, capsys, text, *extra_args):
    path = tmp_path / "job.toml"
    path.write_text(text)
    code = main(["check", str(path), "--quiet", "--json", str(tmp_path / "check.json"),
                 *extra_args])
    out = capsys.readouterr()
    return code, out, json.loads((tmp_path / "check.json").read_text())


MU_ALPHA_BETA = '["dipole", "alpha", "beta"]'
MU_ALPHA = '["dipole", "alpha"]'
DFT_GRID = "[scf]\ngrid_level = 3"
# DFT points cost ~20x HF ones here (grid work in every SCF cycle and CPKS
# iteration), so the default suite checks DFT mu and alpha with one functional per
# reference kind (B3LYP restricted, PBE unrestricted); the others are slow checks.
CASES = [
    pytest.param(rotated_water(), 'method = "hf"', 1, "", MU_ALPHA_BETA, id="rhf"),
    pytest.param(nh2_geometry(), 'method = "hf"', 2, "", MU_ALPHA_BETA, id="uhf-radical"),
    pytest.param(rotated_water(), 'method = "dft"\nfunctional = "b3lyp"', 1, DFT_GRID,
                 MU_ALPHA, id="rks-b3lyp"),
    pytest.param(rotated_water(), 'method = "dft"\nfunctional = "pbe"', 1, DFT_GRID,
                 MU_ALPHA, id="rks-pbe", marks=pytest.mark.slow),
    pytest.param(nh2_geometry(), 'method = "dft"\nfunctional = "pbe"', 2, DFT_GRID,
                 MU_ALPHA, id="uks-pbe"),
    pytest.param(nh2_geometry(), 'method = "dft"\nfunctional = "b3lyp"', 2, DFT_GRID,
                 MU_ALPHA, id="uks-b3lyp", marks=pytest.mark.slow),
    pytest.param(nh2_geometry(), 'method = "dft"\nfunctional = "pbe"', 2, DFT_GRID,
                 MU_ALPHA_BETA, id="uks-pbe-beta", marks=pytest.mark.slow),
]


@pytest.mark.parametrize("geometry, model, multiplicity, extra, props", CASES)
def test_check_agrees_with_analytic_references(tmp_path, capsys, geometry, model,
                                               multiplicity, extra, props):
    # Energy route: the dipole, alpha and beta are then all finite-field numbers.
    text = job_text(geometry, model.replace("\n", "\n        "), multiplicity,
                    'differentiate = "energy"\n' + extra, props=props)
    code, out, doc = run_check(tmp_path, capsys, text)
    assert code == 0, out.out[-2000:] + out.err
    assert "fieldprop check: AGREE" in out.out
    assert set(doc["tensors"]) == set(json.loads(props))
    assert all(c["agrees"] for rows in doc["tensors"].values() for c in rows)
    # fieldprop's own CPHF/CPKS alpha (the reference of the check) against the
    # independent solver of analytic_reference.py: ~1e-9 relative (both converge
    # the linear equations to <= 1e-10 relative residual).
    from fieldprop.job import load_job

    job = load_job(tmp_path / "job.toml")
    mf = mean_field(job)
    from fieldprop.molecule import build_molecule

    origin = build_molecule(job.molecule, job.response.origin).origin_bohr
    independent = cphf_polarizability(mf, origin)
    reference_alpha = np.array([[c["reference"] for c in doc["tensors"]["alpha"]][3 * i:3 * i + 3]
                                for i in range(3)])
    assert np.max(np.abs(reference_alpha - independent)) < 1e-6 * np.max(np.abs(independent))


def test_check_names_a_component_off_by_one_percent_and_accepts_a_rotated_file(tmp_path,
                                                                              capsys):
    text = job_text(rotated_water(), 'method = "hf"', props='["dipole", "alpha"]',
                    extra='differentiate = "energy"')
    (tmp_path / "job.toml").write_text(text)
    from fieldprop.job import load_job

    job = load_job(tmp_path / "job.toml")
    mf = mean_field(job)
    mu = mf.dip_moment(unit="AU", verbose=0)
    alpha = cphf_polarizability(mf)  # neutral: both origin-independent
    coords = np.array([a.coords_bohr for a in job.molecule.atoms])
    # Another code's output in another frame: geometry and tensors rotated by Q.
    q = rotation().T @ rotation().T
    other = {"geometry": {"symbols": ["O", "H", "H"], "coords_bohr": (coords @ q.T).tolist()},
             "tensors": {"dipole": {"value": (q @ mu).tolist()},
                         "alpha": {"value": (q @ alpha @ q.T).tolist()}}}
    good = tmp_path / "other_code.json"
    good.write_text(json.dumps(other))
    code = main(["check", str(tmp_path / "job.toml"), "--against", str(good), "--quiet"])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "rotated into the job's frame" in out

    # Same file with alpha_xy (and its mirror alpha_yx) of the job's frame off by 1 %.
    wrong = alpha.copy()
    wrong[0, 1] *= 1.01
    wrong[1, 0] *= 1.01
    other["tensors"]["alpha"]["value"] = (q @ wrong @ q.T).tolist()
    bad = tmp_path / "buggy_code.json"
    bad.write_text(json.dumps(other))
    code = main(["check", str(tmp_path / "job.toml"), "--against", str(bad), "--quiet"])
    captured = capsys.readouterr()
    assert code == 1
    verdict = [ln for ln in captured.out.splitlines() if ln.startswith("fieldprop check:")][0]
    assert "DISAGREE" in verdict and "alpha_xy" in verdict
    assert "alpha_xx" not in verdict and "dipole" not in verdict
    assert captured.err.count("\n") == 1 and "alpha_xy" in captured.err

    # A geometry that is not the job's structure cannot be aligned: exit 2.
    other["geometry"]["coords_bohr"][1][0] += 0.2
    bad.write_text(json.dumps(other))
    assert main(["check", str(tmp_path / "job.toml"), "--against", str(bad), "--quiet"]) == 2
    assert "cannot be matched" in capsys.readouterr().err


def test_dipole_route_agrees_with_energy_route_and_is_tenfold_sharper(tmp_path):
    text = """
        [molecule]
        geometry = \"\"\"
{geometry}
        \"\"\"
        [model]
        method = "hf"
        basis = "6-31+g*"
        [response]
        properties = ["alpha", "beta"]
        field_au = 0.001
        differentiate = "{route}"
        """
    _, energy = run_job(tmp_path, text.format(geometry=rotated_water(), route="energy"), "e.toml")
    _, dipole = run_job(tmp_path, text.format(geometry=rotated_water(), route="dipole"), "d.toml")
    for name in ("alpha", "beta"):
        e, d = energy.tensors[name], dipole.tensors[name]
        assert np.all(np.abs(e.value_au - d.value_au) <= 3 * (e.error_au + d.error_au))
        # Same ladder h = 0.001, 0.002, 0.004 au: one derivative fewer, and the SCF
        # converged to an orbital gradient of 1e-12 (dipole error ~g).
        assert np.max(e.error_au) >= 10 * np.max(d.error_au), name


def test_origin_shift_of_a_cation_dipole(tmp_path):
    # H3O+ (closed shell), our pyramidal geometry; charge +1.
    geometry = """O 0.00 0.00 0.10
        H 0.00 0.94 -0.25
        H 0.81 -0.47 -0.25
        H -0.81 -0.47 -0.25"""
    text = """
        [molecule]
        geometry = \"\"\"
        {geometry}
        \"\"\"
        charge = 1
        units = "angstrom"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["dipole", "alpha"]
        differentiate = "energy"
        field_au = 0.002
        origin = {origin}
        """
    _, a = run_job(tmp_path, text.format(geometry=geometry, origin='"zero"'), "a.toml")
    shift_angstrom = np.array([0.5, -0.3, 0.8])
    origin_text = "[" + ", ".join(str(float(v)) for v in shift_angstrom) + "]"
    _, b = run_job(tmp_path, text.format(geometry=geometry, origin=origin_text), "b.toml")
    d_bohr = np.array(b.molecule.origin_bohr) - np.array(a.molecule.origin_bohr)
    # mu(O') = mu(O) - q (O' - O) for a uniform field (REFERENCES sect. 1).
    expected = a.tensors["dipole"].value_au - 1 * d_bohr
    assert np.allclose(b.tensors["dipole"].value_au, expected, atol=1e-6)
    assert np.max(np.abs(d_bohr)) > 1.0  # the shift is visible in the dipole
    # alpha does not depend on the origin (REFERENCES sect. 1).
    assert np.allclose(b.tensors["alpha"].value_au, a.tensors["alpha"].value_au, atol=1e-5)
    # And PySCF's analytic dipole about the same origins agrees.
    from analytic_reference import scf_dipole

    mf = mean_field(a.job)
    assert np.allclose(scf_dipole(mf, b.molecule.origin_bohr), b.tensors["dipole"].value_au,
                       atol=1e-6)
