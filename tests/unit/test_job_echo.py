"""The job echo of the result JSON (``Job.to_dict``, the result's ``"job"``)
speaks the job file's language: its sections hold the job file's own keys,
every default filled in, and a job file written from them (without
``"derived"``) loads as the same job, its geometry bit for bit in bohr. What was
worked out and is no input sits under ``"derived"``.

The jobs cover the automatic window (HF), a given field with every [scf] key
and density fitting (DFT), [correlation] keys with a per-element basis (CCSD),
a geometry optimisation at another model, an ion in an .xyz file with an
explicit origin in angstrom and a named bohr, and a dipole alone at the full
window with a bohr given as a number. No PySCF.
"""

from __future__ import annotations

import dataclasses
import json
import struct
import textwrap

import pytest
from toml_text import toml_document

from fieldprop.engine.geometry import with_geometry
from fieldprop.inputs.job import _SECTIONS, Job, load_job

WATER = """
O   0.000000  0.000000  0.117300
H   0.000000  0.757200 -0.469200
H   0.000000 -0.757200 -0.469200
"""

JOBS = {
    "hf automatic window": f'''
        [molecule]
        geometry = """{WATER}"""
        [model]
        method = "hf"
        basis = "aug-cc-pvdz"
        [response]
        properties = ["dipole", "alpha", "beta"]
        ''',
    "dft given field, scf keys": f'''
        [molecule]
        geometry = """{WATER}"""
        allow_close_atoms = true
        [model]
        method = "dft"
        functional = "b3lyp"
        basis = "6-31g*"
        cartesian = true
        density_fit = true
        [response]
        properties = ["alpha", "gamma"]
        field_au = 0.0015
        ratio = 1.5
        levels = 4
        origin = "centre-of-mass"
        differentiate = "energy"
        symmetry = false
        [scf]
        energy_conv_tol_au = 3e-13
        max_iterations = 321
        grid_level = 4
        gradient_target = 2e-11
        gradient_needed = 7e-9
        solver = "diis"
        scaled_target = false
        ''',
    "ccsd correlation keys": f'''
        [molecule]
        geometry = """{WATER}"""
        [model]
        method = "ccsd"
        basis = {{O = "cc-pvdz", H = """H    S
      1.0   1.0
"""}}
        frozen_core = false
        [response]
        properties = ["alpha"]
        field_au = 0.002
        [correlation]
        energy_change_au = 1e-13
        amplitude_change = 1e-9
        ''',
    "geometry optimisation": f'''
        [molecule]
        geometry = """{WATER}"""
        units = "angstrom"
        [model]
        method = "mp2"
        basis = "cc-pvdz"
        density_fit = false
        [response]
        properties = ["dipole", "alpha"]
        [geometry]
        optimise = true
        method = "dft"
        functional = "pbe0"
        basis = "def2-svp"
        criteria = "coarse"
        max_steps = 42
        ''',
    "ion from xyz with an explicit origin": '''
        [molecule]
        xyz = "ion.xyz"
        charge = 1
        multiplicity = 2
        bohr_angstrom = "scipy"
        [model]
        method = "hf"
        basis = "sto-3g"
        reference = "unrestricted"
        [response]
        properties = ["dipole", "alpha"]
        origin = [0.1, -0.2, 0.30000000000000004]
        symmetry = "symmetrise"
        nuclear_relaxation = true
        ''',
    "dipole alone, full window, bohr as a number": f'''
        [molecule]
        geometry = """{WATER}"""
        bohr_angstrom = 0.52917721067
        [model]
        method = "hf"
        basis = "sto-3g"
        reference = "auto"
        [response]
        properties = ["dipole"]
        window = "full"
        ''',
}

ION_XYZ = """3
water cation, a comment line
O   0.000000  0.000000  0.117300
H   0.000000  0.757200 -0.469200
H   0.000000 -0.757200 -0.469200
"""


def _load(tmp_path, name) -> Job:
    (tmp_path / "ion.xyz").write_text(ION_XYZ)
    path = tmp_path / "job.toml"
    path.write_text(textwrap.dedent(JOBS[name]))
    return load_job(path)


def _rebuilt(tmp_path, echo: dict) -> Job:
    sections = {k: v for k, v in json.loads(json.dumps(echo, allow_nan=False)).items()
                if k != "derived"}
    path = tmp_path / "rebuilt.toml"
    path.write_text(toml_document(sections))
    return load_job(path)


def _bits(job: Job) -> list[bytes]:
    return [struct.pack("<3d", *a.coords_bohr) for a in job.molecule.atoms]


@pytest.mark.parametrize("name", sorted(JOBS))
def test_a_job_file_written_from_the_echo_loads_as_the_same_job(tmp_path, name):
    job = _load(tmp_path, name)
    echo = job.to_dict()
    rebuilt = _rebuilt(tmp_path, echo)
    # The echo gives the geometry in bohr; what the job file said is derived.
    expected = dataclasses.replace(
        job, path=rebuilt.path,
        molecule=dataclasses.replace(job.molecule, units="bohr", source="inline"))
    assert rebuilt == expected
    assert _bits(rebuilt) == _bits(job)
    assert echo["molecule"]["units"] == "bohr"
    assert echo["derived"]["molecule"]["units"] == job.molecule.units
    assert echo["derived"]["molecule"]["source"] == job.molecule.source
    assert echo["derived"]["path"] == job.path


@pytest.mark.parametrize("name", sorted(JOBS))
def test_the_echo_s_sections_hold_only_job_file_keys(tmp_path, name):
    echo = _load(tmp_path, name).to_dict()
    for section, table in echo.items():
        if section == "derived":
            continue
        assert section in _SECTIONS
        assert set(table) <= _SECTIONS[section] - {"route", "xyz"}, section


def test_what_is_derived_is_under_derived(tmp_path):
    job = _load(tmp_path, "hf automatic window")
    echo = job.to_dict()
    assert "field_au" not in echo["response"] and "window" in echo["response"]
    derived = echo["derived"]
    assert derived["response"] == {"field_au": job.response.field_au,
                                   "field_au_source": "automatic window",
                                   "window": "adaptive"}
    assert derived["scf"] == {"gradient_accepted": job.scf.gradient_accepted,
                              "target_power": job.scf.target_power,
                              "target_step_au": job.scf.target_step_au}
    assert job.scf.target_power == 2 and job.scf.target_step_au == job.response.field_au
    assert derived["molecule"]["bohr_source"] == "backend"
    assert derived["molecule"]["atoms"] == [
        {"symbol": a.symbol, "coords_bohr": list(a.coords_bohr)} for a in job.molecule.atoms]
    assert derived["geometry"] == {"thresholds": job.geometry.thresholds()}
    assert derived["optimisation"] is None and derived["relaxation"] is None
    fixed = _load(tmp_path, "dft given field, scf keys").to_dict()
    assert "window" not in fixed["response"] and fixed["response"]["field_au"] == 0.0015
    assert fixed["derived"]["response"]["window"] == "fixed"
    assert fixed["scf"]["gradient_target"] == 2e-11
    assert fixed["response"]["differentiate"] == "energy"
    assert fixed["model"]["density_fit"] is True


def test_an_optimised_job_echoes_its_starting_geometry_and_derives_the_optimum(tmp_path):
    job = _load(tmp_path, "geometry optimisation")
    optimum = [[0.0, 0.0, 0.2], [0.0, 1.43, -0.9], [0.0, -1.43, -0.9]]
    document = {"coords_bohr": optimum, "energy_au": -76.0, "steps": 5}
    done = with_geometry(job, document)
    echo = done.to_dict()
    assert [a["coords_bohr"] for a in echo["derived"]["molecule"]["atoms"]] == optimum
    # The document as used: moved onto the point group of the start (here
    # already on it), which the echo records.
    assert echo["derived"]["optimisation"] == {
        **document, "symmetrised": {"group": "C2v, 4 operations", "moved_bohr": 0.0}}
    rebuilt = _rebuilt(tmp_path, echo)
    assert _bits(rebuilt) == _bits(job)  # the start, which the optimisation begins from
    assert rebuilt.geometry == job.geometry and rebuilt.geometry.optimize


def test_the_nuclei_of_an_echo_are_read_from_either_layout(tmp_path):
    from fieldprop.outputs.compare import _json_geometry
    from fieldprop.inputs.job import echo_atoms

    job = _load(tmp_path, "hf automatic window")
    echo = job.to_dict()
    atoms = echo["derived"]["molecule"]["atoms"]
    assert echo_atoms(echo) == atoms
    # A result written before the echo took the job file's keys.
    assert echo_atoms({"molecule": {"atoms": atoms}}) == atoms
    assert echo_atoms({"molecule": {}, "derived": []}) is None
    symbols, coords = _json_geometry("ref.json", {"job": echo})
    assert symbols == ["O", "H", "H"]
    assert coords.tolist() == [list(a.coords_bohr) for a in job.molecule.atoms]
