"""Tables for people: a result's header, one table per tensor and the invariants
(:func:`write_tables`), check's comparison (:func:`write_comparison`), ``relax``'s
forces and displacements (:func:`write_relaxation_table`), and :func:`format_pair`, a
value rounded to its error bar. Every number is printed beside its error bar and
the Richardson entry that produced it; an unstable component is printed as
``unstable``, never as a number. Writes only to the stream it is given."""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, TextIO

import numpy as np
from tabulate import tabulate

from fieldprop import __version__
from fieldprop.inputs.job import SYMMETRISE, model_name
from fieldprop.numerics.extrapolate import ComponentStatus
from fieldprop.numerics.units import FIELD_AU_TO_V_PER_M
from fieldprop.outputs.summary import conversion
from fieldprop.outputs.documents import (_INVARIANT_PROPERTY, _INVARIANT_TEXT, caution,
                                         orientation_note)

if TYPE_CHECKING:
    from fieldprop.engine.analyse import RunResult


#: Significant digits of a value in the tables of run, collect and report at
#: most (--all-digits: every digit its error bar supports).
SIGNIFICANT_DIGITS = 6


def format_pair(value: float | None, error: float | None,
                significant: int | None = None) -> tuple[str, str]:
    """Value and error as text, the value rounded to the error's second digit
    and to at most ``significant`` significant digits (None: no limit).

    >>> format_pair(8.0560071234, 2.3e-6)
    ('8.0560071', '2.3e-06')
    >>> format_pair(8.0560071234, 2.3e-6, significant=4)
    ('8.056', '2.3e-06')
    >>> format_pair(None, None)
    ('unstable', '-')
    """
    if value is None or error is None or not math.isfinite(value):
        return "unstable", "-"
    if error <= 0 or not math.isfinite(error):
        return f"{value:.{significant or 10}g}", f"{error:.2g}"
    decimals = max(0, 1 - int(math.floor(math.log10(error))))
    if significant is not None and value != 0.0:
        decimals = min(decimals, max(0, significant - 1 - int(math.floor(math.log10(abs(value))))))
    if abs(value) >= 1e7 or decimals > 15:
        digits = max(1, int(math.floor(math.log10(max(abs(value), error)))) -
                     int(math.floor(math.log10(error))) + 1)
        if significant is not None:
            digits = min(digits, significant - 1)
        return f"{value:.{max(digits, 0)}e}", f"{error:.2g}"
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


def _table_source(plan, name: str) -> str:
    """What a table's components are: the derivative taken (and, on the dipole
    route, whether each fills its index permutations)."""
    text = _TABLE_SOURCE[plan.route][name]
    if plan.route == "dipole" and name in ("alpha", "beta", "gamma"):
        symmetric = any(c.symmetric for c in plan.components if c.tensor == name)
        text += (", one per unique component (index symmetry assumed)" if symmetric else
                 ", every mu_i (index symmetry tested: permutations computed apart)")
    return text


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


def _average_rows(average, factor: float, significant=None) -> list[list[str]]:
    """A tensor's components in the orientation frame and their average."""
    rows = []
    for c in average.in_frame:
        pairs = [format_pair(None if v is None else v * factor,
                             None if e is None else e * factor, significant)
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


#: Width of the prose lines (headers, notes, warnings) of the tables.
TEXT_WIDTH = 100


def _wrapped(text: str) -> str:
    """Each line of ``text`` longer than TEXT_WIDTH wrapped at spaces, its
    continuation indented two more than the line (tables are written apart
    and never pass through here)."""
    import textwrap

    out = []
    for line in text.split("\n"):
        indent = " " * (len(line) - len(line.lstrip(" ")))
        out.append(textwrap.fill(line, TEXT_WIDTH, subsequent_indent=indent + "  ",
                                 break_long_words=False, break_on_hyphens=False)
                   if len(line) > TEXT_WIDTH else line)
    return "\n".join(out)


#: How each convention's tensors enter the energy (the table header says it).
CONVENTION_TEXT = {
    "taylor": "Taylor convention E = E0 - mu F - alpha F^2/2 - beta F^3/6 - gamma F^4/24",
    "perturbation": "perturbation convention E = E0 - mu F - alpha F^2/2 - beta F^3/3 - "
                    "gamma F^4/4 (beta and gamma: half and a sixth of the Taylor ones)"}


def write_tables(result: RunResult, out: TextIO, units: str = "au",
                 convention: str = "taylor", all_digits: bool = False) -> None:
    """The human-readable report: header, one table per tensor (in ``units``:
    au, esu or si, units.TABLE_UNITS, and ``convention``: summary.CONVENTIONS),
    invariants; values to SIGNIFICANT_DIGITS at most, or with ``all_digits``
    every digit their error bars support."""
    significant = None if all_digits else SIGNIFICANT_DIGITS
    import io

    final, out = out, io.StringIO()  # the header's prose, wrapped below
    job, plan = result.job, result.plan
    model = job.model
    model_label = model_name(model, result.molecule.multiplicity)
    out.write(f"fieldprop {__version__}: {job.path}\n")
    out.write(f"  molecule {result.molecule.formula}, charge {result.molecule.charge}, "
              f"multiplicity {result.molecule.multiplicity}; {model_label}; "
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
    out.write(f"  {system}, {CONVENTION_TEXT[convention]}; static (zero-frequency) "
              "tensors; error bars are estimates (Richardson table spread plus round-off "
              "floor), not bounds\n")
    if result.orientation is not None:
        out.write(f"  {orientation_note(result.orientation)}\n")
    final.write(_wrapped(out.getvalue()) + "\n")
    out = final
    for name, tensor in result.tensors.items():
        label, factor = conversion(name, units, convention)
        rows = []
        for c in tensor.components:
            est = c.estimate
            v, e = (format_pair(est.value_au * factor, est.error_au * factor, significant)
                    if c.stable
                    else (est.status.value, "-"))
            rows.append([c.plan.name, v, e, _entry_text(est),
                         est.status.value + (f": {est.reason}" if est.reason and not c.stable
                                             else "")])
        out.write(f"{name}, electronic: nuclei clamped ({label}; "
                  f"{_table_source(plan, name)})\n")
        out.write(tabulate(rows, headers=["component", "value", "+- error", "Richardson entry",
                                          "status"], disable_numparse=True) + "\n")
        if name == "dipole" and result.molecule.charge != 0:
            out.write(f"  {_origin_note(result)}\n")
        if name in result.averages:
            o = result.orientation
            about = "about n" if o.kind == "linear" else "over all turns"
            out.write(f"\n{name} in the orientation frame ({', '.join(o.labels)}) and its "
                      f"{o.average} average {about} ({label})\n")
            out.write(tabulate(_average_rows(result.averages[name], factor, significant),
                               headers=["component", "value", "+- error", f"{o.average} average",
                                        "+- error"], disable_numparse=True) + "\n")
        out.write("\n")
    rows, legend = [], []
    for inv in result.invariants:
        prop = _INVARIANT_PROPERTY[inv.name]
        label, factor = conversion(prop, units, convention)
        if inv.value_au is None:
            v, e = ("missing" if inv.reason.startswith("missing") else "unstable"), "-"
        else:
            v, e = format_pair(inv.value_au * factor, inv.error_au * factor, significant)
        row = [inv.name, v, e, label]
        if units != "au":
            scale = conversion(prop, "au", convention)[1]
            row.append("-" if inv.value_au is None else
                       " +- ".join(format_pair(inv.value_au * scale, inv.error_au * scale,
                                               significant)))
        rows.append(row)
        legend.append(f"  {inv.name}: {_INVARIANT_TEXT[inv.name]}"
                      + (f" ({inv.reason})" if inv.value_au is None else ""))
    if rows:
        out.write(f"invariants, electronic: nuclei clamped ({convention} convention)\n")
        out.write(tabulate(rows, headers=["invariant", "value", "+- error", "unit"]
                           + (["in au"] if units != "au" else []),
                           disable_numparse=True) + "\n")
        out.write(_wrapped("\n".join(legend)) + "\n\n")
    if result.relaxation is not None:
        _write_relaxation(result, out, units, convention, significant)
    if result.zero_point is not None:
        _write_zero_point(result, out, units, convention, significant)
    if result.optical is not None:
        _write_optical(result, out, units, convention, significant)
    for text in result.warnings:
        out.write(_wrapped(f"warning: {text}") + "\n")
    if any(p in result.tensors for p in ("beta", "gamma")):
        out.write(_wrapped(f"note: {caution(job.model)}") + "\n")


def _pair_text(est, stable: bool, factor: float, significant=None) -> str:
    if not stable:
        return est.status.value
    v, e = format_pair(est.value_au * factor, est.error_au * factor, significant)
    return f"{v} +- {e}"


def _write_relaxation(result: RunResult, out: TextIO, units: str,
                      convention: str = "taylor", significant=None) -> None:
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
        label, factor = conversion(name, units, convention)
        rows = []
        for ce, cn, ct in zip(result.tensors[name].components, nuclear.components,
                              total.tensors[name].components):
            if ce.estimate.status is ComponentStatus.SYMMETRY_ZERO:
                continue
            rows.append([ce.plan.name, _pair_text(ce.estimate, ce.stable, factor, significant),
                         _pair_text(cn.estimate, cn.stable, factor, significant),
                         _pair_text(ct.estimate, ct.stable, factor, significant)])
        out.write(f"{name} ({label}; components not zero by symmetry)\n")
        # With a zero-point part, "total" is that table's (all parts): here
        # the relaxed nuclei's own.
        relaxed = "total" if result.zero_point is None else "with relaxed nuclei"
        out.write(tabulate(rows, headers=["component", "electronic", "nuclear relaxation",
                                          relaxed], disable_numparse=True) + "\n\n")
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
        scale = conversion(_INVARIANT_PROPERTY[inv.name], "au", convention)[1]
        rows.append([inv.name, " +- ".join(format_pair(e.value_au * scale, e.error_au * scale,
                                                       significant))
                     if e.value_au is not None else "unstable",
                     " +- ".join(format_pair(inv.value_au * scale, inv.error_au * scale,
                                             significant))
                     if inv.value_au is not None else "unstable"])
    if rows:
        out.write(f"invariants (au, {convention} convention): clamped and relaxed nuclei\n")
        last = "total" if result.zero_point is None else "with relaxed nuclei"
        out.write(tabulate(rows, headers=["invariant", "electronic", last],
                           disable_numparse=True) + "\n")
        averaged = ("no zero-point vibrational averaging here (zero_point = true adds it)"
                    if result.zero_point is None else "the zero-point correction follows")
        out.write(_wrapped(f"  Static limit only: {averaged}; vibrational contributions "
                           "depend strongly on the model, and the optical (high-frequency) "
                           "limit differs.") + "\n\n")


#: The invariants the optical estimates' table shows (the result JSON has
#: every beta invariant): hyper-Rayleigh, the vector norm, the EFISH one.
OPTICAL_COLUMNS = ("beta_hrs", "beta_vector_norm", "beta_parallel")


def _write_optical(result: RunResult, out: TextIO, units: str,
                   convention: str = "taylor", significant=None) -> None:
    """The two-state optical-frequency estimates: the excited state used and,
    per wavelength and process, the factor and the beta invariants."""
    from fieldprop.numerics import optical

    part = result.optical
    out.write(_wrapped(
        "optical-frequency estimates (two-state model from the static electronic beta: guides "
        "to the size of dispersion, not frequency-dependent calculations)") + "\n")
    if part.excitation_energy_au is None:
        out.write("  no excited state with oscillator strength: no estimate\n\n")
        return
    ev = optical.energy_ev(part.excitation_energy_au)
    out.write(_wrapped(f"  excitation: state {part.state} of {part.method}, {ev:.3f} eV "
                       f"({optical.wavelength_nm(part.excitation_energy_au):.0f} nm), "
                       "oscillator strength "
                       f"{part.oscillator_strength:.3f}; chosen as {optical.RULE}; resonant "
                       f"within {optical.RESONANCE_MARGIN_EV:g} eV") + "\n")
    present = {n for e in part.entries for n in e["invariants"]}
    names = [n for n in OPTICAL_COLUMNS if n in present]  # the JSON has them all
    rows = []
    for e in part.entries:
        row = [f"{e['wavelength_nm']:g}", e["process"],
               "resonant" if e["resonant"] else "-" if e["factor"] is None
               else f"{e['factor']:.4f}"]
        for name in names:
            v, err = e["invariants"].get(name, (None, None))
            if v is None:
                row.append("-")
                continue
            label, factor = conversion(_INVARIANT_PROPERTY[name], units, convention)
            row.append(" +- ".join(format_pair(v * factor, err * factor, significant)))
        rows.append(row)
    unit = conversion("beta", units, convention)[0]
    out.write(tabulate(rows, headers=["nm", "process", "factor"] + names,
                       disable_numparse=True) + f"\n  ({unit}; {convention} convention)\n\n")


def _write_zero_point(result: RunResult, out: TextIO, units: str,
                      convention: str = "taylor", significant=None) -> None:
    """Electronic, zero-point correction, nuclear relaxation (where computed)
    and total tensors side by side; the modes; the invariants."""
    from fieldprop.numerics import zero_point as zp

    part = result.zero_point
    relaxed = result.relaxation
    freqs = part.modes.frequencies_cm()
    out.write(_wrapped(
        "zero-point vibrational average (first order in the anharmonicity; the property's "
        "curvature along each harmonic mode and the shift of the averaged structure, from the "
        f"tensors and gradients at {part.geometries} displaced geometries"
        + (f" ({part.images} of them images of others by symmetry)" if part.images else "")
        + ", steps "
        + " and ".join(f"+-{s:g}" for s in zp.STEPS) + " of the dimensionless normal "
        f"coordinates; {part.computed} field points computed, {part.reused} reused)") + "\n")
    out.write(_wrapped("  modes (cm^-1): " + ", ".join(f"{f:.0f}" for f in freqs)
                       + "; masses (u): " + ", ".join(f"{m:.6g}" for m in part.masses_u))
              + "\n\n")
    for name, corr in part.correction.items():
        label, factor = conversion(name, units, convention)
        rows = []
        nuclear = relaxed.nuclear[name].components if relaxed is not None else None
        for i, (ce, cz, ct) in enumerate(zip(result.tensors[name].components, corr.components,
                                             part.total[name].components)):
            if ce.estimate.status is ComponentStatus.SYMMETRY_ZERO:
                continue
            row = [ce.plan.name, _pair_text(ce.estimate, ce.stable, factor, significant),
                   _pair_text(cz.estimate, cz.stable, factor, significant)]
            if nuclear is not None:
                row.append(_pair_text(nuclear[i].estimate, nuclear[i].stable, factor,
                                      significant))
            rows.append(row + [_pair_text(ct.estimate, ct.stable, factor, significant)])
        out.write(f"{name} ({label}; components not zero by symmetry)\n")
        out.write(tabulate(rows, headers=["component", "electronic", "zero-point"]
                           + (["nuclear relaxation"] if relaxed is not None else []) + ["total"],
                           disable_numparse=True) + "\n\n")
    clamped = {inv.name: inv for inv in result.invariants}
    rows = []
    for inv in part.total_invariants:
        e = clamped.get(inv.name)
        if e is None:
            continue
        scale = conversion(_INVARIANT_PROPERTY[inv.name], "au", convention)[1]
        rows.append([inv.name] + [" +- ".join(format_pair(x.value_au * scale, x.error_au * scale,
                                                          significant))
                                  if x.value_au is not None else "no number" for x in (e, inv)])
    if rows:
        out.write(f"invariants (au, {convention} convention): electronic and total"
                  + (" (with nuclear relaxation)" if relaxed is not None else "") + "\n")
        out.write(tabulate(rows, headers=["invariant", "electronic", "total"],
                           disable_numparse=True) + "\n")
        out.write(_wrapped(
            "  The correction is first order in the anharmonicity: it leaves out the quartic "
            "force constants, the cubic ones squared and higher property derivatives (typically "
            "a few per cent of the correction), and it is of the vibrational ground state "
            "(0 K). The bars are those of the numerical differentiation only.") + "\n\n")


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
    out.write(_wrapped(f"reference: {reference.source}" + (
        f" ({reference.note})" if reference.note else "")) + "\n")
    out.write(_wrapped(f"agreement: {rule.describe()}; ok where diff/allowed <= 1" + (
        "" if rule.strict else "; \"ok by floor\": the difference exceeds the error bars' "
        "term and only the floor admits it (--strict fails it)")) + "\n\n")
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
