"""Content keys of stored field points (:mod:`fieldprop.points.keys`).

A stored point is reused by any job whose key for it is the same, so keys must

- AGREE whenever the numbers at a point cannot differ: other ladder lengths,
  ratios or property orders that plan the same field vector, a property added
  on the same SCF settings, the automatic window against the equal explicit
  one, another ``max_cycle``, a signed zero in the field;
- DIFFER whenever they can: basis, functional, grid level, geometry, charge,
  multiplicity, origin, SCF tolerances, method, reference, the quantities
  computed, and the field vector down to one unit in the last place;
- be 64 lowercase hex digits of SHA-256 over canonical JSON, the same in every
  process whatever its hash seed.

Jobs are read from TOML files with :func:`fieldprop.job.load_job` and keyed with
:func:`fieldprop.engine.prepare.make_tasks` (no PySCF), or keyed directly with
:func:`fieldprop.keys.model_key` and :func:`fieldprop.keys.point_key`.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
import math
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fieldprop.engine.prepare import make_plan, make_tasks
from fieldprop.inputs.job import ModelSpec, ScfSpec, load_job
from fieldprop.points.keys import (COORDINATE_DECIMALS, Quantities, digest, model_document, model_key,
                            point_key, short_id)
from fieldprop.inputs.molecule import MoleculeSpec, build_molecule
from fieldprop.numerics.units import ANGSTROM_TO_BOHR

# A few dozen examples per property: enough to hit the pools' coincidences and
# every mutated field many times, and the file still runs in a few seconds.
SETTINGS = settings(max_examples=50, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])
HEX64 = re.compile(r"[0-9a-f]{64}")
REPO = Path(__file__).resolve().parents[2]

# --------------------------------------------------------------------------- jobs

H2 = "H 0 0 0\nH 0 0 0.74"
_counter = itertools.count()


def job_text(geometry: str = H2, **sections: dict[str, str]) -> str:
    """The H2/HF/STO-3G alpha job with keys replaced (values are raw TOML text)."""
    doc = {"molecule": {"geometry": '"""\n' + geometry + '\n"""'},
           "model": {"method": '"hf"', "basis": '"sto-3g"'},
           "response": {"properties": '["alpha"]'}}
    for name, keys in sections.items():
        doc.setdefault(name, {}).update(keys)
    lines = []
    for name, keys in doc.items():
        lines.append(f"[{name}]")
        lines += [f"{k} = {v}" for k, v in keys.items()]
    return "\n".join(lines) + "\n"


def load(tmp_path: Path, geometry: str = H2, **sections):
    path = tmp_path / f"job{next(_counter)}.toml"
    path.write_text(job_text(geometry, **sections), encoding="utf-8")
    return load_job(path)


def tasks_of(job):
    return make_tasks(job, build_molecule(job.molecule, job.response.origin), make_plan(job))


def keys_of(tmp_path: Path, geometry: str = H2, **sections) -> list[str]:
    return [t.key for t in tasks_of(load(tmp_path, geometry, **sections))]


def keyed_scf(scf) -> tuple:
    """The SCF settings that enter the model key (see fieldprop.points.keys): not
    max_cycle or other settings that only decide whether a point is accepted."""
    return scf.energy_conv_tol_au, scf.gradient_target, scf.grid_level


def vectors_by_key(tmp_path: Path, **sections) -> dict[str, tuple[float, float, float]]:
    return {t.key: t.point.field_vector_au for t in tasks_of(load(tmp_path, **sections))}


# --------------------------------------------------------------------------- direct inputs

MOLECULE = MoleculeSpec(("H", "H"), (1, 1), ((0.0, 0.0, 0.0), (0.0, 0.0, 1.4)), 0, 1,
                        (0.0, 0.0, 0.7))
MODEL = ModelSpec("hf", "sto-3g", "restricted")
SCF = ScfSpec(1e-11, 1e-12, 200, None)
DIPOLE = Quantities(dipole=True)
FIELD = (0.0, 0.0, 0.001)


def key(molecule=MOLECULE, model=MODEL, scf=SCF, quantities=DIPOLE, field=FIELD,
        origin=None) -> str:
    mkey = model_key(molecule, model, scf)
    return point_key(mkey, molecule.origin_bohr if origin is None else origin, quantities,
                     field)


# =========================================================================== AGREE

@pytest.mark.parametrize("properties, route", [('["alpha"]', '"dipole"'),
                                                ('["beta"]', '"energy"')])
def test_a_longer_ladder_keeps_every_key_of_the_shorter(tmp_path, properties, route):
    """levels 3 -> 4 at field_au 0.001, ratio 2: every shorter-plan vector is
    planned again, under the same key. The beta stencils use offsets +-2, so
    (2,0,0) at level 2 (the top of the 3-level ladder) becomes (1,0,0) at level 3
    of the 4-level one: 2 * 0.004 == 1 * 0.008 exactly (powers of two)."""
    common = {"properties": properties, "route": route, "field_au": "0.001", "ratio": "2"}
    short = vectors_by_key(tmp_path, response={**common, "levels": "3"})
    long = vectors_by_key(tmp_path, response={**common, "levels": "4"})
    assert set(short) < set(long)
    for k, vector in short.items():
        assert long[k] == vector


def test_another_ratio_shares_the_keys_of_every_common_field_vector(tmp_path):
    """ratio 2 (levels 3) and ratio 4 (levels 2) from 0.001 au both reach 0.004 au
    (0.001 * 2**2 == 0.001 * 4 exactly), and beta's +-2 offsets make more common
    vectors: a key is shared exactly when the field vector is."""
    base = {"properties": '["beta"]', "route": '"energy"', "field_au": "0.001"}
    a = vectors_by_key(tmp_path, response={**base, "ratio": "2", "levels": "3"})
    b = vectors_by_key(tmp_path, response={**base, "ratio": "4", "levels": "2"})
    shared_vectors = set(a.values()) & set(b.values())
    assert len(shared_vectors) > 1  # more than the zero field, else the test says little
    assert len(set(a) & set(b)) == len(shared_vectors)
    for ka, va in a.items():
        for kb, vb in b.items():
            assert (ka == kb) == (va == vb), (va, vb)


@pytest.mark.parametrize("reordered", ['["dipole", "alpha"]', '["ALPHA", "dipole", "alpha"]'])
def test_the_order_of_properties_does_not_matter(tmp_path, reordered):
    """The parser sorts and deduplicates properties, so the plan and keys match."""
    assert keys_of(tmp_path, response={"properties": reordered}) == \
        keys_of(tmp_path, response={"properties": '["alpha", "dipole"]'})


def test_adding_gamma_to_beta_keeps_every_beta_key(tmp_path):
    """Both get the same SCF settings (energy tolerance 1e-12 for order >= 3,
    orbital gradient 1e-8 on the energy route of a mean-field method), so the
    model key is the same and every beta point is planned again for gamma."""
    response = {"route": '"energy"', "field_au": "0.001", "levels": "3"}
    beta = load(tmp_path, response={**response, "properties": '["beta"]'})
    both = load(tmp_path, response={**response, "properties": '["beta", "gamma"]'})
    assert keyed_scf(beta.scf) == keyed_scf(both.scf) == (1e-12, 1e-8, None)
    beta_keys = {t.key for t in tasks_of(beta)}
    both_keys = {t.key for t in tasks_of(both)}
    assert beta_keys < both_keys


def test_the_automatic_window_shares_the_keys_of_the_equal_explicit_ladder(tmp_path):
    """alpha, dipole route: the automatic window is 0.00025 au x 2**k, k = 0..5;
    its level 2 is 0.00025 * 4, which equals 0.001 in binary (scaling by a power
    of two is exact, and rounding 0.001/4 is rounding 0.001 scaled), so the
    explicit ladder 0.001, 0.002, 0.004 au is part of it, under the same keys."""
    assert 0.00025 * 4 == 0.001
    auto = load(tmp_path)
    explicit = load(tmp_path, response={"properties": '["alpha"]', "field_au": "0.001",
                                        "ratio": "2"})
    assert auto.response.field_au_source != "job" and auto.response.field_au == 0.00025
    assert keyed_scf(explicit.scf) == keyed_scf(auto.scf)
    auto_keys = {t.key for t in tasks_of(auto)}
    explicit_keys = {t.key for t in tasks_of(explicit)}
    assert explicit_keys < auto_keys


def test_max_cycle_does_not_change_any_key(tmp_path):
    """max_cycle only decides whether a point converges, never what it converges to."""
    assert keys_of(tmp_path, scf={"max_iterations": "50"}) == \
        keys_of(tmp_path, scf={"max_iterations": "500"}) == keys_of(tmp_path)


@given(st.integers(10, 100_000))
@SETTINGS
def test_max_cycle_does_not_change_the_model_key(max_cycle):
    assert model_key(MOLECULE, MODEL, dataclasses.replace(SCF, max_iterations=max_cycle)) == \
        model_key(MOLECULE, MODEL, SCF)


def test_origin_zero_and_origin_at_zero_agree(tmp_path):
    """Origin "zero" and [0, 0, 0] are the same operator origin in bohr."""
    assert keys_of(tmp_path, response={"properties": '["alpha"]', "origin": '"zero"'}) == \
        keys_of(tmp_path, response={"properties": '["alpha"]', "origin": "[0.0, 0.0, 0.0]"})


def test_basis_names_are_case_insensitive(tmp_path):
    """The model document lower-cases a basis name (PySCF reads names so)."""
    assert keys_of(tmp_path, model={"method": '"hf"', "basis": '"STO-3G"'}) == keys_of(tmp_path)


def test_coordinates_key_at_ten_decimals_of_a_bohr():
    """A shift of 1e-13 bohr stays in the same 1e-10-bohr bin (1.4 and 0.7 lie far
    from a bin edge); a shift of 1e-9 bohr, ten bins, does not."""
    assert COORDINATE_DECIMALS == 10
    near = dataclasses.replace(MOLECULE, coords_bohr=((0.0, 0.0, 1e-13), (0.0, 0.0, 1.4 + 1e-13)))
    far = dataclasses.replace(MOLECULE, coords_bohr=((0.0, 0.0, 0.0), (0.0, 0.0, 1.4 + 1e-9)))
    assert model_key(near, MODEL, SCF) == model_key(MOLECULE, MODEL, SCF)
    assert model_key(far, MODEL, SCF) != model_key(MOLECULE, MODEL, SCF)
    assert key(origin=(0.0, -1e-13, 0.7 + 1e-13)) == key()
    assert key(origin=(0.0, 0.0, 0.7 + 1e-9)) != key()


def test_a_negative_zero_field_component_is_zero():
    """-0.0 and 0.0 are the same field; the key must not split them."""
    assert key(field=(-0.0, -0.0, 0.001)) == key(field=(0.0, 0.0, 0.001))
    assert key(field=(-0.0, 0.0, -0.0)) == key(field=(0.0, 0.0, 0.0))


# =========================================================================== DIFFER

DFT = {"method": '"dft"', "functional": '"b3lyp"', "basis": '"sto-3g"'}
OPEN = "H 0 0 0\nH 0 0 0.74"  # with charge = 1, multiplicity = 2: H2+

#: (name, base job sections, changed job sections, geometry of the changed job).
#: Each pair differs in one thing a number depends on.
DIFFERENCES = [
    ("basis", {}, {"model": {"method": '"hf"', "basis": '"6-31g"'}}, H2),
    ("functional", {"model": DFT}, {"model": {**DFT, "functional": '"pbe0"'}}, H2),
    ("grid_level", {"model": DFT}, {"model": DFT, "scf": {"grid_level": "3"}}, H2),
    ("geometry_1e-6_angstrom", {}, {}, "H 0 0 0\nH 0 0 0.740001"),
    ("charge_and_multiplicity", {}, {"molecule": {"charge": "1", "multiplicity": "2"}}, H2),
    ("multiplicity", {}, {"molecule": {"multiplicity": "3"}}, H2),
    ("origin_xyz_vs_nuclear_charge", {},
     {"response": {"properties": '["alpha"]', "origin": "[0.0, 0.0, 0.0]"}}, H2),
    ("scf_energy_tolerance", {}, {"scf": {"energy_conv_tol_au": "1e-12"}}, H2),
    ("method", {"response": {"properties": '["alpha"]', "route": '"energy"'}},
     {"model": {"method": '"mp2"', "basis": '"sto-3g"'},
      "response": {"properties": '["alpha"]', "route": '"energy"'}}, H2),
    ("reference_open_shell",
     {"molecule": {"charge": "1", "multiplicity": "2"},
      "model": {"method": '"hf"', "basis": '"sto-3g"', "reference": '"restricted"'}},
     {"molecule": {"charge": "1", "multiplicity": "2"},
      "model": {"method": '"hf"', "basis": '"sto-3g"', "reference": '"unrestricted"'}}, OPEN),
]


@pytest.mark.parametrize("name, base, changed, geometry", DIFFERENCES,
                         ids=[d[0] for d in DIFFERENCES])
def test_a_change_that_matters_changes_every_key(tmp_path, name, base, changed, geometry):
    """No point of the changed job may reuse a point of the base job, not even
    the zero field (its energy, dipole or reference state differ)."""
    base_geometry = OPEN if name == "reference_open_shell" else H2
    a = keys_of(tmp_path, base_geometry, **base)
    b = keys_of(tmp_path, geometry, **changed)
    assert len(a) > 1 and len(b) > 1
    assert not set(a) & set(b)


def test_the_reference_pair_differs_in_the_reference_only(tmp_path):
    """The open-shell pair above isolates the reference: same SCF tolerances (open
    shell, dipole route) and the same quantities (Newton dipole error)."""
    _, base, changed, _ = DIFFERENCES[-1]
    r, u = load(tmp_path, OPEN, **base), load(tmp_path, OPEN, **changed)
    assert (r.model.reference, u.model.reference) == ("restricted", "unrestricted")
    assert keyed_scf(r.scf) == keyed_scf(u.scf) and r.response == u.response
    tr, tu = tasks_of(r), tasks_of(u)
    assert tr[0].quantities == tu[0].quantities
    assert [t.point.field_vector_au for t in tr] == [t.point.field_vector_au for t in tu]


#: One input of the model key changed at a time, everything else as in MOLECULE,
#: MODEL and SCF.
MODEL_CHANGES = [
    ("basis", MOLECULE, dataclasses.replace(MODEL, basis="6-31g"), SCF),
    ("method", MOLECULE, dataclasses.replace(MODEL, method="mp2"), SCF),
    ("functional", MOLECULE, dataclasses.replace(MODEL, method="dft", functional="b3lyp"),
     SCF),
    ("reference", MOLECULE, dataclasses.replace(MODEL, reference="unrestricted"), SCF),
    ("charge", dataclasses.replace(MOLECULE, charge=1), MODEL, SCF),
    ("multiplicity", dataclasses.replace(MOLECULE, multiplicity=3), MODEL, SCF),
    ("element", dataclasses.replace(MOLECULE, symbols=("H", "He")), MODEL, SCF),
    ("coordinate_1e-6_angstrom", dataclasses.replace(
        MOLECULE, coords_bohr=((0.0, 0.0, 0.0), (0.0, 0.0, 1.4 + 1e-6 * ANGSTROM_TO_BOHR))),
     MODEL, SCF),
    ("energy_tolerance", MOLECULE, MODEL, dataclasses.replace(SCF, energy_conv_tol_au=1e-12)),
    ("energy_tolerance_one_ulp", MOLECULE, MODEL,
     dataclasses.replace(SCF, energy_conv_tol_au=math.nextafter(1e-11, 1.0))),
    ("gradient_tolerance", MOLECULE, MODEL, dataclasses.replace(SCF, gradient_target=1e-10)),
    ("grid_level", MOLECULE, MODEL, dataclasses.replace(SCF, grid_level=3)),
    ("cartesian", MOLECULE, dataclasses.replace(MODEL, cartesian=True), SCF),
]


def test_frozen_core_counts_in_the_model_key():
    mp2 = dataclasses.replace(MODEL, method="mp2")
    frozen = dataclasses.replace(mp2, frozen_core=True)
    assert model_key(MOLECULE, frozen, SCF) != model_key(MOLECULE, mp2, SCF)


@pytest.mark.parametrize("name, molecule, model, scf", MODEL_CHANGES,
                         ids=[c[0] for c in MODEL_CHANGES])
def test_each_input_of_the_model_key_counts(name, molecule, model, scf):
    assert model_key(molecule, model, scf) != model_key(MOLECULE, MODEL, SCF)
    assert key(molecule, model, scf) != key()


def test_the_basis_of_one_element_counts():
    def per_element(h: str) -> str:
        basis = (("H", h), ("He", "6-31g"))
        return model_key(dataclasses.replace(MOLECULE, symbols=("H", "He")),
                         dataclasses.replace(MODEL, basis=basis), SCF)

    assert per_element("sto-3g") != per_element("sto-6g")


def test_the_model_changes_are_all_distinct():
    keys = [model_key(m, mo, s) for _, m, mo, s in MODEL_CHANGES]
    assert len(set(keys)) == len(keys)


def test_every_combination_of_quantities_has_its_own_key():
    """The Newton dipole error only means something with a dipole: 6 combinations."""
    combos = [Quantities(d, a, n) for d in (False, True) for a in (False, True)
              for n in ((False, True) if d else (False,))]
    keys = [key(quantities=q) for q in combos]
    assert len(combos) == 6 and len(set(keys)) == 6


def test_one_ulp_of_field_is_another_point():
    up = (0.0, 0.0, math.nextafter(0.001, 1.0))
    down = (0.0, 0.0, math.nextafter(0.001, 0.0))
    assert len({key(field=FIELD), key(field=up), key(field=down)}) == 3
    # the smallest nonzero field against zero: 5e-324 au is still another vector
    assert key(field=(math.nextafter(0.0, 1.0), 0.0, 0.0)) != key(field=(0.0, 0.0, 0.0))


def test_origin_moves_the_point_not_the_model():
    assert key(origin=(0.0, 0.0, 0.0)) != key()
    assert key(origin=(0.0, 0.0, 0.7 + 1e-6 * ANGSTROM_TO_BOHR)) != key()


# --------------------------------------------------------------------------- hypothesis

_field = st.floats(-0.1, 0.1, allow_nan=False, allow_infinity=False)
#: Coordinates on a 1e-3 bohr grid: distinct values are 1e7 key bins apart, so
#: "equal after rounding to 1e-10 bohr" is plain equality.
_coord = st.integers(-3000, 3000).map(lambda i: i / 1000)


@given(st.tuples(_field, _field, _field), st.integers(0, 2), st.booleans())
@SETTINGS
def test_any_field_vector_one_ulp_away_is_another_point(vector, axis, upward):
    moved = list(vector)
    moved[axis] = math.nextafter(moved[axis], math.inf if upward else -math.inf)
    a, b = key(field=vector), key(field=tuple(moved))
    assert a != b
    assert HEX64.fullmatch(a) and HEX64.fullmatch(b)
    assert key(field=vector) == a  # deterministic


@given(st.lists(st.tuples(_coord, _coord, _coord), min_size=1, max_size=4),
       st.data())
@SETTINGS
def test_any_geometry_moved_by_1e6_angstrom_is_another_model(coords, data):
    atom = data.draw(st.integers(0, len(coords) - 1))
    axis = data.draw(st.integers(0, 2))
    sign = data.draw(st.sampled_from([1.0, -1.0]))
    molecule = MoleculeSpec(("H",) * len(coords), (1,) * len(coords), tuple(coords), 0,
                            1 + len(coords) % 2, (0.0, 0.0, 0.0))
    moved = [list(c) for c in coords]
    # 1e-6 A = 1.9e-6 bohr = 18897 bins of 1e-10 bohr: never rounds together
    moved[atom][axis] += sign * 1e-6 * ANGSTROM_TO_BOHR
    other = dataclasses.replace(molecule, coords_bohr=tuple(tuple(c) for c in moved))
    assert model_key(other, MODEL, SCF) != model_key(molecule, MODEL, SCF)


#: Small pools, so that two draws often coincide field by field: the equality
#: side of "equal iff" is exercised as well as the other. The field pool holds
#: -0.0 (== 0.0, and keyed alike) and 0.001 with its neighbour one ulp up.
_POOLS = {
    "symbols": st.sampled_from([("H", "H"), ("H", "He"), ("He", "H")]),
    "coords": st.tuples(st.tuples(_coord, _coord, _coord),
                        st.sampled_from([(0.0, 0.0, 1.4), (0.0, 0.0, 1.401), (0.0, 1.4, 0.0)])),
    "charge": st.sampled_from([0, 1]),
    "multiplicity": st.sampled_from([1, 2]),
    "origin": st.sampled_from([(0.0, 0.0, 0.0), (0.0, 0.0, 0.7), (0.0, 0.0, -0.0)]),
    "basis": st.sampled_from(["sto-3g", "6-31g"]),
    "method": st.sampled_from(["hf", "mp2"]),
    "reference": st.sampled_from(["restricted", "unrestricted"]),
    "energy_tol": st.sampled_from([1e-11, 1e-12]),
    "quantities": st.sampled_from([Quantities(True), Quantities(True, True),
                                   Quantities(False), Quantities(True, False, True)]),
    "field": st.tuples(*[st.sampled_from([0.0, -0.0, 0.001, math.nextafter(0.001, 1.0),
                                          -0.001])] * 3),
}


def _inputs():
    return st.fixed_dictionaries(_POOLS)


def _key_of(inputs: dict) -> str:
    molecule = MoleculeSpec(inputs["symbols"], (1, 1), inputs["coords"], inputs["charge"],
                            inputs["multiplicity"], inputs["origin"])
    model = ModelSpec(inputs["method"], inputs["basis"], inputs["reference"])
    scf = ScfSpec(inputs["energy_tol"], 1e-8, 200, None)
    return point_key(model_key(molecule, model, scf), molecule.origin_bohr,
                     inputs["quantities"], inputs["field"])


@given(_inputs(), st.data())
@SETTINGS
def test_point_keys_are_equal_exactly_when_the_inputs_are(first, data):
    """A second input set equal to the first but for a random subset of fields,
    each redrawn from its pool (so sometimes to the same value)."""
    changed = data.draw(st.sets(st.sampled_from(sorted(_POOLS))))
    second = dict(first)
    for name in changed:
        second[name] = data.draw(_POOLS[name])
    # Python's == is the key's notion of equal: -0.0 == 0.0, and the coordinate
    # grid is far coarser than the key's 1e-10 bohr.
    assert (_key_of(first) == _key_of(second)) == (first == second), (first, second)


# =========================================================================== FORMAT

def test_keys_are_sha256_of_canonical_json():
    document = model_document(MOLECULE, MODEL, SCF)
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    assert model_key(MOLECULE, MODEL, SCF) == hashlib.sha256(text.encode("ascii")).hexdigest()
    # canonical: the order of a document's keys does not matter
    assert digest(dict(reversed(list(document.items())))) == digest(document)


def test_keys_are_64_lowercase_hex_and_ids_their_first_12(tmp_path):
    tasks = tasks_of(load(tmp_path))
    assert len(tasks) > 1
    for t in tasks:
        assert HEX64.fullmatch(t.key) and HEX64.fullmatch(t.model_key)
        assert short_id(t.key) == t.key[:12]
    assert len({short_id(t.key) for t in tasks}) == len(tasks)


_SUBPROCESS = """
import json, sys
from fieldprop.inputs.job import ModelSpec, ScfSpec
from fieldprop.points.keys import Quantities, model_key, point_key
from fieldprop.inputs.molecule import MoleculeSpec
import fieldprop.engine.prepare, fieldprop.points.store  # the whole keying path; none imports PySCF
assert "pyscf" not in sys.modules
spec = json.loads(sys.argv[1])
m = MoleculeSpec(tuple(spec["symbols"]), tuple(spec["charges"]),
                 tuple(tuple(c) for c in spec["coords"]), 0, 2, tuple(spec["origin"]))
model = ModelSpec("dft", tuple(tuple(p) for p in spec["basis"]), "unrestricted", "b3lyp")
mk = model_key(m, model, ScfSpec(1e-12, 1e-10, 200, 5))
print(mk, point_key(mk, m.origin_bohr, Quantities(True, False, True), tuple(spec["field"])))
"""

_SPEC = {"symbols": ["O", "H"], "charges": [8, 1],
         "coords": [[0.0, 0.0, 0.0], [0.0, 0.0, 1.8330]], "origin": [0.0, 0.0, 0.1018],
         "basis": [["H", "sto-3g"], ["O", "6-31g*"]], "field": [0.0, -0.002, 0.004]}


def test_keys_are_the_same_in_every_process():
    """Computed in two fresh interpreters with different hash seeds, and here:
    a key from Python's salted hash(), or from set or dict iteration that
    depended on it, would differ between them."""
    m = MoleculeSpec(tuple(_SPEC["symbols"]), tuple(_SPEC["charges"]),
                     tuple(tuple(c) for c in _SPEC["coords"]), 0, 2, tuple(_SPEC["origin"]))
    model = ModelSpec("dft", tuple(tuple(p) for p in _SPEC["basis"]), "unrestricted", "b3lyp")
    mk = model_key(m, model, ScfSpec(1e-12, 1e-10, 200, 5))
    pk = point_key(mk, m.origin_bohr, Quantities(True, False, True), tuple(_SPEC["field"]))
    here = f"{mk} {pk}"
    outputs = []
    for seed in ("0", "4242"):
        env = {**os.environ, "PYTHONHASHSEED": seed,
               "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")])}
        proc = subprocess.run([sys.executable, "-c", _SUBPROCESS, json.dumps(_SPEC)],
                              capture_output=True, text=True, env=env, cwd=REPO, timeout=120)
        assert proc.returncode == 0, proc.stderr
        outputs.append(proc.stdout.strip())
    assert outputs == [here, here]
    assert all(HEX64.fullmatch(k) for k in here.split())
