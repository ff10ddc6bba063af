"""Component-by-component comparison of finite-field tensors with reference tensors.

Pure numerics plus the reading of one reference file (the contract's JSON tensor
layout, or ``.npy``/``.npz`` arrays). No PySCF.

The verdict
-----------
A component agrees when

    |ff - ref| <= allowed = bars + floor,   bars = sigmas * (err_ff + err_ref)

where err_ref is the reference's own error bar (zero for a file without one) and
the floor is max(abs_floor[order], rel_floor * scale), scale being the largest
magnitude in that reference tensor. The two error bars add linearly: they are
estimates of truncation and round-off, not independent Gaussian spreads, and the
two sides share the field ladder (the analytic reference of ``check`` uses the
same field strengths), so their errors may be correlated; the sum bounds the
combination for any correlation, quadrature only for none. Defaults: sigmas = 3,
since the error bars are estimates of one standard spread rather than bounds
(common practice: "within three error bars"); absolute floors of one tenth of
tensors.NEGLIGIBLE_ERROR_AU (1e-6, 1e-5, 1e-3, 0.1 au for orders 1-4), below any
difference that matters for a property; rel_floor = 1e-6, the precision a careful
analytic code reaches in double precision with tight convergence. A 1 % error in
any component of a molecular tensor exceeds all of these by orders of magnitude.

Where the error bars are far below the floor (1e-9 for alpha on the dipole
route), differences up to the floor pass: each entry therefore records which term
of ``allowed`` is the larger (its ``bound``: error bars, relative floor or
absolute floor), its ``margin`` |ff - ref| / allowed (<= 1 agrees), and whether
it agrees only by the floor (|ff - ref| > bars). ``strict`` drops the floors:
allowed = bars.

Diagnoses
---------
For a tensor with disagreeing entries, ``diagnose`` tries the commonest mistakes
of a comparison between codes, each as a transformed reference judged by the same
rule: -reference (sign); 2x or 1/2x beta, 6x or 1/6x gamma (perturbation
convention); the average over index permutations (an unsymmetrised reference);
(1 + lambda) x reference with lambda fitted and of the size a different CODATA
edition of the bohr makes (a heuristic). A cause is named only when the
transformed reference agrees in every stable entry. ``align_reference`` adds two
from the geometry: coordinates that match only after scaling by the bohr
(angstrom given as bohr or the other way round), and a geometry that is the
job's scaled by 1 + d, |d| of the size of the differences between CODATA bohrs.

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
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fieldprop.errors import InputError
from fieldprop.inputs.job import echo_atoms
from fieldprop.numerics.plan import AXES
from fieldprop.numerics.tensors import NEGLIGIBLE_ERROR_AU, symmetrize
from fieldprop.numerics.units import ANGSTROM_TO_BOHR, BOHR_TO_ANGSTROM, PROPERTY_ORDER

#: Largest RMS deviation (bohr) between aligned geometries for the frames to match:
#: geometries printed with 5-6 decimals in angstrom agree to ~1e-5 bohr; 1e-3
#: bohr still rejects any real structural difference.
ALIGN_TOLERANCE_BOHR = 1e-3
DEFAULT_SIGMAS = 3.0
DEFAULT_REL_FLOOR = 1e-6
DEFAULT_ABS_FLOOR_AU = {order: v / 10.0 for order, v in NEGLIGIBLE_ERROR_AU.items()}

#: What decides an entry's allowed difference: the larger of its two terms.
BOUND_ERROR_BARS = "error-bars"
BOUND_RELATIVE_FLOOR = "relative-floor"
BOUND_ABSOLUTE_FLOOR = "absolute-floor"
_BOUND_TEXT = {BOUND_ERROR_BARS: "the error bars", BOUND_RELATIVE_FLOOR: "the relative floor",
               BOUND_ABSOLUTE_FLOOR: "the absolute floor"}

#: The causes ``diagnose`` and ``align_reference`` can name (the JSON's ``cause``).
CAUSE_SIGN = "sign"
CAUSE_CONVENTION = "perturbation-convention"
CAUSE_UNSYMMETRISED = "unsymmetrised"
CAUSE_GEOMETRY_UNITS = "geometry-units"
CAUSE_BOHR_VALUE = "bohr-value"

#: Relative differences d between the bohr radius of two CODATA editions, the
#: band in which a uniform scaling is called "another bohr". SciPy's own tables
#: (scipy.constants._codata, editions 2006-2022) give the bohr in angstrom as
#: 0.52917720859 (2006), 0.52917721092 (2010, PySCF's nist.BOHR), 0.52917721067
#: (2014), 0.529177210903 (2018), 0.529177210544 (2022): pairs differ by 3.2e-11
#: (2010/2018) to 4.4e-9 (2006/2010). The band reaches a factor 3 below and 20
#: above, for older editions and for a tensor of order n, which moves by about
#: n * d when it passes through SI or esu units converted with another bohr
#: (tests/unit/test_compare.py reads SciPy's tables against it). A heuristic: a
#: difference in this band is a hint, not a proof.
BOHR_EDITION_BAND = (1e-11, 1e-7)
#: A uniform scale explains a geometry mismatch when it leaves at most this share
#: of the RMS deviation (rounding of printed coordinates is not a scaling and
#: stays).
SCALE_EXPLAINS_SHARE = 0.25


@dataclass(frozen=True)
class Diagnosis:
    """A likely cause of a disagreement: ``cause`` one of the CAUSE_* names,
    ``property`` the tensor it fits (or "geometry"), ``detail`` one line."""

    cause: str
    property: str
    detail: str


@dataclass(frozen=True)
class ReferenceTensors:
    """Tensors to compare against, in the job's frame; ``error`` may be None.
    ``diagnoses``: what the alignment of the reference's geometry found."""

    source: str
    value: dict[str, np.ndarray]
    error: dict[str, np.ndarray | None]
    note: str = ""
    diagnoses: tuple[Diagnosis, ...] = ()


@dataclass(frozen=True)
class AgreementRule:
    """How large a difference an entry may show (see the module Notes).

    ``abs_floor_au`` maps the order of a tensor (1-4) to its absolute floor, au;
    ``strict``: error bars only, no floor.
    """

    sigmas: float = DEFAULT_SIGMAS
    rel_floor: float = DEFAULT_REL_FLOOR
    abs_floor_au: dict[int, float] = field(default_factory=lambda: dict(DEFAULT_ABS_FLOOR_AU))
    strict: bool = False

    def floor(self, order: int, scale: float) -> tuple[float, str | None]:
        """The floor of a tensor of this order whose largest |entry| is ``scale``,
        and its kind (None under ``strict``)."""
        if self.strict:
            return 0.0, None
        absolute, relative = self.abs_floor_au[order], self.rel_floor * scale
        if relative > absolute:
            return relative, BOUND_RELATIVE_FLOOR
        return absolute, BOUND_ABSOLUTE_FLOOR

    def describe(self) -> str:
        bars = f"{self.sigmas:g} x (ff error + ref error)"
        if self.strict:
            return f"|ff - ref| <= allowed = {bars} (--strict: no floor)"
        return (f"|ff - ref| <= allowed = {bars} + floor, the floor being the larger of "
                f"{self.rel_floor:g} x largest |ref| of the tensor and an absolute one "
                f"({', '.join(f'{self.abs_floor_au[PROPERTY_ORDER[n]]:g}' for n in PROPERTY_ORDER)}"
                f" au for {', '.join(PROPERTY_ORDER)})")


@dataclass(frozen=True)
class ComponentComparison:
    """One tensor entry against the reference.

    ``bars`` = sigmas x (ff error + ref error), None for an unstable finite-field
    entry (which never agrees); ``floor`` and ``floor_kind`` as
    AgreementRule.floor gave them for the tensor.
    """

    name: str
    index: tuple[int, ...]
    ff_value: float | None
    ff_error: float | None
    ref_value: float
    ref_error: float
    bars: float | None
    floor: float = 0.0
    floor_kind: str | None = None

    @property
    def difference(self) -> float | None:
        return None if self.ff_value is None else self.ff_value - self.ref_value

    @property
    def allowed(self) -> float | None:
        return None if self.bars is None else self.bars + self.floor

    @property
    def agrees(self) -> bool:
        return self.allowed is not None and abs(self.difference) <= self.allowed

    @property
    def bound(self) -> str | None:
        """The larger term of ``allowed``: BOUND_ERROR_BARS or the floor's kind."""
        if self.bars is None:
            return None
        return BOUND_ERROR_BARS if self.floor_kind is None or self.bars >= self.floor \
            else self.floor_kind

    @property
    def margin(self) -> float | None:
        """|difference| / allowed: <= 1 agrees. None when unstable, or when nothing
        is allowed and the difference is not zero (infinite)."""
        if self.allowed is None:
            return None
        if self.allowed > 0:
            return abs(self.difference) / self.allowed
        return 0.0 if self.difference == 0 else None

    @property
    def floor_decided(self) -> bool:
        """Agrees only by the floor: the difference exceeds the error bars' term."""
        return self.agrees and abs(self.difference) > self.bars

    @property
    def ratio(self) -> float | None:
        """|difference| / combined error bar (inf when that bar is zero)."""
        if self.ff_value is None:
            return None
        bar = (self.ff_error or 0.0) + self.ref_error
        return abs(self.difference) / bar if bar > 0 else math.inf


def component_name(tensor: str, index) -> str:
    return tensor + "_" + "".join(AXES[i] for i in index)


def compare_tensor(name: str, t, ref: np.ndarray, ref_err: np.ndarray | None,
                   rule: AgreementRule) -> list[ComponentComparison]:
    """Every entry of one tensor (``t`` a tensors.TensorResult) against ``ref``."""
    floor, kind = rule.floor(PROPERTY_ORDER[name], float(np.max(np.abs(ref))))
    rows = []
    for index in np.ndindex(*ref.shape):
        stable = bool(t.stable[index])
        e_ref = float(ref_err[index]) if ref_err is not None else 0.0
        ff_v = float(t.value_au[index]) if stable else None
        ff_e = float(t.error_au[index]) if stable else None
        bars = rule.sigmas * (ff_e + e_ref) if stable else None
        rows.append(ComponentComparison(component_name(name, index), tuple(index), ff_v, ff_e,
                                        float(ref[index]), e_ref, bars, floor, kind))
    return rows


def compare_tensors(ff_tensors, reference: ReferenceTensors,
                    rule: AgreementRule | None = None) -> dict[str, list[ComponentComparison]]:
    """Every entry of every common tensor: a list of ComponentComparison per tensor.

    ``ff_tensors`` maps names to tensors.TensorResult. Each full-tensor entry is
    compared, so a reference that breaks index symmetry in one permutation is
    caught there. An unstable finite-field entry never agrees.
    """
    rule = AgreementRule() if rule is None else rule
    return {name: compare_tensor(name, t, reference.value[name], reference.error.get(name), rule)
            for name, t in ff_tensors.items() if name in reference.value}


def worst(comparisons) -> list[ComponentComparison]:
    """Disagreeing entries, worst first (by margin; unstable ones first)."""
    bad = [c for rows in comparisons.values() for c in rows if not c.agrees]
    return sorted(bad, key=lambda c: -(math.inf if c.margin is None else c.margin))


def _stable_fit(rows) -> tuple[bool, bool]:
    """(every stable entry agrees, some stable entry exists)."""
    stable = [c for c in rows if c.ff_value is not None]
    return all(c.agrees for c in stable), bool(stable)


def _candidates(name: str, ref: np.ndarray, err: np.ndarray | None, ff: np.ndarray,
                stable: np.ndarray):
    """(cause, transformed reference, its errors, detail) for each mistake tried."""
    order = PROPERTY_ORDER[name]

    def scaled(f: float):
        return f * ref, None if err is None else abs(f) * err

    yield (CAUSE_SIGN, *scaled(-1.0),
           "-reference agrees: the opposite sign convention (here E(F) = E0 - mu.F - ..., "
           "mu = -dE/dF, the dipole pointing from - to +)")
    factor = {"beta": 2.0, "gamma": 6.0}.get(name)
    if factor is not None:
        f = f"{factor:g}"
        yield (CAUSE_CONVENTION, *scaled(factor),
               f"{f} x reference agrees: the reference is in the perturbation convention "
               f"({name}_B = {name}/{f}); declare \"convention\": \"perturbation\" in its JSON")
        yield (CAUSE_CONVENTION, *scaled(1.0 / factor),
               f"reference / {f} agrees: the reference holds Taylor numbers declared "
               f"\"convention\": \"perturbation\", or was multiplied by {f} twice")
    if order >= 2:
        sym = symmetrize(ref)
        asym = np.abs(ref - sym)
        where = np.unravel_index(int(np.argmax(asym)), ref.shape)
        yield (CAUSE_UNSYMMETRISED, sym, None if err is None else symmetrize(err),
               f"its average over index permutations agrees: the reference is not symmetric "
               f"(largest departure {float(asym[where]):.2g} au at "
               f"{component_name(name, where)}), while a static {name} is (mixed field "
               "derivatives commute); symmetrise it, or look for entries stored under "
               "another index order")
    mask = stable & np.isfinite(ff)
    norm = float(np.sum(ref[mask] ** 2))
    if norm > 0:
        lam = float(np.sum((ff[mask] - ref[mask]) * ref[mask]) / norm)
        per_order = abs(lam) / order
        low, high = BOHR_EDITION_BAND
        if low <= per_order <= high:
            yield (CAUSE_BOHR_VALUE, *scaled(1.0 + lam),
                   f"(1 + lambda) x reference agrees, lambda = {lam:.2g} ({lam / order:.2g} "
                   f"per order of {name}): the size of the change of the bohr between CODATA "
                   "editions, in a tensor converted through SI, esu or angstrom units with "
                   "another edition (a heuristic: a uniform relative difference fitted)")


def diagnose(ff_tensors, reference: ReferenceTensors, comparisons,
             rule: AgreementRule | None = None) -> list[Diagnosis]:
    """Likely causes of the disagreements in ``comparisons`` (see module Notes).

    Each cause is a fit: the reference transformed accordingly agrees in every
    stable entry of a tensor of which some stable entry disagrees untransformed.
    The geometry's diagnoses from the alignment come first.
    """
    rule = AgreementRule() if rule is None else rule
    found = list(reference.diagnoses)
    for name, rows in comparisons.items():
        if all(c.agrees for c in rows if c.ff_value is not None):
            continue
        t = ff_tensors[name]
        ref, err = reference.value[name], reference.error.get(name)
        stable = np.asarray(t.stable, dtype=bool)
        ff = np.where(stable, np.asarray(t.value_au, dtype=float), np.nan)
        for cause, value, error, detail in _candidates(name, ref, err, ff, stable):
            fits, any_stable = _stable_fit(compare_tensor(name, t, value, error, rule))
            if fits and any_stable:
                found.append(Diagnosis(cause, name, detail))
    return found


@dataclass(frozen=True)
class Verdict:
    """The check's outcome: ``agree`` (every entry agrees), the one-line ``text``."""

    agree: bool
    text: str
    entries: int
    disagreeing: tuple[ComponentComparison, ...]
    floor_decided: tuple[ComponentComparison, ...]


def verdict(comparisons, rule: AgreementRule, diagnoses=()) -> Verdict:
    """The one-line verdict; it says when a floor decided and names likely causes."""
    total = sum(len(rows) for rows in comparisons.values())
    bad = worst(comparisons)
    by_floor = sorted((c for rows in comparisons.values() for c in rows if c.floor_decided),
                      key=lambda c: -c.ratio)
    bars = f"{rule.sigmas:g} error bars"
    causes = ", ".join(f"{d.cause} ({d.property})" for d in diagnoses)
    if bad:
        names = ", ".join(
            f"{c.name} (diff {c.difference:+.3g}, allowed {c.allowed:.2g} by "
            f"{_BOUND_TEXT[c.bound]})"
            if c.ff_value is not None else f"{c.name} (unstable)" for c in bad[:3])
        text = (f"DISAGREE: {len(bad)} of {total} tensor entries outside "
                f"{bars + (' (--strict: no floor)' if rule.strict else ' plus the floor')}; "
                f"worst: {names}")
        if causes:
            text += f"; likely cause: {causes}"
    else:
        text = f"AGREE: all {total} tensor entries of {', '.join(comparisons)} "
        if by_floor:
            c = by_floor[0]
            text += (f"within the bounds, {len(by_floor)} of them only by the floor (beyond "
                     f"{bars}; worst {c.name}: diff {c.difference:+.2g} is {c.ratio:.3g} error "
                     f"bars, {_BOUND_TEXT[c.floor_kind]} {c.floor:.2g} au); --strict would "
                     "fail them")
        else:
            text += f"within {bars}" + (" (--strict: no floor)" if rule.strict else "")
            floored = [c for rows in comparisons.values() for c in rows
                       if c.bound not in (None, BOUND_ERROR_BARS)]
            if floored:
                text += (f"; a floor allows more for {len(floored)} of them (up to "
                         f"{max(c.allowed for c in floored):.2g} au; --strict tests the error "
                         "bars alone)")
        if causes:
            text += f"; note: {causes}"
    return Verdict(not bad, text, total, tuple(bad), tuple(by_floor))


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
        atoms = echo_atoms(doc["job"])
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


def _kabsch_fit(p: np.ndarray, q: np.ndarray):
    """Best rotation of ``p`` onto ``q``: (R, RMS deviation in bohr, the centred
    rotated p, the centred q)."""
    rot = kabsch_rotation(p, q)
    pc, qc = (p - p.mean(axis=0)) @ rot.T, q - q.mean(axis=0)
    return rot, float(np.sqrt(np.mean(np.sum((pc - qc) ** 2, axis=1)))), pc, qc


#: Scalings of a reference geometry tried when it does not match: (factor applied
#: to the reference's coordinates, what it means).
_UNIT_SLIPS = (
    (ANGSTROM_TO_BOHR, "matches the job's after multiplying by {f:.6g} (bohr per angstrom): "
     "angstrom coordinates given as coords_bohr in the reference, or the job's bohr "
     "coordinates declared units = \"angstrom\""),
    (BOHR_TO_ANGSTROM, "matches the job's after multiplying by {f:.6g} (angstrom per bohr): "
     "bohr coordinates converted to bohr again in the reference, or the job's angstrom "
     "coordinates declared units = \"bohr\""),
)


def _uniform_scale(pc: np.ndarray, qc: np.ndarray, rmsd: float) -> Diagnosis | None:
    """A geometry that is the job's scaled by 1 + d with d of the size of the
    differences between CODATA bohrs, the scaling explaining the mismatch."""
    norm = float(np.sum(pc * pc))
    if norm == 0.0 or rmsd == 0.0:
        return None
    s = float(np.sum(pc * qc)) / norm
    d = 1.0 / s - 1.0  # reference = job x (1 + d)
    left = float(np.sqrt(np.mean(np.sum((s * pc - qc) ** 2, axis=1))))
    low, high = BOHR_EDITION_BAND
    if not (low <= abs(d) <= high and left <= SCALE_EXPLAINS_SHARE * rmsd):
        return None
    return Diagnosis(CAUSE_BOHR_VALUE, "geometry",
                     f"the reference geometry is the job's scaled by 1 + d, d = {d:.2g} (RMS "
                     f"deviation {rmsd:.2g} bohr, {left:.2g} after the scaling): the size of the "
                     "change of the bohr between CODATA editions, so the reference converted "
                     "angstrom to bohr with another edition (a heuristic); each tensor then "
                     "differs by |d| times its logarithmic derivative with respect to the "
                     "molecule's size, not computed here: a few |d| of itself, below the "
                     "floors")


def align_reference(where: str, ref: ReferenceFile, symbols, coords_bohr, charge: int,
                    origin_bohr) -> ReferenceTensors:
    """Rotate reference tensors into the job's frame (see module Notes).

    For a charged molecule the dipole depends on the origin: it is shifted from
    the reference origin (rotated and translated into the job's frame) to the
    job's origin, mu(O) = mu(O_ref) - q (O - O_ref); without a reference origin a
    charged molecule's dipole is not compared. A geometry that matches only once
    scaled by the bohr is aligned so, with a diagnosis (the tensors are compared
    all the same: their numbers do not depend on how the geometry was labelled).
    """
    note = ""
    diagnoses: list[Diagnosis] = []
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
        rot, rmsd, pc, qc = _kabsch_fit(ref_coords, q)
        if rmsd > ALIGN_TOLERANCE_BOHR:
            for factor, story in _UNIT_SLIPS:
                s_rot, s_rmsd, _, _ = _kabsch_fit(ref_coords * factor, q)
                if s_rmsd <= ALIGN_TOLERANCE_BOHR:
                    diagnoses.append(Diagnosis(
                        CAUSE_GEOMETRY_UNITS, "geometry",
                        f"the reference geometry does not match the job's (RMS deviation "
                        f"{rmsd:.2g} bohr) but " + story.format(f=factor) +
                        f" (then {s_rmsd:.1e} bohr)"))
                    ref_coords, rot, rmsd = ref_coords * factor, s_rot, s_rmsd
                    if ref_origin_bohr is not None:
                        ref_origin_bohr = np.asarray(ref_origin_bohr, dtype=float) * factor
                    break
            else:
                raise InputError(f"{where}: reference geometry cannot be matched to the job's "
                                 f"(RMS deviation {rmsd:.2e} bohr after the best rotation, "
                                 f"tolerance {ALIGN_TOLERANCE_BOHR:g}, also when scaled by the "
                                 "bohr); not the same structure")
        else:
            scaled = _uniform_scale(pc, qc, rmsd)
            if scaled is not None:
                diagnoses.append(scaled)
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
    return ReferenceTensors(where, out_v, out_e, note, tuple(diagnoses))
