"""Tables for people, JSON for programs. Writes only to the stream or path given.

Every number is printed beside its error bar and the route that produced it; an
unstable component is printed as ``unstable`` and written to JSON as ``null``
with its reason, never as a number.
"""

from __future__ import annotations

import json
import math
import os
import sys
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from tabulate import tabulate

from fieldprop import __version__
from fieldprop.outputs.files import replacing
from fieldprop.engine.analyse import RunResult, entry_window_au
from fieldprop.inputs.job import SYMMETRISE
from fieldprop.numerics.extrapolate import ComponentStatus
from fieldprop.points.keys import short_id
from fieldprop.numerics.plan import FieldPlan
from fieldprop.outputs.summary import RESULT_SCHEMA
from fieldprop.numerics.units import (DISPLAY_UNITS,
                             FIELD_AU_TO_V_PER_M, PROPERTY_ORDER, TABLE_UNITS)


CAUTION = ("Results depend on method and basis set (beta and gamma strongly: diffuse "
           "functions and correlation change them by tens of percent); computed NLO "
           "figures guide, and do not replace, measurement.")

_INVARIANT_PROPERTY = {"dipole_norm": "dipole", "alpha_iso": "alpha", "alpha_aniso": "alpha",
                       "beta_parallel": "beta", "beta_vector_norm": "beta", "beta_hrs": "beta",
                       "gamma_parallel": "gamma"}
_INVARIANT_TEXT = {
    "dipole_norm": "|mu|",
    "alpha_iso": "tr(alpha)/3",
    "alpha_aniso": "sqrt(((a_xx-a_yy)^2 + (a_yy-a_zz)^2 + (a_zz-a_xx)^2)/2 + 3(a_xy^2 + a_xz^2 "
                   "+ a_yz^2)); |a_par - a_perp| for a linear molecule",
    "beta_parallel": "3/5 sum_i mu_i beta_i / |mu|, beta_i = 1/3 sum_j (b_ijj + b_jij + b_jji) "
                     "(EFISH projection on the dipole)",
    "beta_vector_norm": "|beta_i|, beta_i = 1/3 sum_j (b_ijj + b_jij + b_jji) (the norm, not "
                        "the projection on the dipole)",
    "beta_hrs": "sqrt(<b_ZZZ^2> + <b_XZZ^2>) (hyper-Rayleigh)",
    "gamma_parallel": "1/15 sum_ij (g_iijj + g_ijij + g_ijji)",
}


#: Old invariant names still written to the result JSON (old name -> new name).
DEPRECATED_INVARIANTS = {"beta_vec": "beta_vector_norm"}


def format_pair(value: float | None, error: float | None) -> tuple[str, str]:
    """Value and error as text, the value rounded to the error's second digit.

    >>> format_pair(8.0560071234, 2.3e-6)
    ('8.0560071', '2.3e-06')
    >>> format_pair(None, None)
    ('unstable', '-')
    """
    if value is None or error is None or not math.isfinite(value):
        return "unstable", "-"
    if error <= 0 or not math.isfinite(error):
        return f"{value:.10g}", f"{error:.2g}"
    decimals = max(0, 1 - int(math.floor(math.log10(error))))
    if abs(value) >= 1e7 or decimals > 15:
        digits = max(1, int(math.floor(math.log10(max(abs(value), error)))) -
                     int(math.floor(math.log10(error))) + 1)
        return f"{value:.{digits}e}", f"{error:.2g}"
    return f"{value:.{decimals}f}", f"{error:.2g}"


def _entry_text(est) -> str:
    """The Richardson entry used: ``h<k>, <m> steps`` = the entry that starts at
    the k-th field strength h_k = h0 r^k and took m extrapolation steps (it
    uses the strengths h_k .. h_k+m); ``F = 0`` for a zero-field value."""
    if est.status is ComponentStatus.ZERO_FIELD:
        return "F = 0 (no derivative)"
    if est.status is ComponentStatus.MISSING:
        return "-"
    if est.status is ComponentStatus.SYMMETRY_ZERO:
        return "none (symmetry)"
    k, m = est.chosen_entry
    return f"h{k}, {m} step{'s' if m != 1 else ''}"


def _frame_text(frame) -> str:
    """'a = (0.123, ...), b = (...), c = (...)': a frame's axes in the input frame."""
    return ", ".join(f"{n} = ({', '.join(f'{v:.6f}' for v in row)})"
                     for n, row in zip("abc", frame))


#: What each table's components are, by route: the derivative taken.
_TABLE_SOURCE = {
    "energy": {"dipole": "-dE/dF_i", "alpha": "-d2E/dF_i dF_j, unique components",
               "beta": "-d3E/dF_i dF_j dF_k, unique components",
               "gamma": "-d4E/dF_i dF_j dF_k dF_l, unique components"},
    "dipole": {"dipole": "the SCF dipole at zero field", "alpha": "d mu_i/dF_j",
               "beta": "d2 mu_i/dF_j dF_k", "gamma": "d3 mu_i/dF_j dF_k dF_l"},
    "alpha": {"dipole": "the SCF dipole at zero field", "alpha": "CPHF/CPKS at zero field",
              "beta": "d alpha_ij/dF_k", "gamma": "d2 alpha_ij/dF_k dF_l"},
}


def _fit_text(result: RunResult) -> str:
    """'; density fitting: cc-pvdz-jkfit (116 functions)' or ''."""
    if result.job.model.density_fit is None:
        return ""
    facts = result.backend_facts
    aux = facts.get("auxiliary_basis", result.job.model.density_fit)
    if isinstance(aux, dict):
        names = sorted(set(aux.values()))
        aux = names[0] if len(names) == 1 else "+".join(f"{k}:{v}" for k, v in aux.items())
    n = facts.get("n_auxiliary_functions")
    return f"; density fitting: {aux}" + (f" ({n} functions)" if n else "")


def _ecp_text(result: RunResult) -> str:
    """'; effective core potentials: I (28 electrons)' or ''."""
    cores = result.molecule.core_electrons
    seen = {}
    for symbol, n in zip(result.molecule.symbols, cores):
        if n:
            seen.setdefault(symbol, n)
    if not seen:
        return ""
    return "; effective core potentials: " + ", ".join(f"{s} ({n} electrons)"
                                                       for s, n in seen.items())


def _origin_note(result: RunResult) -> str:
    """For an ion: its dipole depends on the origin; which one is used."""
    origin = result.job.response.origin
    name = origin if isinstance(origin, str) else "given"
    where = ", ".join(f"{v:.6f}" for v in result.molecule.origin_bohr)
    return (f"charge {result.molecule.charge:+d}: the dipole of an ion depends on the origin "
            f"(mu(O') = mu(O) - q (O' - O)); this one is about the {name} origin "
            f"({where}) bohr")


def symmetry_note(result: RunResult) -> str:
    """One line on the geometry and its point group, where it matters: a group
    the geometry is only near (not used: how far, what symmetrising would
    save), or a geometry moved onto its group (the moved nuclei were computed).
    Empty where the geometry is used as given, with or without its group."""
    near = result.near_symmetry
    if near is not None:
        return (f"geometry computed as given: it is near {near.group} (the nuclei are "
                f"{near.distance_bohr:.1e} bohr from it), not symmetric to round-off; "
                f"[response] symmetry = \"symmetrise\" would move it onto the group and save "
                f"{near.points_saved} of the planned field points")
    sym = result.symmetry
    if sym is not None and result.job.response.symmetry == SYMMETRISE and not sym.exact:
        return (f"geometry symmetrised ({sym.name}): the nuclei were moved by up to "
                f"{sym.moved_bohr:.1e} bohr, and the moved nuclei are the molecule computed "
                "(geometry_computed_bohr in the result JSON)")
    return ""


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


def _average_rows(average, factor: float) -> list[list[str]]:
    """A tensor's components in the orientation frame and their average."""
    rows = []
    for c in average.in_frame:
        pairs = [format_pair(None if v is None else v * factor,
                             None if e is None else e * factor)
                 for v, e in ((c.value_au, c.error_au), (c.average_au, c.average_error_au))]
        rows.append([c.name, *pairs[0], *pairs[1]])
    return rows


def _write_geometry(job, out: TextIO) -> None:
    """The structure used, in the job's units, and its shortest distance."""
    mol = job.molecule
    coords = np.array([a.coords_bohr for a in mol.atoms]) / mol.unit_scale
    out.write(f"  geometry ({mol.units}, {mol.source}):\n")
    for atom, xyz in zip(mol.atoms, coords):
        out.write(f"    {atom.symbol:<2} {xyz[0]:12.6f} {xyz[1]:12.6f} {xyz[2]:12.6f}\n")
    if len(coords) > 1:
        d = np.linalg.norm(coords[:, None] - coords[None], axis=-1)
        i, j = np.unravel_index(np.argmin(d + np.diag(np.full(len(d), np.inf))), d.shape)
        i, j = min(i, j), max(i, j)
        out.write(f"  shortest distance {d[i, j]:.4f} {mol.units}: atoms {i + 1} "
                  f"({mol.atoms[i].symbol}) and {j + 1} ({mol.atoms[j].symbol})\n")


def write_tables(result: RunResult, out: TextIO, units: str = "au") -> None:
    """The human-readable report: header, one table per tensor (in ``units``:
    au, esu or si, units.TABLE_UNITS), invariants."""
    job, plan = result.job, result.plan
    model = job.model
    basis = (model.basis if isinstance(model.basis, str)
             else "+".join(f"{sym}:{text if chr(10) not in text else 'custom'}"
                           for sym, text in model.basis))
    model_text = "/".join(x for x in (model.method.upper(), model.functional, basis) if x)
    out.write(f"fieldprop {__version__}: {job.path}\n")
    out.write(f"  molecule {result.molecule.formula}, charge {result.molecule.charge}, "
              f"multiplicity {result.molecule.multiplicity}; {model_text} ({model.reference}); "
              f"{result.backend_facts.get('n_basis_functions', '?')} "
              f"{'cartesian ' if model.cartesian else ''}basis functions"
              f"{_ecp_text(result)}{_fit_text(result)}\n")
    facts = result.backend_facts
    if "correlated_electrons" in facts:
        frozen = facts.get("frozen_core_orbitals", 0)
        out.write(f"  correlated: {facts['correlated_electrons']} electrons "
                  + (f"(frozen core: {frozen} orbital{'s' if frozen != 1 else ''} "
                     f"uncorrelated)\n" if frozen else "(all electrons)\n"))
    _write_geometry(job, out)
    origin = ", ".join(f"{v:.6f}" for v in result.molecule.origin_bohr)
    if len(plan.points) == 1:
        out.write(f"  no field applied: the values at zero field; origin ({origin}) bohr\n")
    else:
        steps = ", ".join(f"{h:g}" for h in plan.steps_au())
        out.write(f"  differentiated: "
                  f"{'E(F)' if plan.route == 'energy' else 'the SCF dipole mu(F)'}; field "
                  f"strengths {steps} au (h0: {job.response.field_au_source}); origin ({origin}) "
                  "bohr\n")
    counts = result.counts
    reused = (f" ({counts.reused} reused from {result.store or 'the store'})"
              if counts and counts.reused else "")
    n = counts.planned if counts else len(result.records)
    gone = ""
    if counts and counts.ladder > n:
        gone += (f" (the adaptive window's, of the {counts.ladder} on the whole ladder: see "
                 "each component's levels)")
    if counts and counts.images:
        gone += (f", {counts.images} of them images of the others under the molecule's "
                 f"symmetry ({result.symmetry.name})")
    if plan.frame is not None:
        gone += (f", along the axes of its symmetry frame {_frame_text(plan.frame)} (tensors "
                 "turned back into the input frame)")
    if result.missing:
        gone += (f", {len(result.missing)} of the {n - (counts.images if counts else 0)} to "
                 "compute missing (their components: missing)")
    note = symmetry_note(result)
    if note:
        out.write(f"  {note}\n")
    out.write(f"  {n} field point{'s' if n != 1 else ''}{reused}{gone}, "
              f"{sum(r.scf_cycles for r in result.computed_records)} SCF cycles (zero field "
              "included); "
              "SCF energy tolerance "
              f"{job.scf.energy_conv_tol_au:g} Eh; E(0) = {result.energy_au:.10f} Eh\n")
    system = {"au": "atomic units", "esu": "tensors in esu (dipole in debye, alpha in "
              "angstrom^3)", "si": "tensors in SI units"}[units]
    out.write(f"  {system}, Taylor convention E = E0 - mu F - alpha F^2/2 - beta F^3/6 - "
              "gamma F^4/24; error bars are estimates (Richardson table spread plus round-off "
              "floor), not bounds\n")
    if result.orientation is not None:
        out.write(f"  {orientation_note(result.orientation)}\n")
    out.write("\n")
    for name, tensor in result.tensors.items():
        label, factor = TABLE_UNITS[units][name]
        rows = []
        for c in tensor.components:
            est = c.estimate
            v, e = (format_pair(est.value_au * factor, est.error_au * factor) if c.stable
                    else (est.status.value, "-"))
            rows.append([c.plan.name, v, e, _entry_text(est),
                         est.status.value + (f": {est.reason}" if est.reason and not c.stable
                                             else "")])
        out.write(f"{name} ({label}; {_TABLE_SOURCE[plan.route][name]})\n")
        out.write(tabulate(rows, headers=["component", "value", "+- error", "Richardson entry",
                                          "status"], disable_numparse=True) + "\n")
        if name == "dipole" and result.molecule.charge != 0:
            out.write(f"  {_origin_note(result)}\n")
        if name in result.averages:
            o = result.orientation
            about = "about n" if o.kind == "linear" else "over all turns"
            out.write(f"\n{name} in the orientation frame ({', '.join(o.labels)}) and its "
                      f"{o.average} average {about} ({label})\n")
            out.write(tabulate(_average_rows(result.averages[name], factor),
                               headers=["component", "value", "+- error", f"{o.average} average",
                                        "+- error"], disable_numparse=True) + "\n")
        out.write("\n")
    rows = []
    for inv in result.invariants:
        prop = _INVARIANT_PROPERTY[inv.name]
        v, e = format_pair(inv.value_au, inv.error_au)
        if inv.value_au is None:
            v = "missing" if inv.reason.startswith("missing") else "unstable"
        label, factor = DISPLAY_UNITS[prop][0]
        if inv.value_au is None:
            cv, ce = "-", "-"
        else:
            cv, ce = format_pair(inv.value_au * factor, inv.error_au * factor)
        rows.append([inv.name, v, e, f"{cv} +- {ce} {label}" if inv.value_au is not None
                     else inv.reason, _INVARIANT_TEXT[inv.name]])
    if rows:
        out.write("invariants\n")
        # Definitions wrapped: the table fits a 160-column terminal.
        out.write(tabulate(rows, headers=["invariant", "value (au)", "+- error", "converted",
                                          "definition"], disable_numparse=True,
                           maxcolwidths=[None, None, None, 44, 56]) + "\n\n")
    if result.relaxation is not None:
        _write_relaxation(result, out, units)
    for text in result.warnings:
        out.write(f"warning: {text}\n")
    if any(p in result.tensors for p in ("beta", "gamma")):
        out.write(f"note: {CAUTION}\n")


def _pair_text(est, stable: bool, factor: float) -> str:
    if not stable:
        return est.status.value
    v, e = format_pair(est.value_au * factor, est.error_au * factor)
    return f"{v} +- {e}"


def _write_relaxation(result: RunResult, out: TextIO, units: str) -> None:
    """Electronic, nuclear-relaxation and total tensors side by side, and the
    invariants with the nuclei clamped and relaxed."""
    part = result.relaxation
    frame = part.frame
    total = part.total
    freqs = frame.get("frequencies_cm") or [0.0]
    steps = [r.relaxation["steps"] for r in total.computed_records if r.relaxation]
    gradients = sum(r.relaxation.get("gradients", 0) for r in total.computed_records
                    if r.relaxation)
    worst_e = max((r.relaxation["energy_change_au"] for r in total.computed_records
                   if r.relaxation), default=0.0)
    reused = (f", {part.counts.reused} reused from {result.store or 'the store'}"
              if part.counts.reused else "")
    out.write("nuclear relaxation (static limit; the nuclei relaxed at every field point under "
              "the Eckart conditions of the zero-field minimum)\n")
    out.write(f"  zero-field minimum: polished in {frame['polish_steps']} Newton step"
              f"{'s' if frame['polish_steps'] != 1 else ''} (moved {frame['moved_bohr']:.1e} "
              f"bohr from the given structure, whose largest gradient was "
              f"{frame['input_gradient_au']:.1e} Eh/bohr); Hessian: {frame['hessian_source']}; "
              f"harmonic frequencies {freqs[0]:.0f} to {freqs[-1]:.0f} cm^-1\n")
    if steps:
        out.write(f"  {len(steps)} relaxed field points{reused}: {min(steps)} to {max(steps)} "
                  f"Newton steps, {gradients} gradients; the remaining energy error at most "
                  f"{worst_e:.1e} Eh (in the error bars)\n\n")
    for name, nuclear in part.nuclear.items():
        label, factor = TABLE_UNITS[units][name]
        rows = []
        for ce, cn, ct in zip(result.tensors[name].components, nuclear.components,
                              total.tensors[name].components):
            if ce.estimate.status is ComponentStatus.SYMMETRY_ZERO:
                continue
            rows.append([ce.plan.name, _pair_text(ce.estimate, ce.stable, factor),
                         _pair_text(cn.estimate, cn.stable, factor),
                         _pair_text(ct.estimate, ct.stable, factor)])
        out.write(f"{name} ({label}; components not zero by symmetry)\n")
        out.write(tabulate(rows, headers=["component", "electronic", "nuclear relaxation",
                                          "total"], disable_numparse=True) + "\n\n")
    if frame.get("double_harmonic_alpha_au") and "alpha" in part.nuclear:
        a = np.asarray(frame["double_harmonic_alpha_au"])
        out.write("  double-harmonic alpha^nr = sum over modes (dmu/dQ)^2/omega^2 (zero-field "
                  "Hessian; a check, not a result): diagonal "
                  + ", ".join(f"{v:.6g}" for v in np.diag(a)) + " au\n\n")
    rows = []
    clamped = {inv.name: inv for inv in result.invariants}
    for inv in total.invariants:
        if inv.name == "dipole_norm":
            continue
        e = clamped[inv.name]
        rows.append([inv.name, " +- ".join(format_pair(e.value_au, e.error_au))
                     if e.value_au is not None else "unstable",
                     " +- ".join(format_pair(inv.value_au, inv.error_au))
                     if inv.value_au is not None else "unstable"])
    if rows:
        out.write("invariants (au): clamped and relaxed nuclei\n")
        out.write(tabulate(rows, headers=["invariant", "electronic", "total"],
                           disable_numparse=True) + "\n")
        out.write("  Static limit only: no zero-point vibrational averaging; vibrational "
                  "contributions depend strongly on the model, and the optical (high-frequency) "
                  "limit differs.\n\n")


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
                                  for label, f in DISPLAY_UNITS[prop]}
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
        "job": result.job.to_dict(),
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
        "caution": CAUTION,
        "wall_time_s": result.wall_time_s,
    }


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
                            "kind": d.kind, "reason": d.reason, "residual": d.residual, "noise": d.noise, "change": d.change,
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
    """Write JSON to ``path`` whole or not at all (:func:`fieldprop.atomic_files.
    replacing`; ``-``: to standard output)."""
    if is_stdout(path):
        json.dump(document, sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
        sys.stdout.flush()
        return
    with replacing(path) as fh:
        json.dump(document, fh, indent=1, allow_nan=False)
        fh.write("\n")


def _stored_status(task, stored) -> str:
    """``stored``, ``failed`` or ``missing``: a planned point in ``stored``
    ({key: StoredPoint})."""
    row = stored.get(task.key)
    return "missing" if row is None else ("stored" if row.ok else "failed")


def write_plan(plan: FieldPlan, tasks, stored, out: TextIO, fmt: str = "table",
               store_label: str | None = None, only=None, images=(), symmetry=None,
               without_symmetry: int | None = None, stage: str | None = None,
               used=None, near=None) -> None:
    """The field points ``run`` would compute, which components use them, and
    which the store holds already (``stored``: {key: StoredPoint}); ``fmt``
    table, json (a JSON object per line), csv or ids (an id per line);
    ``only``: the keys to list (default all); ``images``: per point, the index
    of the point it is a symmetry image of and the operation (None: computed);
    the ids listing leaves images out; ``without_symmetry``: the number of
    points the plan has when symmetry is not used; ``used``: the indices of
    the points the adaptive window uses at its ``stage`` (a line of text);
    only those are listed and counted; ``near``: the engine's NearSymmetry
    (a group the geometry is near but not used)."""
    import csv

    image_of = {i: (j, op) for i, (j, op) in enumerate(images) if op is not None}

    def plan_status(task, stored) -> str:
        if task.point.index in image_of:
            return "image of " + short_id(tasks[image_of[task.point.index][0]].key)
        return _stored_status(task, stored)

    uses: dict[int, int] = {}
    for c in plan.components:
        for s in c.stencils:
            for p, _ in s.terms:
                uses[p] = uses.get(p, 0) + 1
    if used is not None:
        only = {t.key for t in tasks if t.point.index in used
                and (only is None or t.key in only)}
    listed = [(p, t) for p, t in zip(plan.points, tasks) if only is None or t.key in only]
    if fmt == "ids":
        for p, t in listed:
            if p.index not in image_of:
                out.write(short_id(t.key) + "\n")
        return
    if fmt == "json":
        for p, t in listed:
            doc = {"id": short_id(t.key), "key": t.key, "index": p.index, "level": p.level,
                   "label": p.label, "offsets": list(p.offsets),
                   "field_vector_au": list(p.field_vector_au),
                   "stencil_uses": uses.get(p.index, 0), "stored": _stored_status(t, stored)}
            if p.index in image_of:
                j, op = image_of[p.index]
                doc.update(stored="image", image_of=short_id(tasks[j].key),
                           operation=[[float(v) for v in row] for row in op])
            out.write(json.dumps(doc) + "\n")
        return
    if fmt == "csv":
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(["id", "index", "level", "label", "F_x_au", "F_y_au", "F_z_au",
                         "stencil_uses", "stored"])
        for p, t in listed:
            writer.writerow([short_id(t.key), p.index, p.level, p.label,
                             *(repr(float(v)) for v in p.field_vector_au),
                             uses.get(p.index, 0), plan_status(t, stored)])
        return
    counted = tasks if used is None else [t for t in tasks if t.point.index in used]
    counts = {s: sum(1 for t in counted if plan_status(t, stored) == s)
              for s in ("stored", "failed", "missing")}
    if len(plan.points) == 1:
        out.write(f"no field applied: 1 point (zero field) for {len(plan.components)} "
                  "components\n")
    else:
        out.write(f"differentiating {'E(F)' if plan.route == 'energy' else 'the SCF dipole'}; "
                  f"ladder h_k = {plan.field_au:g} * {plan.ratio:g}**k, "
                  f"k = 0..{plan.levels - 1}; {len(plan.points)} field points for "
                  f"{len(plan.components)} components\n")
    per_property: dict[str, set] = {}
    for c in plan.components:
        for s in c.stencils:
            per_property.setdefault(c.tensor, set()).update(p for p, _ in s.terms)
    out.write("points used per property: " + ", ".join(
        f"{name} {len(points)}" for name, points in per_property.items()) + "\n")
    if stage:
        out.write(stage + "\n")
    if symmetry is not None:
        out.write(f"symmetry: {symmetry.name}: {len(tasks) - len(image_of)} points computed, "
                  f"{len(image_of)} images of them (without symmetry: "
                  f"{without_symmetry or len(tasks)} points computed)"
                  + (f"; offsets along the symmetry frame's axes {_frame_text(plan.frame)}"
                     if plan.frame is not None else "")
                  + (f"; geometry symmetrised, largest move {symmetry.moved_bohr:.1e} bohr"
                     if not symmetry.exact else "") + "\n")
    if near is not None:
        out.write(f"symmetry: not used: the geometry is near {near.group} "
                  f"({near.distance_bohr:.1e} bohr from it), not symmetric to round-off; "
                  f"symmetry = \"symmetrise\" would save {near.points_saved} points\n")
    out.write(f"store {store_label or '(none yet)'}: {counts['stored']} stored, "
              f"{counts['failed']} failed, {counts['missing']} to compute\n")
    rows = [[short_id(t.key), p.level, p.label, *(f"{v:+.6g}" for v in p.field_vector_au),
             uses.get(p.index, 0), plan_status(t, stored)] for p, t in listed]
    out.write(tabulate(rows, headers=["id", "level", "point", "F_x (au)", "F_y (au)",
                                      "F_z (au)", "stencil uses", "store"],
                       disable_numparse=True) + "\n")


def write_store_summary(store, path: Path, out: TextIO) -> None:
    """Molecules and models in a store, points computed and failed, size."""
    models = store.summary()
    size = sum(p.stat().st_size for p in (path, Path(str(path) + "-wal")) if p.exists())
    total_ok = sum(m["points_ok"] for m in models)
    total_failed = sum(m["points_failed"] for m in models)
    out.write(f"fieldprop point store {path}: {len(models)} model(s), {total_ok} points "
              f"computed, {total_failed} failed; {size / 1e6:.2f} MB\n")
    rows = []
    for m in models:
        basis = m["basis"] if isinstance(m["basis"], str) else "per element"
        model = "/".join(x for x in (m["method"], m.get("functional"), basis) if x)
        rows.append([m["model_key"][:12], m.get("formula", "?"), m["charge"], m["multiplicity"],
                     f"{model} ({m['reference']})", m["points_ok"], m["points_failed"],
                     f"{m['compute_time_s']:.0f}", m["last_point_at"] or "-"])
    if rows:
        out.write(tabulate(rows, headers=["model", "formula", "charge", "mult.", "model chemistry",
                                          "points", "failed", "compute s", "last point (UTC)"],
                           disable_numparse=True) + "\n")


def write_store_lines(store, out: TextIO) -> None:
    """Every stored point as a point line (:mod:`fieldprop.points.pointlines`),
    computed and failed: ``fieldprop collect --points`` reads them back."""
    from fieldprop.points.pointlines import line_document, write_line

    facts: dict = {}
    for row, extra, description in store.iter_points():
        if row.model_key not in facts:
            facts[row.model_key] = store.get_facts(row.model_key)
        write_line(line_document(row, extra["field_vector_au"], extra["origin_bohr"],
                                 extra["quantities"], facts[row.model_key], description,
                                 extra.get("tolerances")), out)


#: How an entry's verdict reads in check's table.
_VERDICT_WORDS = {(True, False): "ok", (True, True): "ok by floor", (False, False): "DISAGREE"}
#: The bound column of check's table: which term of the allowed difference is larger.
_BOUND_WORDS = {"error-bars": "error bars", "relative-floor": "rel. floor",
                "absolute-floor": "abs. floor"}


def write_comparison(comparisons, reference, rule, out: TextIO) -> None:
    """One table per tensor: finite field vs reference, difference, the allowed
    difference and its larger term, the margin |diff|/allowed, the verdict.

    Entries are listed in sorted index order (beta_xyz, not beta_zyx) unless they
    disagree; every entry of the full tensor is compared.
    """
    out.write(f"reference: {reference.source}" + (f" ({reference.note})" if reference.note
                                                 else "") + "\n")
    out.write(f"agreement: {rule.describe()}; ok where diff/allowed <= 1")
    if not rule.strict:
        out.write("; \"ok by floor\": the difference exceeds the error bars' term and only "
                  "the floor admits it (--strict fails it)")
    out.write("\n\n")
    for name, rows in comparisons.items():
        table = []
        for c in rows:
            if list(c.index) != sorted(c.index) and c.agrees:
                continue
            v, e = format_pair(c.ff_value, c.ff_error)
            rv, re = format_pair(c.ref_value, c.ref_error) if c.ref_error > 0 else (
                f"{c.ref_value:.10g}", "0")
            diff = "-" if c.difference is None else f"{c.difference:+.3g}"
            allowed = "-" if c.allowed is None else f"{c.allowed:.2g}"
            bound = "-" if c.bound is None else _BOUND_WORDS[c.bound]
            margin = ("-" if c.allowed is None else "inf" if c.margin is None
                      else f"{c.margin:.2g}")
            table.append([c.name, v, e, rv, re, diff, allowed, bound, margin,
                          _VERDICT_WORDS[(c.agrees, c.floor_decided)]])
        out.write(f"{name} (au)\n")
        out.write(tabulate(table, headers=["component", "finite field", "+- error", "reference",
                                           "+- error", "difference", "allowed", "bound",
                                           "diff/allowed", "verdict"],
                           disable_numparse=True) + "\n\n")


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


def write_relaxation_table(document: dict, out: TextIO, bohr_angstrom: float) -> None:
    """``fieldprop relax``: per atom the field's force on the zero-field
    minimum and the displacement to the relaxed structure; energies, dipoles."""
    field = ", ".join(f"{v:g}" for v in document["field_au"])
    out.write(f"nuclei relaxed in the field ({field}) au "
              f"({np.linalg.norm(document['field_au']) * FIELD_AU_TO_V_PER_M:.3g} V/m), "
              "no overall translation or rotation (Eckart conditions of the zero-field "
              "minimum)\n")
    rows = []
    for n, (symbol, force, moved, xyz) in enumerate(zip(
            document["symbols"], document["forces_at_minimum_au"],
            document["displacement_bohr"], document["relaxed_bohr"]), start=1):
        rows.append([f"{n} {symbol}", *(f"{v:.3e}" for v in force),
                     *(f"{v * bohr_angstrom:.3e}" for v in moved),
                     *(f"{v * bohr_angstrom:.8f}" for v in xyz)])
    out.write(tabulate(rows, headers=["atom", "Fx (Eh/bohr)", "Fy", "Fz", "dx (angstrom)", "dy",
                                      "dz", "x relaxed (angstrom)", "y", "z"],
                       disable_numparse=True) + "\n")
    mu0, mu1 = np.asarray(document["dipole_clamped_au"]), np.asarray(document["dipole_relaxed_au"])
    residual = document["eckart_residuals"]
    out.write(f"  forces: the field's, on the zero-field minimum (where they are zero without "
              f"it)\n  relaxation energy {document['relaxation_energy_au']:.6e} Eh "
              f"(E clamped {document['energy_clamped_au']:.10f}, relaxed "
              f"{document['energy_relaxed_au']:.10f} Eh); {document['steps']} Newton steps, "
              f"{document['gradients']} gradients, a further step would lower E by "
              f"{document['energy_change_au']:.1e} Eh\n"
              f"  dipole (au) clamped ({', '.join(f'{v:.8f}' for v in mu0)}), relaxed "
              f"({', '.join(f'{v:.8f}' for v in mu1)}): the nuclei add "
              f"({', '.join(f'{v:.3e}' for v in mu1 - mu0)})\n"
              f"  Eckart residuals: translation {residual['translation_bohr']:.1e} bohr, rotation "
              f"{residual['rotation_bohr2']:.1e} bohr^2\n")
