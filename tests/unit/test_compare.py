"""Reference files, frame alignment and the verdict of ``fieldprop check`` (no PySCF)."""

import json

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from fieldprop.compare import (ReferenceTensors, align_reference, compare_tensors,
                               kabsch_rotation, load_reference_file, rotate_tensor, worst)
from fieldprop.errors import InputError
from fieldprop.tensors import symmetrize

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
