"""Screening campaigns (fieldprop screen): bad sets refused before any work, a
ranked CSV whose numbers are those of each molecule's own job and of an analytic
CPHF polarizability, a failed molecule that leaves the others intact, SMILES
structures that do not change between runs, and a killed campaign that resumes.
"""

import csv
import io
import json
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from fieldprop.cli import main

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "physics"))

pytest.importorskip("pyscf")

SHARED = """
[model]
method = "hf"
basis = "sto-3g"
[response]
properties = ["dipole", "alpha", "beta"]
"""


def write_set(folder: Path, molecules: str, shared: str = SHARED, name="set.toml") -> Path:
    path = folder / name
    path.write_text(molecules + shared)
    return path


def one_line(capsys, code, result, *words):
    err = capsys.readouterr().err
    assert result == code, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    for word in words:
        assert word in lines[0], (word, lines[0])
    return lines[0]


BAD_SETS = {
    "duplicate name": ('[[molecule]]\nname = "w"\nsmiles = "O"\n[[molecule]]\nname = "w"\n'
                       'smiles = "N"\n', ["'w'", "twice"]),
    "missing file": ('[[molecule]]\nxyz = "nowhere.xyz"\n', ["nowhere", "not found"]),
    "unparsable smiles": ('[[molecule]]\nname = "ring"\nsmiles = "C1CC"\n',
                          ["'ring'", "smiles", "cannot parse"]),
    "charge disagrees": ('[[molecule]]\nname = "ammonium"\nsmiles = "[NH4+]"\ncharge = 0\n',
                         ["'ammonium'", "charge", "implies charge 1"]),
    "multiplicity disagrees": ('[[molecule]]\nname = "amidogen"\nsmiles = "[NH2]"\n'
                               'multiplicity = 1\n', ["'amidogen'", "multiplicity"]),
    "two sources": ('[[molecule]]\nname = "w"\nsmiles = "O"\ngeometry = "H 0 0 0"\n',
                    ["exactly one of xyz, geometry, smiles"]),
    "unknown key": ('[[molecule]]\nname = "w"\nsmiles = "O"\ncolour = "blue"\n', ["colour"]),
    "no molecule": ("", ["no molecule"]),
    "missing folder": ('xyz_dir = "candidates"\n', ["xyz_dir", "no such folder"]),
    "bad name": ('[[molecule]]\nname = "a/b"\nsmiles = "O"\n', ["'a/b'", "name"]),
    "bad model": ('[[molecule]]\nname = "w"\nsmiles = "O"\n',
                  ["[model] method"]),
    "nuclear relaxation": ('[[molecule]]\nname = "w"\nsmiles = "O"\n',
                           ["[response] nuclear_relaxation = true", "clamped-nucleus"]),
    "zero point": ('[[molecule]]\nname = "w"\nsmiles = "O"\n',
                   ["[response] zero_point = true", "one geometry per molecule"]),
}


@pytest.mark.parametrize("case", list(BAD_SETS))
def test_a_bad_set_is_one_line_exit_2_and_nothing_is_written(tmp_path, capsys, case):
    molecules, words = BAD_SETS[case]
    shared = SHARED.replace('"hf"', '"hartree"') if case == "bad model" else SHARED
    if case == "nuclear relaxation":
        shared += "nuclear_relaxation = true\n"  # in [response], the last table
    if case == "zero point":
        shared += "zero_point = true\n"
    path = write_set(tmp_path, molecules, shared)
    before = set(tmp_path.iterdir())
    result = main(["screen", str(path), "--csv", str(tmp_path / "out.csv")])
    one_line(capsys, 2, result, "set.toml", *words)
    assert set(tmp_path.iterdir()) == before  # no store, no results, no CSV


THREE = """
[[molecule]]
name = "water"
smiles = "O"
[[molecule]]
name = "formaldehyde"
smiles = "C=O"
[[molecule]]
name = "hydrogen-fluoride"
geometry = \"\"\"
F 0 0 0
H 0 0 0.92
\"\"\"
"""


@pytest.fixture(scope="module")
def three(tmp_path_factory):
    folder = tmp_path_factory.mktemp("screen")
    path = write_set(folder, THREE)
    done = subprocess.run([sys.executable, "-m", "fieldprop", "screen", str(path), "--csv",
                           str(folder / "ranked.csv"), "--units", "esu", "--workers", "2"],
                          capture_output=True, text=True, timeout=600)
    return folder, done


def test_three_molecules_give_a_ranked_csv_in_the_units_asked(three):
    folder, done = three
    assert done.returncode == 0, done.stderr
    rows = list(csv.DictReader(io.StringIO((folder / "ranked.csv").read_text())))
    assert [r["rank"] for r in rows] == ["1", "2", "3"]
    header = list(rows[0])
    assert header[:3] == ["rank", "name", "formula"]
    for column in ("dipole_norm_debye", "dipole_norm_error_debye", "alpha_iso_angstrom3",
                   "alpha_iso_error_angstrom3", "beta_hrs_1e-30_esu", "beta_hrs_error_1e-30_esu",
                   "status", "model", "convention", "bars_clear_of_next", "reason", "caution"):
        assert column in header, column
    assert {r["convention"] for r in rows} == {"taylor"}
    assert {r["name"] for r in rows} == {"water", "formaldehyde", "hydrogen-fluoride"}
    # Best first by |beta_hrs| (the default key with beta computed).
    values = [float(r["beta_hrs_1e-30_esu"]) for r in rows]
    assert values == sorted(values, reverse=True)
    assert all(r["status"] == "ok" and r["model"] == "HF/sto-3g" for r in rows)
    # Every molecule has its result file, as run writes it; the CSV carries its
    # numbers converted (esu: angstrom^3 for alpha, by scipy.constants' CODATA).
    from fieldprop.numerics.units import ALPHA_AU_TO_ANGSTROM3

    for r in rows:
        doc = json.loads((folder / "set.results" / f"{r['name']}.result.json").read_text())
        alpha = doc["invariants"]["alpha_iso"]["value"]
        assert float(r["alpha_iso_angstrom3"]) == pytest.approx(alpha * ALPHA_AU_TO_ANGSTROM3,
                                                                rel=1e-14)
    assert (folder / "set.summary.png").stat().st_size > 1000
    assert "3 done, 0 failed" in done.stderr


def test_each_alpha_iso_agrees_with_an_analytic_cphf_polarizability(three):
    """alpha_iso of each molecule against an independent CPHF solve
    (tests/physics/analytic_reference.py) at the geometry its result file holds."""
    from analytic_reference import cphf_polarizability
    from pyscf import gto, scf

    folder, done = three
    assert done.returncode == 0, done.stderr
    for name in ("water", "formaldehyde", "hydrogen-fluoride"):
        doc = json.loads((folder / "set.results" / f"{name}.result.json").read_text())
        atoms = doc["job"]["derived"]["molecule"]["atoms"]
        mol = gto.M(atom=[(a["symbol"], a["coords_bohr"]) for a in atoms], unit="Bohr",
                    basis="sto-3g", verbose=0)
        mf = scf.RHF(mol)
        mf.conv_tol, mf.conv_tol_grad = 1e-12, 1e-10
        mf.kernel()
        reference = float(np.trace(cphf_polarizability(mf, doc["origin_bohr"]))) / 3.0
        found = doc["invariants"]["alpha_iso"]
        assert abs(found["value"] - reference) <= 3 * found["error"] + 1e-6 * reference, name


def test_a_failed_molecule_is_named_and_the_others_are_kept(tmp_path):
    # PySCF's 6-31G stops at krypton: the iodide fails, not the set.
    path = write_set(tmp_path, '[[molecule]]\nname = "water"\nsmiles = "O"\n'
                     '[[molecule]]\nname = "hydrogen-iodide"\ngeometry = """\nI 0 0 0\n'
                     'H 0 0 1.61\n"""\n', SHARED.replace('"sto-3g"', '"6-31g"'))
    done = subprocess.run([sys.executable, "-m", "fieldprop", "screen", str(path), "--csv",
                           str(tmp_path / "ranked.csv"), "--workers", "2"],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 1, done.stderr
    last = done.stderr.strip().splitlines()[-1]
    assert "hydrogen-iodide (failed)" in last and "Traceback" not in done.stderr
    rows = {r["name"]: r for r in csv.DictReader(io.StringIO(
        (tmp_path / "ranked.csv").read_text()))}
    assert rows["water"]["status"] == "ok" and rows["water"]["rank"] == "1"
    assert rows["hydrogen-iodide"]["status"] == "failed"
    assert "basis" in rows["hydrogen-iodide"]["reason"] and rows["hydrogen-iodide"]["rank"] == ""
    assert (tmp_path / "set.results" / "water.result.json").exists()
    assert not (tmp_path / "set.results" / "hydrogen-iodide.result.json").exists()


def test_a_smiles_structure_is_the_same_on_every_run(tmp_path):
    # Two separate processes: nothing of RDKit's state is shared.
    code = ("from fieldprop.inputs.structures import from_smiles; import json; "
            "s = from_smiles('Nc1ccc(cc1)[N+](=O)[O-]'); "
            "print(json.dumps([s.symbols, s.coords_angstrom]))")
    runs = [json.loads(subprocess.run([sys.executable, "-c", code], capture_output=True,
                                      text=True, check=True).stdout) for _ in range(2)]
    assert runs[0][0] == runs[1][0] and len(runs[0][0]) == 16
    assert np.abs(np.array(runs[0][1]) - np.array(runs[1][1])).max() < 1e-6


def _stored_points(path: Path) -> int:
    if not path.exists():
        return 0
    try:
        with sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5) as db:
            return db.execute("SELECT COUNT(*) FROM points").fetchone()[0]
    except sqlite3.OperationalError:
        return 0


def test_a_killed_campaign_resumes_without_recomputing_finished_points(tmp_path):
    path = write_set(tmp_path, THREE, SHARED.replace('"sto-3g"', '"6-31g"').replace(
        '["dipole", "alpha", "beta"]', '["dipole", "alpha", "beta", "gamma"]'))
    store = tmp_path / "fieldprop-points.sqlite"
    proc = subprocess.Popen([sys.executable, "-m", "fieldprop", "screen", str(path),
                             "--workers", "2"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    deadline = time.monotonic() + 300
    while _stored_points(store) < 20 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    assert proc.poll() is None, "the campaign ended before it could be stopped"
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 143, err
    kept = _stored_points(store)
    assert kept >= 20
    done = subprocess.run([sys.executable, "-m", "fieldprop", "screen", str(path),
                           "--workers", "2"], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    closing = next(line for line in done.stderr.splitlines() if "field points computed" in line)
    computed = int(closing.split("field points computed")[0].split()[-1])
    reused = int(closing.split("computed, ")[1].split()[0])
    assert reused == kept  # every point stored before the kill was reused
    assert computed + reused == _stored_points(store)


def test_the_example_set_is_a_valid_set():
    from fieldprop.inputs.campaign import load_set

    path = Path(__file__).resolve().parents[2] / "configs" / "chromophores.toml"
    campaign = load_set(path)
    assert [c.name for c in campaign.candidates] == ["aminopropenal", "aminoacrylonitrile",
                                                     "nitroethenamine", "propenal"]
    assert all(c.job.geometry.optimize and c.job.molecule.charge == 0
               and c.job.molecule.source.startswith("smiles ") for c in campaign.candidates)


def test_a_campaign_optimises_each_geometry_once(tmp_path):
    """[geometry] optimise in a set: each molecule optimised in the pool, its
    XYZ written beside its result, and a rerun takes the geometries from the
    store (none optimised again, no point computed again)."""
    path = write_set(tmp_path, '[[molecule]]\nname = "water"\nsmiles = "O"\n'
                     '[[molecule]]\nname = "hydrogen-fluoride"\nsmiles = "F"\n',
                     SHARED + "[geometry]\noptimize = true\n")
    command = [sys.executable, "-m", "fieldprop", "screen", str(path), "--workers", "2"]
    first = subprocess.run(command, capture_output=True, text=True, timeout=600)
    assert first.returncode == 0, first.stderr
    assert "optimising 2 geometries" in first.stderr
    for name in ("water", "hydrogen-fluoride"):
        doc = json.loads((tmp_path / "set.results" / f"{name}.result.json").read_text())
        opt = doc["job"]["derived"]["optimisation"]
        assert opt["criteria"] == "fine" and opt["largest_gradient_au"] < 2e-5
        xyz = (tmp_path / "set.results" / f"{name}.optimised.xyz").read_text().splitlines()
        assert int(xyz[0]) == len(doc["job"]["derived"]["molecule"]["atoms"])
    again = subprocess.run(command, capture_output=True, text=True, timeout=600)
    assert again.returncode == 0, again.stderr
    assert "optimising" not in again.stderr and " 0 field points computed" in again.stderr


CONFORMER_SET = """
[[molecule]]
name = "aminobutadiene"
smiles = "C=CC=CN"
[model]
method = "hf"
basis = "sto-3g"
[response]
properties = ["dipole", "alpha"]
[geometry]
optimise = true
[conformers]
keep = 3
"""


def test_a_flexible_molecule_is_ranked_by_its_conformer_ensemble(tmp_path):
    # 1-amino-1,3-butadiene: s-trans and s-cis about its single bond.
    path = tmp_path / "set.toml"
    path.write_text(CONFORMER_SET)
    assert main(["screen", str(path), "--workers", "2", "--quiet",
                 "--csv", str(tmp_path / "ranked.csv")]) == 0
    doc = json.loads((tmp_path / "set.results" / "aminobutadiene.ensemble.json").read_text())
    conformers = doc["conformers"]
    assert len(conformers) >= 2
    assert sum(c["weight"] for c in conformers) == pytest.approx(1.0, abs=1e-12)
    # Boltzmann at 298.15 K from the model's energies: the lowest weighs most.
    lowest = min(conformers, key=lambda c: c["energy_au"])
    assert lowest["weight"] == max(c["weight"] for c in conformers)
    values = [json.loads((tmp_path / "set.results" / c["result"]).read_text())
              ["invariants"]["alpha_iso"]["value"] for c in conformers]
    ensemble = doc["invariants"]["alpha_iso"]
    assert min(values) <= ensemble["value"] <= max(values)
    assert ensemble["value"] == pytest.approx(sum(c["weight"] * v
                                                  for c, v in zip(conformers, values)))
    with open(tmp_path / "ranked.csv") as fh:
        row = next(csv.DictReader(fh))
    assert row["name"] == "aminobutadiene" and row["conformers"].startswith(f"{len(values)} of")
    assert float(row["alpha_iso_au"]) == pytest.approx(ensemble["value"])


def test_conformers_are_the_same_in_every_process():
    code = ("from fieldprop.inputs.structures import conformers_from_smiles, ConformerOptions; "
            "import json; c = conformers_from_smiles('NC=CC=CC=O', ConformerOptions(keep=4)); "
            "print(json.dumps([[s.coords_angstrom, e] for s, e in c]))")
    runs = [json.loads(subprocess.run([sys.executable, "-c", code], capture_output=True,
                                      text=True, check=True).stdout) for _ in range(2)]
    assert len(runs[0]) >= 2 and runs[0] == runs[1]


@pytest.mark.parametrize("table, words", [
    ("[conformers]\nkeep = 1\n", ["[conformers] keep must be an integer from 2 to 20"]),
    ("[conformers]\nseed = 3\n", ["[conformers] unknown key 'seed'"]),
])
def test_a_bad_conformer_table_is_one_line(tmp_path, capsys, table, words):
    path = tmp_path / "set.toml"
    path.write_text(CONFORMER_SET.split("[conformers]")[0] + table)
    assert main(["screen", str(path)]) == 2
    one_line(capsys, 2, 2, "set.toml", *words)


def test_conformers_need_optimised_geometries(tmp_path, capsys):
    path = tmp_path / "set.toml"
    path.write_text(CONFORMER_SET.replace("[geometry]\noptimise = true\n", ""))
    result = main(["screen", str(path)])
    one_line(capsys, 2, result, "set.toml", "[conformers] needs [geometry] optimise = true")
