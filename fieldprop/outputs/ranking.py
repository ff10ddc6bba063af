"""A screening campaign's ranked table: one row per molecule, best first.

Built from the molecules' result documents (:func:`fieldprop.outputs.documents.
result_document`) and failures, in any unit system (:mod:`fieldprop.outputs.summary`
converts). Molecules are ranked by the magnitude of the ranking invariant
(|beta_parallel| for a sign-carrying one); a molecule without a number for it
(failed, or the invariant unstable) comes last, unranked. Two neighbours whose
ranking values overlap within their (numerical) error bars are marked: their
bars are not clear of each other.

CSV columns: ``rank, name, formula``, then ``<invariant>_<unit>`` and
``<invariant>_error_<unit>`` for each invariant (a ratio: no unit), then
``status``, ``model``, ``convention``, ``bars_clear_of_next``, ``reason`` and
``caution`` (RANKING_CAUTION).
"""

from __future__ import annotations

import csv
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

from tabulate import tabulate

from fieldprop.outputs.files import replacing
from fieldprop.outputs.summary import (INVARIANTS, _formula, _model, conversion,
                                       invariant_columns)

#: Ranking keys: every invariant. The old short name of the vector norm is
#: still taken (rank_key), not offered.
RANK_KEYS = tuple(name for name, _ in INVARIANTS)
_ALIASES = {"beta_vec": "beta_vector_norm"}
PROPERTY_OF = dict(INVARIANTS)
#: An optical-frequency estimate as a ranking key: a beta invariant, the
#: process (shg: second-harmonic, eo: electro-optic) and the wavelength, as in
#: beta_hrs_shg_1064nm (the result JSON's optical_estimates).
ESTIMATE_KEY = re.compile(r"^(beta_[a-z_]+?)_(shg|eo)_(\d+(?:\.\d+)?)nm$")
PROCESS_CODES = {"shg": "second-harmonic", "eo": "electro-optic"}


def estimate_parts(key: str) -> tuple[str, str, float] | None:
    """(invariant, process, wavelength in nm) of an estimate key, else None."""
    m = ESTIMATE_KEY.match(key)
    if m is None or PROPERTY_OF.get(m.group(1)) != "beta":
        return None
    return m.group(1), PROCESS_CODES[m.group(2)], float(m.group(3))


def valid_key(key: str) -> bool:
    return key in PROPERTY_OF or estimate_parts(key) is not None


def property_of(key: str) -> str:
    """The property whose units a ranking key takes."""
    parts = estimate_parts(key)
    return PROPERTY_OF[parts[0] if parts is not None else key]


@dataclass(frozen=True)
class Entry:
    """One molecule: its result document (None when it failed) or failure."""

    name: str
    document: dict | None
    formula: str = ""
    model: str = ""
    failure: str = ""
    #: A conformer ensemble: how many conformers and their weights.
    note: str = ""

    def resonant(self, name: str) -> bool:
        """Whether the optical estimate ``name`` is resonant for this molecule."""
        parts = estimate_parts(name)
        if self.document is None or parts is None:
            return False
        _, process, wavelength = parts
        entries = (self.document.get("optical_estimates") or {}).get("entries") or ()
        return any(e.get("resonant") for e in entries if e.get("process") == process
                   and abs(float(e.get("wavelength_nm", -1)) - wavelength) < 1e-9)

    def invariant(self, name: str) -> tuple[float | None, float | None]:
        if self.document is None:
            return None, None
        parts = estimate_parts(name)
        if parts is not None:
            invariant, process, wavelength = parts
            entries = (self.document.get("optical_estimates") or {}).get("entries") or ()
            item = next(((e.get("invariants") or {}).get(invariant) or {} for e in entries
                         if e.get("process") == process
                         and abs(float(e.get("wavelength_nm", -1)) - wavelength) < 1e-9), {})
        else:
            item = self.document["invariants"].get(name) or {}
        value, error = item.get("value"), item.get("error")
        ok = all(isinstance(x, (int, float)) and math.isfinite(x) for x in (value, error))
        return (float(value), float(error)) if ok else (None, None)


@dataclass(frozen=True)
class Row:
    rank: int | None
    entry: Entry
    status: str
    reason: str
    bars_clear_of_next: bool | None


def resolve_key(key: str) -> str:
    """A ranking key: an invariant's name, or an old name of one (--rank-by)."""
    return _ALIASES.get(key, key)


def rank(entries: list[Entry], key: str) -> list[Row]:
    """The rows, best first by |key|; unranked molecules last, by name."""
    key = resolve_key(key)
    scored, rest = [], []
    for e in entries:
        value, error = e.invariant(key)
        (scored if value is not None else rest).append((e, value, error))
    scored.sort(key=lambda x: -abs(x[1]))
    rows = []
    for n, (e, value, error) in enumerate(scored):
        separated = None
        if n + 1 < len(scored):
            _, v2, e2 = scored[n + 1]
            separated = abs(value) - error > abs(v2) + e2
        status, reason = _status(e)
        rows.append(Row(n + 1, e, status, reason, separated))
    for e, _, _ in sorted(rest, key=lambda x: x[0].name):
        status, reason = _status(e)
        if status == "ok" and e.resonant(key):
            status, reason = "resonant", (f"{key}: the two-state estimate is resonant there "
                                          "(no number; see its result file)")
        elif status == "ok":
            status, reason = "unranked", f"{key}: no number (see its result file)"
        rows.append(Row(None, e, status, reason, None))
    return rows


def _status(e: Entry) -> tuple[str, str]:
    if e.document is None:
        return "failed", e.failure
    problems = [f"{c.get('name')}: {c.get('reason') or c.get('status')}"
                for t in e.document["tensors"].values() for c in t.get("components", ())
                if c.get("status") in ("unstable", "missing")]
    return ("unstable", "; ".join(problems[:3])) if problems else ("ok", "")


def _present(entries) -> list[tuple[str, str]]:
    return [(n, p) for n, p in INVARIANTS
            if any(e.document is not None and n in e.document["invariants"] for e in entries)]


#: What the error bars of a ranking do not contain (a column of the CSV, a
#: line under the table).
RANKING_CAUTION = ("bars: numerical differentiation only; the model (method, basis) moves "
                   "beta by tens of per cent, more than most gaps between neighbours")


def table(rows: list[Row], units: str, convention: str = "taylor", key: str | None = None
          ) -> tuple[list[str], list[list], list[str]]:
    """(CSV header, rows of values, display header), in ``units`` and
    ``convention``; ranked by an optical estimate (``key``), its column too."""
    present = _present([r.entry for r in rows])
    if key is not None and estimate_parts(key) is not None:
        present.append((key, "beta"))
    header, shown = ["rank", "name", "formula"], ["rank", "name", "formula"]
    for name, prop in present:
        columns, headers = invariant_columns(name, prop, units, convention)
        header += columns
        shown += headers
    ensembles = any(r.entry.note for r in rows)
    header += ["status", "model", "convention", "bars_clear_of_next"] + (
        ["conformers"] if ensembles else []) + ["reason", "caution"]
    shown += ["status", "model", "convention", "bars clear"] + (
        ["conformers"] if ensembles else []) + ["reason"]
    out = []
    for r in rows:
        e = r.entry
        row = [r.rank, e.name, e.formula]
        for name, prop in present:
            value, error = e.invariant(name)
            factor = conversion(prop, units, convention)[1]
            row += [None, None] if value is None else [value * factor, error * factor]
        row += [r.status, e.model, convention,
                None if r.bars_clear_of_next is None else r.bars_clear_of_next]
        row += ([e.note] if ensembles else []) + [r.reason, RANKING_CAUTION]
        out.append(row)
    return header, out, shown


def write_csv(rows: list[Row], units: str, out: TextIO, convention: str = "taylor",
              key: str | None = None) -> None:
    header, values, _ = table(rows, units, convention, key)
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    for row in values:
        writer.writerow(["" if v is None else repr(v) if isinstance(v, float)
                         else str(v).lower() if isinstance(v, bool) else v for v in row])


def write_csv_file(rows: list[Row], units: str, path: Path, convention: str = "taylor",
                   key: str | None = None) -> None:
    """The CSV (:func:`write_csv`) as the file ``path``, whole or not at all."""
    with replacing(path, newline="") as out:
        write_csv(rows, units, out, convention, key)


#: The invariants the ranked text table shows beside the ranking key (the CSV
#: has every one): a table a terminal can show.
TABLE_INVARIANTS = ("alpha_iso", "beta_hrs", "beta_vector_norm", "gamma_parallel")


def write_table(rows: list[Row], units: str, key: str, out: TextIO,
                convention: str = "taylor") -> None:
    """The ranked table for a terminal: the ranking key and the headline
    invariants (TABLE_INVARIANTS) as value +- error, status, model, whether
    the bars clear the next molecule's, the conformers of an ensemble, the
    reason; every invariant is in the CSV."""
    key = resolve_key(key)
    present = {n for n, _ in _present([r.entry for r in rows])}
    names = [key] + [n for n in TABLE_INVARIANTS if n in present and n != key]
    ensembles = any(r.entry.note for r in rows)
    headers = ["rank", "name", "formula"]
    factors = []
    for name in names:
        label, factor = conversion(property_of(name), units, convention)
        headers.append(f"{name} ({label})" if label else name)
        factors.append(factor)
    headers += ["status", "model", "bars clear"] + (["conformers"] if ensembles else []) + [
        "reason"]
    text = []
    for r in rows:
        e = r.entry
        cells = ["-" if r.rank is None else str(r.rank), e.name, e.formula]
        for name, factor in zip(names, factors):
            value, error = e.invariant(name)
            cells.append("-" if value is None else f"{value * factor:.6g} +- {error * factor:.2g}")
        cells += [r.status, e.model, "-" if r.bars_clear_of_next is None else
                  "yes" if r.bars_clear_of_next else "NO (overlaps next)"]
        cells += ([e.note] if ensembles else []) + [r.reason[:60]]
        text.append(cells)
    out.write(f"ranked by |{key}|, best first; {convention} convention; error bars are "
              "estimates of the numerical differentiation only; every invariant: --csv\n")
    out.write(tabulate(text, headers=headers, disable_numparse=True) + "\n")
    out.write(f"caution: {RANKING_CAUTION}\n")


def entry_from(name: str, document: dict | None, failure: str = "", formula: str = "",
               model: str = "", note: str = "") -> Entry:
    if document is not None:
        formula, model = _formula(document), _model(document)
    return Entry(name, document, formula, model, failure, note)


def _scaled(values, label: str) -> tuple[float, str]:
    """A power of ten that brings ``values`` near 1, and the axis unit with it
    written out (so that no offset text hides at the axis end)."""
    largest = max((abs(v) for v in values), default=0.0)
    if largest == 0.0 or 1e-2 <= largest < 1e4:
        return 1.0, label
    power = int(math.floor(math.log10(largest)))
    return 10.0 ** -power, f"10^{power} {label}".strip()


def write_png(rows: list[Row], key: str, units: str, path: Path,
              convention: str = "taylor") -> None:
    """Two panels: the ranking key with error bars per molecule (ranked;
    signed, so a negative value draws to the left), and the ranking key
    against alpha_iso (when alpha is there). Titles name the model and the
    convention; axis labels carry the power of ten."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    key = resolve_key(key)
    prop = property_of(key)
    label, factor = conversion(prop, units, convention)
    ranked = [r for r in rows if r.rank is not None]
    names = [r.entry.name for r in ranked]
    values = [r.entry.invariant(key)[0] * factor for r in ranked]
    errors = [r.entry.invariant(key)[1] * factor for r in ranked]
    scale, unit = _scaled(values, label)
    alpha_label, alpha_factor = conversion("alpha", units, convention)
    pairs = [(r.entry.invariant(key)[0] * factor * scale,
              r.entry.invariant("alpha_iso")[0] * alpha_factor, r.entry.name)
             for r in ranked if r.entry.invariant("alpha_iso")[0] is not None]
    panels = 2 if pairs and key != "alpha_iso" else 1
    models = sorted({r.entry.model for r in ranked if r.entry.model}) or ["?"]
    fig, axes = plt.subplots(1, panels, figsize=(6.5 * panels, 0.35 * len(names) + 2.8),
                             squeeze=False, constrained_layout=True)
    fig.suptitle(f"{', '.join(models)}; {convention} convention; static, gas phase; bars: "
                 "numerical error only", fontsize=9)
    ax = axes[0][0]
    positions = list(range(len(names)))[::-1]
    ax.barh(positions, [v * scale for v in values], xerr=[e * scale for e in errors],
            color=["tab:blue" if v >= 0 else "tab:red" for v in values], alpha=0.7, capsize=3)
    ax.axvline(0.0, color="black", linewidth=0.6)
    ax.set_yticks(positions, names, fontsize=8)
    ax.set_xlabel(f"{key} ({unit})" if unit else key)
    ax.set_title(f"ranked by |{key}|", fontsize=10)
    if panels == 2:
        ax = axes[0][1]
        ax.scatter([a for _, a, _ in pairs], [v for v, _, _ in pairs], color="tab:orange")
        for v, a, n in pairs:
            ax.annotate(n, (a, v), fontsize=7, xytext=(3, 3), textcoords="offset points",
                        annotation_clip=False)
        ax.margins(x=0.2, y=0.1)
        ax.set_xlabel(f"alpha_iso ({alpha_label})")
        ax.set_ylabel(f"{key} ({unit})" if unit else key)
        ax.set_title(f"{key} against alpha_iso", fontsize=10)
    try:
        with replacing(path, binary=True) as fh:
            fig.savefig(fh, format="png", dpi=120)
    finally:
        plt.close(fig)
