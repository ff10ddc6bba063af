"""Nuclear relaxation through the commands: resumable runs, collect, relax, refusals.

The physics (double-harmonic relations, gradients) is in
tests/physics/test_nuclear_relaxation.py; here water at HF/STO-3G keeps it fast.
"""

import csv
import io
import json
import textwrap

import numpy as np
import pytest

from fieldprop.cli import main

pytest.importorskip("pyscf")

WATER = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    O 0.0 0.0 0.1173
    H 0.0 0.7572 -0.4692
    H 0.0 -0.7572 -0.4692
    \"\"\"
    [model]
    method = "hf"
    basis = "sto-3g"
    [geometry]
    optimize = true
    [response]
    properties = ["alpha", "beta"]
    nuclear_relaxation = true
    """)


def _one_line_error(capsys, *parts):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("fieldprop: error:"), err
    for part in parts:
        assert part in err[0], err[0]


def test_a_rerun_reuses_every_relaxed_point_and_collect_gives_the_same(tmp_path, capsys):
    path = tmp_path / "water.toml"
    path.write_text(WATER)
    assert main(["run", str(path), "--quiet", "--workers", "2"]) == 0
    out = capsys.readouterr().out
    assert "nuclear relaxation (static limit" in out and "nuclear relaxation" in out
    first = json.loads((tmp_path / "water.result.json").read_text())
    relaxed = first["nuclear_relaxation"]["points"]
    assert relaxed["computed"] > 0 and relaxed["reused"] == 0
    assert set(first["invariants_total"]) == set(first["invariants"])
    assert main(["run", str(path), "--quiet"]) == 0
    capsys.readouterr()
    second = json.loads((tmp_path / "water.result.json").read_text())
    assert second["nuclear_relaxation"]["points"] == {
        "planned": relaxed["planned"], "computed": 0, "reused": relaxed["computed"]}
    assert second["tensors_nuclear_relaxation"] == first["tensors_nuclear_relaxation"]
    out = tmp_path / "collected.json"
    assert main(["collect", str(path), "--quiet", "--json", str(out)]) == 0
    capsys.readouterr()
    collected = json.loads(out.read_text())
    assert collected["tensors_nuclear_relaxation"] == first["tensors_nuclear_relaxation"]
    assert collected["invariants_total"] == first["invariants_total"]
    # The CSVs carry every part, labelled: a row per component of the
    # electronic, nuclear-relaxation and total tensors (collect, as run), and
    # the electronic and total invariants (report); total = electronic + nuclear.
    assert main(["collect", str(path), "--quiet", "--json", str(out), "--format", "csv"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    by_part = {(r["part"], r["component"]): float(r["value"]) for r in rows if r["value"]}
    assert {r["part"] for r in rows} == {"electronic", "nuclear_relaxation", "total"}
    for name in ("alpha_xx", "alpha_zz", "beta_zzz"):
        assert by_part["total", name] == pytest.approx(
            by_part["electronic", name] + by_part["nuclear_relaxation", name], rel=1e-9,
            abs=1e-12)
    assert main(["report", str(out), "--format", "csv"]) == 0
    rows = {r["part"]: r for r in csv.DictReader(io.StringIO(capsys.readouterr().out))}
    assert set(rows) == {"electronic", "total"}
    assert float(rows["total"]["alpha_iso_au"]) == pytest.approx(
        first["invariants_total"]["alpha_iso"]["value"], rel=1e-12)
    # Commands that handle clamped nuclei only say so, in one line.
    assert main(["point", str(path), "--zero-field"]) == 2
    _one_line_error(capsys, "[response] nuclear_relaxation = true", "fieldprop point")


def test_a_geometry_that_is_not_a_minimum_is_refused(tmp_path, capsys):
    path = tmp_path / "h2.toml"
    # H2 at 0.80 angstrom: HF/STO-3G's minimum is near 0.71 (from memory); the
    # gradient there is ~0.1 Eh/bohr.
    path.write_text(textwrap.dedent("""
        [molecule]
        geometry = \"\"\"
        H 0 0 0
        H 0 0 0.80
        \"\"\"
        [model]
        method = "hf"
        basis = "sto-3g"
        [response]
        properties = ["alpha"]
        nuclear_relaxation = true
        """))
    assert main(["run", str(path), "--no-store", "--quiet"]) == 2
    _one_line_error(capsys, f"{path}: [response] nuclear_relaxation: the geometry is not a "
                    "minimum", "[geometry] optimise = true")
    assert not (tmp_path / "h2.result.json").exists()


def test_relax_gives_the_minimum_in_the_field_without_turning(tmp_path, capsys):
    from tests.physics.test_nuclear_relaxation import _energy

    path = tmp_path / "water.toml"
    path.write_text(WATER)
    field = np.array([0.0, 0.008, -0.006])
    assert main(["relax", str(path), "--field", *map(str, field), "--quiet", "--json",
                 str(tmp_path / "relaxed.json")]) == 0
    table = capsys.readouterr().out
    assert "relaxation energy" in table and "Eckart residuals" in table
    doc = json.loads((tmp_path / "relaxed.json").read_text())
    xyz = (tmp_path / "water.relaxed.xyz").read_text().splitlines()
    assert xyz[0] == "3" and len(xyz) == 5
    minimum = np.array(doc["zero_field_minimum_bohr"])
    relaxed = np.array(doc["relaxed_bohr"])
    assert 1e-4 < np.abs(relaxed - minimum).max() < 0.05
    # Eckart conditions, written here (16O, 1H masses; a fact of the trade).
    assert np.allclose(doc["masses_u"], [15.99491462, 1.00782503, 1.00782503], rtol=1e-7)
    masses = np.array(doc["masses_u"])
    centred = minimum - masses @ minimum / masses.sum()
    assert np.abs(masses @ (relaxed - minimum)).max() < 1e-10
    assert np.abs((masses[:, None] * np.cross(centred, relaxed)).sum(axis=0)).max() < 1e-10
    # Independent energies (PySCF alone): the relaxed structure is lower than the
    # clamped one by the reported relaxation energy, and a minimum along the
    # Eckart-allowed moves (a symmetric stretch, a bend, an antisymmetric
    # stretch of the relaxed structure, each made rotation- and translation-free).
    origin = np.array(doc["origin_bohr"])
    assert np.allclose(origin, _origin(minimum), atol=1e-8)
    e_min = _energy("OHH", relaxed, "rhf", field, origin, basis="sto-3g")
    e_clamped = _energy("OHH", minimum, "rhf", field, origin, basis="sto-3g")
    assert abs((e_clamped - e_min) - doc["relaxation_energy_au"]) < 1e-10
    assert doc["relaxation_energy_au"] > 1e-7
    for move in _eckart_moves(minimum, masses):
        for t in (1e-3, -1e-3):
            assert _energy("OHH", relaxed + t * move, "rhf", field, origin,
                           basis="sto-3g") > e_min


def _origin(coords):
    """The centre of nuclear charge (the job's default origin)."""
    z = np.array([8.0, 1.0, 1.0])
    return z @ coords / z.sum()


def _eckart_moves(reference, masses):
    """Three displacements (unit max) satisfying the Eckart conditions about
    ``reference``: random moves with the mass-weighted rigid motions removed."""
    n = len(masses)
    root = np.sqrt(masses)
    centred = reference - masses @ reference / masses.sum()
    rigid = []
    for k in range(3):
        t = np.zeros((n, 3))
        t[:, k] = root
        rigid.append(t.ravel())
        rigid.append((np.cross(np.eye(3)[k], centred) * root[:, None]).ravel())
    q, _ = np.linalg.qr(np.array(rigid).T)
    rng = np.random.default_rng(5)
    out = []
    for _ in range(3):
        v = rng.normal(size=3 * n)
        v -= q @ (q.T @ v)
        move = (v / np.repeat(root, 3)).reshape(n, 3)
        out.append(move / np.abs(move).max())
    return out


def test_relax_refuses_a_field_beyond_the_perturbative_regime(tmp_path, capsys):
    path = tmp_path / "water.toml"
    path.write_text(WATER)
    assert main(["relax", str(path), "--field", "0.1", "0", "0"]) == 2
    _one_line_error(capsys, "--field 0.1 0 0", "0.05 au")
    assert not (tmp_path / "water.relaxed.xyz").exists()
