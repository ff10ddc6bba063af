"""A catalogue of bad job files and arguments, each run through ``fieldprop run``.

Contract (CONTRACT.md, exit codes): bad input exits 2 with ONE line on stderr,
``fieldprop: error: ...``, naming the file and the key, no traceback, and nothing
written (a result file already there stays byte-identical).

Every case runs in-process through :func:`fieldprop.cli.main` (fast); a subset
also runs as a real ``python -m fieldprop`` process, which is where a traceback,
a library warning or a stray print would actually reach the user. The point
evaluator is replaced by a tripwire, so a case that got as far as an SCF fails.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from fieldprop.cli import main

# --------------------------------------------------------------------------- job text

H2 = "H 0 0 0\nH 0 0 0.74"
BASE = {
    "molecule": {"geometry": None},  # filled by geometry=
    "model": {"method": '"hf"', "basis": '"sto-3g"'},
    "response": {"properties": '["alpha"]'},
}


def geom(text: str) -> str:
    """A TOML multi-line basic string holding ``text`` (the first newline is trimmed)."""
    return '"""\n' + text + '\n"""'


def job(geometry: str | None = H2, drop: tuple[str, ...] = (), before: str = "",
        after: str = "", **sections: dict[str, str | None]) -> str:
    """The valid H2/HF/STO-3G alpha job with keys replaced (value None deletes a key).

    Values are raw TOML text. ``drop`` removes whole sections; ``before`` and
    ``after`` add raw text around the document.
    """
    doc = {name: dict(keys) for name, keys in BASE.items()}
    doc["molecule"]["geometry"] = geom(geometry) if geometry is not None else None
    for name, keys in sections.items():
        doc.setdefault(name, {}).update(keys)
    lines = [before] if before else []
    for name, keys in doc.items():
        if name in drop:
            continue
        lines.append(f"[{name}]")
        lines += [f"{k} = {v}" for k, v in keys.items() if v is not None]
        lines.append("")
    return "\n".join(lines) + after


#: Markers in a case's ``files``: a name ending in "/" is made a directory.
DIR = None
MISSING = object()  # job text: the job file is not created
JOB_IS_DIR = object()  # job text: job.toml is a directory
PREVIOUS = b'{"schema": "fieldprop-result-1", "note": "an earlier result"}\n'

XYZ_JOB = job(geometry=None, molecule={"xyz": '"mol.xyz"'})
#: Water (angstrom, our geometry) for the unit-mistake case.
WATER_ANGSTROM_LINES = "O 0 0 0.1173\nH 0 0.7572 -0.4692\nH 0 -0.7572 -0.4692"
OH = "O 0 0 0\nH 0 0 0.97"
DFT = {"method": '"dft"', "functional": '"b3lyp"', "basis": '"sto-3g"'}

# (case id, job text, extra files, expected substrings, extra argv)
# "{job}" is the job path as given on the command line, "{dir}" its folder.
CASES = [
    # [molecule] geometry
    ("unknown_element", job("Xx 0 0 0\nH 0 0 0.74"), {},
     ["{job}: [molecule] geometry", "line 1", "unknown element 'Xx'"], []),
    ("overlapping_atoms", job("H 0 0 0\nH 0 0 0.1"), {},
     ["{job}: [molecule] geometry", "atoms 1 (H) and 2 (H)", "overlap"], []),
    ("empty_geometry", job(molecule={"geometry": '""'}), {},
     ["{job}: [molecule] geometry", "empty"], []),
    ("blank_geometry", job("   \n\t\n"), {},
     ["{job}: [molecule] geometry", "empty"], []),
    ("nan_coordinate", job("H 0 0 0\nH 0 0 nan"), {},
     ["{job}: [molecule] geometry", "line 2", "finite"], []),
    ("inf_coordinate", job("H inf 0 0\nH 0 0 0.74"), {},
     ["{job}: [molecule] geometry", "line 1", "finite"], []),
    ("huge_coordinate", job("H 1e308 0 0\nH -1e308 0 0"), {},
     ["{job}: [molecule] geometry", "line 1", "bohr"], []),
    ("text_coordinate", job("H 0 0 0\nH 0 0 zero"), {},
     ["{job}: [molecule] geometry", "line 2", "must be numbers", "zero"], []),
    ("wrong_column_count_inline", job("H 0 0\nH 0 0 0.74"), {},
     ["{job}: [molecule] geometry", "line 1 has 3 columns, expected 4"], []),
    ("geometry_not_string", job(molecule={"geometry": "42"}), {},
     ["{job}: [molecule] geometry", "must be a string"], []),
    ("geometry_missing", job(molecule={"geometry": None}), {},
     ["{job}: [molecule] geometry is missing", "xyz"], []),
    ("geometry_and_xyz", job(molecule={"xyz": '"mol.xyz"'}),
     {"mol.xyz": "2\n\nH 0 0 0\nH 0 0 0.74\n"},
     ["{job}: [molecule] geometry and xyz are both given"], []),
    # [molecule] xyz
    ("xyz_wrong_column_count", XYZ_JOB, {"mol.xyz": "2\nwater?\nH 0 0 0 0\nH 0 0 0.74\n"},
     ["{dir}/mol.xyz", "line 3 has 5 columns"], []),
    ("xyz_count_disagrees", XYZ_JOB, {"mol.xyz": "3\ncomment\nH 0 0 0\nH 0 0 0.74\n"},
     ["{dir}/mol.xyz", "line 1 says 3 atoms but 2"], []),
    ("xyz_count_not_a_number", XYZ_JOB, {"mol.xyz": "two\ncomment\nH 0 0 0\nH 0 0 0.74\n"},
     ["{dir}/mol.xyz", "line 1 must be the atom count", "'two'"], []),
    ("xyz_empty_file", XYZ_JOB, {"mol.xyz": ""},
     ["{dir}/mol.xyz", "empty .xyz file"], []),
    ("xyz_unknown_element", XYZ_JOB, {"mol.xyz": "2\n\nH 0 0 0\nQq 0 0 0.74\n"},
     ["{dir}/mol.xyz", "line 4", "unknown element 'Qq'"], []),
    ("xyz_missing", XYZ_JOB, {},
     ["{job}: [molecule] xyz", "'mol.xyz' not found"], []),
    ("xyz_is_directory", XYZ_JOB, {"mol.xyz/": DIR},
     ["{job}: [molecule] xyz", "'mol.xyz' is a directory"], []),
    ("xyz_not_utf8", XYZ_JOB, {"mol.xyz": b"2\n\xff\xfe\nH 0 0 0\nH 0 0 0.74\n"},
     ["{job}: [molecule] xyz", "'mol.xyz' is not UTF-8"], []),
    # [molecule] units, charge, multiplicity
    # (water in angstrom declared as bohr: O-H 0.958 bohr, 0.52 of the O-H bond length)
    ("angstrom_read_as_bohr",
     job(WATER_ANGSTROM_LINES, molecule={"units": '"bohr"'}), {},
     ['{job}: [molecule] units = "bohr"', "atoms 1 (O) and 2 (H)", "0.958 bohr apart",
      "were the coordinates in angstrom?", "allow_close_atoms"], []),
    ("allow_close_atoms_not_bool", job(molecule={"allow_close_atoms": '"yes"'}), {},
     ["{job}: [molecule] allow_close_atoms must be true or false", "'yes'"], []),
    ("units_unknown", job(molecule={"units": '"nm"'}), {},
     ["{job}: [molecule] units", "angstrom, bohr", "'nm'"], []),
    ("multiplicity_impossible", job(molecule={"multiplicity": "2"}), {},
     ["{job}: [molecule] multiplicity = 2 is impossible with 2 electrons", "valid: 1, 3"], []),
    ("multiplicity_zero", job(molecule={"multiplicity": "0"}), {},
     ["{job}: [molecule] multiplicity must be >= 1, got 0"], []),
    ("multiplicity_text", job(molecule={"multiplicity": '"singlet"'}), {},
     ["{job}: [molecule] multiplicity must be an integer", "'singlet'"], []),
    ("charge_leaves_no_electrons", job(molecule={"charge": "2"}), {},
     ["{job}: [molecule] charge = 2 leaves 0 electrons"], []),
    ("charge_not_integer", job(molecule={"charge": "0.5"}), {},
     ["{job}: [molecule] charge must be an integer", "0.5"], []),
    # [model]: PySCF judges basis and functional, still before any SCF
    ("unknown_basis", job(model={"basis": '"no-such-basis"'}), {},
     ["{job}: [model] basis 'no-such-basis'", "not available"], []),
    ("density_fit_unknown_basis", job(model={"density_fit": '"no-such-fit"'}), {},
     ["{job}: [model] density_fit 'no-such-fit'", "not an auxiliary basis"], []),
    ("density_fit_not_a_name", job(model={"density_fit": "3"}), {},
     ["{job}: [model] density_fit must be true, false or an auxiliary basis name"], []),
    ("density_fit_for_a_correlated_method", job(model={"method": '"mp2"',
                                                       "density_fit": "true"}), {},
     ["{job}: [model] density_fit applies to hf and dft", "not to mp2"], []),
    ("basis_missing_element", job("Au 0 0 0\nH 0 0 1.52", model={"basis": '"6-31g"'}), {},
     ["{job}: [model] basis '6-31g'", "Au"], []),
    ("basis_table_missing_element",
     job("Li 0 0 0\nH 0 0 1.6", model={"basis": '{H = "sto-3g"}'}), {},
     ["{job}: [model] basis", "no basis given for Li"], []),
    ("basis_text_negative_exponent", job(model={"basis": '{H = """\nH S\n  -1.0  1.0\n"""}'}),
     {}, ["{job}: [model] basis", "exponents must be > 0"], []),
    ("basis_text_garbage", job(model={"basis": '{H = """\nH S\n  one two\n"""}'}), {},
     ["{job}: [model] basis", "not available"], []),
    ("basis_table_unknown_element", job(model={"basis": '{H = "sto-3g", Xx = "sto-3g"}'}), {},
     ["{job}: [model] basis", "unknown element 'Xx'"], []),
    ("basis_table_empty", job(model={"basis": "{}"}), {},
     ["{job}: [model] basis", "empty"], []),
    ("basis_missing", job(model={"basis": None}), {},
     ["{job}: [model] basis is missing"], []),
    ("basis_not_string", job(model={"basis": "3"}), {},
     ["{job}: [model] basis must be a string"], []),
    ("unknown_functional", job(model={**DFT, "functional": '"no-such-xc"'}), {},
     ["{job}: [model] functional 'no-such-xc'", "libxc"], []),
    ("dft_without_functional", job(model={**DFT, "functional": None}), {},
     ["{job}: [model] functional is missing", "dft"], []),
    ("functional_with_hf", job(model={"functional": '"b3lyp"'}), {},
     ["{job}: [model] functional is given but method = 'hf'"], []),
    ("unknown_method", job(model={"method": '"casscf"'}), {},
     ["{job}: [model] method must be one of hf, dft, mp2", "'casscf'"], []),
    ("method_missing", job(model={"method": None}), {},
     ["{job}: [model] method is missing", "hf, dft"], []),
    ("reference_unknown", job(model={"reference": '"rohf"'}), {},
     ["{job}: [model] reference must be one of", "'rohf'"], []),
    ("restricted_open_shell_mp2",
     job(OH, molecule={"multiplicity": "2"},
         model={"method": '"mp2"', "reference": '"restricted"'}), {},
     ["{job}: [model] reference = \"restricted\" with multiplicity 2", "unrestricted"], []),
    # [response]
    ("unknown_property", job(response={"properties": '["alpha", "polarizability"]'}), {},
     ["{job}: [response] properties", "unknown property 'polarizability'",
      "dipole, alpha, beta, gamma"], []),
    ("empty_properties", job(response={"properties": "[]"}), {},
     ["{job}: [response] properties must be a non-empty list"], []),
    ("properties_not_a_list", job(response={"properties": '"alpha"'}), {},
     ["{job}: [response] properties must be a non-empty list", "'alpha'"], []),
    ("properties_not_strings", job(response={"properties": "[2, 3]"}), {},
     ["{job}: [response] properties must be a non-empty list"], []),
    ("properties_missing", job(response={"properties": None, "levels": "3"}), {},
     ["{job}: [response] properties is missing"], []),
    ("zero_field", job(response={"field_au": "0.0"}), {},
     ["{job}: [response] field_au must be > 0"], []),
    ("negative_field", job(response={"field_au": "-0.001"}), {},
     ["{job}: [response] field_au must be > 0, got -0.001"], []),
    ("field_too_strong", job(response={"field_au": "0.5"}), {},
     ["{job}: [response] field_au = 0.5"], []),
    ("field_not_a_number", job(response={"field_au": '"small"'}), {},
     ["{job}: [response] field_au must be a number", "'small'"], []),
    ("field_nan", job(response={"field_au": "nan"}), {},
     ["{job}: [response] field_au must be finite"], []),
    ("ratio_one", job(response={"ratio": "1.0"}), {},
     ["{job}: [response] ratio must be > 1"], []),
    ("ratio_below_one", job(response={"ratio": "0.5"}), {},
     ["{job}: [response] ratio must be > 1", "got 0.5"], []),
    ("ratio_not_a_number", job(response={"ratio": '"two"'}), {},
     ["{job}: [response] ratio must be a number", "'two'"], []),
    ("ratio_too_large", job(response={"ratio": "20"}), {},
     ["{job}: [response] ratio = 20"], []),
    ("levels_zero", job(response={"levels": "0"}), {},
     ["{job}: [response] levels must be >= 1, got 0"], []),
    ("levels_too_large", job(response={"levels": "9"}), {},
     ["{job}: [response] levels = 9", "2 to 6"], []),
    ("levels_beyond_what_the_order_needs",
     job(response={"properties": '["dipole"]', "differentiate": '"dipole"', "levels": "3"}), {},
     ["{job}: [response] levels = 3 is more than the order needs"], []),
    ("levels_not_integer", job(response={"levels": "3.0"}), {},
     ["{job}: [response] levels must be an integer"], []),
    ("ladder_too_strong", job(response={"field_au": "0.01", "ratio": "4", "levels": "4"}), {},
     ["{job}: [response] levels = 4", "lower one of them"], []),
    ("origin_wrong_length", job(response={"origin": "[0.0, 0.0]"}), {},
     ["{job}: [response] origin must have 3 coordinates", "got 2"], []),
    ("origin_text_coordinates", job(response={"origin": '["a", "b", "c"]'}), {},
     ["{job}: [response] origin coordinates must be finite numbers"], []),
    ("origin_unknown_name", job(response={"origin": '"centre"'}), {},
     ["{job}: [response] origin must be one of nuclear-charge, centre-of-mass, zero", "'centre'"], []),
    ("origin_bool", job(response={"origin": "true"}), {},
     ["{job}: [response] origin must be", "True"], []),
    ("origin_huge", job(response={"origin": "[1e308, 0, 0]"}), {},
     ["{job}: [response] origin coordinates must lie within"], []),
    ("differentiate_unknown", job(response={"differentiate": '"numerical"'}), {},
     ["{job}: [response] differentiate must be one of auto, energy, dipole", "'numerical'"],
     []),
    ("differentiate_dipole_mp2",
     job(model={"method": '"mp2"'}, response={"differentiate": '"dipole"'}), {},
     ["{job}: [response] differentiate = \"dipole\"", "mp2"], []),
    ("route_and_differentiate",
     job(response={"differentiate": '"dipole"', "route": '"dipole"'}), {},
     ["{job}: [response] route and differentiate are both given"], []),
    ("index_symmetry_unknown", job(response={"index_symmetry": '"check"'}), {},
     ["{job}: [response] index_symmetry must be one of assume, test", "'check'"], []),
    ("index_symmetry_test_on_energy_route",
     job(response={"differentiate": '"energy"', "index_symmetry": '"test"'}), {},
     ["{job}: [response] index_symmetry = \"test\" computes every derivative"], []),
    ("nuclear_relaxation_without_gradient",
     job(model={"method": '"ccsd"'}, response={"nuclear_relaxation": "true"}), {},
     ["{job}: [response] nuclear_relaxation = true needs nuclear gradients", "ccsd has none"],
     []),
    ("nuclear_relaxation_text", job(response={"nuclear_relaxation": '"yes"'}), {},
     ["{job}: [response] nuclear_relaxation must be true or false"], []),
    ("zero_point_without_gradient",
     job(model={"method": '"ccsd"'}, response={"zero_point": "true"}), {},
     ["{job}: [response] zero_point = true needs nuclear gradients", "ccsd has none"], []),
    ("zero_point_text", job(response={"zero_point": "1"}), {},
     ["{job}: [response] zero_point must be true or false"], []),
    ("zero_point_of_an_atom", job(geometry="He 0 0 0", response={"zero_point": "true"}), {},
     ["{job}: [response] zero_point = true: an atom has no vibrations"], []),
    ("isotope_masses_not_an_atom", job(molecule={"isotope_masses": "{ 3 = 2.014 }"}), {},
     ["{job}: [molecule] isotope_masses key '3' is not an atom number (1 to 2"], []),
    ("isotope_masses_not_a_mass", job(molecule={"isotope_masses": '{ 1 = "D" }'}), {},
     ["{job}: [molecule] isotope_masses atom 1 (H): the mass must be a number of u"], []),
    ("isotope_masses_not_a_table", job(molecule={"isotope_masses": "2.014"}), {},
     ["{job}: [molecule] isotope_masses must be a table of atom number = mass in u"], []),
    ("optical_without_beta", job(response={"optical_wavelengths_nm": "[1064]"}), {},
     ["{job}: [response] optical_wavelengths_nm estimates beta", "add \"beta\""], []),
    ("optical_not_a_list", job(response={"optical_wavelengths_nm": "1064"}), {},
     ["{job}: [response] optical_wavelengths_nm must be a list of wavelengths in nm"], []),
    ("optical_out_of_range", job(response={"optical_wavelengths_nm": "[1.064]"}), {},
     ["{job}: [response] optical_wavelengths_nm 1.064 is not a wavelength between"], []),
    ("optical_mp2", job(model={"method": '"mp2"'}, response={
        "optical_wavelengths_nm": "[1064]", "properties": '["beta"]'}), {},
     ["{job}: [response] optical_wavelengths_nm needs the model's own excited states",
      "mp2 has none"], []),
    ("solvent_unknown", job(model={"solvent": '"seawater"'}), {},
     ["{job}: [model] solvent 'seawater' is not in the solvent table"], []),
    ("solvent_epsilon_below_one", job(model={"solvent": "{ epsilon = 0.5 }"}), {},
     ["{job}: [model] solvent as a table must be {{ epsilon = <static dielectric"], []),
    ("solvent_model_alone", job(model={"solvent_model": '"cpcm"'}), {},
     ["{job}: [model] solvent_model is given but there is no solvent"], []),
    ("solvent_model_unknown", job(model={"solvent": '"water"', "solvent_model": '"smd"'}),
     {}, ["{job}: [model] solvent_model must be one of iefpcm, cpcm"], []),
    ("solvent_mp2", job(model={"method": '"mp2"', "solvent": '"water"'}), {},
     ["{job}: [model] solvent applies to hf and dft", "mp2 has none yet"], []),
    ("solvent_zero_point", job(model={"solvent": '"water"'}, response={"zero_point": "true"}),
     {}, ["{job}: [model] solvent with [response] zero_point = true: not available yet"], []),
    # [scf]
    ("scf_grid_level_for_hf", job(scf={"grid_level": "3"}), {},
     ["{job}: [scf] grid_level applies to method = \"dft\" only"], []),
    ("scf_grid_level_too_high", job(model=DFT, scf={"grid_level": "12"}), {},
     ["{job}: [scf] grid_level must be 0..9"], []),
    ("scf_unknown_solver", job(scf={"solver": '"steepest"'}), {},
     ["{job}: [scf] solver must be one of newton, diis"], []),
    ("scf_gradient_target_too_small", job(scf={"gradient_target": "1e-20"}), {},
     ["{job}: [scf] gradient_target must lie in [1e-14, 1e-4]"], []),
    ("scf_gradient_needed_not_a_number", job(scf={"gradient_needed": '"tight"'}), {},
     ["{job}: [scf] gradient_needed must be a number"], []),
    ("scf_scaled_target_text", job(scf={"scaled_target": '"no"'}), {},
     ["{job}: [scf] scaled_target must be true or false"], []),
    ("scf_tolerance_out_of_range", job(scf={"energy_conv_tol_au": "1e-3"}), {},
     ["{job}: [scf] energy_conv_tol_au must lie in"], []),
    ("scf_max_iterations_too_small", job(scf={"max_iterations": "5"}), {},
     ["{job}: [scf] max_iterations must be >= 10"], []),
    ("scf_max_cycle_of_earlier_versions", job(scf={"max_cycle": "50"}), {},
     ["{job}: [scf] max_cycle is a name of earlier versions: it is max_iterations now"], []),
    ("geometry_optimise_spelt_twice",
     job(after='[geometry]\noptimise = true\noptimize = true\n'), {},
     ["{job}: [geometry] optimize and optimise are one key: give one of them"], []),
    ("geometry_criteria_of_earlier_versions",
     job(after='[geometry]\noptimize = true\ncriteria = "very-tight"\n'), {},
     ["{job}: [geometry] criteria = 'very-tight' is a name of earlier versions: use \"coarse\""],
     []),
    # [correlation]
    ("correlation_for_hf", job(correlation={"energy_change_au": "1e-12"}), {},
     ["{job}: [correlation] energy_change_au applies to the amplitude solvers (ccsd, "
      "ccsd(t)), not to method = 'hf'"], []),
    ("correlation_energy_change_too_small",
     job(model={"method": '"ccsd"'}, correlation={"energy_change_au": "1e-20"}), {},
     ["{job}: [correlation] energy_change_au must lie in [1e-15, 1e-5] Eh, got 1e-20"], []),
    ("correlation_amplitude_change_text",
     job(model={"method": '"ccsd"'}, correlation={"amplitude_change": '"tight"'}), {},
     ["{job}: [correlation] amplitude_change must be a number"], []),
    ("correlation_unknown_key", job(model={"method": '"ccsd(t)"'}, correlation={"conv_tol": "1"}),
     {}, ["{job}: [correlation] unknown key 'conv_tol'",
          "valid keys: amplitude_change, energy_change_au"], []),
    # structure of the document
    ("unknown_key_in_section", job(model={"basis_set": '"sto-3g"'}), {},
     ["{job}: [model] unknown key 'basis_set'",
      "valid keys: basis, cartesian, density_fit, frozen_core, functional, method, "
      "reference"], []),
    ("unknown_key_in_response", job(response={"field": "0.001"}), {},
     ["{job}: [response] unknown key 'field'", "valid keys:", "field_au", "ratio"], []),
    ("unknown_section", job(output={"format": '"json"'}), {},
     ["{job}: unknown section [output]", "[molecule], [model], [response], [geometry], [scf]"], []),
    ("section_not_a_table", job(before="scf = 5"), {},
     ["{job}: scf must be a [scf] table"], []),
    ("missing_model", job(drop=("model",)), {},
     ["{job}: section [model] is missing"], []),
    ("missing_molecule", job(drop=("molecule",)), {},
     ["{job}: section [molecule] is missing"], []),
    ("empty_job_file", "", {},
     ["{job}: section [molecule] is missing"], []),
    ("not_valid_toml", job(after="[response\nlevels = 3\n"), {},
     ["{job}: not valid TOML"], []),
    ("duplicate_key", job(after="[molecule]\ncharge = 1\n"), {},
     ["{job}: not valid TOML"], []),
    ("not_utf8", b"\xff\xfe[\x00m\x00o\x00l\x00]\x00", {},
     ["{job}: not UTF-8"], []),
    ("job_is_directory", JOB_IS_DIR, {},
     ["{job}: is a directory"], []),
    ("job_missing", MISSING, {},
     ["{job}: job file not found"], []),
    # command line
    ("result_folder_missing", job(), {},
     ["--json missing_dir/out.json", "'missing_dir' does not exist"],
     ["--json", "missing_dir/out.json"]),
    ("result_path_is_directory", job(), {"outdir/": DIR},
     ["--json outdir", "is a directory"], ["--json", "outdir"]),
    ("workers_zero", job(), {},
     ["fieldprop run: argument --workers", "must be >= 1, got 0"], ["--workers", "0"]),
    ("workers_not_a_number", job(), {},
     ["fieldprop run: argument --workers", "'many'"], ["--workers", "many"]),
    ("unknown_option", job(), {},
     ["fieldprop", "unrecognized arguments: --fast"], ["--fast"]),
    # a result file already there is left byte-identical ...
    ("existing_result_kept", job(response={"field_au": "-0.001"}), {"out.json": PREVIOUS},
     ["{job}: [response] field_au must be > 0"], []),
    # ... also when the error comes from PySCF, after the output path was checked
    ("existing_result_kept_basis", job(model={"basis": '"no-such-basis"'}),
     {"out.json": PREVIOUS}, ["{job}: [model] basis 'no-such-basis'"], []),
    # the default result path (JOB.result.json beside the job) is not written either
    ("default_result_not_written", job(model={**DFT, "functional": '"no-such-xc"'}), {},
     ["{job}: [model] functional 'no-such-xc'"], ["--no-json"]),
]

#: Cases also run as a real process: those where PySCF speaks, plus a spread.
SUBPROCESS_IDS = ["unknown_basis", "basis_missing_element", "unknown_functional",
                  "existing_result_kept_basis", "not_valid_toml", "not_utf8", "job_missing",
                  "basis_text_negative_exponent", "xyz_wrong_column_count", "result_folder_missing", "workers_zero",
                  "default_result_not_written", "correlation_for_hf"]

_IDS = [c[0] for c in CASES]
assert len(_IDS) == len(set(_IDS)), "case ids must be unique"
assert set(SUBPROCESS_IDS) <= set(_IDS)


# --------------------------------------------------------------------------- helpers

def _prepare(tmp_path: Path, text, files: dict) -> tuple[Path, list[str]]:
    """Write the job and extra files under ``tmp_path``; return the job path."""
    job_path = tmp_path / "job.toml"
    if text is JOB_IS_DIR:
        job_path.mkdir()
    elif text is not MISSING:
        if isinstance(text, bytes):
            job_path.write_bytes(text)
        else:
            job_path.write_text(text, encoding="utf-8")
    for name, content in files.items():
        target = tmp_path / name.rstrip("/")
        if name.endswith("/"):
            target.mkdir()
        elif isinstance(content, bytes):
            target.write_bytes(content)
        else:
            target.write_text(content, encoding="utf-8")
    return job_path


def _argv(job_path: Path, tmp_path: Path, extra: list[str]) -> list[str]:
    argv = ["run", str(job_path)]
    if "--no-json" in extra:  # default result path beside the job
        extra = [a for a in extra if a != "--no-json"]
    elif "--json" not in extra:
        argv += ["--json", str(tmp_path / "out.json")]
    return argv + extra


def _snapshot(root: Path) -> dict[str, bytes | None]:
    """Every path under ``root`` with its bytes (None for a directory)."""
    return {str(p.relative_to(root)): (None if p.is_dir() else p.read_bytes())
            for p in sorted(root.rglob("*"))}


def _check(rc: int, out: str, err: str, expected: list[str], job_path: Path,
           before: dict, after: dict) -> None:
    lines = err.splitlines()
    assert "Traceback" not in err and "Traceback" not in out, err
    assert rc == 2, f"exit code {rc}, stderr: {err!r}"
    assert len(lines) == 1, f"stderr must be one line, got {len(lines)}: {err!r}"
    line = lines[0]
    assert line.startswith("fieldprop: error: bad input: "), line
    for piece in expected:
        piece = piece.format(job=job_path, dir=job_path.parent)
        assert piece in line, f"{piece!r} not in {line!r}"
    assert out == "", f"nothing goes to stdout on bad input, got {out!r}"
    # Nothing written: no result (default or --json), no temporary file, and a
    # result already there byte-identical.
    assert after == before, "files changed: " + ", ".join(
        sorted(k for k in set(before) | set(after) if before.get(k, 0) != after.get(k, 0)))


@pytest.fixture(autouse=True)
def _no_scf(monkeypatch):
    """Bad input must be refused before any field point is computed."""
    import fieldprop.backend.context

    def tripwire(*args):
        raise AssertionError("a model context was built for an SCF")

    # Where the backend's tasks, which build every model context, look it up.
    monkeypatch.setattr(fieldprop.backend.context, "ModelContext", tripwire)


# --------------------------------------------------------------------------- tests

@pytest.mark.parametrize("case_id, text, files, expected, extra", CASES, ids=_IDS)
def test_bad_input_in_process(case_id, text, files, expected, extra, tmp_path, capsys,
                              monkeypatch):
    monkeypatch.chdir(tmp_path)
    job_path = _prepare(tmp_path, text, files)
    before = _snapshot(tmp_path)
    rc = main(_argv(job_path, tmp_path, extra))
    captured = capsys.readouterr()
    _check(rc, captured.out, captured.err, expected, job_path, before, _snapshot(tmp_path))


@pytest.mark.parametrize("case_id, text, files, expected, extra",
                         [c for c in CASES if c[0] in SUBPROCESS_IDS],
                         ids=[i for i in _IDS if i in SUBPROCESS_IDS])
def test_bad_input_subprocess(case_id, text, files, expected, extra, tmp_path):
    job_path = _prepare(tmp_path, text, files)
    before = _snapshot(tmp_path)
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHONWARNINGS")}
    env["OMP_NUM_THREADS"] = "1"
    proc = subprocess.run([sys.executable, "-m", "fieldprop", *_argv(job_path, tmp_path, extra)],
                          capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
    _check(proc.returncode, proc.stdout, proc.stderr, expected, job_path, before,
           _snapshot(tmp_path))


def test_catalogue_is_broad():
    """At least 30 kinds of bad input, at least 5 of them in a real process."""
    assert len(CASES) >= 30 and len(SUBPROCESS_IDS) >= 5


def test_good_job_passes_the_same_gate(tmp_path, capsys, monkeypatch):
    """The base job itself is valid: every case fails for its own reason only.

    ``plan`` reads and validates the job without computing anything.
    """
    monkeypatch.chdir(tmp_path)
    job_path = _prepare(tmp_path, job(), {})
    assert main(["plan", str(job_path)]) == 0
    captured = capsys.readouterr()
    assert "field points" in captured.out and captured.err == ""
    xyz_path = _prepare(tmp_path, XYZ_JOB, {"mol.xyz": "2\ncomment\nH 0 0 0\nH 0 0 0.74\n"})
    assert main(["plan", str(xyz_path)]) == 0
    capsys.readouterr()


def test_close_atoms_pass_when_the_job_allows_them(tmp_path):
    """The refused unit-mistake geometry passes validation with allow_close_atoms."""
    pytest.importorskip("pyscf")
    from fieldprop.engine.prepare import prepare
    from fieldprop.inputs.job import load_job

    path = tmp_path / "job.toml"
    path.write_text(job(WATER_ANGSTROM_LINES, molecule={"units": '"bohr"',
                                                        "allow_close_atoms": "true"}))
    prepared = prepare(load_job(path))
    assert prepared.job.molecule.allow_close_atoms and prepared.facts["n_basis_functions"] == 7
