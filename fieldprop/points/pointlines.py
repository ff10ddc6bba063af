"""Point lines: one computed field point as one line of JSON, for pipelines.

``fieldprop point --stdout`` writes them, ``fieldprop inspect --json-lines``
exports a store as them, and ``fieldprop collect --points`` and ``fieldprop
plan --points`` read them back. A line carries everything the store keeps of a
point (its record or its failure, the convergence reached, provenance) and the
backend facts of its model, so that a result can be assembled from lines alone
without PySCF.

Every line read is checked against the job before anything is used, and a bad
one is bad input (one line naming the source, the line number and what is
wrong): a line that is not JSON or not a point line (corrupt, truncated, a
foreign file), a point of another molecule or model, a point whose key does not
match its contents (edited or damaged), or a point that is not in the job's
plan. Pure: no PySCF, no store.

>>> line = {"schema": SCHEMA, "key": "k", "model_key": "m"}
>>> parse_line(json.dumps(line), "points.jsonl", 3)
Traceback (most recent call last):
...
fieldprop.errors.InputError: points.jsonl line 3: not a complete point line (missing field_vector_au, origin_bohr, quantities, status)
"""

from __future__ import annotations

import json
import math
from typing import Iterable, TextIO

from fieldprop.errors import InputError
from fieldprop.points.keys import backend_version_conflict, point_key, short_id
from fieldprop.points.records import Orientation
from fieldprop.points.store import StoredPoint

#: The kind mark of a point line.
SCHEMA = "fieldprop-point-1"
_REQUIRED = ("key", "model_key", "field_vector_au", "origin_bohr", "quantities", "status")
_RECORD = {"energy_au": float, "scf_energy_au": float, "scf_cycles": int, "attempts": list,
           "s2": float, "occupied_overlap": float, "gradient_norm": float}
_OPTIONAL = {"dipole_au": list, "alpha_au": list, "dipole_error_au": float, "state_issue": str,
             "energy_scale_au": float, "relaxation": dict,
             "correlation_energy_change_au": float, "amplitude_change": float,
             "orientation": dict}
_KIND_NAMES = {list: "list", str: "string", dict: "JSON object"}


def line_document(row: StoredPoint, field_vector_au, origin_bohr, quantities,
                  facts: dict | None = None, description: dict | None = None,
                  tolerances: dict | None = None) -> dict:
    """A stored point (row of the store, with its field vector, origin,
    quantities and, for a tightened point, its convergence targets) as a
    point line's object."""
    doc = {"schema": SCHEMA, "id": short_id(row.key), "key": row.key,
           "model_key": row.model_key, "field_vector_au": [float(v) for v in field_vector_au],
           "origin_bohr": [float(v) for v in origin_bohr], "quantities": list(quantities),
           "status": row.status}
    if tolerances:
        doc["tolerances"] = tolerances
    if description:
        doc.update({k: description.get(k) for k in ("formula", "method", "functional",
                                                      "basis")})
    fields = dict(row.fields)
    for name in ("dipole_au", "alpha_au", "attempts"):
        if fields.get(name) is not None:
            fields[name] = json.loads(json.dumps(fields[name]))  # tuples -> lists
    if fields.get("orientation") is not None:
        fields["orientation"] = fields["orientation"].document()
    doc.update(fields)
    doc.update({"wall_time_s": row.wall_time_s, "host": row.host, "version": row.version,
                "created_at": row.created_at})
    if facts is not None:
        doc["facts"] = facts
    return doc


def write_line(doc: dict, out: TextIO) -> None:
    out.write(json.dumps(doc, allow_nan=False) + "\n")


def parse_line(text: str, source: str, number: int) -> dict:
    """One line's object, checked for form (not yet against a job)."""
    where = f"{source} line {number}"
    try:
        doc = json.loads(text)
    except ValueError:
        raise InputError(f"{where}: not JSON (a corrupt or truncated point line)") from None
    if not isinstance(doc, dict):
        raise InputError(f"{where}: not a JSON object, so not a point line")
    if doc.get("schema") != SCHEMA:
        found = doc.get("schema")
        raise InputError(f"{where}: not a fieldprop point line (schema {found!r}, expected "
                         f"{SCHEMA!r}); point lines come from fieldprop point --stdout or "
                         "fieldprop inspect --json-lines")
    missing = [k for k in _REQUIRED if k not in doc]
    if missing:
        raise InputError(f"{where}: not a complete point line (missing {', '.join(missing)})")
    if doc["status"] not in ("ok", "failed"):
        raise InputError(f"{where}: status {doc['status']!r} is neither 'ok' nor 'failed'")
    vector = doc["field_vector_au"]
    if not (isinstance(vector, list) and len(vector) == 3
            and all(isinstance(v, (int, float)) for v in vector)):
        raise InputError(f"{where}: field_vector_au is not three numbers")
    if doc["status"] == "ok":
        for name, kind in {**_RECORD, **_OPTIONAL}.items():
            value = doc.get(name)
            if value is None and name in _OPTIONAL:
                continue
            good = (isinstance(value, list) if kind is list else isinstance(value, str)
                    if kind is str else isinstance(value, dict) if kind is dict
                    else isinstance(value, (int, float))
                    and not isinstance(value, bool) and math.isfinite(value))
            if not good:
                raise InputError(f"{where}: {name} is missing or not a "
                                 f"{_KIND_NAMES.get(kind, 'number')}"
                                 " (a damaged point line)")
        if doc.get("orientation") is not None:
            try:
                Orientation.from_document(doc["orientation"])
            except ValueError:
                raise InputError(f"{where}: orientation is not an orientation document (a "
                                 "damaged point line)") from None
    elif not isinstance(doc.get("reason"), str):
        raise InputError(f"{where}: a failed point without its reason (a damaged point line)")
    return doc


def stored_point(doc: dict) -> StoredPoint:
    """The StoredPoint of a checked line's object."""
    if doc["status"] == "ok":
        fields = {
            "energy_au": float(doc["energy_au"]), "scf_energy_au": float(doc["scf_energy_au"]),
            "dipole_au": None if doc.get("dipole_au") is None else tuple(
                float(v) for v in doc["dipole_au"]),
            "alpha_au": None if doc.get("alpha_au") is None else tuple(
                tuple(float(v) for v in row) for row in doc["alpha_au"]),
            "scf_cycles": int(doc["scf_cycles"]), "attempts": tuple(doc["attempts"]),
            "s2": float(doc["s2"]), "occupied_overlap": float(doc["occupied_overlap"]),
            "gradient_norm": float(doc["gradient_norm"]),
            "dipole_error_au": float(doc.get("dipole_error_au") or 0.0),
            "state_issue": doc.get("state_issue") or "",
            "energy_scale_au": float(doc.get("energy_scale_au") or 0.0),
            "relaxation": doc.get("relaxation"),
            **{name: None if doc.get(name) is None else float(doc[name])
               for name in ("correlation_energy_change_au", "amplitude_change")},
            "orientation": (None if doc.get("orientation") is None
                            else Orientation.from_document(doc["orientation"])),
        }
    else:
        fields = {"reason": doc["reason"], "kind": doc.get("kind") or "FieldpropError"}
    return StoredPoint(doc["key"], doc["model_key"], doc["status"], fields,
                       float(doc.get("wall_time_s") or 0.0), str(doc.get("host", "")),
                       str(doc.get("version", "")), str(doc.get("created_at", "")))


def read_lines(lines: Iterable[str], source: str, tasks, model_key_: str
               ) -> tuple[dict[str, StoredPoint], dict | None]:
    """The points of ``tasks`` (a job's planned PointTasks) in point lines.

    Returns ({point key: StoredPoint}, backend facts of the model or None). A
    computed point wins over a failure of the same key; blank lines are
    skipped. Raises InputError (see the module notes) for any bad line, and
    for lines computed with another backend version than earlier ones
    (keys.backend_version_conflict: one table never mixes two).
    """
    by_key = {t.key: t for t in tasks}
    out: dict[str, StoredPoint] = {}
    facts, facts_where = None, ""
    for number, text in enumerate(lines, start=1):
        if not text.strip():
            continue
        doc = parse_line(text, source, number)
        where = f"{source} line {number} (point {short_id(str(doc['key']))})"
        if doc["model_key"] != model_key_:
            what = "/".join(str(doc.get(k)) for k in ("formula", "method", "basis")
                            if doc.get(k))
            raise InputError(f"{where}: a point of another molecule or model"
                             f"{f' ({what})' if what else ''}, model {str(doc['model_key'])[:12]}"
                             f"; this job's model is {model_key_[:12]}")
        try:
            tolerances = doc.get("tolerances")
            if tolerances is not None and not isinstance(tolerances, dict):
                raise TypeError("tolerances")
            own = point_key(doc["model_key"], doc["origin_bohr"], _Quantities(doc["quantities"]),
                            doc["field_vector_au"], tolerances)
        except (TypeError, ValueError):
            own = None
        if own != doc["key"]:
            raise InputError(f"{where}: its key does not match its field vector, origin and "
                             "quantities (an edited or damaged point line)")
        if doc["key"] not in by_key:
            raise InputError(f"{where}: not in this job's plan (field vector "
                             f"{doc['field_vector_au']}); it belongs to another ladder, "
                             "origin or set of quantities")
        row = stored_point(doc)
        if doc["key"] not in out or (row.ok and not out[doc["key"]].ok):
            out[doc["key"]] = row
        if isinstance(doc.get("facts"), dict):
            conflict = (backend_version_conflict(facts, doc["facts"]) if facts is not None
                        else None)
            if conflict is not None:
                raise InputError(f"{where}: computed with {conflict[1]}, {facts_where} with "
                                 f"{conflict[0]}: one Richardson table would mix points of "
                                 "two backend versions")
            facts, facts_where = doc["facts"], f"line {number}"
    return out, facts


class _Quantities:
    """A stored quantities list, in the shape keys.point_key hashes."""

    def __init__(self, canonical):
        if not (isinstance(canonical, list) and all(isinstance(q, str) for q in canonical)):
            raise TypeError("quantities")
        self._canonical = list(canonical)

    def canonical(self) -> list[str]:
        return self._canonical


__all__ = ["SCHEMA", "line_document", "parse_line", "read_lines", "stored_point",
           "write_line"]
