"""The number belongs to the molecule the user gave.

A validator feeds fieldprop and an analytic code the same angstrom XYZ and
compares at fieldprop's error bars. So: angstrom becomes bohr exactly as the
backend (PySCF) converts it; a geometry symmetric only to the digits it was
typed with is computed as given (its point group is named, not imposed); and
``symmetry = "symmetrise"`` moves it onto the group only when asked, saying
so. The analytic references here are built by PySCF from the angstrom text
itself (``gto.M(atom=text, unit="Angstrom")``), never from fieldprop's
coordinates: alpha from a CPHF solve (tests/physics/analytic_reference.py)
and beta from central differences of that alpha at fields put into PySCF's
core Hamiltonian, one Richardson step.
"""

import json
import textwrap

import numpy as np
import pytest

pytest.importorskip("pyscf")

from analytic_reference import cphf_polarizability, scf_dipole  # noqa: E402
from support import rotation  # noqa: E402

from fieldprop.cli import main  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402
from fieldprop.numerics.symmetry import detect  # noqa: E402
from fieldprop.numerics.units import BACKEND_BOHR_ANGSTROM, BOHR_TO_ANGSTROM  # noqa: E402

#: Water (our idealised shape, angstrom) turned off every axis and moved, then
#: typed to six decimals as XYZ files usually are: C2v only to ~1e-6 bohr.
_WATER = np.array([[0.0, 0.0, 0.1173], [0.0, 0.7572, -0.4692], [0.0, -0.7572, -0.4692]])
SIX_DECIMALS = "\n".join(
    f"{s} {x:.6f} {y:.6f} {z:.6f}"
    for s, (x, y, z) in zip("OHH", _WATER @ rotation().T + np.array([0.31, -0.17, 0.52])))


def _job_text(extra_molecule="", symmetry=None, properties='["dipole", "alpha", "beta"]'):
    return textwrap.dedent(f"""
        [molecule]
        geometry = \"\"\"
        {textwrap.indent(SIX_DECIMALS, '        ').strip()}
        \"\"\"
        {extra_molecule}
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = {properties}
        """) + ("" if symmetry is None else f"symmetry = {symmetry}\n")


def _pyscf_mean_field(field=None, origin=(0.0, 0.0, 0.0)):
    """RHF/6-31G of the angstrom text as PySCF reads it, +F.(r - origin) in
    the core Hamiltonian, converged to an orbital gradient of ~1e-11."""
    from pyscf import gto, scf

    mol = gto.M(atom=SIX_DECIMALS, unit="Angstrom", basis="6-31g", verbose=0)
    mf = scf.RHF(mol)
    if field is not None:
        with mol.with_common_orig(np.asarray(origin, dtype=float)):
            r = mol.intor_symmetric("int1e_r", comp=3)
        h = mf.get_hcore() + np.einsum("x,xij->ij", np.asarray(field, dtype=float), r)
        mf.get_hcore = lambda *args: h
    mf.conv_tol, mf.conv_tol_grad, mf.max_cycle = 1e-13, 1e-11, 300
    mf.kernel()
    assert mf.converged
    return mf


def _analytic_references(origin):
    """mu, alpha (CPHF) and beta (central differences of CPHF alpha over
    h = 0.001 and 0.002 au, one Richardson step) with their uncertainties."""
    mf = _pyscf_mean_field(origin=origin)
    mu, alpha = scf_dipole(mf, origin), cphf_polarizability(mf, origin)
    steps, estimates = (0.001, 0.002, 0.004), []
    for h in steps:
        d = np.zeros((3, 3, 3))
        for k in range(3):
            f = np.zeros(3)
            f[k] = h
            plus = cphf_polarizability(_pyscf_mean_field(f, origin), origin)
            minus = cphf_polarizability(_pyscf_mean_field(-f, origin), origin)
            d[:, :, k] = (plus - minus) / (2 * h)
        estimates.append(d)
    first = (4 * estimates[0] - estimates[1]) / 3
    second = (4 * estimates[1] - estimates[2]) / 3
    perms = ((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0))
    beta = sum(np.transpose(first, p) for p in perms) / 6
    # Truncation (the next Richardson step's change) plus the CPHF alphas'
    # noise (~1e-10 au, converged to 1e-11) through 4/3 of a difference over 2h.
    beta_error = sum(np.transpose(np.abs(first - second), p) for p in perms) / 6 + 1e-7
    # The SCF references carry ~the orbital gradient (1e-11) and the CPHF
    # residual (1e-10 relative, analytic_reference._RESIDUAL_TOL).
    return {"dipole": (mu, np.full(3, 1e-10)), "alpha": (alpha, 1e-9 * np.abs(alpha) + 1e-10),
            "beta": (beta, beta_error)}


def test_angstrom_is_turned_into_the_backends_bohr_bit_for_bit(tmp_path):
    from pyscf import gto
    from pyscf.data.nist import BOHR

    # fieldprop holds PySCF's bohr without importing it; they must agree.
    assert BACKEND_BOHR_ANGSTROM == BOHR
    path = tmp_path / "water.toml"
    path.write_text(_job_text())
    job = load_job(path)
    ours = np.array([a.coords_bohr for a in job.molecule.atoms])
    theirs = gto.M(atom=SIX_DECIMALS, unit="Angstrom", basis="sto-3g").atom_coords()
    assert np.array_equal(ours, theirs)  # bit for bit
    echo = job.to_dict()
    assert echo["molecule"]["bohr_angstrom"] == "backend"
    derived = echo["derived"]["molecule"]
    assert derived["bohr_angstrom"] == BOHR and derived["bohr_source"] == "backend"
    # Another bohr, asked for by name or number, gives another molecule, and says so.
    path.write_text(_job_text('bohr_angstrom = "scipy"'))
    scipy_job = load_job(path)
    scipy_coords = np.array([a.coords_bohr for a in scipy_job.molecule.atoms])
    assert not np.array_equal(scipy_coords, theirs)
    assert np.allclose(scipy_coords * BOHR_TO_ANGSTROM, theirs * BOHR, rtol=0, atol=1e-14)
    assert scipy_job.to_dict()["molecule"]["bohr_angstrom"] == "scipy"
    assert scipy_job.to_dict()["derived"]["molecule"]["bohr_source"] == "scipy"
    path.write_text(_job_text("bohr_angstrom = 0.52917721067"))
    given = load_job(path).to_dict()
    assert given["molecule"]["bohr_angstrom"] == 0.52917721067
    assert given["derived"]["molecule"]["bohr_source"] == "given"


def test_a_geometry_symmetric_to_its_digits_is_computed_as_given(tmp_path, capsys):
    path = tmp_path / "water.toml"
    path.write_text(_job_text())
    assert main(["run", str(path), "--workers", "1"]) == 0
    out = capsys.readouterr().out
    doc = json.loads((tmp_path / "water.result.json").read_text())
    # The group is named in the header and the JSON, not used.
    assert doc["symmetry"] is None
    near = doc["symmetry_near"]
    assert near["group"].startswith("C2v") and 1e-8 < near["distance_bohr"] < 1e-5
    assert near["points_saved_by_symmetrise"] > 0
    assert "computed as given" in out and "near C2v" in out
    # The nuclei computed are the ones given, at full precision.
    from pyscf import gto

    given = gto.M(atom=SIX_DECIMALS, unit="Angstrom", basis="sto-3g").atom_coords()
    computed = np.array([a["coords_bohr"] for a in doc["geometry_computed_bohr"]])
    assert np.array_equal(computed, given)
    # Every component against analytic values of the same angstrom input, at
    # the printed error bars plus the reference's own, with no absolute floor:
    # moved onto C2v (as fieldprop once did), mu missed by up to 1.7e-7 au,
    # alpha by ~2e-6, beta by ~1e-5, 10-100 error bars.
    refs = _analytic_references(doc["origin_bohr"])
    for name, (ref, ref_err) in refs.items():
        value = np.array(doc["tensors"][name]["value"])
        error = np.array(doc["tensors"][name]["error"])
        miss = np.abs(value - ref)
        bound = 3.0 * (error + ref_err)
        worst = np.unravel_index(np.argmax(miss / bound), miss.shape)
        assert np.all(miss <= bound), (name, worst, miss[worst], error[worst], ref_err[worst])
    # The validator's way: the analytic tensors as a reference file, with the
    # geometry PySCF read, and check --strict (error bars only, no floors).
    reference = tmp_path / "analytic.json"
    reference.write_text(json.dumps({
        "tensors": {name: {"value": ref.tolist(), "error": np.asarray(err).tolist()}
                    for name, (ref, err) in refs.items()},
        "geometry": {"symbols": list("OHH"), "coords_bohr": given.tolist()},
        "origin_bohr": doc["origin_bohr"]}))
    verdict = tmp_path / "verdict.json"
    assert main(["check", str(path), "--against", str(reference), "--strict",
                 "--json", str(verdict)]) == 0
    assert json.loads(verdict.read_text())["agree"] is True


def test_symmetrise_moves_the_geometry_onto_its_group_and_says_so(tmp_path, capsys):
    path = tmp_path / "water.toml"
    path.write_text(_job_text(symmetry='"symmetrise"', properties='["dipole", "alpha"]'))
    assert main(["run", str(path), "--workers", "1"]) == 0
    captured = capsys.readouterr()
    doc = json.loads((tmp_path / "water.result.json").read_text())
    assert doc["symmetry"]["group"].startswith("C2v") and doc["symmetry"]["geometry_symmetrised"]
    assert doc["symmetry_near"] is None
    assert "geometry symmetrised" in captured.out
    assert any("moved by up to" in w for w in doc["warnings"])
    computed = np.array([a["coords_bohr"] for a in doc["geometry_computed_bohr"]])
    given = np.array([[float(v) for v in line.split()[1:]]  # the job file's, echoed in bohr
                      for line in doc["job"]["molecule"]["geometry"].splitlines()])
    moved = np.abs(computed - given).max()
    assert 1e-8 < moved < 1e-5 and moved <= doc["symmetry"]["geometry_moved_bohr"] * 1.01
    # The job echo's derived nuclei are the ones computed, its input the given.
    derived = [a["coords_bohr"] for a in doc["job"]["derived"]["molecule"]["atoms"]]
    assert np.array_equal(np.array(derived), computed)
    # The nuclei computed are symmetric to round-off: the group holds as they stand.
    again = detect((8, 1, 1), computed)
    assert again is not None and again.exact


FORMALDEHYDE = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    C 0.0 0.0 -0.53
    O 0.0 0.0 0.68
    H 0.0 0.95 -1.12
    H 0.0 -0.95 -1.12
    \"\"\"
    [model]
    method = "hf"
    basis = "sto-3g"
    [response]
    properties = ["dipole", "alpha"]
    [geometry]
    optimize = true
    """)


def test_an_optimised_c2v_molecule_keeps_exact_zeros_and_honest_bars(tmp_path):
    path = tmp_path / "h2co.toml"
    path.write_text(FORMALDEHYDE)
    assert main(["run", str(path), "--quiet", "--workers", "1"]) == 0
    doc = json.loads((tmp_path / "h2co.result.json").read_text())
    # Symmetrised at its source: the optimiser's tilt is gone, the group used.
    assert doc["job"]["derived"]["optimisation"]["symmetrised"]["moved_bohr"] < 1e-4
    assert doc["symmetry"]["group"].startswith("C2v") and not doc["symmetry"]["geometry_symmetrised"]
    coords = np.array([a["coords_bohr"] for a in doc["geometry_computed_bohr"]])
    assert np.all(coords[:, 0] == 0.0) and coords[2, 1] == -coords[3, 1]
    assert coords[2, 2] == coords[3, 2] and coords[0, 1] == coords[1, 1] == 0.0
    # Components C2v forbids (C2 along z, molecular plane yz) are exact zeros.
    mu = np.array(doc["tensors"]["dipole"]["value"])
    alpha = np.array(doc["tensors"]["alpha"]["value"])
    assert mu[0] == 0.0 and mu[1] == 0.0
    assert alpha[0, 1] == alpha[0, 2] == alpha[1, 2] == 0.0
    # No bar below the rounding of the value it qualifies (8 ulp of |value|).
    eps = np.finfo(float).eps
    for name in ("dipole", "alpha"):
        value = np.array(doc["tensors"][name]["value"])
        error = np.array(doc["tensors"][name]["error"])
        assert np.all((value == 0.0) | (error >= 8 * eps * np.abs(value)))
        assert np.all((value == 0.0) | (error > 0.0))
    # The XYZ written is the computed geometry (15 decimals of angstrom).
    lines = (tmp_path / "h2co.optimised.xyz").read_text().splitlines()[2:]
    written = np.array([[float(v) for v in line.split()[1:]] for line in lines])
    assert np.allclose(written / BACKEND_BOHR_ANGSTROM, coords, rtol=0, atol=1e-14)
