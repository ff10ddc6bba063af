"""Component-by-component comparison of finite-field tensors with reference tensors.

Pure numerics plus the reading of one reference file (the contract's JSON tensor
layout, or ``.npy``/``.npz`` arrays). No PySCF.

The verdict
-----------
A component agrees when

    |ff - ref| <= sigmas * (err_ff + err_ref) + max(abs_floor[order], rel_floor * scale)

where err_ref is the reference's own error bar (zero for a file without one) and
scale is the largest magnitude in that reference tensor. Defaults: sigmas = 3,
since the error bars are estimates of one standard spread rather than bounds
(common practice: "within three error bars"); absolute floors of one tenth of
tensors.NEGLIGIBLE_ERROR_AU (1e-6, 1e-5, 1e-3, 0.1 au for orders 1-4), below any
difference that matters for a property; rel_floor = 1e-6, the precision a careful
analytic code reaches in double precision with tight convergence. A 1 % error in
any component of a molecular tensor exceeds all of these by orders of magnitude.

Frames
------
A reference file that carries a geometry is aligned to the job's frame: atoms are
matched in order (same symbols), both sets are centred, and the proper rotation
R minimising |R P - Q| (Kabsch) is applied to the reference tensors,
T'_ij.. = R_ia R_jb .. T_ab... If the aligned geometries differ by more than
ALIGN_TOLERANCE_BOHR, the frames cannot be matched and the check refuses.

Example
-------
>>> import numpy as np
>>> q = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 1.4]])
>>> r = np.array([[0.0, 0.0, 0.0], [1.4, 0.0, 0.0]])
>>> rot = kabsch_rotation(r, q)
>>> np.round(rot @ np.array([1.0, 0.0, 0.0]), 12).tolist()
[0.0, 0.0, 1.0]
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fieldprop.errors import InputError
from fieldprop.plan import AXES
from fieldprop.tensors import NEGLIGIBLE_ERROR_AU
from fieldprop.units import PROPERTY_ORDER

#: Largest RMS deviation (bohr) between aligned geometries for the frames to match:
#: geometries printed with 5-6 decimals in angstrom agree to ~1e-5 bohr; 1e-3
#: bohr still rejects any real structural difference.
ALIGN_TOLERANCE_BOHR = 1e-3
DEFAULT_SIGMAS = 3.0
DEFAULT_REL_FLOOR = 1e-6
DEFAULT_ABS_FLOOR_AU = {order: v / 10.0 for order, v in NEGLIGIBLE_ERROR_AU.items()}


@dataclass(frozen=True)
class ReferenceTensors:
    """Tensors to compare against, in the job's frame; ``error`` may be None."""

    source: str
    value: dict[str, np.ndarray]
    error: dict[str, np.ndarray | None]
    note: str = ""


@dataclass(frozen=True)
class ComponentComparison:
    name: str
    index: tuple[int, ...]
    ff_value: float | None
    ff_error: float | None
    ref_value: float
    ref_error: float
    allowed: float | None

    @property
    def difference(self) -> float | None:
        return None if self.ff_value is None else self.ff_value - self.ref_value

    @property
    def agrees(self) -> bool:
        return self.allowed is not None and abs(self.difference) <= self.allowed

    @property
    def ratio(self) -> float | None:
        """|difference| / combined error bar (inf when that bar is zero)."""
        if self.ff_value is None:
            return None
        bar = (self.ff_error or 0.0) + self.ref_error
        return abs(self.difference) / bar if bar > 0 else math.inf


def component_name(tensor: str, index) -> str:
    return tensor + "_" + "".join(AXES[i] for i in index)


def compare_tensors(ff_tensors, reference: ReferenceTensors, sigmas: float = DEFAULT_SIGMAS,
                    rel_floor: float = DEFAULT_REL_FLOOR,
                    abs_floor_au: dict[int, float] | None = None):
    """Every entry of every common tensor: a list of ComponentComparison per tensor.

    ``ff_tensors`` maps names to tensors.TensorResult. Each full-tensor entry is
    compared, so a reference that breaks index symmetry in one permutation is
    caught there. An unstable finite-field entry never agrees.
    """
    floors = dict(DEFAULT_ABS_FLOOR_AU if abs_floor_au is None else abs_floor_au)
    out: dict[str, list[ComponentComparison]] = {}
    for name, t in ff_tensors.items():
        if name not in reference.value:
            continue
        ref = reference.value[name]
        ref_err = reference.error.get(name)
        scale = float(np.max(np.abs(ref)))
        floor = max(floors[PROPERTY_ORDER[name]], rel_floor * scale)
        rows = []
        for index in np.ndindex(*ref.shape):
            stable = bool(t.stable[index])
            e_ref = float(ref_err[index]) if ref_err is not None else 0.0
            ff_v = float(t.value_au[index]) if stable else None
            ff_e = float(t.error_au[index]) if stable else None
            allowed = sigmas * (ff_e + e_ref) + floor if stable else None
            rows.append(ComponentComparison(component_name(name, index), tuple(index), ff_v,
                                            ff_e, float(ref[index]), e_ref, allowed))
        out[name] = rows
    return out


def worst(comparisons) -> list[ComponentComparison]:
    """Disagreeing entries, worst first (by difference over allowed)."""
    bad = [c for rows in comparisons.values() for c in rows if not c.agrees]
    return sorted(bad, key=lambda c: -(abs(c.difference) / c.allowed
                                       if c.allowed else math.inf))


def kabsch_rotation(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Proper rotation R (3x3) minimising sum |R (p_a - p_c) - (q_a - q_c)|^2."""
    pc, qc = p - p.mean(axis=0), q - q.mean(axis=0)
    u, _, vt = np.linalg.svd(pc.T @ qc)
    d = np.sign(np.linalg.det(vt.T @ u.T)) or 1.0
    return vt.T @ np.diag([1.0, 1.0, d]) @ u.T


def rotate_tensor(t: np.ndarray, rot: np.ndarray) -> np.ndarray:
    """T'_{ij..} = R_ia R_jb .. T_{ab..}."""
    out = np.asarray(t, dtype=float)
    for axis in range(out.ndim):
        out = np.moveaxis(np.tensordot(rot, out, axes=([1], [axis])), 0, axis)
    return out


def rotate_errors(e: np.ndarray, rot: np.ndarray) -> np.ndarray:
    """Error bars through a rotation: |R| applied linearly (an upper estimate)."""
    return rotate_tensor(e, np.abs(rot))


@dataclass(frozen=True)
class ReferenceFile:
    """What a reference file holds, in its own frame.

    ``geometry`` is None or (symbols, coords_bohr of shape (n, 3)); beta and gamma
    are already converted to the Taylor convention.
    """

    values: dict[str, np.ndarray]
    errors: dict[str, np.ndarray | None]
    geometry: tuple[list[str], np.ndarray] | None
    convention: str
    origin_bohr: np.ndarray | None


_SHAPES = {(3,): "dipole", (3, 3): "alpha", (3, 3, 3): "beta", (3, 3, 3, 3): "gamma"}


def _array(where: str, name: str, raw) -> np.ndarray:
    try:
        arr = np.array(raw, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{where}: {name} is not an array of numbers") from None
    expected = (3,) * PROPERTY_ORDER[name]
    if arr.shape != expected:
        raise InputError(f"{where}: {name} has shape {arr.shape}, expected {expected}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{where}: {name} holds non-finite numbers")
    return arr


def load_reference_file(path: Path) -> ReferenceFile:
    """Read tensors (and a geometry, if any) from JSON, .npy or .npz.

    JSON: ``{"tensors": {"alpha": {"value": [[...]], "error": [[...]]}, ...}}``
    (the result JSON of ``fieldprop run`` qualifies), optionally with the geometry
    as ``"geometry": {"symbols": [...], "coords_bohr": [[x, y, z], ...]}`` or the
    result JSON's ``job.molecule.atoms``, and ``"convention": "taylor"`` (default)
    or ``"perturbation"`` (beta_B = beta/2, gamma_B = gamma/6). ``.npy``: one array,
    the tensor named by its shape. ``.npz``: arrays named dipole, alpha, beta,
    gamma, and optionally symbols, coords_bohr and origin_bohr. The origin of a
    JSON file is its ``origin_bohr``.
    """
    where = str(path)
    if not path.is_file():
        raise InputError(f"{where}: reference file not found" if not path.exists()
                         else f"{where}: is not a file")
    values: dict[str, np.ndarray] = {}
    errors: dict[str, np.ndarray | None] = {}
    geometry = None
    origin = None
    convention = "taylor"
    suffix = path.suffix.lower()
    if suffix == ".npy":
        try:
            arr = np.load(path, allow_pickle=False)
        except (ValueError, OSError) as exc:
            raise InputError(f"{where}: not a NumPy .npy file ({exc})") from None
        name = _SHAPES.get(arr.shape)
        if name is None:
            raise InputError(f"{where}: array of shape {arr.shape} is no response tensor; "
                             "expected (3,), (3, 3), (3, 3, 3) or (3, 3, 3, 3)")
        values[name], errors[name] = _array(where, name, arr), None
    elif suffix == ".npz":
        try:
            data = np.load(path, allow_pickle=False)
        except (ValueError, OSError) as exc:
            raise InputError(f"{where}: not a NumPy .npz file ({exc})") from None
        for name in PROPERTY_ORDER:
            if name in data.files:
                values[name], errors[name] = _array(where, name, data[name]), None
        if "coords_bohr" in data.files:
            if "symbols" not in data.files:
                raise InputError(f"{where}: coords_bohr given without symbols")
            geometry = ([str(s) for s in data["symbols"]],
                        np.array(data["coords_bohr"], dtype=float))
        if "origin_bohr" in data.files:
            origin = np.array(data["origin_bohr"], dtype=float).reshape(3)
    else:
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise InputError(f"{where}: not valid JSON ({exc}); expected the tensor layout "
                             "of the result JSON, or a .npy/.npz file") from None
        tensors = doc.get("tensors") if isinstance(doc, dict) else None
        if not isinstance(tensors, dict):
            raise InputError(f"{where}: no \"tensors\" object; expected "
                             "{\"tensors\": {\"alpha\": {\"value\": [[...]]}}}")
        for name, entry in tensors.items():
            if name not in PROPERTY_ORDER:
                raise InputError(f"{where}: tensors.{name} is unknown; valid: "
                                 f"{', '.join(PROPERTY_ORDER)}")
            if not isinstance(entry, dict) or "value" not in entry:
                raise InputError(f"{where}: tensors.{name} needs a \"value\" array")
            if _has_null(entry["value"]):
                raise InputError(f"{where}: tensors.{name}.value holds null (an unstable "
                                 "component); remove it or give a number")
            values[name] = _array(where, f"{name}", entry["value"])
            err = entry.get("error")
            errors[name] = (None if err is None or _has_null(err)
                            else np.abs(_array(where, name, err)))
        convention = str(doc.get("convention", "taylor")).lower()
        if convention not in ("taylor", "perturbation"):
            raise InputError(f"{where}: convention {convention!r} unknown; use \"taylor\" or "
                             "\"perturbation\"")
        geometry = _json_geometry(where, doc)
        if doc.get("origin_bohr") is not None:
            try:
                origin = np.array(doc["origin_bohr"], dtype=float).reshape(3)
            except (TypeError, ValueError):
                raise InputError(f"{where}: origin_bohr must be [x, y, z]") from None
    if not values:
        raise InputError(f"{where}: holds no tensor (dipole, alpha, beta or gamma)")
    if convention == "perturbation":
        # B convention: beta_B = beta_T / 2, gamma_B = gamma_T / 6 (REFERENCES sect. 1).
        for name, factor in (("beta", 2.0), ("gamma", 6.0)):
            if name in values:
                values[name] = values[name] * factor
                if errors[name] is not None:
                    errors[name] = errors[name] * factor
    return ReferenceFile(values, errors, geometry, convention, origin)


def _has_null(raw) -> bool:
    if raw is None:
        return True
    if isinstance(raw, list):
        return any(_has_null(x) for x in raw)
    return False


def _json_geometry(where: str, doc: dict):
    geo = doc.get("geometry")
    if geo is None and isinstance(doc.get("job"), dict):
        atoms = doc["job"].get("molecule", {}).get("atoms")
        if atoms:
            geo = {"symbols": [a.get("symbol") for a in atoms],
                   "coords_bohr": [a.get("coords_bohr") for a in atoms]}
    if geo is None:
        return None
    try:
        symbols = [str(s) for s in geo["symbols"]]
        coords = np.array(geo["coords_bohr"], dtype=float)
    except (KeyError, TypeError, ValueError):
        raise InputError(f"{where}: geometry needs \"symbols\" and \"coords_bohr\" "
                         "(n x 3, bohr)") from None
    if coords.shape != (len(symbols), 3) or not np.all(np.isfinite(coords)):
        raise InputError(f"{where}: geometry coords_bohr must be {len(symbols)} x 3 numbers")
    return symbols, coords


def align_reference(where: str, ref: ReferenceFile, symbols, coords_bohr, charge: int,
                    origin_bohr) -> ReferenceTensors:
    """Rotate reference tensors into the job's frame (see module Notes).

    For a charged molecule the dipole depends on the origin: it is shifted from
    the reference origin (rotated and translated into the job's frame) to the
    job's origin, mu(O) = mu(O_ref) - q (O - O_ref); without a reference origin a
    charged molecule's dipole is not compared.
    """
    note = ""
    values, errors, geometry, ref_origin_bohr = ref.values, ref.errors, ref.geometry, ref.origin_bohr
    if geometry is None:
        rot = np.eye(3)
        shift = np.zeros(3)
        note = "no geometry in the reference: taken to be in the job's frame"
    else:
        ref_symbols, ref_coords = geometry
        if [s.lower() for s in ref_symbols] != [s.lower() for s in symbols]:
            raise InputError(f"{where}: reference geometry has atoms {' '.join(ref_symbols)}, "
                             f"the job {' '.join(symbols)} (same atoms, same order needed)")
        q = np.asarray(coords_bohr, dtype=float)
        rot = kabsch_rotation(ref_coords, q)
        aligned = (ref_coords - ref_coords.mean(axis=0)) @ rot.T + q.mean(axis=0)
        rmsd = float(np.sqrt(np.mean(np.sum((aligned - q) ** 2, axis=1))))
        if rmsd > ALIGN_TOLERANCE_BOHR:
            raise InputError(f"{where}: reference geometry cannot be matched to the job's "
                             f"(RMS deviation {rmsd:.2e} bohr after the best rotation, "
                             f"tolerance {ALIGN_TOLERANCE_BOHR:g}); not the same structure")
        shift = q.mean(axis=0) - ref_coords.mean(axis=0) @ rot.T
        if not np.allclose(rot, np.eye(3), atol=1e-12):
            note = f"reference rotated into the job's frame (RMS deviation {rmsd:.1e} bohr)"
    out_v, out_e = {}, {}
    for name, v in values.items():
        out_v[name] = rotate_tensor(v, rot)
        out_e[name] = None if errors.get(name) is None else rotate_errors(errors[name], rot)
    if "dipole" in out_v and charge != 0:
        if ref_origin_bohr is None:
            del out_v["dipole"], out_e["dipole"]
            note += ("; " if note else "") + ("charged molecule and no reference origin: "
                                              "dipole not compared")
        else:
            o_ref = rot @ np.asarray(ref_origin_bohr, dtype=float) + shift
            out_v["dipole"] = out_v["dipole"] - charge * (np.asarray(origin_bohr) - o_ref)
    return ReferenceTensors(where, out_v, out_e, note)
