"""Tensors in the dipole frame (report --components --frame dipole): z along
the dipole moment, x along alpha's largest perpendicular axis. A
one-dimensional push-pull beta along a tilted dipole becomes beta_zzz alone;
invariants do not change; error bars are carried linearly. No PySCF."""

import itertools

import numpy as np
import pytest

from fieldprop.errors import InputError
from fieldprop.numerics import tensors as ft
from fieldprop.outputs import summary


def _document(mu, alpha, beta, errors=1e-6):
    """A result document's tensors in the result JSON's layout."""
    tensors = {}
    for name, value in (("dipole", mu), ("alpha", alpha), ("beta", beta)):
        value = np.asarray(value, dtype=float)
        components = [{"name": name + "_" + "".join("xyz"[i] for i in idx),
                       "indices": list(idx), "value": float(value[idx]), "error": errors,
                       "status": "ok"}
                      for idx in itertools.product(range(3), repeat=value.ndim)]
        tensors[name] = {"value": value.tolist(),
                         "error": np.full(value.shape, errors).tolist(),
                         "components": components}
    return {"tensors": tensors, "invariants": {}, "job": {}, "geometry_computed_bohr": []}


def _rows(doc, frame="dipole"):
    header, rows, _ = summary.component_table([("r.json", doc)], "au", "taylor", frame)
    return {r[3]: dict(zip(header, r)) for r in rows}


def test_a_one_dimensional_beta_along_a_tilted_dipole_is_beta_zzz_alone():
    axis = np.array([1.0, 2.0, 2.0]) / 3.0
    mu = 2.5 * axis
    b = 400.0 * np.einsum("i,j,k->ijk", axis, axis, axis)
    # alpha: 30 along the axis, 12 along a perpendicular in-plane direction,
    # 9 out of plane: x of the dipole frame is that in-plane direction.
    inplane = np.array([2.0, 1.0, -2.0]) / 3.0
    out = np.cross(axis, inplane)
    a = 30 * np.outer(axis, axis) + 12 * np.outer(inplane, inplane) + 9 * np.outer(out, out)
    rows = _rows(_document(mu, a, b))
    assert rows["beta_zzz"]["value"] == pytest.approx(400.0)
    assert rows["dipole_z"]["value"] == pytest.approx(2.5)
    assert rows["alpha_xx"]["value"] == pytest.approx(12.0)
    assert rows["alpha_yy"]["value"] == pytest.approx(9.0)
    others = [r["value"] for n, r in rows.items() if n.startswith("beta_") and n != "beta_zzz"]
    assert max(abs(v) for v in others) < 1e-10
    assert {r["frame"] for r in rows.values()} == {"dipole"}
    # Error bars linearly: each turned component's bar is sum |R..| err.
    frame = ft.dipole_frame(mu, a)
    bound = ft.turned(np.full((3, 3, 3), 1e-6), frame, magnitudes=True)
    assert rows["beta_zzz"]["error"] == pytest.approx(bound[2, 2, 2])
    assert bound[2, 2, 2] >= 1e-6


def test_turning_keeps_the_invariants_and_the_frame_is_a_rotation():
    rng = np.random.default_rng(3)
    mu = rng.normal(size=3)
    a = rng.normal(size=(3, 3))
    a = a @ a.T
    b = ft.symmetrize(rng.normal(size=(3, 3, 3)))
    frame = ft.dipole_frame(mu, a)
    assert np.allclose(frame @ frame.T, np.eye(3)) and np.linalg.det(frame) == pytest.approx(1)
    turned = ft.turned(b, frame)
    assert ft.beta_hrs(turned) == pytest.approx(ft.beta_hrs(b))
    assert np.linalg.norm(ft.beta_vector(turned)) == pytest.approx(
        np.linalg.norm(ft.beta_vector(b)))


def test_no_dipole_frame_for_a_dipole_zero_within_its_bars():
    doc = _document([1e-9, 0.0, 0.0], np.eye(3), np.zeros((3, 3, 3)), errors=1e-6)
    with pytest.raises(InputError, match="zero within its error bars"):
        _rows(doc)
