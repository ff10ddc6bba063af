"""Result JSON files turned into tables, CSV or JSON again, in any unit system
and convention, without computing anything (``fieldprop report``; also the
``--format csv`` of ``run`` and ``collect``).

Two layouts:

- **invariants** (default): one row per result and part, ``file, formula,
  model, route, convention, part``, then for each invariant its value and
  error bar, then ``status`` (``ok``, or what has no number and why);
- **components** (``--components``): one row per unique tensor component:
  ``file, part, tensor, component, value, error, unit, convention, status, entry``.

CSV columns name their unit: ``<invariant>_<unit>`` and
``<invariant>_error_<unit>`` (``alpha_iso_au``, ``beta_parallel_error_1e-30_esu``,
``dipole_norm_debye``, ``alpha_iso_C_m2_per_V``); unit tags by system and
property are in :data:`UNIT_TAGS`. Conventions: ``taylor`` (fieldprop's, E = E0 - mu F -
alpha F^2/2 - beta F^3/6 - gamma F^4/24) and ``perturbation`` (the B
convention, mu(F) = mu + alpha F + beta F^2 + gamma F^3: beta/2, gamma/6; mu
and alpha unchanged). Factors come from :mod:`fieldprop.numerics.units`.

>>> conversion("beta", "au", "perturbation")
('au', 0.5)
>>> round(conversion("alpha", "esu", "taylor")[1], 6)
0.148185
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from tabulate import tabulate

from fieldprop.errors import InputError
from fieldprop.inputs.job import echo_atoms, model_text
from fieldprop.numerics.units import TABLE_UNITS
from fieldprop.numerics.units import LABEL_TAGS

#: The schema of the result documents (report.result_document writes them, this
#: module reads them).
RESULT_SCHEMA = "fieldprop-result-1"
#: Conventions: factor from the Taylor convention, per property.
CONVENTIONS = {"taylor": {"dipole": 1.0, "alpha": 1.0, "beta": 1.0, "gamma": 1.0},
               "perturbation": {"dipole": 1.0, "alpha": 1.0, "beta": 0.5, "gamma": 1.0 / 6.0}}
#: The short unit tag of CSV column names, per unit system and property.
UNIT_TAGS = {system: {p: LABEL_TAGS[label] for p, (label, _) in units.items()}
             for system, units in TABLE_UNITS.items()}
#: Invariants in the order of the columns, with their property.
INVARIANTS = (("dipole_norm", "dipole"), ("alpha_iso", "alpha"), ("alpha_aniso", "alpha"),
              ("beta_parallel", "beta"), ("beta_vector_norm", "beta"), ("beta_hrs", "beta"),
              ("beta_hrs_zzz", "beta"), ("beta_hrs_xzz", "beta"),
              ("beta_hrs_depolarisation_ratio", "ratio"), ("beta_dipolar_norm", "beta"),
              ("beta_octupolar_norm", "beta"), ("gamma_parallel", "gamma"),
              ("gamma_perpendicular", "gamma"))
FORMATS = ("table", "csv", "json")


def conversion(prop: str, units: str, convention: str) -> tuple[str, float]:
    """(unit label, factor from Taylor atomic units) of a property ("ratio":
    a dimensionless invariant, the same in every unit system and convention)."""
    if prop == "ratio":
        return "", 1.0
    label, factor = TABLE_UNITS[units][prop]
    return label, factor * CONVENTIONS[convention][prop]


def invariant_columns(name: str, prop: str, units: str, convention: str = "taylor"
                      ) -> tuple[list[str], list[str]]:
    """The CSV columns of an invariant (value, error: ``<name>_<unit tag>``,
    ``<name>_error_<unit tag>``; a ratio has no tag) and their display headers."""
    label = conversion(prop, units, convention)[0]
    if prop == "ratio":
        return [name, f"{name}_error"], [name, "+- error"]
    tag = UNIT_TAGS[units][prop]
    return [f"{name}_{tag}", f"{name}_error_{tag}"], [f"{name} ({label})", "+- error"]


def load_result(path: Path) -> dict:
    """A result JSON document, checked for form (InputError naming the file)."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{path}: no such file") from None
    except IsADirectoryError:
        raise InputError(f"{path}: is a directory, not a result JSON file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot be read ({getattr(exc, 'strerror', None) or exc})") \
            from None
    try:
        doc = json.loads(text)
    except ValueError as exc:
        raise InputError(f"{path}: not JSON ({exc.msg} at line {exc.lineno}); a result file "
                         "is written by fieldprop run or collect") from None
    if not isinstance(doc, dict) or doc.get("schema") != RESULT_SCHEMA:
        found = doc.get("schema") if isinstance(doc, dict) else None
        what = (f"its schema is {found!r}, not {RESULT_SCHEMA!r}" if found is not None else
                "JSON without the result's schema key")
        raise InputError(f"{path}: not a fieldprop result ({what}); a result file is written "
                         "by fieldprop run or collect")
    if doc.get("units") != "au" or doc.get("convention") != "taylor":
        raise InputError(f"{path}: units {doc.get('units')!r} and convention "
                         f"{doc.get('convention')!r}; fieldprop results are in 'au', 'taylor'")
    for key in ("tensors", "invariants", "job"):
        if not isinstance(doc.get(key), dict):
            raise InputError(f"{path}: key {key!r} is missing or not an object (a damaged "
                             "result file)")
    return doc


def job_file_text(label: str, doc: dict) -> str:
    """The job file (TOML) that computes the result ``doc`` again: its job
    echo without what was derived (the echo holds the job file's own
    sections and keys, every default filled in and the geometry in bohr at
    full precision)."""
    import tomli_w

    job = {k: v for k, v in doc["job"].items() if k != "derived"}
    if not isinstance(job.get("molecule"), dict):
        raise InputError(f"{label}: its job echo has no [molecule]; it cannot be rebuilt")
    return (f"# The job of {label}, rebuilt from its result (fieldprop "
            f"{doc.get('version', '?')}).\n" + tomli_w.dumps(job, multiline_strings=True))


def _formula(doc: dict) -> str:
    formula = doc.get("formula")
    if isinstance(formula, str) and formula:
        return formula
    atoms = echo_atoms(doc["job"]) or []
    counts: dict[str, int] = {}
    for a in atoms:
        counts[a.get("symbol", "?")] = counts.get(a.get("symbol", "?"), 0) + 1
    order = sorted(counts, key=lambda s: (s != "C", s != "H", s)) if "C" in counts \
        else sorted(counts)
    return "".join(f"{s}{counts[s] if counts[s] > 1 else ''}" for s in order)


def _model(doc: dict) -> str:
    m = doc["job"].get("model") or {}
    multiplicity = (doc["job"].get("molecule") or {}).get("multiplicity", 1)
    return model_text(m.get("method"), m.get("functional"), m.get("basis") or "?",
                      m.get("solvent"), m.get("solvent_model"), m.get("reference"),
                      multiplicity if isinstance(multiplicity, int) else 1)


def _number(x: Any) -> float | None:
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


#: The parts of a result (the ``part`` column): its keys in the result JSON
#: for tensors and invariants (None: the part has none). Electronic with the
#: nuclei clamped always; with zero_point = true the zero-point correction,
#: with nuclear_relaxation = true the nuclear-relaxation part, and with
#: either the total.
PARTS = (("electronic", "tensors", "invariants"),
         ("zero_point", "tensors_zero_point", None),
         ("nuclear_relaxation", "tensors_nuclear_relaxation", None),
         ("total", "tensors_total", "invariants_total"))
PART_LEGEND = ("part: electronic = nuclei clamped at the geometry; zero_point = the zero-point "
               "vibrational average's correction (first order in the anharmonicity); "
               "nuclear_relaxation = what the nuclei relaxing in the field add; total = the sum "
               "(static limit)")


def invariant_table(docs: list[tuple[str, dict]], units: str, convention: str
                    ) -> tuple[list[str], list[list[Any]], list[str]]:
    """(CSV header, rows of numbers, display headers): one row per result and
    part (PARTS: electronic, and total where the nuclei were relaxed)."""
    present = [(name, prop) for name, prop in INVARIANTS
               if any(name in d["invariants"] for _, d in docs)]
    header = ["file", "formula", "model", "route", "convention", "part"]
    shown = list(header)
    for name, prop in present:
        columns, headers = invariant_columns(name, prop, units, convention)
        header += columns
        shown += headers
    header.append("status")
    shown.append("status")
    rows = []
    for label, doc in docs:
        routes = sorted({t.get("route", "?") for t in doc["tensors"].values()})
        for part, _, key in PARTS:
            if key is None or not isinstance(doc.get(key), dict):
                continue
            rows.append(_invariant_row(doc[key], present, units, convention,
                                       [label, _formula(doc), _model(doc), "+".join(routes),
                                        convention, part]))
    return header, rows, shown


def _invariant_row(invariants: dict, present, units: str, convention: str, row: list) -> list:
    """``row`` continued with each present invariant's value and error bar
    (converted) and a status: ok, or what has no number and why."""
    problems = []
    for name, prop in present:
        entry = invariants.get(name)
        _, factor = conversion(prop, units, convention)
        value = _number(entry.get("value")) if isinstance(entry, dict) else None
        error = _number(entry.get("error")) if isinstance(entry, dict) else None
        if value is None or error is None:
            row += [None, None]
            if isinstance(entry, dict):
                problems.append(f"{name}: {entry.get('reason') or 'no number'}")
            continue
        row += [value * factor, error * factor]
    row.append("ok" if not problems else "; ".join(problems))
    return row


def _frame_of(label: str, doc: dict):
    """The dipole frame of a result (tensors.dipole_frame: z along its
    electronic dipole, x along its alpha's largest perpendicular axis, or the
    nuclei's without alpha); InputError where the dipole is zero within its
    error bars or not in the result."""
    from fieldprop.numerics.tensors import dipole_frame, dipole_is_zero

    tensors = doc["tensors"]
    dipole = tensors.get("dipole") or {}
    mu, err = dipole.get("value"), dipole.get("error")
    if mu is None or err is None or any(v is None for v in list(mu) + list(err)):
        raise InputError(f"{label}: the dipole frame needs the dipole moment (properties "
                         "with \"dipole\", every component a number)")
    mu, err = np.array(mu, dtype=float), np.array(err, dtype=float)
    if dipole_is_zero(mu, err):
        raise InputError(f"{label}: the dipole moment is zero within its error bars: the "
                         "molecule has no dipole frame")
    alpha = (tensors.get("alpha") or {}).get("value")
    if alpha is not None and any(v is None for row in alpha for v in row):
        alpha = None
    atoms = [a["coords_bohr"] for a in doc.get("geometry_computed_bohr") or []]
    return dipole_frame(mu, alpha, atoms if alpha is None else None)


def _turned_components(tensor: dict, frame) -> list[dict]:
    """A tensor's components (the result's layout) in ``frame``; every one
    without a number when one of the tensor's is (nothing to turn)."""
    from fieldprop.numerics.tensors import turned

    value, error = tensor.get("value"), tensor.get("error")
    flat_v = np.array(value, dtype=object).ravel()
    if any(v is None for v in flat_v) or error is None:
        return [{**c, "value": None, "error": None, "status": "unstable",
                 "reason": "not turned: a component of the tensor has no number"}
                for c in tensor.get("components") or []]
    v = turned(np.array(value, dtype=float), frame)
    e = turned(np.array(error, dtype=float), frame, magnitudes=True)
    out = []
    for c in tensor.get("components") or []:
        index = tuple(c["indices"])
        status = "ok" if c.get("status") == "zero-by-symmetry" else c.get("status")
        out.append({**c, "value": float(v[index]), "error": float(e[index]),
                    "status": status})
    return out


def component_table(docs: list[tuple[str, dict]], units: str, convention: str,
                    frame: str = "input") -> tuple[list[str], list[list[Any]], list[str]]:
    """(CSV header, rows, display headers): one row per unique tensor
    component, in the input frame or (``frame`` = "dipole") the dipole frame
    (_frame_of; components named by their indices in that frame)."""
    header = ["file", "part", "tensor", "component", "value", "error", "unit", "convention",
              "frame", "status", "entry"]
    rows = []
    axes = {label: _frame_of(label, doc) for label, doc in docs} if frame == "dipole" else {}
    for label, doc, part, tensors in ((label, doc, part, doc.get(key))
                                      for label, doc in docs for part, key, _ in PARTS):
        if not isinstance(tensors, dict):
            continue
        for name in ("dipole", "alpha", "beta", "gamma"):
            tensor = tensors.get(name)
            if not isinstance(tensor, dict):
                continue
            unit, factor = conversion(name, units, convention)
            components = (tensor.get("components") or [] if frame != "dipole"
                          else _turned_components(tensor, axes[label]))
            for c in components:
                value, error = _number(c.get("value")), _number(c.get("error"))
                entry = c.get("richardson_entry") or {}
                rows.append([label, part, name, c.get("name"),
                             None if value is None else value * factor,
                             None if error is None else error * factor, unit, convention,
                             frame, c.get("status") if value is not None else
                             f"{c.get('status')}: {c.get('reason')}",
                             f"h{entry.get('level')}, {entry.get('steps')} steps"
                             if entry and c.get("status") not in (
                                 "ok-zero-field", "missing", "zero-by-symmetry")
                             else {"ok-zero-field": "F = 0 (no derivative)",
                                   "zero-by-symmetry": "none (symmetry)"}.get(
                                       c.get("status"), "-")])
    return header, rows, header


def _pair_text(value, error, significant=None) -> tuple[str, str]:
    from fieldprop.outputs.tables import format_pair

    if value is None:
        return "-", "-"
    return format_pair(value, error, significant)


def write(docs: list[tuple[str, dict]], out: TextIO, units: str = "au",
          convention: str = "taylor", fmt: str = "table", components: bool = False,
          all_digits: bool = False, frame: str = "input") -> None:
    """The results ``docs`` ((label, document) pairs) in one layout and format
    (a table: values to tables.SIGNIFICANT_DIGITS, or with ``all_digits``
    every digit their bars support; CSV and JSON: full precision)."""
    from fieldprop.outputs.tables import SIGNIFICANT_DIGITS

    significant = None if all_digits else SIGNIFICANT_DIGITS
    if components:
        header, rows, shown = component_table(docs, units, convention, frame)
    else:
        header, rows, shown = invariant_table(docs, units, convention)
    if fmt == "csv":
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(header)
        for row in rows:
            writer.writerow(["" if v is None else repr(v) if isinstance(v, float) else v
                             for v in row])
        return
    if fmt == "json":
        json.dump({"schema": "fieldprop-report-1", "units": units, "convention": convention,
                   "columns": header, "rows": rows}, out, indent=1, allow_nan=False)
        out.write("\n")
        return
    out.write(f"{'tensor components' if components else 'invariants'}; units: {units}; "
              f"convention: {convention}"
              + (" (mu(F) = mu + alpha F + beta F^2 + gamma F^3: beta_T/2, gamma_T/6)"
                 if convention == "perturbation" else
                 " (E = E0 - mu F - alpha F^2/2 - beta F^3/6 - gamma F^4/24)") + "\n")
    if components:
        text_rows = []
        for row in rows:
            v, e = _pair_text(row[4], row[5], significant)
            text_rows.append([*row[:4], v, e, *row[6:]])
        out.write(tabulate(text_rows, headers=shown, disable_numparse=True) + "\n")
    else:
        _write_invariant_columns(header, rows, units, convention, significant, out)
    out.write(PART_LEGEND + "; static (zero-frequency) tensors of the isolated molecule\n")


def _write_invariant_columns(header, rows, units: str, convention: str, significant,
                             out: TextIO) -> None:
    """The invariant layout for people, narrow: a numbered line per result
    and part (file, formula, model, route, part, status), then a row per
    invariant (its unit beside its name) and a column per result."""
    for k, row in enumerate(rows, 1):
        out.write(f"  [{k}] {row[0]}: {row[1]}, {row[2]}, {row[3]} route, {row[5]}; "
                  f"{row[-1]}\n")
    by_column = {invariant_columns(n, p, units, convention)[0][0]: (n, p)
                 for n, p in INVARIANTS}
    table = []
    for column in range(6, len(header) - 1, 2):
        name, prop = by_column[header[column]]
        label = conversion(prop, units, convention)[0]
        cells = [f"{name} ({label})" if label else name]
        for row in rows:
            v, e = _pair_text(row[column], row[column + 1], significant)
            cells.append("-" if row[column] is None else f"{v} +- {e}")
        table.append(cells)
    out.write(tabulate(table, headers=["invariant"] + [f"[{k}]" for k in range(1, len(rows) + 1)],
                       disable_numparse=True) + "\n")
