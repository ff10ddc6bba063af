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
    from fieldprop.inputs.job import load_job

    job = load_job(tmp_path / "job.toml")
    mf = mean_field(job)
    from fieldprop.inputs.molecule import build_molecule

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
    from fieldprop.inputs.job import load_job

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


# ------------------------------------------------ what decides, and the common mistakes

@pytest.fixture(scope="module")
def water_reference(tmp_path_factory):
    """Water off its axes (HF/6-31G, dipole route, mu to gamma) and the content of a
    correct reference file: PySCF's SCF dipole, fieldprop's analytic alpha and its
    field derivatives (beta, gamma) with their error bars, read from check's own
    JSON, and the job's geometry in bohr. Returns (folder, job path, document)."""
    from fieldprop.inputs.job import load_job

    folder = tmp_path_factory.mktemp("mistakes")
    job_path = folder / "water.toml"
    job_path.write_text(job_text(rotated_water(), 'method = "hf"',
                                 props='["dipole", "alpha", "beta", "gamma"]')
                        .replace('"6-31g*"', '"6-31g"'))
    assert main(["check", str(job_path), "--quiet", "--json", str(folder / "own.json")]) == 0
    own = json.loads((folder / "own.json").read_text())
    job = load_job(job_path)
    tensors = {}
    for name, rows in own["tensors"].items():
        shape = (3,) * len(rows[0]["index"])
        tensors[name] = {"value": np.reshape([c["reference"] for c in rows], shape).tolist(),
                         "error": np.reshape([c["reference_error"] for c in rows],
                                             shape).tolist()}
    # PySCF's SCF dipole (neutral: it does not depend on the origin). PySCF stops
    # near an orbital gradient of 2e-9 for this molecule (DIIS on a singular DIIS
    # matrix with one BLAS thread, hence not support.mean_field; its second-order
    # solver stalls there): converged to 1e-8, the dipole errs by ~1e-8.
    from pyscf import gto, scf

    mol = gto.M(atom=[(a.symbol, a.coords_bohr) for a in job.molecule.atoms], unit="Bohr",
                basis="6-31g", verbose=0)
    mf = scf.RHF(mol)
    mf.conv_tol, mf.conv_tol_grad = 1e-10, 1e-8
    mf.kernel()
    assert mf.converged
    tensors["dipole"] = {"value": mf.dip_moment(unit="AU", verbose=0).tolist(),
                         "error": [1e-8] * 3}
    document = {"geometry": {"symbols": [a.symbol for a in job.molecule.atoms],
                             "coords_bohr": [list(a.coords_bohr) for a in job.molecule.atoms]},
                "tensors": tensors}
    return folder, job_path, document


def check_against(water_reference, capsys, name, document, *extra):
    folder, job_path, _ = water_reference
    ref = folder / f"{name}.json"
    ref.write_text(json.dumps(document))
    out_json = folder / f"{name}.check.json"
    code = main(["check", str(job_path), "--against", str(ref), "--quiet", "--json",
                 str(out_json), *extra])
    return code, capsys.readouterr(), json.loads(out_json.read_text())


def test_strict_fails_where_the_floor_hid_an_error(water_reference, capsys):
    import copy

    _, _, document = water_reference
    code, out, doc = check_against(water_reference, capsys, "correct", document, "--strict")
    assert code == 0 and doc["agree"] is True and doc["strict"] is True, out.out[-3000:]
    assert doc["floors"] is None and doc["diagnoses"] == []
    # alpha_yy off by 1e-7 au: ~20 combined error bars (dipole route, ~5e-9), a
    # hundredth of the absolute floor 1e-5 au.
    wrong = copy.deepcopy(document)
    wrong["tensors"]["alpha"]["value"][1][1] += 1e-7
    code, out, doc = check_against(water_reference, capsys, "floor", wrong)
    assert code == 0 and doc["agree"] is True and doc["entries_by_floor"] == 1
    entry = next(c for c in doc["tensors"]["alpha"] if c["name"] == "alpha_yy")
    assert entry["by_floor"] and entry["bound"] == "absolute-floor" and entry["floor"] == 1e-5
    assert entry["error_bars_term"] < abs(entry["difference"]) < entry["allowed"]
    assert entry["margin"] == pytest.approx(abs(entry["difference"]) / entry["allowed"])
    assert "1 of them only by the floor" in doc["verdict"]
    assert "--strict would fail" in doc["verdict"]
    assert "ok by floor" in out.out
    code, out, doc = check_against(water_reference, capsys, "floor-strict", wrong, "--strict")
    assert code == 1 and doc["agree"] is False and doc["entries_disagreeing"] == 1
    entry = next(c for c in doc["tensors"]["alpha"] if c["name"] == "alpha_yy")
    assert not entry["agrees"] and entry["bound"] == "error-bars" and entry["margin"] > 1
    assert "alpha_yy" in out.err and out.err.startswith("fieldprop: error: check disagrees")


def _negate(doc, *names):
    for name in names:
        doc["tensors"][name]["value"] = (-np.array(doc["tensors"][name]["value"])).tolist()


def _scale(doc, name, factor):
    for key in ("value", "error"):
        doc["tensors"][name][key] = (np.array(doc["tensors"][name][key]) * factor).tolist()


def _unsymmetrise(doc):
    beta = np.array(doc["tensors"]["beta"]["value"])
    beta[0, 1, 1] += 0.5  # moved between permutations: the average is the same
    beta[1, 0, 1] -= 0.25
    beta[1, 1, 0] -= 0.25
    doc["tensors"]["beta"]["value"] = beta.tolist()


def _geometry(doc, factor):
    coords = np.array(doc["geometry"]["coords_bohr"])
    doc["geometry"]["coords_bohr"] = (coords * factor).tolist()


def _declare_perturbation(doc):
    doc["convention"] = "perturbation"


# CODATA bohr in angstrom (scipy.constants._codata tables): 2006 0.52917720859,
# 2018 0.529177210903, 2022 0.529177210544 (SciPy's own, hence the job's).
D_2018 = 0.529177210903 / 0.529177210544 - 1.0   # 6.8e-10
D_2006 = 0.52917720859 / 0.529177210544 - 1.0    # -3.7e-9
MISTAKES = [
    pytest.param(lambda d: _negate(d, "dipole", "beta"), (), 1,
                 {("sign", "dipole"), ("sign", "beta")}, id="sign-of-odd-orders"),
    pytest.param(lambda d: _scale(d, "beta", 0.5), (), 1,
                 {("perturbation-convention", "beta")}, id="beta-halved"),
    pytest.param(lambda d: _scale(d, "gamma", 1 / 6), (), 1,
                 {("perturbation-convention", "gamma")}, id="gamma-sixth"),
    pytest.param(_declare_perturbation, (), 1,
                 {("perturbation-convention", "beta"), ("perturbation-convention", "gamma")},
                 id="taylor-declared-perturbation"),
    pytest.param(_unsymmetrise, (), 1, {("unsymmetrised", "beta")}, id="unsymmetrised-beta"),
    # The tensors are right, only the geometry's label is wrong: compared all the same.
    pytest.param(lambda d: _geometry(d, 0.52917721054482), (), 0,
                 {("geometry-units", "geometry")}, id="angstrom-as-bohr"),
    pytest.param(lambda d: _geometry(d, 1 / (1 + D_2018)), (), 0,
                 {("bohr-value", "geometry")}, id="geometry-other-bohr"),
    # alpha through SI units and back with the 2006 bohr: (1 + d)^2, 4e-8 of alpha,
    # under the floors, caught by --strict.
    pytest.param(lambda d: _scale(d, "alpha", (1 + D_2006) ** 2), ("--strict",), 1,
                 {("bohr-value", "alpha")}, id="alpha-other-bohr"),
]


@pytest.mark.parametrize("spoil, extra, exit_code, causes", MISTAKES)
def test_check_names_the_likely_cause_of_a_wrong_reference(water_reference, capsys, spoil,
                                                           extra, exit_code, causes):
    import copy

    _, _, document = water_reference
    wrong = copy.deepcopy(document)
    spoil(wrong)
    code, out, doc = check_against(water_reference, capsys, "wrong", wrong, *extra)
    assert code == exit_code, out.out[-3000:] + out.err
    assert doc["agree"] is (exit_code == 0)
    assert {(d["cause"], d["property"]) for d in doc["diagnoses"]} == causes, doc["diagnoses"]
    lines = [ln for ln in out.out.splitlines() if ln.startswith("fieldprop check: diagnosis:")]
    assert len(lines) == len(causes)
    if exit_code:
        # The one error line names the likely causes.
        assert out.err.count("\n") == 1
        assert all(f"{c} ({p})" in out.err for c, p in causes)
