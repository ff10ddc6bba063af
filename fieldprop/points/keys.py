"""Content keys of stored results: what determines a number, hashed.

A field point is identified by what fixes its numbers, not by its place in a
plan: two jobs that ask for the same field vector of the same molecule and model
share one stored point, whatever their ladders, levels or property lists.

- :func:`model_key` covers the zero-field reference (the start and state
  reference of every point): nuclei (symbols, bohr at 1e-10), charge,
  multiplicity, the basis as given (name, or per element name or text), method,
  functional, reference (restricted/unrestricted), the SCF settings that change
  results (energy and orbital-gradient tolerances, DFT grid level, solver; not
  ``max_iterations`` or the gradient a stalled point may end at, which only decide
  whether a point is accepted), and
  :data:`NUMERICS_VERSION`.
- :func:`point_key` adds the quantities computed at the point (:class:`Quantities`),
  the origin of the dipole operator (bohr at 1e-10) and the field vector exactly
  (``float.hex`` of each component), and for a point computed with tightened
  convergence (the adaptive window lowering a noise floor) its targets
  (:func:`tolerance_document`).
- Coupled-cluster models add the amplitude solver's convergence ([correlation])
  to the model's SCF settings; other models' keys do not have it.

The backend's version (PySCF's, and libxc's for DFT) is not in the keys: keys
must be computable without PySCF (``collect`` and ``plan`` look points up by
key), and a key with the version in it would, after an upgrade, silently leave
the old points beside the new ones. The store records the version with the
model's reference (its backend facts, :data:`BACKEND_VERSION_FACTS`), and a
process whose backend differs refuses to add points to that model
(:func:`backend_version_conflict`): one Richardson table never mixes points of
two versions, and what is stored stays readable by any version.

Keys are SHA-256 over a canonical JSON text (sorted keys, no spaces); never
Python's salted ``hash``. Pure: no PySCF, no I/O.

>>> from fieldprop.inputs.job import ModelSpec, ScfSpec
>>> from fieldprop.inputs.molecule import MoleculeSpec
>>> m = MoleculeSpec(("H", "H"), (1, 1), ((0.0, 0.0, 0.0), (0.0, 0.0, 1.4)), 0, 1,
...                  (0.0, 0.0, 0.7))
>>> k = model_key(m, ModelSpec("hf", "sto-3g", "restricted"), ScfSpec(1e-11, 1e-8, 200, None))
>>> len(k), k == model_key(m, ModelSpec("hf", "sto-3g", "restricted"),
...                        ScfSpec(1e-11, 1e-8, 50, None))
(64, True)
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass

#: Bumped whenever the backend's numbers change for the same inputs (a new field
#: term, another SCF finish, another state check): stored points of an older
#: numerics version are then not reused.
NUMERICS_VERSION = 4

#: The backend facts that name the backend's version and their names for
#: people: PySCF's, and libxc's (whose functionals a DFT model evaluates;
#: PySCF's wheels bundle it, but a PySCF built from source may take another).
BACKEND_VERSION_FACTS = {"pyscf_version": "PySCF", "libxc_version": "libxc"}

#: Coordinates and origins enter keys rounded to this many decimals of a bohr:
#: far below any geometric difference that matters (1e-10 bohr moves an energy
#: by ~1e-10 x gradient), far above the rounding of an angstrom-to-bohr
#: conversion (~1e-16 bohr), so the same geometry typed twice keys alike.
COORDINATE_DECIMALS = 10


@dataclass(frozen=True)
class Quantities:
    """What a point computes beside the energy.

    ``dipole``: the analytic SCF dipole; ``alpha``: the analytic CPHF/CPKS alpha
    at the field; ``newton_dipole_error``: the dipole's convergence error from the
    full-Hessian Newton step (open shells on the dipole route) rather than the
    diagonal estimate.
    """

    dipole: bool
    alpha: bool = False
    newton_dipole_error: bool = False

    def canonical(self) -> list[str]:
        out = ["energy"]
        if self.dipole:
            out.append("dipole")
            out.append("dipole_error:" + ("newton" if self.newton_dipole_error else "diagonal"))
        if self.alpha:
            out.append("alpha")
        return out


def _fixed(x: float) -> str:
    text = f"{float(x):.{COORDINATE_DECIMALS}f}"
    return "0." + "0" * COORDINATE_DECIMALS if float(text) == 0.0 else text  # no "-0.000..."


def _exact(x: float) -> str:
    return (float(x) + 0.0).hex()  # + 0.0 turns -0.0 into 0.0


def digest(document) -> str:
    """SHA-256 (hex) of the canonical JSON text of ``document``."""
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


def model_document(molecule, model, scf) -> dict:
    """The canonical form hashed by :func:`model_key` (also stored, for people).
    Its names are frozen with the keys (``gradient_conv_tol`` is the job's
    ``gradient_target``): renaming one would orphan every stored point."""
    basis = model.basis if isinstance(model.basis, str) else [list(p) for p in model.basis]
    return {
        "kind": "fieldprop-model",
        "numerics": NUMERICS_VERSION,
        "atoms": [[s, [_fixed(v) for v in xyz]]
                  for s, xyz in zip(molecule.symbols, molecule.coords_bohr)],
        "charge": int(molecule.charge),
        "multiplicity": int(molecule.multiplicity),
        "method": model.method,
        "functional": model.functional,
        "basis": basis.lower() if isinstance(basis, str) else basis,
        "reference": model.reference,
        "frozen_core": bool(getattr(model, "frozen_core", False)),
        "cartesian": bool(getattr(model, "cartesian", False)),
        "scf": {"energy_conv_tol_au": _exact(scf.energy_conv_tol_au),
                "gradient_conv_tol": _exact(scf.gradient_target),
                "grid_level": scf.grid_level, "solver": getattr(scf, "solver", "newton")},
    } | ({"density_fit": model.density_fit}
         if getattr(model, "density_fit", None) else {}) | (  # absent: keys as they were
        {"solvent": {"epsilon": _exact(model.solvent_epsilon), "model": model.solvent_model}}
        if getattr(model, "solvent_epsilon", None) is not None else {}) | (
        {"correlation": _correlation_document(scf.correlation)}
        if getattr(scf, "correlation", None) is not None else {})


def _correlation_document(correlation) -> dict:
    return {"energy_change_au": _exact(correlation.energy_change_au),
            "amplitude_change": _exact(correlation.amplitude_change)}


def tolerance_document(scf) -> dict:
    """The convergence targets of a tightened point (ScfSpec.tightened): part
    of its key, so that it is another point than its untightened twin and is
    reused by any job that tightens the same point alike."""
    out = {"gradient_conv_tol": _exact(scf.gradient_target)}
    if getattr(scf, "correlation", None) is not None:
        out["correlation"] = _correlation_document(scf.correlation)
    return out


def model_key(molecule, model, scf) -> str:
    """Key of the zero-field reference of a molecule and model (hex SHA-256)."""
    return digest(model_document(molecule, model, scf))


def point_key(model_key_: str, origin_bohr, quantities: Quantities, field_vector_au,
              tolerances: dict | None = None) -> str:
    """Key of one field point (hex SHA-256); see the module notes.
    ``tolerances``: a tightened point's convergence targets
    (:func:`tolerance_document`; None for the model's own, and the key is
    then what it always was)."""
    return digest({
        "kind": "fieldprop-point",
        "model": model_key_,
        "origin_bohr": [_fixed(v) for v in origin_bohr],
        "quantities": quantities.canonical(),
        "field_vector_au": [_exact(v) for v in field_vector_au],
    } | ({"tolerances": tolerances} if tolerances else {}))


def backend_version_conflict(stored: dict, current: dict) -> tuple[str, str] | None:
    """None when the backend versions in two sets of backend facts agree, else
    the two, as text ("PySCF 2.13.0", "PySCF 2.14.0"). A version that one side
    does not record (a store written before it was recorded) is not compared.

    >>> backend_version_conflict({"pyscf_version": "2.13.0"}, {"pyscf_version": "2.14.0",
    ...                                                        "libxc_version": "7.0.0"})
    ('PySCF 2.13.0', 'PySCF 2.14.0')
    """
    names = [n for n in BACKEND_VERSION_FACTS if n in stored and n in current]
    if all(str(stored[n]) == str(current[n]) for n in names):
        return None
    return tuple(", ".join(f"{BACKEND_VERSION_FACTS[n]} {facts[n]}" for n in names)
                 for facts in (stored, current))


def short_id(key: str) -> str:
    """The first 12 hex digits: a point's id in tables and on command lines."""
    return key[:12]
