"""The result documents for programs: the result JSON of ``run`` and ``collect``
(summary.RESULT_SCHEMA), check's comparison document, ``relax``'s relaxed structure as XYZ, and the
output paths they go to (checked before any work, written whole or not at all by
:func:`write_json_atomic`). An unstable component is written as ``null`` with its
reason, never as a number; the texts the tables share (CAUTION, the invariants'
definitions, the orientation note) are defined here once."""

from __future__ import annotations

import datetime
import hashlib
import json
import math
import os
import platform
import shlex
import socket
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from fieldprop import __version__
from fieldprop.numerics.extrapolate import ComponentStatus
from fieldprop.numerics.units import DISPLAY_UNITS, FIELD_AU_TO_V_PER_M, PROPERTY_ORDER
from fieldprop.outputs.files import replacing
from fieldprop.outputs.summary import RESULT_SCHEMA

if TYPE_CHECKING:
    from fieldprop.engine.analyse import RunResult



CAUTION = ("Results depend on method and basis set (beta and gamma strongly: diffuse "
           "functions and correlation change them by tens of percent); the tensors are "
           "static (zero frequency) and of the isolated molecule (gas phase: a solvent "
           "changes a push-pull beta by tens of percent); computed NLO figures guide, and "
           "do not replace, measurement.")

SOLVATED_CAUTION = (
    "Results depend on method and basis set (beta and gamma strongly: diffuse functions and "
    "correlation change them by tens of percent); the tensors are static (zero frequency) and "
    "of the solute in a polarizable continuum: its response in the reaction field, with no "
    "cavity-field or local-field factors (the field acting on it is the field in the cavity, "
    "not the applied one); computed NLO figures guide, and do not replace, measurement.")


def caution(model) -> str:
    """The caution of a result of ``model`` (a ModelSpec): gas phase or solvated."""
    return CAUTION if getattr(model, "solvent_epsilon", None) is None else SOLVATED_CAUTION


#: The property whose units each invariant carries ("ratio": none).
_INVARIANT_PROPERTY = {"dipole_norm": "dipole", "alpha_iso": "alpha", "alpha_aniso": "alpha",
                       "beta_parallel": "beta", "beta_vector_norm": "beta", "beta_hrs": "beta",
                       "beta_hrs_zzz": "beta", "beta_hrs_xzz": "beta",
                       "beta_hrs_depolarisation_ratio": "ratio", "beta_dipolar_norm": "beta",
                       "beta_octupolar_norm": "beta", "gamma_parallel": "gamma",
                       "gamma_perpendicular": "gamma"}
_INVARIANT_TEXT = {
    "dipole_norm": "|mu|",
    "alpha_iso": "tr(alpha)/3",
    "alpha_aniso": "sqrt(((a_xx-a_yy)^2 + (a_yy-a_zz)^2 + (a_zz-a_xx)^2)/2 + 3(a_xy^2 + a_xz^2 "
                   "+ a_yz^2)); |a_par - a_perp| for a linear molecule",
    "beta_parallel": "3/5 sum_i mu_i beta_i / |mu|, beta_i = 1/3 sum_j (b_ijj + b_jij + b_jji) "
                     "(EFISH projection on the dipole)",
    "beta_vector_norm": "|beta_i|, beta_i = 1/3 sum_j (b_ijj + b_jij + b_jji) (the norm, not "
                        "the projection on the dipole; often called beta_tot or beta_0)",
    "beta_hrs": "sqrt(<b_ZZZ^2> + <b_XZZ^2>) (hyper-Rayleigh)",
    "beta_hrs_zzz": "sqrt(<b_ZZZ^2>) (hyper-Rayleigh, both polarisations along Z)",
    "beta_hrs_xzz": "sqrt(<b_XZZ^2>) (hyper-Rayleigh, scattered light along X)",
    "beta_hrs_depolarisation_ratio": "<b_ZZZ^2>/<b_XZZ^2> (5: one-dimensional; 3/2: octupolar)",
    "beta_dipolar_norm": "|b(J=1)|, b(J=1)_ijk = (d_ij v_k + d_ik v_j + d_jk v_i)/5, "
                         "v_i = sum_j b_ijj (symmetrised beta)",
    "beta_octupolar_norm": "|b(J=3)|, b(J=3) = b - b(J=1) (symmetrised beta)",
    "gamma_parallel": "1/15 sum_ij (g_iijj + g_ijij + g_ijji)",
    "gamma_perpendicular": "1/30 sum_ij (4 g_iijj - g_ijij - g_ijji)",
}


#: Old invariant names still written to the result JSON (old name -> new name).
DEPRECATED_INVARIANTS = {"beta_vec": "beta_vector_norm"}


def _vector_text(v) -> str:
    return "(" + ", ".join(f"{x:.6f}" for x in v) + ")"


def orientation_note(o) -> str:
    """What a degenerate open shell's tensors are (records.Orientation ``o``):
    the orientation chosen, in the input frame, and what its average means."""
    m = o.unpaired_second_moments_bohr2
    moments = ", ".join(f"{name} {value:.6f}" for name, value in zip(o.labels, m))
    if o.kind == "linear":
        u, v, n = o.axes
        where = (f"its unpaired density lies along u = {_vector_text(u)}, perpendicular to the "
                 f"molecular axis n = {_vector_text(n)} (v = n x u = {_vector_text(v)}; the "
                 f"unpaired density's second moments along u, v, n: {moments} e bohr^2)")
        turns, average = "about n", "a molecule turning freely about its axis"
    else:
        where = ("its unpaired density's principal axes lie along x, y, z, the largest second "
                 f"moment first ({moments} e bohr^2)")
        turns, average = "of the atom", "a freely turning atom"
    return (f"degenerate open shell ({o.kind}): {where}. Every turn {turns} gives an equally "
            "good determinant; fieldprop turned the zero-field one to this orientation and "
            "every field point keeps it, so the tensors are this determinant's (as an "
            f"analytic response of it gives them), not an average; {average} shows their "
            f"{o.average} average, given beside each tensor")


def _nested(array: np.ndarray, mask: np.ndarray):
    """Nested lists with None where ``mask`` is False."""
    if array.ndim == 0:
        return float(array) if bool(mask) else None
    return [_nested(a, m) for a, m in zip(array, mask)]


def _finite(x: float) -> float | None:
    """JSON has no NaN: a missing number is null."""
    return float(x) if math.isfinite(x) else None


def _average_document(average, orientation) -> dict:
    """A tensor's ``rotational_average`` in the result JSON."""
    doc = {
        "kind": average.kind,
        "axis": list(orientation.axes[2]) if average.kind == "cylindrical" else None,
        "value": _nested(average.value_au, average.stable),
        "error": _nested(average.error_au, average.stable),
        "in_orientation_frame": [{
            "name": c.name, "indices": list(c.indices), "value": c.value_au,
            "error": c.error_au, "average": c.average_au, "average_error": c.average_error_au,
        } for c in average.in_frame],
    }
    if average.name == "alpha":
        named = {c.indices: c for c in average.in_frame}
        wanted = ({"perpendicular": (0, 0), "parallel": (2, 2)}
                  if average.kind == "cylindrical" else {"isotropic": (0, 0)})
        for key, idx in wanted.items():
            c = named[idx]
            doc[key] = {"value": c.average_au, "error": c.average_error_au}
    return doc


def _tensors_document(result: RunResult, tensors_in: dict, tables: bool = True,
                      averages: dict | None = None) -> dict:
    """The ``tensors`` layout of the result JSON for ``tensors_in`` (without
    Richardson entries and tables when ``tables`` is False: a difference of
    two tensors has none of its own), with their rotational ``averages``
    (a degenerate open shell)."""
    # The engine's own rule for an entry's field strengths; imported here, where
    # a result is at hand, so that this module does not load the engine.
    from fieldprop.engine.analyse import entry_window_au

    tensors = {}
    for name, t in tensors_in.items():
        status = np.empty(t.value_au.shape, dtype=object)
        for c in t.components:
            for e in c.entries:
                status[e] = c.estimate.status.value
        tensors[name] = {
            "value": _nested(t.value_au, t.stable),
            "error": _nested(t.error_au, t.stable),
            "status": status.tolist(),
            "route": result.plan.route,
            "components": [{
                "name": c.plan.name,
                "indices": list(c.plan.indices),
                "entries": [list(e) for e in c.entries],
                "source": c.plan.source,
                "value": c.estimate.value_au if c.stable else None,
                "error": c.estimate.error_au if c.stable else None,
                "status": c.estimate.status.value,
                "reason": c.estimate.reason,
                "roundoff_floor": _finite(c.estimate.roundoff_au),
                **({} if not tables else
                   {"richardson_entry": None, "window_au": None, "richardson_table": []}
                   if c.estimate.status is ComponentStatus.SYMMETRY_ZERO else {
                    "richardson_entry": {"level": c.estimate.chosen_entry[0],
                                         "steps": c.estimate.chosen_entry[1]},
                    "window_au": list(entry_window_au(result.plan, c.estimate.chosen_entry)),
                    "richardson_table": [[_finite(v) for v in col]
                                         for col in c.estimate.table]}),
            } for c in t.components],
        }
        if averages and name in averages:
            tensors[name]["rotational_average"] = _average_document(averages[name],
                                                                    result.orientation)
    return tensors


def _invariants_document(items) -> dict:
    """The ``invariants`` layout of the result JSON."""
    invariants = {}
    for inv in items:
        prop = _INVARIANT_PROPERTY[inv.name]
        entry: dict[str, Any] = {"value": inv.value_au, "error": inv.error_au}
        if inv.value_au is None:
            entry["reason"] = inv.reason
        else:
            entry["converted"] = {label: {"value": inv.value_au * f, "error": inv.error_au * f}
                                  for label, f in DISPLAY_UNITS.get(prop, ())}
        entry["definition"] = _INVARIANT_TEXT[inv.name]
        invariants[inv.name] = entry
        if inv.name in DEPRECATED_INVARIANTS.values():
            old = next(k for k, v in DEPRECATED_INVARIANTS.items() if v == inv.name)
            invariants[old] = {**entry, "deprecated": f"renamed {inv.name}; this key goes in a "
                                                      "later version"}
    return invariants


def _relaxation_document(part) -> dict:
    """How the nuclear relaxation was done: the zero-field minimum and each
    relaxed point's structure and remaining optimiser errors."""
    frame = part.frame
    from fieldprop.numerics import relaxation as nr

    return {
        "method": "finite-field nuclear relaxation under the Eckart conditions of the "
                  "zero-field minimum (static limit; no zero-point averaging)",
        "tolerances": {"energy_change_au": nr.ENERGY_TOLERANCE_AU,
                       "dipole_change_au": nr.DIPOLE_TOLERANCE_AU,
                       "max_steps": nr.MAX_STEPS,
                       "minimum_gradient_au": nr.MINIMUM_GRADIENT_AU},
        "minimum": {k: frame[k] for k in ("coords_bohr", "moved_bohr", "input_gradient_au",
                                           "polish_steps", "masses_u", "hessian_source",
                                           "frequencies_cm", "double_harmonic_alpha_au",
                                           "energy_au", "gradients", "wall_time_s")},
        "points": {"planned": part.counts.planned, "computed": part.counts.computed,
                   "reused": part.counts.reused},
        "relaxed": [{"point": r.point.label, "field_vector_au": list(r.point.field_vector_au),
                     **r.relaxation} for r in part.total.computed_records if r.relaxation],
    }


def _solvent_document(model) -> dict | None:
    """The continuum solvent (None: gas phase), with the usual local-field
    factors as optional conversions."""
    if model.solvent_epsilon is None:
        return None
    from fieldprop.inputs.job import SOLVENT_MODEL_NAMES

    eps = model.solvent_epsilon
    index = model.solvent_refractive_index
    out = {"name": model.solvent, "epsilon": eps,
           "model": SOLVENT_MODEL_NAMES[model.solvent_model],
           "source": "dielectric constants and refractive indices: the Minnesota Solvent "
                     "Descriptor Database (as pyscf.solvent.smd carries it)",
           "note": "the solute's response in the reaction field of the continuum (equilibrium "
                   "solvation, every field point self-consistent); no cavity-field or "
                   "local-field factors are applied to the tensors"}
    if index:
        n2 = index * index
        # Lorentz: f = (n^2 + 2)/3 at optical frequencies; Onsager's static
        # cavity-field factor f0 = eps (n^2 + 2)/(n^2 + 2 eps) (L. Onsager,
        # J. Am. Chem. Soc. 58, 1486 (1936); cited from memory).
        out["refractive_index"] = index
        out["local_field_factors"] = {
            "lorentz_optical": (n2 + 2.0) / 3.0,
            "onsager_static": eps * (n2 + 2.0) / (n2 + 2.0 * eps),
            "note": "optional conversions to macroscopic susceptibilities (e.g. EFISH: "
                    "f0 f_w^2 f_2w); not applied"}
    return out


def _optical_document(part) -> dict:
    """The two-state optical-frequency estimates (engine.optical)."""
    from fieldprop.numerics import optical

    return {
        "note": "two-state estimates from the static electronic (nuclei clamped) beta, not "
                "frequency-dependent calculations; a guide to the size of dispersion",
        "model": "two-state dispersion factor beta(-w_s; w_1, w_2) / beta(0) = w_eg^4 (3 w_eg^2 "
                 "+ w_1 w_2 - w_s^2) / (3 (w_eg^2 - w_1^2)(w_eg^2 - w_2^2)(w_eg^2 - w_s^2))",
        "excited_states_method": part.method,
        "rule": optical.RULE,
        "state": part.state,
        "excitation_energy_au": part.excitation_energy_au,
        "excitation_energy_ev": (None if part.excitation_energy_au is None
                                 else optical.energy_ev(part.excitation_energy_au)),
        "oscillator_strength": part.oscillator_strength,
        "resonance_margin_ev": optical.RESONANCE_MARGIN_EV,
        "states_seen": [{"state": i + 1, "energy_au": s["energy_au"],
                         "energy_ev": optical.energy_ev(s["energy_au"]),
                         "oscillator_strength": s["oscillator_strength"]}
                        for i, s in enumerate(part.states)],
        "entries": [{"wavelength_nm": e["wavelength_nm"],
                     "photon_energy_ev": e["photon_energy_ev"], "process": e["process"],
                     "factor": e["factor"], "resonant": e["resonant"],
                     **({"reason": e["reason"]} if "reason" in e else {}),
                     "invariants": {name: {"value": v, "error": err}
                                    for name, (v, err) in e["invariants"].items()}}
                    for e in part.entries],
    }


def _zero_point_document(part) -> dict:
    """How the zero-point correction was formed: the modes, masses, steps,
    cubic sums, each mode's contribution to each invariant, the counts."""
    from fieldprop.numerics import zero_point as zp

    return {
        "method": "first-order zero-point vibrational average (first order in the "
                  "anharmonicity: 1/4 sum_a d2P/dx_a^2 - 1/4 sum_a dP/dx_a sum_b phi_abb / "
                  "omega_a, dimensionless normal coordinates x of the zero-field minimum); "
                  "derivatives by central differences at two steps, Richardson-combined",
        "steps_dimensionless": list(zp.STEPS),
        "masses_u": list(part.masses_u),
        "geometries": part.geometries,
        "images_by_symmetry": part.images,
        "points": {"computed": part.computed, "reused": part.reused},
        "modes": [{"mode": a + 1, "frequency_cm": float(f), "omega_au": float(w),
                   "cubic_sum_au": float(part.cubic.value[a]),
                   "cubic_sum_error_au": float(part.cubic.error[a]),
                   "displacement_bohr_per_unit": [[float(v) for v in row]
                                                  for row in part.modes.displacements[a]],
                   "invariant_contributions": part.contributions[a]}
                  for a, (f, w) in enumerate(zip(part.modes.frequencies_cm(),
                                                  part.modes.omega_au))],
        "contributions_note": "a mode's invariant_contributions are the change of each "
                              "invariant when that mode's correction alone is added; modes "
                              "of one frequency (a degenerate set) share theirs "
                              "arbitrarily, only the set's sum is meaningful",
        "leaves_out": "second order in the anharmonicity (quartic force constants, squared "
                      "cubic ones, higher property derivatives), typically a few per cent of "
                      "the correction; temperature (the ground state only); the dynamic "
                      "(frequency-dependent) vibrational terms",
    }


def _job_echo(result: RunResult) -> dict:
    """The job as understood (Job.to_dict), its derived nuclei the ones
    computed: with symmetry = "symmetrise" the moved ones, as in
    geometry_computed_bohr."""
    echo = result.job.to_dict()
    molecule = echo.get("derived", {}).get("molecule")
    if molecule is not None and "atoms" in molecule:
        molecule["atoms"] = [{"symbol": symbol, "coords_bohr": list(xyz)} for symbol, xyz
                             in zip(result.molecule.symbols, result.molecule.coords_bohr)]
    return echo


def _versions(backend_facts: dict) -> dict[str, str | None]:
    """The versions that made a result: fieldprop's, the backend's as it
    reported them (PySCF; libxc where a functional was evaluated, else the
    installed one), NumPy's, SciPy's and Python's."""
    from importlib import metadata

    import scipy

    def installed(name):
        try:
            return metadata.version(name)
        except metadata.PackageNotFoundError:
            return None

    return {"fieldprop": __version__,
            "pyscf": backend_facts.get("pyscf_version") or installed("pyscf"),
            "libxc": backend_facts.get("libxc_version"),
            "numpy": np.__version__, "scipy": scipy.__version__,
            "python": platform.python_version()}


def _job_sha256(path) -> str | None:
    """SHA-256 (hex) of the job file's bytes as they are now (None if it is gone)."""
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return None


def provenance(result: RunResult) -> dict[str, Any]:
    """What made the result and when: the static frequency of the tensors,
    creation time (UTC), host, command line, the job file's hash and the
    versions (contract keys ``response_frequency_au``, ``created_utc``,
    ``command``, ``versions``; ``host`` and ``job_sha256`` besides)."""
    return {
        "response_frequency_au": 0.0,
        "created_utc": datetime.datetime.now(datetime.timezone.utc).strftime(
            "%Y-%m-%dT%H:%M:%SZ"),
        "host": socket.gethostname(),
        "command": shlex.join(["fieldprop", *sys.argv[1:]]),
        "job_sha256": _job_sha256(result.job.path),
        "versions": _versions(result.backend_facts or {}),
    }


def result_document(result: RunResult) -> dict[str, Any]:
    """The result JSON of the contract (schema fieldprop-result-1), with extensions."""
    tensors = _tensors_document(result, result.tensors, averages=result.averages)
    invariants = _invariants_document(result.invariants)
    plan = result.plan
    document = {
        "schema": RESULT_SCHEMA,
        "version": __version__,
        "units": "au",
        "convention": "taylor",
        "job": _job_echo(result),
        "formula": result.molecule.formula,
        "origin_bohr": list(result.molecule.origin_bohr),
        "geometry_computed_bohr": [{"symbol": symbol, "coords_bohr": list(xyz)} for symbol, xyz
                                   in zip(result.molecule.symbols, result.molecule.coords_bohr)],
        "energy_au": result.energy_au,
        "tensors": tensors,
        "invariants": invariants,
        "orientation": None if result.orientation is None else {
            "kind": result.orientation.kind,
            "axes": dict(zip(result.orientation.labels,
                             (list(a) for a in result.orientation.axes))),
            "unpaired_second_moments_bohr2": dict(zip(
                result.orientation.labels, result.orientation.unpaired_second_moments_bohr2)),
            "centre_bohr": list(result.orientation.centre_bohr),
            "average": result.orientation.average,
            "note": orientation_note(result.orientation)},
    }
    if result.relaxation is not None:
        part = result.relaxation
        document["tensors_nuclear_relaxation"] = _tensors_document(result, part.nuclear,
                                                                   tables=False)
        document["tensors_total"] = _tensors_document(part.total, part.total.tensors,
                                                      averages=part.total.averages)
        document["invariants_total"] = _invariants_document(part.total.invariants)
        document["nuclear_relaxation"] = _relaxation_document(part)
    if result.optical is not None:
        document["optical_estimates"] = _optical_document(result.optical)
    if result.zero_point is not None:
        part = result.zero_point
        document["tensors_zero_point"] = _tensors_document(result, part.correction,
                                                           tables=False)
        document["tensors_total"] = _tensors_document(result, part.total, tables=False)
        document["invariants_total"] = _invariants_document(part.total_invariants)
        document["zero_point"] = _zero_point_document(part)
    return document | {
        "points": _points_document(result),
        "field_plan": {"route": plan.route, "field_au": plan.field_au, "ratio": plan.ratio,
                       "levels": plan.levels, "steps_au": list(plan.steps_au()),
                       "window": result.job.response.window,
                       **({"component_levels": {
                           c.name: list(w[:2])
                           for c, w in zip(plan.components, result.windows) if c.stencils},
                           "frame_components": plan.frame is not None}
                          if result.windows else {}),
                       **({"component_tightening": {
                           c.name: w[2] for c, w in zip(plan.components, result.windows)
                           if c.stencils and w[2]}}
                          if any(w[2] for w in result.windows) else {}),
                       "largest_field_V_per_m": max(
                           float(np.linalg.norm(p.field_vector_au)) for p in plan.points)
                       * FIELD_AU_TO_V_PER_M},
        "noise_model": {"largest_" + k: v for k, v in result.noise.largest().items()},
        "scf_retries": [{"point": r.point.label, "attempts": list(r.attempts)}
                        for r in result.computed_records if r.retried],
        "state_checks": state_checks_document(result),
        "symmetry": None if result.symmetry is None else {
            "group": result.symmetry.name, "kind": result.symmetry.kind,
            "operations": [[[float(v) for v in row] for row in op]
                           for op in result.symmetry.operations]
            if result.symmetry.kind == "finite" else None,
            "geometry_moved_bohr": result.symmetry.moved_bohr,
            "geometry_symmetrised": not result.symmetry.exact,
            "frame": None if plan.frame is None else [list(row) for row in plan.frame]},
        "symmetry_near": None if result.near_symmetry is None else {
            "group": result.near_symmetry.group,
            "distance_bohr": result.near_symmetry.distance_bohr,
            "points_saved_by_symmetrise": result.near_symmetry.points_saved},
        "backend": result.backend_facts,
        "unit_factors": {p: {label: f for label, f in DISPLAY_UNITS[p]}
                         for p in PROPERTY_ORDER},
        "warnings": list(result.warnings),
        "caution": caution(result.job.model),
        "solvent": _solvent_document(result.job.model),
        "wall_time_s": result.wall_time_s,
    } | provenance(result)


def _points_document(result: RunResult) -> dict[str, Any]:
    """Planned, computed now, reused from the store; SCF cycles of every point
    (when it was computed), and where the store is."""
    counts = result.counts
    planned = counts.planned if counts else len(result.plan.points)
    out = {"planned": planned,
           "computed": counts.computed if counts else len(result.records),
           "reused": counts.reused if counts else 0,
           "scf_cycles": int(sum(r.scf_cycles for r in result.computed_records)),
           "store": result.store or None}
    if counts and counts.images:
        out["images"] = counts.images
    if result.windows:
        out["ladder"] = len(result.plan.points)
    if result.tightening:
        out["tightened"] = len(result.tightening)
    if result.missing:
        out["missing"] = [{"id": ident, "point": result.plan.points[i].label,
                           "field_vector_au": list(result.plan.points[i].field_vector_au)}
                          for i, ident in result.missing]
    return out


def state_checks_document(result: RunResult) -> dict[str, Any]:
    """What the state checks measured: the worst point of each, and every departure."""
    records = result.computed_records[1:]
    out: dict[str, Any] = {
        "smallest_occupied_overlap": min((r.occupied_overlap for r in records), default=1.0),
        "largest_s2_change": max((abs(r.s2 - result.records[0].s2) for r in records),
                                 default=0.0),
    }
    report = result.continuity
    if report is not None:
        out["taylor_continuity"] = {
            "quantity": result.plan.route,
            "points_checked": report.checked,
            "largest_relative_residual": _finite(report.largest_relative),
            "departures": [{"point": d.label, "field_vector_au": list(d.field_vector_au),
                            "kind": d.kind, "reason": d.reason, "residual": d.residual,
                            "noise": d.noise, "change": d.change,
                            "relative": _finite(d.relative) if d.kind == "taylor" else None,
                            "nodes": d.nodes}
                           for d in report.departures],
            "excluded_points": sorted(result.plan.points[i].label for i in report.excluded),
        }
    return out


#: The path that means standard output (``--json -``).
STDOUT = "-"


def is_stdout(path) -> bool:
    return str(path) == STDOUT


def check_output_path(path: Path, what: str = "--json", example: str = "result.json") -> None:
    """Refuse, before any work, an output path that cannot be written."""
    if is_stdout(path):
        return
    if path.is_dir():
        raise_input(f"{what} {path}: is a directory; give a file name such as {example}")
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise_input(f"{what} {path}: folder {str(parent)!r} does not exist; create it first")
    if not os.access(parent, os.W_OK):
        raise_input(f"{what} {path}: folder {str(parent)!r} is not writable")


def raise_input(message: str):
    from fieldprop.errors import InputError

    raise InputError(message)


def write_json_atomic(document: dict[str, Any], path: Path) -> None:
    """Write JSON to ``path`` whole or not at all (:func:`fieldprop.outputs.
    files.replacing`; ``-``: to standard output)."""
    if is_stdout(path):
        json.dump(document, sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
        sys.stdout.flush()
        return
    with replacing(path) as fh:
        json.dump(document, fh, indent=1, allow_nan=False)
        fh.write("\n")


def comparison_document(comparisons, reference, rule, outcome, diagnoses) -> dict[str, Any]:
    """The comparison as JSON: the rule, every entry with its bound and margin,
    the boolean ``agree``, the verdict and the diagnoses."""
    floors = None if rule.strict else {
        "relative": rule.rel_floor,
        "absolute_au": {n: rule.abs_floor_au[o] for n, o in PROPERTY_ORDER.items()}}
    return {
        "schema": "fieldprop-check-1",
        "version": __version__,
        "units": "au",
        "convention": "taylor",
        "reference": {"source": reference.source, "note": reference.note},
        "agree": outcome.agree,
        "strict": rule.strict,
        "sigmas": rule.sigmas,
        "error_bars_combined": "sum",
        "floors": floors,
        "entries": outcome.entries,
        "entries_disagreeing": len(outcome.disagreeing),
        "entries_by_floor": len(outcome.floor_decided),
        "verdict": outcome.text,
        "diagnoses": [{"cause": d.cause, "property": d.property, "detail": d.detail}
                      for d in diagnoses],
        "tensors": {name: [{"name": c.name, "index": list(c.index), "value": c.ff_value,
                            "error": c.ff_error, "reference": c.ref_value,
                            "reference_error": c.ref_error, "difference": c.difference,
                            "allowed": c.allowed, "agrees": c.agrees,
                            "error_bars_term": c.bars, "floor": c.floor if c.floor_kind else None,
                            "bound": c.bound, "margin": c.margin,
                            "by_floor": c.floor_decided} for c in rows]
                    for name, rows in comparisons.items()},
    }


def write_relaxed_structure(document: dict, path: Path, job_path: str,
                            bohr_angstrom: float) -> None:
    """The relaxed structure of ``fieldprop relax`` as XYZ (angstrom, the job's
    bohr), atomically."""
    field = " ".join(f"{v:g}" for v in document["field_au"])
    lines = [str(len(document["symbols"])),
             f"{job_path}: nuclei relaxed in the field ({field}) au under the Eckart conditions "
             f"of the zero-field minimum; E = {document['energy_relaxed_au']:.10f} Eh"]
    for symbol, xyz in zip(document["symbols"], document["relaxed_bohr"]):
        x, y, z = (v * bohr_angstrom for v in xyz)
        lines.append(f"{symbol:<2} {x:20.15f} {y:20.15f} {z:20.15f}")
    with replacing(path) as fh:
        fh.write("\n".join(lines) + "\n")
