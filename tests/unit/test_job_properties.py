"""Property-based tests of the job parser and the field planner (hypothesis).

(a) :func:`fieldprop.job.load_job` on documents mixing valid and invalid values
    for every key: it returns a Job that satisfies the documented invariants, or
    raises InputError with a one-line message naming the file; never anything
    else. Also on mutilated and random raw text.
(b) :func:`fieldprop.plan.plan_fields` on random jobs: no point planned twice,
    point 0 the zero field, valid point indices, and every stencil meets the
    Taylor-matching conditions it is built from.

Neither function needs PySCF, and nothing here imports it.
"""

from __future__ import annotations

import itertools
import json
import math
import re
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fieldprop.errors import InputError
from fieldprop.inputs.job import (DIPOLE_ROUTE_METHODS, MAX_COORDINATE_BOHR, METHODS,
                           MIN_DISTANCE_BOHR, ORIGINS, Job, load_job)
from fieldprop.numerics.methods import METHODS as TRAITS
from fieldprop.numerics.plan import plan_fields
from fieldprop.numerics.tensors import _entries
from fieldprop.numerics.units import PROPERTY_ORDER
from toml_text import toml_document

SETTINGS = settings(max_examples=300, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])

# --------------------------------------------------------------------------- TOML writer


def test_toml_writer_round_trips():
    import tomllib

    doc = {"a": {"s": 'q"\\\x00\x7f\né', "i": -3, "f": 1e-05, "n": float("inf"),
                 "b": False, "l": [1, "x", [2.5]], "t": {"H": "sto-3g"}}}
    assert tomllib.loads(toml_document(doc)) == doc


# --------------------------------------------------------------------------- values

_text = st.text(st.characters(blacklist_categories=("Cs",)), max_size=12)
_float = st.floats(allow_nan=True, allow_infinity=True)
#: Values of every TOML type, mostly wrong for any key.
junk = st.one_of(st.integers(-10**6, 10**6), _float, st.booleans(), _text,
                 st.lists(st.one_of(st.integers(-5, 5), _float, _text), max_size=4),
                 st.dictionaries(st.sampled_from(["H", "O", "x"]), st.just("sto-3g"),
                                 max_size=2))

_GEOMETRIES = [
    "H 0 0 0\nH 0 0 0.74",
    "O 0.0 0.0 0.1173\nH 0.0 0.7572 -0.4692\nH 0.0 -0.7572 -0.4692",
    "O 0 0 0\nH 0 0 0.97",
    "li 0 0 0\nh 0 0 1.6",
    "He 0 0 0",
    "\n  H 0 0 0  \n\n  F 0 0 0.92\n",
]
_symbol = st.sampled_from(["H", "He", "Li", "C", "N", "O", "F", "Na", "Xx", "h", "HE", "D", "",
                           "1"])
_coord = st.one_of(st.floats(-3, 3), st.sampled_from([0.0, 0.1, float("nan"), float("inf"),
                                                      1e308, -1e300, 1e7]))
#: Coordinate tokens as typed: numbers, and text that float() refuses or reads as
#: non-finite ("1e400" is inf).
_token = st.one_of(_coord.map(repr), st.sampled_from(
    ["zero", "1,5", "0..1", "--1", "1e", "nan", "-inf", "1e400", "0x10", "1/2", "."]))
_four_columns = st.builds(lambda s, c: " ".join([s, *c]), _symbol,
                          st.lists(_token, min_size=3, max_size=3))
_atom_line = st.one_of(
    _four_columns, _four_columns, _four_columns,
    st.builds(lambda s, c: " ".join([s, *c]), _symbol, st.lists(_token, max_size=5)),
    _text,
)

def _valid_geometry_lines(n: int) -> st.SearchStrategy[str]:
    """n atoms of random elements about 1 A apart along z, jittered."""
    atom = st.tuples(st.sampled_from(["H", "He", "Li", "C", "N", "O", "F", "Cl", "h", "CL"]),
                     st.floats(-0.3, 0.3), st.floats(-0.3, 0.3))
    return st.lists(atom, min_size=n, max_size=n).map(lambda atoms: "\n".join(
        f"{s} {x!r} {y!r} {1.2 * i!r}" for i, (s, x, y) in enumerate(atoms)))


def _either(valid, invalid):
    """Invalid values: the key's near misses three times in four, else any type.

    (Not ``st.one_of(invalid, junk)``: hypothesis flattens the branches of junk
    into it, and the near misses would come one time in seven.)
    """
    return {"valid": valid,
            "invalid": st.integers(0, 3).flatmap(lambda i: invalid if i else junk)}


#: Per key: values valid on their own, and values invalid on their own (near
#: misses and junk). Combinations of valid values may still be invalid together
#: (multiplicity and electrons, method and route, ...): the cross-key checks.
KEYS = {
    ("molecule", "geometry"): _either(
        st.one_of(st.sampled_from(_GEOMETRIES), st.integers(1, 4).flatmap(_valid_geometry_lines)),
        st.lists(_atom_line, min_size=1, max_size=4).map("\n".join)),
    ("molecule", "units"): _either(st.sampled_from(["angstrom", "bohr", "Bohr", " ANGSTROM "]),
                                   st.sampled_from(["nm", "", "au", "angstroms"])),
    ("molecule", "charge"): _either(st.sampled_from([0, 0, 0, 1, -1]),
                                    st.one_of(st.integers(-200, 200), st.just(0.0))),
    ("molecule", "multiplicity"): _either(st.sampled_from([1, 1, 1, 2, 3]),
                                          st.integers(-3, 0)),
    ("model", "method"): _either(st.sampled_from([*METHODS, "HF", " dft ", "CCSD(T)"]),
                                 st.sampled_from(["casscf", "", "ccsd_t", "b3lyp"])),
    ("model", "functional"): _either(st.sampled_from(["b3lyp", "pbe0", "PBE"]),
                                     st.sampled_from(["", "  "])),
    ("model", "basis"): _either(
        st.one_of(st.sampled_from(["sto-3g", "cc-pvdz", "6-31g*"]),
                  st.fixed_dictionaries({"H": st.just("sto-3g"), "o": st.just("cc-pvdz")})),
        st.one_of(st.sampled_from(["", " "]), st.just({}),
                  st.fixed_dictionaries({"Qq": st.just("sto-3g")}),
                  st.fixed_dictionaries({"H": st.sampled_from(["", 3])}))),
    ("model", "reference"): _either(
        st.sampled_from(["auto", "auto", "restricted", "unrestricted", "Unrestricted"]),
        st.sampled_from(["UHF", "rohf", ""])),
    ("response", "properties"): _either(
        st.lists(st.sampled_from(list(PROPERTY_ORDER) + ["Alpha", "GAMMA"]), min_size=1,
                 max_size=5),
        st.one_of(st.just([]), st.lists(st.sampled_from(["polarizability", "", "alpha"]),
                                        min_size=1, max_size=3),
                  st.sampled_from(["alpha", "dipole"]))),
    ("response", "field_au"): _either(st.floats(1e-4, 1e-2),
                                      st.sampled_from([0.0, -1e-3, 0, 0.06, 1, float("nan")])),
    ("response", "ratio"): _either(st.one_of(st.floats(1.2, 4.0), st.sampled_from([2, 2.0, 3])),
                                   st.one_of(st.floats(-1.0, 1.0), st.floats(10.01, 1e6),
                                             st.just(float("inf")))),
    ("response", "levels"): _either(st.integers(1, 5), st.one_of(st.integers(-2, 0),
                                                                st.integers(9, 10**6),
                                                                st.just(3.0))),
    ("response", "origin"): _either(
        st.one_of(st.sampled_from([*ORIGINS, "Zero"]),
                  st.lists(st.one_of(st.floats(-3, 3), st.integers(-3, 3)), min_size=3,
                           max_size=3)),
        st.one_of(st.sampled_from(["centre", "", "com"]),
                  st.lists(st.floats(-3, 3), max_size=2),
                  st.lists(st.floats(-3, 3), min_size=4, max_size=5),
                  st.lists(st.one_of(_coord, st.booleans(), _text), min_size=3, max_size=3))),
    ("response", "route"): _either(st.sampled_from(["auto", "auto", "energy", "dipole",
                                                    "DIPOLE"]),
                                   st.sampled_from(["numerical", "", "analytic"])),
    ("response", "nuclear_relaxation"): _either(st.just(False), st.just(True)),
    ("scf", "energy_conv_tol_au"): _either(st.floats(1e-14, 1e-6),
                                           st.one_of(st.floats(1e-20, 1e-14, exclude_max=True),
                                                     st.floats(1e-6, 1.0, exclude_min=True))),
    ("scf", "max_iterations"): _either(st.integers(10, 500), st.integers(-5, 9)),
    ("scf", "grid_level"): _either(st.integers(0, 9), st.one_of(st.integers(-3, -1),
                                                                st.integers(10, 99))),
}
_Z = {"h": 1, "he": 2, "li": 3, "c": 6, "n": 7, "o": 8, "f": 9, "cl": 17}
REQUIRED = {("molecule", "geometry"), ("model", "method"), ("model", "basis"),
            ("response", "properties")}
#: Valid only with method = "dft", otherwise to be left out.
DFT_ONLY = {("model", "functional"), ("scf", "grid_level")}


@st.composite
def targeted_documents(draw, fault=None):
    """A job with ``fault`` (and maybe one more key) wrong: reaches every later check."""
    faults = draw(st.sets(st.sampled_from(sorted(KEYS)), max_size=1))
    if fault is not None:
        faults.add(fault)
    doc: dict = {"molecule": {}, "model": {}, "response": {}}
    if draw(st.booleans()):
        doc["scf"] = {}
    method = None
    for (name, key), values in KEYS.items():
        if name not in doc:
            continue
        if (name, key) in faults:
            if (name, key) in REQUIRED and draw(st.integers(0, 3)) == 0:
                continue  # a missing required key
            if (name, key) in DFT_ONLY and method != "dft":
                doc[name][key] = draw(values["valid"])  # present though not dft
                continue
            doc[name][key] = draw(values["invalid"])
            continue
        if (name, key) in DFT_ONLY:
            if method == "dft":
                doc[name][key] = draw(values["valid"])
            continue
        if (name, key) not in REQUIRED and draw(st.integers(0, 3)) == 0:
            continue  # optional key left to its default
        doc[name][key] = draw(values["valid"])
        if key == "method":
            method = doc[name][key].strip().lower()
    mol = doc["molecule"]
    if not faults & {("molecule", k) for k in ("geometry", "charge", "multiplicity")}:
        # Mostly a spin state the electron count allows (else the parity check).
        electrons = sum(_Z.get(line.split()[0].lower(), 0)
                        for line in mol["geometry"].splitlines() if line.split())
        electrons -= mol.get("charge", 0)
        multiplicity = mol.get("multiplicity", 1)
        if (electrons - multiplicity + 1) % 2 and draw(st.integers(0, 4)):
            mol["multiplicity"] = multiplicity + 1
    xyz = None
    if draw(st.integers(0, 4)) == 0:
        geometry = doc["molecule"].pop("geometry", _GEOMETRIES[0])
        if draw(st.integers(0, 10)) == 0:
            doc["molecule"]["geometry"] = geometry  # both given
        doc["molecule"]["xyz"] = draw(st.sampled_from(["mol.xyz", "mol.xyz", "none.xyz", "."]))
        if isinstance(geometry, str):
            lines = [ln for ln in geometry.splitlines() if ln.strip()]
            count = draw(st.sampled_from([len(lines)] * 4 + [len(lines) + 1, 0]))
            xyz = f"{count}\na comment line\n" + "\n".join(lines) + "\n"
    return doc, xyz


@st.composite
def hostile_documents(draw):
    """Any value for any key, sections missing or replaced: the structural checks."""
    doc = {}
    for name in ("molecule", "model", "response", "scf"):
        if draw(st.integers(0, 5)) == 0:
            continue
        keys = [k for (n, k) in KEYS if n == name]
        doc[name] = {k: draw(st.one_of(KEYS[(name, k)]["valid"], KEYS[(name, k)]["invalid"]))
                     for k in keys if draw(st.booleans())}
    if draw(st.integers(0, 3)) == 0:
        doc.setdefault(draw(st.sampled_from(["molecule", "model", "response", "scf"])), {})[
            draw(st.sampled_from(["basis_set", "field", "Units", "x"]))] = draw(junk)
    if draw(st.integers(0, 3)) == 0:
        doc[draw(st.sampled_from(["output", "Model", "scf", "molecule"]))] = draw(
            st.one_of(st.just({}), junk))
    return doc, None




# --------------------------------------------------------------------------- checks

_SECTION_NAMED = re.compile(r"\[(molecule|model|response|scf)\]|unknown section \[")


def check_outcome(job_path: Path, xyz_name, names_section: bool = False) -> Job | None:
    """load_job returns a Job or raises a one-line InputError naming the file.

    ``names_section``: the document is valid TOML, so a message about the job
    file must name the section (and key) at fault.
    """
    try:
        job = load_job(job_path)
    except InputError as exc:
        message = str(exc)
        assert message and "\n" not in message and "\r" not in message, repr(message)
        xyz_path = str(job_path.parent / xyz_name) if isinstance(xyz_name, str) else None
        assert (message.startswith(f"{job_path}: ")
                or (xyz_path is not None and message.startswith(f"{xyz_path}: "))), message
        if names_section and message.startswith(f"{job_path}: "):
            assert _SECTION_NAMED.search(message), message
        return None
    check_job_invariants(job)
    return job


def check_job_invariants(job: Job) -> None:
    r, m, mol, scf = job.response, job.model, job.molecule, job.scf
    assert isinstance(r.field_au, float) and math.isfinite(r.field_au) and r.field_au > 0
    assert isinstance(r.ratio, float) and r.ratio > 1
    assert isinstance(r.levels, int) and not isinstance(r.levels, bool) and r.levels >= 1
    assert m.reference in ("restricted", "unrestricted")
    assert r.route in ("energy", "dipole")
    assert r.route == "energy" or m.method in DIPOLE_ROUTE_METHODS
    assert isinstance(r.properties, tuple) and r.properties
    assert list(r.properties) == [p for p in PROPERTY_ORDER if p in r.properties]  # canonical
    # Nuclear relaxation needs the method's nuclear gradient (methods.METHODS).
    assert not r.nuclear_relaxation or TRAITS[m.method].nuclear_gradient
    assert m.method in METHODS
    assert (m.functional is not None) == (m.method == "dft")
    assert m.basis
    assert mol.multiplicity >= 1 and mol.n_electrons >= 1
    assert mol.multiplicity - 1 <= mol.n_electrons
    assert (mol.n_electrons - mol.multiplicity + 1) % 2 == 0
    assert m.reference == "unrestricted" or mol.multiplicity == 1 or m.method in ("hf", "dft")
    assert mol.atoms and mol.units in ("angstrom", "bohr")
    for a in mol.atoms:
        assert all(math.isfinite(v) and abs(v) <= MAX_COORDINATE_BOHR for v in a.coords_bohr)
    for a, b in itertools.combinations(mol.atoms, 2):
        assert math.dist(a.coords_bohr, b.coords_bohr) >= MIN_DISTANCE_BOHR
    if isinstance(r.origin, str):
        assert r.origin in ORIGINS
    else:
        assert len(r.origin) == 3 and all(math.isfinite(v) for v in r.origin)
    assert 1e-14 <= scf.energy_conv_tol_au <= 1e-6 and scf.max_iterations >= 10
    assert (scf.grid_level is not None) == (m.method == "dft")
    json.dumps(job.to_dict(), allow_nan=False)  # goes into the result JSON as is


def _write_job(folder: Path, text: str | bytes, xyz_name, xyz_text) -> Path:
    job_path = folder / "job.toml"
    if isinstance(text, bytes):
        job_path.write_bytes(text)
    else:
        job_path.write_text(text, encoding="utf-8")
    if xyz_text is not None and xyz_name == "mol.xyz":
        (folder / "mol.xyz").write_text(xyz_text, encoding="utf-8")
    return job_path


# --------------------------------------------------------------------------- (a) parser

@pytest.mark.parametrize("fault", [None, *sorted(KEYS)], ids=lambda k: "-".join(k or ["none"]))
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_load_job_returns_job_or_one_line_input_error(fault, data):
    """Each key in turn given a wrong value (or left out), the rest mostly valid."""
    check_document(*data.draw(targeted_documents(fault)))


@SETTINGS
@given(hostile_documents())
def test_load_job_on_hostile_documents(generated):
    """Any value for any key, unknown keys and sections, sections that are not tables."""
    check_document(*generated)


def check_document(doc: dict, xyz_text: str | None) -> None:
    text = toml_document(doc)
    xyz_name = doc.get("molecule", {}).get("xyz") if isinstance(doc.get("molecule"),
                                                                 dict) else None
    with tempfile.TemporaryDirectory() as tmp:
        job_path = _write_job(Path(tmp), text, xyz_name, xyz_text)
        job = check_outcome(job_path, xyz_name, names_section=True)
    if job is None:
        return
    # What the document said, the job says (nothing silently ignored).
    given_r = doc["response"]
    for key in ("field_au", "ratio"):
        if key in given_r:
            assert getattr(job.response, key) == float(given_r[key])
    if "levels" in given_r:
        assert job.response.levels == given_r["levels"]
    assert set(job.response.properties) == {p.lower() for p in given_r["properties"]}
    assert job.molecule.charge == doc["molecule"].get("charge", 0)
    assert job.molecule.multiplicity == doc["molecule"].get("multiplicity", 1)


NAN, INF = float("nan"), float("inf")
#: Values each wrong on their own, in a job that is valid otherwise (water, HF).
NEAR_MISSES = {
    ("molecule", "geometry"): ["", "  \n ", "H 0 0", "Xx 0 0 0", "H 0 0 zero", "H 0 0 nan",
                               "H 1e400 0 0", "H 1e300 0 0", "H 0 0 0\nH 0 0 0.1", 5,
                               ["H 0 0 0"]],
    ("molecule", "units"): ["nm", "", 1],
    ("molecule", "charge"): [0.5, "0", 10, True],
    ("molecule", "multiplicity"): [0, -1, 2, 12, 1.0, "1"],
    ("model", "method"): ["casscf", "", 1],
    ("model", "functional"): ["b3lyp"],  # with method = "hf"
    ("model", "basis"): ["", {}, {"Qq": "sto-3g"}, {"H": ""}, 3],
    ("model", "reference"): ["rohf", "", True],
    ("response", "properties"): [[], ["polarizability"], "alpha", [1], [""]],
    ("response", "field_au"): [0.0, -1e-3, 0, 0.06, NAN, INF, "0.001", True],
    ("response", "ratio"): [1.0, 0.5, -2.0, 10.5, NAN, "2"],
    ("response", "levels"): [0, -1, 9, 3.0, "3", True],
    ("response", "origin"): ["centre", [0, 0], [0, 0, 0, 0], ["a", 0, 0], [NAN, 0, 0],
                             [1e308, 0, 0], True, {}],
    ("response", "route"): ["numerical", "", 3],
    ("response", "nuclear_relaxation"): ["no", 0],
    ("scf", "energy_conv_tol_au"): [1e-3, 1e-15, 0.0, NAN, "tight"],
    ("scf", "max_iterations"): [5, 0, 50.0],
    ("scf", "grid_level"): [3],  # with method = "hf"
}
_NEAR_MISS_CASES = [(section, key, value) for (section, key), values in NEAR_MISSES.items()
                    for value in values]


@pytest.mark.parametrize("section, key, value", _NEAR_MISS_CASES,
                         ids=[f"{s}.{k}={v!r}" for s, k, v in _NEAR_MISS_CASES])
def test_each_near_miss_is_refused_naming_its_key(section, key, value):
    """Every key refuses its near misses, and the message names that key."""
    doc = {"molecule": {"geometry": _GEOMETRIES[1]},
           "model": {"method": "hf", "basis": "sto-3g"},
           "response": {"properties": ["alpha"]}, "scf": {}}
    with tempfile.TemporaryDirectory() as tmp:
        path = _write_job(Path(tmp), toml_document(doc), None, None)
        check_job_invariants(load_job(path))  # the base job is valid
        doc[section][key] = value
        path = _write_job(Path(tmp), toml_document(doc), None, None)
        try:
            load_job(path)
        except InputError as exc:
            message = str(exc)
        else:
            raise AssertionError(f"[{section}] {key} = {value!r} was accepted")
    assert "\n" not in message and message.startswith(f"{path}: [{section}] {key}"), message


def test_load_job_accepts_a_full_valid_document():
    """The generator's valid values do make jobs (so (a) tests both outcomes)."""
    doc = {"molecule": {"geometry": _GEOMETRIES[1], "units": "angstrom", "charge": 0,
                        "multiplicity": 1},
           "model": {"method": "dft", "functional": "b3lyp", "basis": "sto-3g",
                     "reference": "auto"},
           "response": {"properties": ["gamma", "dipole"], "field_au": 0.001, "ratio": 2.0,
                        "levels": 3, "origin": [0.0, 0.0, 0.1], "route": "auto",
                        "nuclear_relaxation": False},
           "scf": {"energy_conv_tol_au": 1e-12, "max_iterations": 100, "grid_level": 3}}
    with tempfile.TemporaryDirectory() as tmp:
        job = check_outcome(_write_job(Path(tmp), toml_document(doc), None, None), None)
    assert job is not None
    assert job.response.properties == ("dipole", "gamma") and job.response.route == "dipole"


_VALID_TEXT = toml_document({
    "molecule": {"geometry": _GEOMETRIES[1], "charge": 0},
    "model": {"method": "mp2", "basis": "cc-pvdz"},
    "response": {"properties": ["alpha", "beta"], "field_au": 0.002, "levels": 2},
})


@SETTINGS
@given(st.lists(st.tuples(st.integers(0, len(_VALID_TEXT)), st.integers(0, 6),
                          st.text(st.sampled_from('[]"=\n ,.#01xe-'), max_size=4)),
                min_size=1, max_size=4))
def test_load_job_on_mutilated_text(edits):
    """A valid document with spans deleted and junk inserted: Job or InputError."""
    text = _VALID_TEXT
    for position, deleted, inserted in edits:
        position = min(position, len(text))
        text = text[:position] + inserted + text[position + deleted:]
    with tempfile.TemporaryDirectory() as tmp:
        check_outcome(_write_job(Path(tmp), text, None, None), None)


@SETTINGS
@given(st.one_of(st.binary(max_size=200), st.text(max_size=200).map(
    lambda t: t.encode("utf-8", "surrogatepass"))))
def test_load_job_on_random_bytes(raw):
    with tempfile.TemporaryDirectory() as tmp:
        check_outcome(_write_job(Path(tmp), raw, None, None), None)


# --------------------------------------------------------------------------- (b) planner

_RATIOS = st.one_of(st.floats(1.2, 4.0), st.sampled_from([1.5, 2.0, 3.0, 4.0, 2**0.5, 2**(1 / 3),
                                                          3**0.5]))


def taylor_residual(weights, offsets, derivative) -> tuple[tuple[int, int, int], float]:
    """The worst |sum_p w_p o_p^m / m! - delta(m, derivative)| over |m| <= n, and its m."""
    n = sum(derivative)
    worst = ((0, 0, 0), 0.0)
    for m in itertools.product(range(n + 1), repeat=3):
        if sum(m) > n:
            continue
        total = math.fsum(w * math.prod(o[a] ** m[a] for a in range(3))
                          for w, o in zip(weights, offsets))
        total /= math.prod(math.factorial(k) for k in m)
        residual = abs(total - (1.0 if m == tuple(derivative) else 0.0))
        if residual > worst[1]:
            worst = (m, residual)
    return worst


@settings(max_examples=150, deadline=None)
@given(props=st.sets(st.sampled_from(list(PROPERTY_ORDER)), min_size=1).flatmap(
           lambda s: st.permutations(sorted(s))),
       field_au=st.floats(1e-4, 1e-2), ratio=_RATIOS, levels=st.integers(1, 5),
       route=st.sampled_from(["energy", "dipole"]),
       index_symmetry=st.sampled_from(["assume", "test"]))
def test_plan_fields_points_and_stencils(props, field_au, ratio, levels, route,
                                         index_symmetry):
    plan = plan_fields(tuple(props), field_au, ratio, levels, route,
                       index_symmetry=index_symmetry)
    points = plan.points

    # Point 0 is the zero field; indices are positions.
    assert points[0].offsets == (0, 0, 0) and points[0].field_vector_au == (0.0, 0.0, 0.0)
    assert [p.index for p in points] == list(range(len(points)))
    # No field planned twice: neither the same vector, nor one within round-off of it.
    vectors = [tuple(p.field_vector_au) for p in points]
    assert len(set(vectors)) == len(vectors)
    for a, b in itertools.combinations(vectors, 2):
        assert max(abs(x - y) for x, y in zip(a, b)) > 1e-10 * field_au, (a, b)

    # One component per unique tensor index set (energy; dipole with the index
    # symmetry assumed) or per first index (dipole, index symmetry tested).
    expected = 0
    for p in props:
        n = PROPERTY_ORDER[p]
        expected += (3 * math.comb(n + 1, 2) if route == "dipole" and index_symmetry == "test"
                     else math.comb(n + 2, 2))
    assert len(plan.components) == expected
    # Every entry of every tensor is filled by exactly one component.
    for p in props:
        filled = [e for c in plan.components if c.tensor == p for e in _entries(c)]
        assert sorted(filled) == list(itertools.product(range(3), repeat=PROPERTY_ORDER[p]))

    used = set()
    for comp in plan.components:
        n = comp.order
        assert n == PROPERTY_ORDER[comp.tensor] - (route == "dipole")
        assert comp.sign == (-1.0 if route == "energy" else 1.0)
        assert len(comp.stencils) == (1 if n == 0 else levels)
        for stencil in comp.stencils:
            assert math.isclose(stencil.step_au, field_au * ratio**stencil.level, rel_tol=1e-12)
            indices = [i for i, _ in stencil.terms]
            assert all(0 <= i < len(points) for i in indices)
            assert len(set(indices)) == len(indices)  # a point enters a stencil once
            used.update(indices)
            offsets = [tuple(v / stencil.step_au for v in points[i].field_vector_au)
                       for i in indices]
            weights = [w for _, w in stencil.terms]
            # Taylor matching: sum_p w_p o_p^m / m! = delta(m, derivative), |m| <= n.
            m, residual = taylor_residual(weights, offsets, comp.derivative)
            assert residual <= 1e-9, (comp.name, stencil.level, m, residual)
            # Inversion symmetry w(-o) = (-1)^n w(o) (even error series in h).
            by_offset = {tuple(round(x) for x in o): w for o, w in zip(offsets, weights)}
            for o, w in by_offset.items():
                assert by_offset.get(tuple(-x for x in o), 0.0) == w * (-1) ** n
    # Every planned point is used by some stencil (nothing computed for nothing);
    # the zero field always is planned, for E0 and the warm start.
    assert used | {0} == set(range(len(points)))


def test_plan_taylor_check_detects_a_wrong_weight():
    """The Taylor check is not vacuous: a perturbed or misplaced weight fails it."""
    plan = plan_fields(("beta",), 1e-3, 2.0, 1, "energy")
    for comp in plan.components:
        stencil = comp.stencils[0]
        offsets = [tuple(v / stencil.step_au for v in plan.points[i].field_vector_au)
                   for i, _ in stencil.terms]
        weights = [w for _, w in stencil.terms]
        assert taylor_residual(weights, offsets, comp.derivative)[1] <= 1e-9
        assert taylor_residual([weights[0] + 1e-6, *weights[1:]], offsets,
                               comp.derivative)[1] > 1e-9
        assert taylor_residual(weights, offsets[1:] + offsets[:1], comp.derivative)[1] > 1e-9


def test_the_old_name_of_differentiate_still_works_with_a_warning(tmp_path, caplog):
    """[response] route = "energy" (the old name) reads as differentiate =
    "energy", and says it was renamed."""
    import logging

    from fieldprop.inputs.job import load_job
    from fieldprop.numerics.methods import Route

    text = ('[molecule]\ngeometry = """\nH 0 0 0\nH 0 0 0.74\n"""\n[model]\nmethod = "hf"\n'
            'basis = "sto-3g"\n[response]\nproperties = ["alpha"]\n{key} = "energy"\n')
    (tmp_path / "old.toml").write_text(text.format(key="route"))
    (tmp_path / "new.toml").write_text(text.format(key="differentiate"))
    with caplog.at_level(logging.WARNING, logger="fieldprop"):
        old = load_job(tmp_path / "old.toml")
    assert old.response.route is Route.ENERGY
    assert any("route is the old name of differentiate" in r.message for r in caplog.records)
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="fieldprop"):
        new = load_job(tmp_path / "new.toml")
    assert new.response.route is Route.ENERGY and not caplog.records
