"""Listings of points: the field points of a plan and which of them the store
holds (:func:`write_plan`: a table, JSON lines, CSV or ids, for job arrays), and what
a point store holds (:func:`write_store_summary`; :func:`write_store_lines` exports
every point as a point line that ``collect --points`` reads back). Writes only to
the stream it is given."""

from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING, TextIO

from tabulate import tabulate

from fieldprop.outputs.tables import _frame_text
from fieldprop.points.keys import short_id

if TYPE_CHECKING:
    from fieldprop.numerics.plan import FieldPlan


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
    table, json (one document: its points), jsonl (a JSON object per point and
    line), csv or ids (an id per line);
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
    if fmt in ("json", "jsonl"):
        docs = []
        for p, t in listed:
            doc = {"id": short_id(t.key), "key": t.key, "index": p.index, "level": p.level,
                   "label": p.label, "offsets": list(p.offsets),
                   "field_vector_au": list(p.field_vector_au),
                   "stencil_uses": uses.get(p.index, 0), "stored": _stored_status(t, stored)}
            if p.index in image_of:
                j, op = image_of[p.index]
                doc.update(stored="image", image_of=short_id(tasks[j].key),
                           operation=[[float(v) for v in row] for row in op])
            docs.append(doc)
        if fmt == "jsonl":
            out.writelines(json.dumps(doc) + "\n" for doc in docs)
        else:
            json.dump({"schema": "fieldprop-plan-1", "points": docs}, out, indent=1)
            out.write("\n")
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
