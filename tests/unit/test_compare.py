"""Reference files, frame alignment and the verdict of ``fieldprop check`` (no PySCF)."""

import json
import re

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from fieldprop.outputs.compare import (ReferenceTensors, align_reference, compare_tensors,
                               kabsch_rotation, load_reference_file, rotate_tensor, worst)
from fieldprop.errors import InputError
from fieldprop.numerics.tensors import symmetrize

RNG = np.random.default_rng(11)
COORDS = RNG.normal(size=(4, 3)) * 2.0
SYMBOLS = ["C", "O", "H", "H"]
ROT = Rotation.from_euler("xyz", [30.0, -50.0, 110.0], degrees=True).as_matrix()


def test_kabsch_recovers_a_known_rotation_and_tensors_rotate_covariantly():
    moved = COORDS @ ROT.T + np.array([1.0, -2.0, 0.5])
    rot = kabsch_rotation(COORDS, moved)
    assert np.allclose(rot, ROT, atol=1e-12)
    beta = symmetrize(RNG.normal(size=(3, 3, 3)))
    # beta_ijk v_i v_j v_k is a scalar: unchanged when both tensor and vector rotate.
    v = RNG.normal(size=3)
    assert np.einsum("ijk,i,j,k->", rotate_tensor(beta, ROT), ROT @ v, ROT @ v, ROT @ v) == \
        pytest.approx(np.einsum("ijk,i,j,k->", beta, v, v, v), rel=1e-12)


def test_a_rotated_reference_is_brought_back_into_the_job_frame(tmp_path):
    alpha = symmetrize(RNG.normal(size=(3, 3)))
    mu = RNG.normal(size=3)
    doc = {"geometry": {"symbols": SYMBOLS, "coords_bohr": (COORDS @ ROT.T).tolist()},
           "tensors": {"alpha": {"value": (ROT @ alpha @ ROT.T).tolist()},
                       "dipole": {"value": (ROT @ mu).tolist()}}}
    path = tmp_path / "ref.json"
    path.write_text(json.dumps(doc))
    ref = align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 0, (0, 0, 0))
    assert np.allclose(ref.value["alpha"], alpha, atol=1e-12)
    assert np.allclose(ref.value["dipole"], mu, atol=1e-12)
    doc["geometry"]["coords_bohr"][2][1] += 0.05  # another structure
    path.write_text(json.dumps(doc))
    with pytest.raises(InputError, match="cannot be matched"):
        align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 0, (0, 0, 0))


def test_npy_npz_and_perturbation_convention(tmp_path):
    beta = symmetrize(RNG.normal(size=(3, 3, 3)))
    np.save(tmp_path / "beta.npy", beta)
    assert np.array_equal(load_reference_file(tmp_path / "beta.npy").values["beta"], beta)
    np.savez(tmp_path / "all.npz", alpha=np.eye(3), gamma=np.ones((3, 3, 3, 3)))
    ref = load_reference_file(tmp_path / "all.npz")
    assert set(ref.values) == {"alpha", "gamma"} and ref.geometry is None
    # B convention: beta_B = beta_T / 2 (docs/REFERENCES.md sect. 1), so a file in
    # B gives back twice its numbers in fieldprop's Taylor convention.
    (tmp_path / "b.json").write_text(json.dumps({"convention": "perturbation",
                                                 "tensors": {"beta": {"value": beta.tolist()}}}))
    assert np.allclose(load_reference_file(tmp_path / "b.json").values["beta"], 2 * beta)
    np.save(tmp_path / "odd.npy", np.zeros((3, 2)))
    with pytest.raises(InputError, match="no response tensor"):
        load_reference_file(tmp_path / "odd.npy")
    (tmp_path / "null.json").write_text(json.dumps({"tensors": {"alpha": {
        "value": [[1, 0, 0], [0, None, 0], [0, 0, 1]]}}}))
    with pytest.raises(InputError, match="null"):
        load_reference_file(tmp_path / "null.json")


def test_charged_dipole_is_shifted_to_the_job_origin(tmp_path):
    mu = np.array([0.1, 0.2, 0.3])
    doc = {"origin_bohr": [1.0, 0.0, 0.0], "tensors": {"dipole": {"value": mu.tolist()}}}
    path = tmp_path / "ion.json"
    path.write_text(json.dumps(doc))
    ref = align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 1,
                          (0.0, 0.0, 0.0))
    # mu(O) = mu(O_ref) - q (O - O_ref) (docs/REFERENCES.md sect. 1), q = +1.
    assert np.allclose(ref.value["dipole"], mu - 1 * (np.zeros(3) - np.array([1.0, 0.0, 0.0])))
    del doc["origin_bohr"]
    path.write_text(json.dumps(doc))
    ref = align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 1, (0, 0, 0))
    assert "dipole" not in ref.value and "not compared" in ref.note


def test_verdict_names_the_entry_off_by_one_percent():
    from types import SimpleNamespace

    alpha = np.array([[8.0, 0.5, 0.1], [0.5, 7.0, 0.2], [0.1, 0.2, 6.0]])
    ff = {"alpha": SimpleNamespace(value_au=alpha, error_au=np.full((3, 3), 1e-6),
                                   stable=np.ones((3, 3), dtype=bool))}
    good = ReferenceTensors("ref", {"alpha": alpha + 1e-7}, {"alpha": None})
    assert not worst(compare_tensors(ff, good))
    wrong = alpha.copy()
    wrong[0, 2] *= 1.01
    bad = worst(compare_tensors(ff, ReferenceTensors("ref", {"alpha": wrong}, {"alpha": None})))
    assert [c.name for c in bad] == ["alpha_xz"]


# --------------------------------------------------------------- bounds and verdict

def _ff(**tensors):
    """Finite-field tensors as check sees them: {name: (value, error)}, all stable."""
    from types import SimpleNamespace

    return {name: SimpleNamespace(value_au=np.asarray(v, dtype=float),
                                  error_au=np.broadcast_to(np.asarray(e, dtype=float),
                                                           np.shape(v)).copy(),
                                  stable=np.ones(np.shape(v), dtype=bool))
            for name, (v, e) in tensors.items()}


ALPHA = np.array([[8.0, 0.5, 0.1], [0.5, 7.0, 0.2], [0.1, 0.2, 6.0]])


def _entry(comparisons, name):
    return next(c for rows in comparisons.values() for c in rows if c.name == name)


def test_an_error_between_the_bars_and_the_floor_agrees_only_by_the_floor_and_strict_fails_it():
    from fieldprop.outputs.compare import AgreementRule, verdict

    ff = _ff(alpha=(ALPHA, 1e-9))  # dipole-route-sized bars, far below the 1e-5 floor
    wrong = ALPHA.copy()
    wrong[1, 1] += 1e-7  # 33 combined bars, a hundredth of the absolute floor
    ref = ReferenceTensors("ref", {"alpha": wrong}, {"alpha": None})
    loose = compare_tensors(ff, ref)
    c = _entry(loose, "alpha_yy")
    assert c.agrees and c.floor_decided
    # Largest |alpha| = 8: relative floor 8e-6 < absolute 1e-5, which decides.
    assert c.bound == "absolute-floor" and c.floor == pytest.approx(1e-5)
    assert c.bars == pytest.approx(3e-9) and c.allowed == pytest.approx(1e-5 + 3e-9)
    assert c.margin == pytest.approx(1e-7 / (1e-5 + 3e-9), rel=1e-6)
    assert not _entry(loose, "alpha_xx").floor_decided
    out = verdict(loose, AgreementRule())
    assert out.agree and "1 of them only by the floor" in out.text
    assert "alpha_yy" in out.text and "--strict would fail" in out.text

    strict = AgreementRule(strict=True)
    tight = compare_tensors(ff, ref, strict)
    c = _entry(tight, "alpha_yy")
    assert not c.agrees and c.bound == "error-bars" and c.floor == 0.0
    out = verdict(tight, strict)
    assert not out.agree and out.text.startswith("DISAGREE: 1 of 9") and "alpha_yy" in out.text
    # The perfect reference passes --strict: the rule is not one that always fails.
    exact = ReferenceTensors("ref", {"alpha": ALPHA + 1e-10}, {"alpha": None})
    assert verdict(compare_tensors(ff, exact, strict), strict).agree


def test_strict_adds_the_two_error_bars_linearly():
    from fieldprop.outputs.compare import AgreementRule

    # ff and reference bars 1e-8 each: sum 2e-8, quadrature 1.41e-8. A difference of
    # 3 x 1.9e-8 is inside 3 x the sum and outside 3 x the quadrature.
    ff = _ff(alpha=(ALPHA, 1e-8))
    wrong = ALPHA.copy()
    wrong[2, 2] += 3 * 1.9e-8
    ref = ReferenceTensors("ref", {"alpha": wrong}, {"alpha": np.full((3, 3), 1e-8)})
    c = _entry(compare_tensors(ff, ref, AgreementRule(strict=True)), "alpha_zz")
    assert c.agrees and c.bars == pytest.approx(6e-8)
    no_error = ReferenceTensors("ref", {"alpha": wrong}, {"alpha": None})
    assert not _entry(compare_tensors(ff, no_error, AgreementRule(strict=True)), "alpha_zz").agrees


def test_the_relative_floor_is_named_where_it_is_the_larger():
    big = ALPHA * 100.0  # largest |alpha| 800: relative floor 8e-4 > absolute 1e-5
    c = _entry(compare_tensors(_ff(alpha=(big, 1e-9)),
                               ReferenceTensors("ref", {"alpha": big}, {"alpha": None})),
               "alpha_xy")
    assert c.bound == "relative-floor" and c.floor == pytest.approx(8e-4)
    bars = _entry(compare_tensors(_ff(alpha=(ALPHA, 1e-4)),
                                  ReferenceTensors("ref", {"alpha": ALPHA}, {"alpha": None})),
                  "alpha_xy")
    assert bars.bound == "error-bars"  # 3e-4 of bars above the 1e-5 floor


# ------------------------------------------------------------------------ diagnoses

MU = np.array([0.3, -0.7, 0.45])
BETA = symmetrize(RNG.normal(size=(3, 3, 3)) * 10.0)
GAMMA = symmetrize(RNG.normal(size=(3, 3, 3, 3)) * 500.0)
ERRORS = {"dipole": 1e-9, "alpha": 1e-9, "beta": 1e-7, "gamma": 1e-4}
TRUE = {"dipole": MU, "alpha": ALPHA, "beta": BETA, "gamma": GAMMA}


def _diagnoses(reference_values, strict=False):
    from fieldprop.outputs.compare import AgreementRule, diagnose

    ff = _ff(**{n: (v, ERRORS[n]) for n, v in TRUE.items()})
    ref = ReferenceTensors("ref", reference_values, {n: None for n in reference_values})
    rule = AgreementRule(strict=strict)
    comparisons = compare_tensors(ff, ref, rule)
    return [(d.cause, d.property) for d in diagnose(ff, ref, comparisons, rule)]


def test_each_common_mistake_is_named_and_only_it():
    assert _diagnoses(dict(TRUE)) == []
    assert _diagnoses({**TRUE, "dipole": -MU, "beta": -BETA}) == [("sign", "dipole"),
                                                                   ("sign", "beta")]
    assert _diagnoses({**TRUE, "beta": BETA / 2}) == [("perturbation-convention", "beta")]
    assert _diagnoses({**TRUE, "beta": BETA * 2}) == [("perturbation-convention", "beta")]
    assert _diagnoses({**TRUE, "gamma": GAMMA / 6}) == [("perturbation-convention", "gamma")]
    assert _diagnoses({**TRUE, "gamma": GAMMA * 6}) == [("perturbation-convention", "gamma")]
    # Weight moved between index permutations: beta_xyy up, beta_yxy and beta_yyx
    # down by half as much; the average over permutations is untouched.
    skew = BETA.copy()
    skew[0, 1, 1] += 0.4
    skew[1, 0, 1] -= 0.2
    skew[1, 1, 0] -= 0.2
    assert _diagnoses({**TRUE, "beta": skew}) == [("unsymmetrised", "beta")]


def test_the_detail_says_which_way_the_convention_factor_goes():
    from fieldprop.outputs.compare import AgreementRule, diagnose

    ff = _ff(beta=(BETA, 1e-7))
    for factor, words in ((0.5, "2 x reference agrees"), (2.0, "reference / 2 agrees")):
        ref = ReferenceTensors("ref", {"beta": BETA * factor}, {"beta": None})
        (d,) = diagnose(ff, ref, compare_tensors(ff, ref), AgreementRule())
        assert words in d.detail


def test_a_diagnosis_is_a_fit_not_a_resemblance():
    # -reference with one more entry wrong: the sign explains all but that entry.
    wrong = -ALPHA
    wrong[0, 2] = wrong[2, 0] = -0.2
    assert _diagnoses({**TRUE, "alpha": wrong}) == []
    # A 1 % error in one entry, and an unrelated tensor: no cause named.
    off = BETA.copy()
    off[2, 2, 2] *= 1.01
    assert _diagnoses({**TRUE, "beta": off}) == []
    assert _diagnoses({**TRUE, "beta": symmetrize(RNG.normal(size=(3, 3, 3)))}) == []
    # Half of beta plus an error in one entry: not the convention alone.
    half = BETA / 2
    half[0, 0, 0] += 0.1
    assert _diagnoses({**TRUE, "beta": half}) == []


def test_a_uniform_difference_of_the_size_of_another_bohr_is_named_under_strict():
    # CODATA 2006 and 2022 bohr (scipy.constants._codata tables): 0.52917720859 and
    # 0.529177210544 angstrom, d = -3.69e-9. alpha in SI converted back with the
    # other edition's bohr moves by 2 d (its unit holds a0^2).
    d = 0.52917720859 / 0.529177210544 - 1.0
    moved = {**TRUE, "alpha": ALPHA * (1.0 + d) ** 2}
    assert _diagnoses(moved) == []  # 6e-8 hides under the 1e-5 floor
    assert _diagnoses(moved, strict=True) == [("bohr-value", "alpha")]
    # The same relative size but not uniform across the entries: no such cause.
    uneven = ALPHA.copy()
    uneven[0, 0] *= 1.0 + 2 * d
    assert _diagnoses({**TRUE, "alpha": uneven}, strict=True) == []
    # A uniform 1e-4: a scaling, but far beyond any bohr.
    assert _diagnoses({**TRUE, "alpha": ALPHA * (1 + 1e-4)}, strict=True) == []


def test_the_bohr_band_holds_every_pair_of_codata_editions_scipy_knows():
    from fieldprop.outputs.compare import BOHR_EDITION_BAND

    codata = pytest.importorskip("scipy.constants._codata")
    values = []
    for name in dir(codata):
        text = getattr(codata, name)
        if name.startswith("txt") and isinstance(text, str):
            line = next((ln for ln in text.splitlines() if ln.startswith("Bohr radius ")), None)
            if line is not None:  # "0.529 177 208 59 e-10 ..." or "5.291 772 109 03 e-11 ..."
                mantissa, exponent = re.match(r"\s*([\d.][\d. ]*?)\s*e(-\d+)",
                                              line[len("Bohr radius"):]).groups()
                values.append(float(mantissa.replace(" ", "") + "e" + exponent))
    assert len(values) >= 5  # 2006 .. 2022
    assert all(abs(v / 5.29177e-11 - 1) < 1e-5 for v in values)  # metres, read right
    diffs = [abs(a / b - 1) for a in values for b in values if a != b]
    assert BOHR_EDITION_BAND[0] <= min(diffs) and max(diffs) <= BOHR_EDITION_BAND[1]


def _geometry_doc(tmp_path, coords, alpha=ALPHA):
    path = tmp_path / "ref.json"
    path.write_text(json.dumps({"geometry": {"symbols": SYMBOLS, "coords_bohr": coords.tolist()},
                                "tensors": {"alpha": {"value": alpha.tolist()}}}))
    return path


def test_angstrom_coordinates_given_as_bohr_are_named_and_still_aligned(tmp_path):
    from fieldprop.numerics.units import ANGSTROM_TO_BOHR, BOHR_TO_ANGSTROM

    turned = ROT @ ALPHA @ ROT.T
    for factor, words in ((BOHR_TO_ANGSTROM, "angstrom coordinates given as coords_bohr"),
                          (ANGSTROM_TO_BOHR, "bohr coordinates converted to bohr again")):
        path = _geometry_doc(tmp_path, (COORDS @ ROT.T) * factor, turned)
        ref = align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 0,
                              (0, 0, 0))
        (d,) = ref.diagnoses
        assert (d.cause, d.property) == ("geometry-units", "geometry") and words in d.detail
        assert np.allclose(ref.value["alpha"], ALPHA, atol=1e-12)
    # Twice the size is no unit slip: still refused.
    path = _geometry_doc(tmp_path, COORDS * 2.0)
    with pytest.raises(InputError, match="also when scaled by the bohr"):
        align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 0, (0, 0, 0))


def test_a_geometry_scaled_by_another_codata_bohr_is_named(tmp_path):
    # CODATA 2018 against 2022 (scipy.constants._codata): 0.529177210903 and
    # 0.529177210544 angstrom, d = 6.8e-10: coordinates converted from angstrom
    # with the older bohr are the job's times 1/(1 + d) ... written at full precision.
    d = 0.529177210544 / 0.529177210903 - 1.0
    path = _geometry_doc(tmp_path, (COORDS - COORDS.mean(axis=0)) * (1 + d) @ ROT.T)
    ref = align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 0, (0, 0, 0))
    (diag,) = ref.diagnoses
    assert (diag.cause, diag.property) == ("bohr-value", "geometry")
    assert f"d = {d:.2g}" in diag.detail
    # Printed to 6 decimals the rounding (~3e-7 bohr) swamps the 2e-9 bohr scaling:
    # nothing to name, and nothing named.
    path = _geometry_doc(tmp_path, np.round(COORDS * (1 + d), 6))
    assert align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 0,
                           (0, 0, 0)).diagnoses == ()
    # The exact geometry: nothing.
    path = _geometry_doc(tmp_path, COORDS)
    assert align_reference(str(path), load_reference_file(path), SYMBOLS, COORDS, 0,
                           (0, 0, 0)).diagnoses == ()
