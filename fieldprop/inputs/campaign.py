r"""Screening sets: many molecules, one model chemistry, each molecule a job.

A set file (TOML) lists molecules (every ``*.xyz`` of ``xyz_dir``, and/or
``[[molecule]]`` entries with ``xyz``, ``geometry`` or ``smiles``) and the
``[model]``, ``[response]``, ``[scf]`` and ``[geometry]`` tables they share.
:func:`load_set` turns it into one validated :class:`~fieldprop.job.Job` per
molecule, or refuses it with one line naming the set file, the molecule and
the key, before anything is computed. No PySCF here.

Example
-------
>>> import tempfile, pathlib
>>> folder = pathlib.Path(tempfile.mkdtemp())
>>> _ = (folder / "set.toml").write_text('''
... [[molecule]]
... name = "hydrogen"
... geometry = "H 0 0 0\\nH 0 0 0.74"
... [model]
... method = "hf"
... basis = "sto-3g"
... [response]
... properties = ["alpha"]
... ''')
>>> [(c.name, c.job.molecule.source) for c in load_set(folder / "set.toml").candidates]
[('hydrogen', 'inline')]
"""

from __future__ import annotations

import dataclasses
import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from fieldprop.errors import InputError
from fieldprop.inputs.job import Job, job_from_tables
from fieldprop.numerics.units import BACKEND_BOHR_ANGSTROM, NAMED_BOHR_ANGSTROM

#: Keys of a [[molecule]] entry.
MOLECULE_KEYS = {"name", "xyz", "geometry", "smiles", "units", "charge", "multiplicity",
                 "allow_close_atoms", "bohr_angstrom"}
#: Top-level keys and tables of a set file.
SET_KEYS = {"xyz_dir", "molecule", "model", "response", "scf", "correlation", "geometry",
            "conformers"}
#: Keys of a set's [conformers] table (inputs.structures.ConformerOptions).
CONFORMER_KEYS = {"keep", "embed", "rmsd_angstrom", "window_kcal_mol", "temperature_k"}
#: A molecule's name names its result files: letters, digits, . _ - only.
NAME_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,99}$")


@dataclass(frozen=True)
class Candidate:
    """One molecule of a set: its name, where it came from, and its job."""

    name: str
    source: str  # "xyz_dir", "xyz", "geometry" or "smiles"
    job: Job
    smiles: str | None = None
    #: A conformer of a SMILES molecule ([conformers]): the molecule's name
    #: (``name`` is ``<group>.c<k>``), its number k from 1, and its force-field
    #: energy above the lowest conformer (kcal/mol).
    group: str | None = None
    conformer: int | None = None
    force_field_kcal_mol: float | None = None


@dataclass(frozen=True)
class Campaign:
    path: str
    candidates: tuple[Candidate, ...]
    #: [conformers]: how SMILES molecules became conformer ensembles (None: one
    #: structure each).
    conformers: object = None


def _fail(path: str, what: str) -> InputError:
    return InputError(f"{path}: {what}")


def _read(path: Path) -> dict[str, Any]:
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise _fail(str(path), "set file not found") from None
    except IsADirectoryError:
        raise _fail(str(path), "is a directory, expected a set file (TOML)") from None
    except OSError as exc:
        raise _fail(str(path), f"cannot read set file: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise _fail(str(path), f"not UTF-8 text (byte {exc.start})") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _fail(str(path), f"not valid TOML: {exc}") from None


def load_set(path: str | Path) -> Campaign:
    """Read and validate a set file: one Job per molecule (see the module text).

    Raises InputError (one line naming the file, the molecule and the key) for
    an unknown key, no molecule, a duplicate name, a missing file, an empty
    folder, a SMILES that cannot be parsed, a charge or multiplicity that
    disagrees with the SMILES, and anything a job would be refused for.
    """
    set_path = Path(path)
    shown = str(path)
    data = _read(set_path)
    for key in data:
        if key not in SET_KEYS:
            raise _fail(shown, f"unknown key or table {key!r}; valid: {', '.join(sorted(SET_KEYS))}")
    for table in ("model", "response"):
        if table not in data:
            raise _fail(shown, f"[{table}] is missing; the set's molecules share one [model] "
                        "and one [response]")
        if not isinstance(data[table], dict):
            raise _fail(shown, f"{table} must be a [{table}] table")
    if data["response"].get("nuclear_relaxation") is True:
        raise _fail(shown, "[response] nuclear_relaxation = true: a screening campaign "
                    "computes clamped-nucleus responses only; run the molecules you want "
                    "relaxed as jobs (fieldprop run), or set it to false")
    if data["response"].get("zero_point") is True:
        raise _fail(shown, "[response] zero_point = true: a screening campaign computes "
                    "clamped-nucleus responses at one geometry per molecule; run the molecules "
                    "you want vibrationally averaged as jobs (fieldprop run), or set it to false")
    shared = {k: data[k] for k in ("model", "response", "scf", "correlation", "geometry")
              if k in data}
    options = _conformer_options(shown, data)
    entries: list[tuple[str, str, dict, str | None]] = []  # name, source, molecule table, smiles
    if "xyz_dir" in data:
        folder_text = data["xyz_dir"]
        if not isinstance(folder_text, str) or not folder_text.strip():
            raise _fail(shown, f"xyz_dir must be a folder name, got {folder_text!r}")
        folder = set_path.parent / folder_text
        if not folder.is_dir():
            raise _fail(shown, f"xyz_dir {folder_text!r}: no such folder (relative to the set "
                        "file)")
        files = sorted(folder.glob("*.xyz"))
        if not files:
            raise _fail(shown, f"xyz_dir {folder_text!r}: no *.xyz file in it")
        for file in files:
            rel = str(file.relative_to(set_path.parent))
            entries.append((file.stem, "xyz_dir", {"xyz": rel}, None))
    listed = data.get("molecule", [])
    if not isinstance(listed, list) or not all(isinstance(m, dict) for m in listed):
        raise _fail(shown, "molecule must be [[molecule]] tables")
    for n, table in enumerate(listed, start=1):
        where = f"[[molecule]] {n}"
        for key in table:
            if key not in MOLECULE_KEYS:
                raise _fail(shown, f"{where}: unknown key {key!r}; valid: "
                            f"{', '.join(sorted(MOLECULE_KEYS))}")
        given = [k for k in ("xyz", "geometry", "smiles") if k in table]
        if len(given) != 1:
            raise _fail(shown, f"{where}: give exactly one of xyz, geometry, smiles"
                        + (f" (got {', '.join(given)})" if given else ""))
        source = given[0]
        name = table.get("name")
        if name is None and source == "xyz" and isinstance(table["xyz"], str):
            name = Path(table["xyz"]).stem
        if name is None:
            raise _fail(shown, f"{where}: name is missing (it names the molecule's results)")
        entries.append((name, source, dict(table), table.get("smiles")))
    if not entries:
        raise _fail(shown, "no molecule: give xyz_dir or [[molecule]] entries")
    seen: dict[str, int] = {}
    candidates = []
    for name, source, table, smiles in entries:
        if not isinstance(name, str) or not NAME_PATTERN.match(name):
            raise _fail(shown, f"molecule {name!r}: name must be 1-100 letters, digits, '.', "
                        "'_' or '-' (it names the result files)")
        if name in seen:
            raise _fail(shown, f"molecule {name!r}: the name is given twice")
        seen[name] = 1
        where = f"molecule {name!r}"
        molecule = {k: v for k, v in table.items() if k not in ("name", "smiles")}
        if source in ("xyz", "xyz_dir") and not (set_path.parent / str(table["xyz"])).is_file():
            raise _fail(shown, f"{where}: xyz file {table['xyz']!r} not found (relative to the "
                        "set file)")
        made = ""
        if smiles is not None and options is not None:
            for k, (table_k, made, energy) in enumerate(
                    _conformers(shown, where, smiles, molecule, options), start=1):
                job = job_from_tables(f"{shown} ({where}, conformer {k})", set_path,
                                      {"molecule": table_k, **shared})
                job = dataclasses.replace(job, molecule=dataclasses.replace(
                    job.molecule, source=f"smiles {smiles}, conformer {k} ({made})"))
                candidates.append(Candidate(f"{name}.c{k}", source, job, smiles, name, k,
                                            energy))
            continue
        if smiles is not None:
            molecule, made = _from_smiles(shown, where, smiles, molecule)
        job = job_from_tables(f"{shown} ({where})", set_path,
                              {"molecule": molecule, **shared})
        if smiles is not None:
            job = dataclasses.replace(job, molecule=dataclasses.replace(
                job.molecule, source=f"smiles {smiles} ({made})"))
        candidates.append(Candidate(name, source, job, smiles))
    return Campaign(shown, tuple(candidates), options)


def _conformer_options(shown: str, data: dict):
    """The set's [conformers] table as ConformerOptions (None without it)."""
    from fieldprop.inputs.structures import ConformerOptions

    table = data.get("conformers")
    if table is None:
        return None
    if not isinstance(table, dict):
        raise _fail(shown, "conformers must be a [conformers] table")
    for key in table:
        if key not in CONFORMER_KEYS:
            raise _fail(shown, f"[conformers] unknown key {key!r}; valid: "
                        f"{', '.join(sorted(CONFORMER_KEYS))}")
    geometry = data.get("geometry") or {}
    if not (geometry.get("optimise") is True or geometry.get("optimize") is True):
        raise _fail(shown, "[conformers] needs [geometry] optimise = true: the conformers' "
                    "weights come from the model's energies at its own minima")
    default = ConformerOptions()
    values = {}
    for key, low, high, kind in (("keep", 2, 20, int), ("embed", 2, 500, int),
                                 ("rmsd_angstrom", 0.01, 5.0, float),
                                 ("window_kcal_mol", 0.1, 50.0, float),
                                 ("temperature_k", 1.0, 2000.0, float)):
        value = table.get(key, getattr(default, key))
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or (kind is int and not isinstance(value, int)) or not low <= value <= high:
            what = "an integer" if kind is int else "a number"
            raise _fail(shown, f"[conformers] {key} must be {what} from {low:g} to {high:g}, "
                        f"got {value!r}")
        values[key] = kind(value)
    if values["embed"] < values["keep"]:
        raise _fail(shown, f"[conformers] embed = {values['embed']} is fewer than keep = "
                    f"{values['keep']}")
    return ConformerOptions(**values)


def _conformers(shown: str, where: str, smiles, molecule: dict, options):
    """Per conformer of ``smiles``: the molecule table, how it was made, and
    its force-field energy above the lowest (kcal/mol)."""
    from fieldprop.inputs.structures import conformers_from_smiles

    if not isinstance(smiles, str) or not smiles.strip():
        raise _fail(shown, f"{where}: smiles must be a SMILES string, got {smiles!r}")
    try:
        found = conformers_from_smiles(smiles.strip(), options)
    except ValueError as exc:
        raise _fail(shown, f"{where}: smiles {smiles!r}: {exc}") from None
    out = []
    for structure, energy in found:
        table, made = _from_structure(shown, where, smiles, molecule, structure)
        out.append((table, made + f", {structure.force_field} {energy:.2f} kcal/mol above "
                    "the lowest conformer", energy))
    return out


def _from_smiles(shown: str, where: str, smiles, molecule: dict) -> tuple[dict, str]:
    """The molecule table with the SMILES' 3D geometry (angstrom) and its
    charge and multiplicity, checked against those given; and how the
    structure was made."""
    from fieldprop.inputs.structures import from_smiles

    if not isinstance(smiles, str) or not smiles.strip():
        raise _fail(shown, f"{where}: smiles must be a SMILES string, got {smiles!r}")
    if "units" in molecule:
        raise _fail(shown, f"{where}: units is given with smiles; a SMILES structure is built "
                    "in angstrom: remove units")
    try:
        structure = from_smiles(smiles.strip())
    except ValueError as exc:
        raise _fail(shown, f"{where}: smiles {smiles!r}: {exc}") from None
    return _from_structure(shown, where, smiles, molecule, structure)


def _from_structure(shown: str, where: str, smiles, molecule: dict, structure
                    ) -> tuple[dict, str]:
    """The molecule table with ``structure`` (from ``smiles``), checked."""
    if "units" in molecule:
        raise _fail(shown, f"{where}: units is given with smiles; a SMILES structure is built "
                    "in angstrom: remove units")
    for key, implied in (("charge", structure.charge), ("multiplicity", structure.multiplicity)):
        given = molecule.get(key, implied)
        if given != implied:
            raise _fail(shown, f"{where}: {key} = {given!r} disagrees with smiles {smiles!r}, "
                        f"which implies {key} {implied}")
    given = molecule.get("bohr_angstrom", "backend")
    bohr = NAMED_BOHR_ANGSTROM.get(given, BACKEND_BOHR_ANGSTROM) if isinstance(given, str) \
        else given if isinstance(given, float) else BACKEND_BOHR_ANGSTROM  # the job checks it
    # Symmetrised at the source, in bohr at full precision: the nuclei the job
    # computes, reports and writes are the ones made here, and a group it is
    # near applies to them exactly.
    geometry, group = structure.symmetrised_bohr(bohr)
    return ({**molecule, "geometry": geometry, "units": "bohr", "charge": structure.charge,
             "multiplicity": structure.multiplicity},
            structure.provenance + (f", symmetrised to {group.split(',')[0]}" if group else ""))
