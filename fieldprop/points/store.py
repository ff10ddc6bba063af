"""The point store: every computed field point, kept in one SQLite file.

A point is stored under its content key (:mod:`fieldprop.points.keys`), so any job
that needs the same field vector of the same molecule and model finds it,
whatever its plan. The zero-field reference each point starts from and is
checked against (density, occupied orbitals, <S^2>, symmetry operations) is
stored once per model key, with the backend facts of that model (basis
functions, core electrons, PySCF version): any process can compute any point
later without redoing zero field, and the analysis of stored points needs no
PySCF at all.

File format (``SCHEMA_VERSION`` 6; an older store is migrated when opened
for writing, and read as it is otherwise), SQLite from the standard library, WAL
journal, a busy timeout so several processes can share one file, one
transaction per finished point:

- ``meta(name, value)``: ``format`` = ``fieldprop-store``, ``schema``, ``created_at``,
  ``created_by``;
- ``models(model_key, description, facts, reference, created_at, host, version)``:
  ``description`` and ``facts`` JSON text, ``reference`` an ``.npz`` blob;
- ``points(point_key, model_key, field_vector_au, origin_bohr, quantities,
  status, energy_au, scf_energy_au, dipole_au, alpha_au, scf_cycles, attempts,
  s2, occupied_overlap, gradient_norm, dipole_error_au, state_issue,
  energy_scale_au, relaxation, orientation, failure, failure_kind,
  wall_time_s, host, version, created_at, correlation_energy_change_au,
  amplitude_change, tolerances)``: ``status`` is ``ok`` or ``failed``;
  ``relaxation`` holds a relaxed point's structure and the optimiser's
  remaining errors, ``orientation`` the zero-field point's of a degenerate
  open shell (records.Orientation), ``tolerances`` a tightened point's
  convergence targets (part of its key; NULL: the model's own); vectors,
  matrices, lists and documents are JSON text (floats round-trip exactly);
- ``geometries(geometry_key, document, created_at, host, version)``: geometries
  optimised before a job's response (``[geometry] optimise``), keyed by the
  starting geometry, the optimisation's model and its criteria; ``document``
  JSON (coordinates in bohr, energy, steps, criteria), so a rerun does not
  optimise again; also the zero-field frame of a nuclear relaxation (the
  polished minimum, its Hessian and dipole derivatives);
- ``todo_lists(list_key, point_keys, created_at)``: the points of a plan still
  to compute, as fixed by ``fieldprop plan --count`` (a JSON list of point keys
  in plan order), so that ``fieldprop point --index N`` maps array element N to
  the same point however many other elements have finished meanwhile.

Beside a writable store file, ``<store>.lock`` serialises the computation of a
model's zero-field reference: processes that need it at once (job-array
elements) wait for the first one instead of all computing it.

The reading commands (``plan``, ``collect``, ``inspect``) open a read-only
view that sees what writers commit while it is open (SQLite's ``-shm`` index);
only in a folder this process cannot write, where SQLite cannot make that
file, is the store read as it stands at the open (``immutable``).

Every problem with a store file (a directory, not SQLite, not a fieldprop
store, a newer schema, corrupt, not writable) is an :class:`InputError` naming
the path; the file is left untouched.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import io
import json
import logging
import os
import socket
import zipfile
import sqlite3
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterator

import numpy as np

from fieldprop import __version__
from fieldprop.errors import InputError
from fieldprop.points.records import (Orientation, PointFailure, PointRecord, SymmetryOperation,
                               ZeroFieldReference)

logger = logging.getLogger(__name__)

FORMAT = "fieldprop-store"
SCHEMA_VERSION = 6
#: Migrations of older schemas, applied when a store is opened for writing:
#: schema 1 -> 2 adds points.energy_scale_au (the energy's rounding scale);
#: 2 -> 3 adds the todo_lists table; 3 -> 4 the geometries table; 4 -> 5
#: points.relaxation (a relaxed point's structure and optimiser errors, JSON);
#: 5 -> 6 the amplitude solver's convergence reached
#: (points.correlation_energy_change_au, amplitude_change), a tightened
#: point's targets (points.tolerances) and a degenerate open shell's
#: orientation (points.orientation, JSON).
#: A store of an older schema opened
#: read-only reads a missing column as NULL, and has no to-do lists.
_TO_DO_LISTS_TABLE = ("CREATE TABLE todo_lists (list_key TEXT PRIMARY KEY, point_keys TEXT NOT NULL, "
               "created_at TEXT NOT NULL)")
_GEOMETRIES_TABLE = ("CREATE TABLE geometries (geometry_key TEXT PRIMARY KEY, "
                     "document TEXT NOT NULL, created_at TEXT NOT NULL, host TEXT NOT NULL, "
                     "version TEXT NOT NULL)")
_MIGRATIONS = {
    1: ["ALTER TABLE points ADD COLUMN energy_scale_au REAL",
        "UPDATE meta SET value = '2' WHERE name = 'schema'"],
    2: [_TO_DO_LISTS_TABLE, "UPDATE meta SET value = '3' WHERE name = 'schema'"],
    3: [_GEOMETRIES_TABLE, "UPDATE meta SET value = '4' WHERE name = 'schema'"],
    4: ["ALTER TABLE points ADD COLUMN relaxation TEXT",
        "UPDATE meta SET value = '5' WHERE name = 'schema'"],
    5: ["ALTER TABLE points ADD COLUMN correlation_energy_change_au REAL",
        "ALTER TABLE points ADD COLUMN amplitude_change REAL",
        "ALTER TABLE points ADD COLUMN tolerances TEXT",
        "ALTER TABLE points ADD COLUMN orientation TEXT",
        "UPDATE meta SET value = '6' WHERE name = 'schema'"],
}
#: Default store file name, in the job file's folder: jobs in one folder share it.
DEFAULT_NAME = "fieldprop-points.sqlite"
#: Rows an export reads per query (``inspect --json-lines``): it holds no read
#: transaction while it writes them out, so a slow consumer of its output
#: never blocks a writer's checkpoint; 500 rows are ~0.4 MB (0.75 kB a point
#: with its alpha, measured on a store of 100,000).
EXPORT_BATCH = 500
#: How long a writer waits for another process's transaction (ms).
BUSY_TIMEOUT_MS = 120_000
_SQLITE_HEADER = b"SQLite format 3\x00"

_SCHEMA = """
CREATE TABLE meta (name TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE models (
    model_key TEXT PRIMARY KEY,
    description TEXT NOT NULL,
    facts TEXT NOT NULL,
    reference BLOB NOT NULL,
    created_at TEXT NOT NULL,
    host TEXT NOT NULL,
    version TEXT NOT NULL
);
CREATE TABLE points (
    point_key TEXT PRIMARY KEY,
    model_key TEXT NOT NULL,
    field_vector_au TEXT NOT NULL,
    origin_bohr TEXT NOT NULL,
    quantities TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('ok', 'failed')),
    energy_au REAL,
    scf_energy_au REAL,
    dipole_au TEXT,
    alpha_au TEXT,
    scf_cycles INTEGER,
    attempts TEXT,
    s2 REAL,
    occupied_overlap REAL,
    gradient_norm REAL,
    dipole_error_au REAL,
    state_issue TEXT,
    energy_scale_au REAL,
    relaxation TEXT,
    orientation TEXT,
    failure TEXT,
    failure_kind TEXT,
    wall_time_s REAL,
    host TEXT NOT NULL,
    version TEXT NOT NULL,
    created_at TEXT NOT NULL,
    correlation_energy_change_au REAL,
    amplitude_change REAL,
    tolerances TEXT
);
CREATE INDEX points_by_model ON points (model_key);
""" + _TO_DO_LISTS_TABLE + ";\n" + _GEOMETRIES_TABLE + ";\n"

def _json_list(value):
    return None if value is None else json.dumps(np.asarray(value, dtype=float).tolist())


#: How a PointRecord field that is not a plain number or text is written into
#: its column and read back: (encode, decode), each of a non-None value.
_CODECS = {
    "dipole_au": (_json_list, lambda v: tuple(json.loads(v))),
    "alpha_au": (_json_list, lambda v: tuple(tuple(r) for r in json.loads(v))),
    "attempts": (lambda v: json.dumps(list(v)), lambda v: tuple(json.loads(v))),
    "scf_cycles": (int, int),
    "relaxation": (json.dumps, json.loads),
    "orientation": (lambda v: json.dumps(v.document()),
                    lambda v: Orientation.from_document(json.loads(v))),
}
#: The record's columns: every field of PointRecord but the point itself (its
#: key and field vector have their own columns) and the wall time (common to
#: failures), so a field added to the record is stored, read back and written
#: into point lines without a second list to keep.
_RECORD_COLUMNS = tuple(f.name for f in dataclasses.fields(PointRecord)
                        if f.name not in ("point", "wall_time_s"))


def _encoded(name: str, value):
    if value is None or name not in _CODECS:
        return value
    return _CODECS[name][0](value)


def _decoded_field(name: str, value):
    if value is None:
        return 0.0 if name == "energy_scale_au" else None  # a column added later: unknown
    return _CODECS[name][1](value) if name in _CODECS else value
_POINT_COLUMNS = ("point_key", "model_key", "field_vector_au", "origin_bohr", "quantities",
                  "status", *_RECORD_COLUMNS, "failure", "failure_kind", "wall_time_s", "host",
                  "version", "created_at", "tolerances")


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def default_store_path(job_path: Path) -> Path:
    """The store beside the job file: ``DEFAULT_NAME`` in its folder."""
    return Path(job_path).parent / DEFAULT_NAME


@dataclass(frozen=True)
class StoredPoint:
    """One row of ``points``: a computed point (``record`` fields) or a failure."""

    key: str
    model_key: str
    status: str  # "ok" or "failed"
    fields: dict  # PointRecord fields without ``point`` (ok), or reason and kind (failed)
    wall_time_s: float
    host: str
    version: str
    created_at: str

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    def record(self, point) -> PointRecord:
        """The PointRecord of this row, attached to the plan's ``point``."""
        return PointRecord(point=point, wall_time_s=self.wall_time_s, **self.fields)

    def failure(self, point) -> PointFailure:
        return PointFailure(point, self.fields["reason"], self.fields["kind"], self.wall_time_s)


# ----------------------------------------------------------------------- reference blobs

def reference_to_bytes(reference: ZeroFieldReference) -> bytes:
    """The reference as an ``.npz`` blob (no pickle)."""
    arrays = {"density": np.asarray(reference.density), "s2": np.array(reference.s2),
              "n_sets": np.array(len(reference.occupied))}
    for i, c in enumerate(reference.occupied):
        arrays[f"occupied_{i}"] = np.asarray(c)
    ops = reference.symmetry
    arrays["op_names"] = np.array([op.name for op in ops], dtype=str)
    if ops:
        arrays["op_matrices"] = np.array([op.matrix for op in ops])
        arrays["op_representations"] = np.array([op.representation for op in ops])
        arrays["op_characters"] = np.array([op.characters for op in ops], dtype=float)
    for name in ("mo_coeff", "mo_occ", "field_rotations"):
        value = getattr(reference, name)
        if value is not None:
            arrays[name] = np.asarray(value)
    arrays["gradient_floor"] = np.array(reference.gradient_floor)
    if reference.nuclear_gradient is not None:
        arrays["nuclear_gradient"] = np.array(reference.nuclear_gradient, dtype=float)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def reference_from_bytes(blob: bytes) -> ZeroFieldReference:
    with np.load(io.BytesIO(blob), allow_pickle=False) as data:
        occupied = tuple(data[f"occupied_{i}"] for i in range(int(data["n_sets"])))
        names = [str(n) for n in data["op_names"]]
        ops = tuple(SymmetryOperation(name, data["op_matrices"][i],
                                      data["op_representations"][i],
                                      tuple(float(c) for c in data["op_characters"][i]))
                    for i, name in enumerate(names))
        extra = {name: data[name] for name in ("mo_coeff", "mo_occ", "field_rotations")
                 if name in data.files}
        if "gradient_floor" in data.files:  # absent from stores written before it
            extra["gradient_floor"] = float(data["gradient_floor"])
        if "nuclear_gradient" in data.files:  # absent: not checked (or an older store)
            value, atom = (float(v) for v in data["nuclear_gradient"])
            extra["nuclear_gradient"] = (value, int(atom))
        return ZeroFieldReference(data["density"], occupied, float(data["s2"]), ops, **extra)


# ----------------------------------------------------------------------- the store

class _DamagedRow(Exception):
    """A stored value that does not decode: the row's bytes are damaged."""


def _decoded(text):
    """JSON text of a stored row (_DamagedRow if it does not parse)."""
    try:
        return json.loads(text)
    except (ValueError, TypeError) as exc:
        raise _DamagedRow(f"a stored value does not decode: {exc}") from None


def _damage_is_bad_input(method):
    """A read or write that finds the file damaged (SQLite's own checks of the
    pages it touches, or a row that does not decode) is bad input naming the
    store, as at open: the full check of the file does not run on every open."""
    @functools.wraps(method)
    def guarded(self, *args, **kwargs):
        try:
            return method(self, *args, **kwargs)
        except (sqlite3.DatabaseError, _DamagedRow) as exc:
            if isinstance(exc, sqlite3.DatabaseError) and not _is_damage(exc):
                raise  # locked, busy, a table an old schema lacks, a constraint: not damage
            detail = " ".join(str(exc).split())[:160]
            raise InputError(f"store {self.label}: corrupt SQLite database ({detail}); move it "
                             "away and rerun to start a new store") from None
    return guarded


def _is_damage(exc: sqlite3.DatabaseError) -> bool:
    """SQLite's codes for a damaged file: SQLITE_CORRUPT (and its extended
    codes), SQLITE_NOTADB."""
    return str(getattr(exc, "sqlite_errorname", "")).startswith(("SQLITE_CORRUPT",
                                                                 "SQLITE_NOTADB"))


class PointStore:
    """A point store: a file (shared, persistent) or in memory (``--no-store``).

    Use :meth:`open` (validates the file; creates it if missing) or
    :meth:`in_memory`; close with :meth:`close` or a ``with`` block. Writes are
    one transaction each; a point already stored as computed is never replaced,
    a stored failure is replaced by a computed point.
    """

    def __init__(self, connection: sqlite3.Connection, path: Path | None,
                 read_only: bool = False, memory_label: str = "memory (--no-store)"):
        self._db = connection
        self.path = path
        self.read_only = read_only
        self._memory_label = memory_label
        present = {row[1] for row in connection.execute("PRAGMA table_info(points)")}
        # Columns an older schema lacks (read-only opens are not migrated) read as NULL.
        self._record_select = ", ".join(c if c in present else f"NULL AS {c}"
                                        for c in _RECORD_COLUMNS)
        self._tolerances = "tolerances" if "tolerances" in present else "NULL"

    # -- opening

    @classmethod
    def in_memory(cls, label: str = "memory (--no-store)") -> "PointStore":
        db = sqlite3.connect(":memory:")
        _initialise(db)
        return cls(db, None, memory_label=label)

    @classmethod
    def open(cls, path: Path, create: bool = True, read_only: bool = False,
             verify: bool = False) -> "PointStore":
        """Open the store at ``path``, validating it first (InputError naming the path).

        ``create``: make a new store if the file does not exist (else InputError).
        ``read_only``: never write (``plan``, ``inspect``); the file must exist.
        ``verify``: SQLite's full check of the file too (``PRAGMA quick_check``,
        which reads every page: its cost grows with the store). Every open
        checks the header, the ``meta`` table and the schema, which cost the
        same at any size; the commands that open a store once per job (``run``,
        ``check``, ``relax``, ``screen``, ``collect``) and ``inspect`` verify,
        ``point`` (every job-array element) and ``plan`` do not.
        """
        path = Path(path)
        shown = f"store {path}"
        if path.is_dir():
            raise InputError(f"{shown}: is a directory; give a file name such as "
                             f"{path / DEFAULT_NAME}")
        folder = path.parent if str(path.parent) else Path(".")
        exists = path.exists()
        if not exists:
            if read_only or not create:
                raise InputError(f"{shown}: no such file")
            if not folder.is_dir():
                raise InputError(f"{shown}: folder {str(folder)!r} does not exist; create it "
                                 "first")
        if exists:
            _validate_file(path, shown, verify)
        if not read_only:
            # SQLite's WAL journal keeps two files beside the store: the folder
            # must be writable, and so must the file.
            if not _writable(folder):
                raise InputError(f"{shown}: folder {str(folder)!r} is not writable (the store "
                                 "needs its journal files beside it); give --store a path in "
                                 "a writable folder, or --no-store")
            if exists and not _writable(path):
                raise InputError(f"{shown}: file is not writable; give --store another path, "
                                 "or --no-store")
        try:
            if read_only:
                db = _read_only_connection(path, BUSY_TIMEOUT_MS / 1000)
            else:
                if not exists and not _create(path):
                    _validate_file(path, shown, verify)  # another process made it first
                db = sqlite3.connect(path, timeout=BUSY_TIMEOUT_MS / 1000)
                db.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
                db.execute("PRAGMA synchronous = NORMAL")
                _migrate(db)
        except sqlite3.Error as exc:
            raise InputError(f"{shown}: cannot be opened ({exc})") from None
        return cls(db, path, read_only)

    def close(self) -> None:
        self._db.close()

    def check(self) -> str:
        """SQLite's full check of the file (``PRAGMA quick_check``: every page
        read, so its cost grows with the store): "ok", or the first problem."""
        return _quick_check(self._db)

    def __enter__(self) -> "PointStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @property
    def label(self) -> str:
        return str(self.path) if self.path is not None else self._memory_label

    # -- models and references

    @contextlib.contextmanager
    def reference_lock(self):
        """Held while a model's zero-field reference is looked up and, if
        missing, computed and stored: an exclusive POSIX record lock
        (``lockf``) on ``<store>.lock`` beside a writable store file (nothing
        for a store in memory or opened read-only, whose processes cannot share
        a reference anyway). Released when the process ends, however it ends.

        A record lock belongs to this process alone: worker processes forked
        while it is held (a pool computing the reference) do not inherit it,
        where a ``flock`` would stay held by their copy of the descriptor and
        block this process's next reference for ever."""
        if self.path is None or self.read_only:
            yield
            return
        import fcntl

        lock_path = Path(str(self.path) + ".lock")
        try:
            fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o666)
        except OSError as exc:
            raise InputError(f"store {self.label}: cannot create its lock file {lock_path} "
                             f"({exc.strerror})") from None
        try:
            try:
                fcntl.lockf(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except (BlockingIOError, PermissionError):
                logger.info("waiting for the zero-field reference another process is "
                            "computing (%s)", self.label)
                fcntl.lockf(fd, fcntl.LOCK_EX)
            yield
        finally:
            os.close(fd)  # releases the lock

    # -- to-do lists (plan --count, point --index)

    @_damage_is_bad_input
    def put_todo(self, list_key: str, point_keys) -> str:
        """Fix the to-do list of a plan (replacing an older one); returns its time."""
        created = _now()
        with self._db:
            self._db.execute("INSERT INTO todo_lists VALUES (?, ?, ?) ON CONFLICT (list_key) "
                             "DO UPDATE SET point_keys = excluded.point_keys, "
                             "created_at = excluded.created_at",
                             (list_key, json.dumps(list(point_keys)), created))
        return created

    @_damage_is_bad_input
    def put_geometry(self, geometry_key: str, document: dict) -> None:
        """Keep an optimised geometry (a JSON document; an existing one stays)."""
        with self._db:
            self._db.execute("INSERT OR IGNORE INTO geometries VALUES (?, ?, ?, ?, ?)",
                             (geometry_key, json.dumps(document), _now(), socket.gethostname(),
                              __version__))

    @_damage_is_bad_input
    def get_geometry(self, geometry_key: str) -> dict | None:
        """An optimised geometry's document, or None (also for an older store)."""
        try:
            row = self._db.execute("SELECT document FROM geometries WHERE geometry_key = ?",
                                   (geometry_key,)).fetchone()
        except sqlite3.OperationalError:  # an older schema, opened read-only
            return None
        return None if row is None else _decoded(row[0])

    @_damage_is_bad_input
    def get_todo(self, list_key: str) -> tuple[list[str], str] | None:
        """(point keys, time fixed) of a plan's to-do list, or None."""
        try:
            row = self._db.execute("SELECT point_keys, created_at FROM todo_lists WHERE "
                                   "list_key = ?", (list_key,)).fetchone()
        except sqlite3.OperationalError:  # an older schema, opened read-only
            return None
        return None if row is None else (_decoded(row[0]), row[1])

    @_damage_is_bad_input
    def get_model(self, model_key: str) -> tuple[ZeroFieldReference, dict] | None:
        """(reference, backend facts) of a model key, or None."""
        row = self._db.execute("SELECT reference, facts FROM models WHERE model_key = ?",
                               (model_key,)).fetchone()
        if row is None:
            return None
        try:
            return reference_from_bytes(row[0]), json.loads(row[1])
        except (ValueError, KeyError, OSError, EOFError, zipfile.BadZipFile) as exc:
            raise InputError(f"store {self.label}: the zero-field reference of model "
                             f"{model_key[:12]} is damaged ({type(exc).__name__}); move the "
                             "store away, or give --store another path") from None

    @_damage_is_bad_input
    def get_facts(self, model_key: str) -> dict | None:
        row = self._db.execute("SELECT facts FROM models WHERE model_key = ?",
                               (model_key,)).fetchone()
        return None if row is None else _decoded(row[0])

    @_damage_is_bad_input
    def put_model(self, model_key: str, description: dict, facts: dict,
                  reference: ZeroFieldReference, zero_point: tuple | None = None) -> bool:
        """Store a model's reference (kept if one is there already), and with it,
        in the same transaction, its zero-field point ``(task, record)``. False
        when another process had stored the model's reference first."""
        with self._db:
            cursor = self._db.execute(
                "INSERT INTO models VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (model_key) "
                "DO NOTHING",
                (model_key, json.dumps(description, sort_keys=True), json.dumps(facts),
                 reference_to_bytes(reference), _now(), socket.gethostname(), __version__))
            if zero_point is not None:
                self._insert_point(*zero_point)
        return cursor.rowcount == 1

    # -- points

    @_damage_is_bad_input
    def put_point(self, task, outcome: PointRecord | PointFailure) -> None:
        """Store a finished point (one transaction)."""
        with self._db:
            self._insert_point(task, outcome)

    def _insert_point(self, task, outcome) -> None:
        common = (task.key, task.model_key, json.dumps(list(task.point.field_vector_au)),
                  json.dumps(list(task.molecule.origin_bohr)),
                  json.dumps(task.quantities.canonical()))
        if isinstance(outcome, PointFailure):
            values = common + ("failed",) + (None,) * len(_RECORD_COLUMNS) + (
                outcome.reason, outcome.kind)
        else:
            values = common + ("ok",) + tuple(_encoded(name, getattr(outcome, name))
                                              for name in _RECORD_COLUMNS) + (None, None)
        tolerances = getattr(task, "tolerances", None)
        values += (outcome.wall_time_s, socket.gethostname(), __version__, _now(),
                   None if tolerances is None else json.dumps(tolerances, sort_keys=True))
        marks = ", ".join("?" * len(values))
        # A computed point is never replaced; a failure is, by a later success.
        self._db.execute(
            f"INSERT INTO points ({', '.join(_POINT_COLUMNS)}) VALUES ({marks}) "
            "ON CONFLICT (point_key) DO UPDATE SET "
            + ", ".join(f"{c} = excluded.{c}" for c in (
                "status", *_RECORD_COLUMNS, "failure", "failure_kind", "wall_time_s", "host",
                "version", "created_at"))
            + " WHERE points.status = 'failed'", values)

    @_damage_is_bad_input
    def get_points(self, keys) -> dict[str, StoredPoint]:
        """The stored rows among ``keys`` (absent keys are simply missing)."""
        keys = list(dict.fromkeys(keys))
        out: dict[str, StoredPoint] = {}
        for start in range(0, len(keys), 500):
            chunk = keys[start:start + 500]
            rows = self._db.execute(
                "SELECT point_key, model_key, status, " + self._record_select
                + ", failure, failure_kind, wall_time_s, host, version, created_at FROM points "
                f"WHERE point_key IN ({', '.join('?' * len(chunk))})", chunk).fetchall()
            for row in rows:
                out[row[0]] = _stored_point(row)
        return out

    def iter_points(self) -> Iterator[tuple[StoredPoint, dict, dict]]:
        """Every stored point with its field vector, origin and quantities, and
        its model's description, in the order (model, time, key).

        Read ``EXPORT_BATCH`` rows per query, each query's rows fetched whole:
        no read transaction stays open while the caller writes them out (an
        open one would keep every writer's checkpoint from finishing). Points
        committed meanwhile appear if they sort after the rows already given."""
        descriptions: dict[str, dict] = {}
        after = None
        while True:
            batch = self._points_after(after, EXPORT_BATCH)
            for row, extra in batch:
                if row.model_key not in descriptions:
                    descriptions[row.model_key] = self._description(row.model_key)
                yield row, extra, descriptions[row.model_key]
            if len(batch) < EXPORT_BATCH:
                return
            last = batch[-1][0]
            after = (last.model_key, last.created_at, last.key)

    @_damage_is_bad_input
    def _points_after(self, after: tuple | None, limit: int) -> list[tuple[StoredPoint, dict]]:
        """Up to ``limit`` points sorting after ``after`` (model key, time, point
        key; None: from the first), read in one query."""
        where, values = ("", ()) if after is None else (
            "WHERE (model_key, created_at, point_key) > (?, ?, ?) ", after)
        rows = self._db.execute(
            "SELECT point_key, model_key, status, " + self._record_select
            + ", failure, failure_kind, wall_time_s, host, version, created_at, "
            "field_vector_au, origin_bohr, quantities, " + self._tolerances
            + f" FROM points {where}"
            "ORDER BY model_key, created_at, point_key LIMIT ?", (*values, limit)).fetchall()
        return [(_stored_point(row[:-4]), {"field_vector_au": _decoded(row[-4]),
                                           "origin_bohr": _decoded(row[-3]),
                                           "quantities": _decoded(row[-2]),
                                           "tolerances": None if row[-1] is None
                                           else _decoded(row[-1])}) for row in rows]

    @_damage_is_bad_input
    def _description(self, model_key: str) -> dict:
        row = self._db.execute("SELECT description FROM models WHERE model_key = ?",
                               (model_key,)).fetchone()
        return {} if row is None else _decoded(row[0])

    @_damage_is_bad_input
    def summary(self) -> list[dict]:
        """Per model: its description, points computed and failed, first and last time."""
        out = []
        for key, description, created in self._db.execute(
                "SELECT model_key, description, created_at FROM models ORDER BY created_at"
        ).fetchall():
            counts = dict(self._db.execute(
                "SELECT status, COUNT(*) FROM points WHERE model_key = ? GROUP BY status",
                (key,)).fetchall())
            last = self._db.execute("SELECT MAX(created_at), SUM(wall_time_s) FROM points "
                                    "WHERE model_key = ?", (key,)).fetchone()
            out.append({"model_key": key, **_decoded(description),
                        "points_ok": counts.get("ok", 0), "points_failed": counts.get("failed", 0),
                        "created_at": created, "last_point_at": last[0],
                        "compute_time_s": last[1] or 0.0})
        return out


def _stored_point(row) -> StoredPoint:
    try:
        return _decoded_point(row)
    except (ValueError, TypeError, KeyError) as exc:
        raise _DamagedRow(f"point row {str(row[0])[:12]} does not decode: {exc}") from None


def _decoded_point(row) -> StoredPoint:
    key, model_key, status = row[:3]
    values = dict(zip(_RECORD_COLUMNS, row[3:3 + len(_RECORD_COLUMNS)]))
    failure, kind, wall, host, version, created = row[3 + len(_RECORD_COLUMNS):]
    if status == "ok":
        fields = {name: _decoded_field(name, values[name]) for name in _RECORD_COLUMNS}
    else:
        fields = {"reason": failure, "kind": kind}
    return StoredPoint(key, model_key, status, fields, wall or 0.0, host, version, created)


def _create(path: Path) -> bool:
    """Make a new, initialised store at ``path`` atomically: built under a
    temporary name beside it, then linked into place, so another process never
    sees a half-made file. False if a file appeared at ``path`` meanwhile."""
    import tempfile

    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".new")
    os.close(fd)
    try:
        os.unlink(tmp)  # SQLite makes the file itself
        db = sqlite3.connect(tmp)
        try:
            db.execute("PRAGMA journal_mode = WAL")  # persistent: kept in the file
            _initialise(db)
        finally:
            db.close()
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        try:
            os.link(tmp, path)
        except FileExistsError:
            return False
        except OSError:  # a file system without hard links: a plain rename
            if path.exists():
                return False
            os.replace(tmp, path)
        return True
    finally:
        for leftover in (tmp, tmp + "-wal", tmp + "-shm"):
            if os.path.exists(leftover):
                os.unlink(leftover)


def _writable(path: Path) -> bool:
    """This process may create and write files in the folder ``path`` (or
    write the file ``path``)."""
    return os.access(path, os.W_OK | (os.X_OK if path.is_dir() else 0))


def _read_only_connection(path: Path, timeout_s: float = 5.0) -> sqlite3.Connection:
    """A connection that never writes a row, sees what other processes commit
    while it is open, and leaves no files beside the store.

    A WAL reader follows writers through the ``-shm`` index beside the store,
    so SQLite must be able to use (or make) that file:

    - a writable folder and file, no ``-wal`` file yet (no writer has the store
      open): an ordinary connection with ``PRAGMA query_only``. SQLite makes its
      ``-wal`` and ``-shm`` companions and, when the last connection closes,
      removes them again (a refused store, ``plan`` leave no trace);
    - a ``-wal`` file there (a writer at work, or one that was killed), or a
      file this process may not write: ``mode=ro``, using the companions as
      they are;
    - a folder this process cannot write and no ``-wal`` file: SQLite cannot
      make the ``-shm`` file, so the file is read as immutable, as it stands
      at this open. No fieldprop writer can work there (a writable open needs
      the folder); a writer of another user who may write the folder, starting
      after this open, would not be seen.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if Path(str(path) + "-wal").exists() or (_writable(folder) and not _writable(path)):
        return sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=timeout_s)
    if not _writable(folder):
        return sqlite3.connect(f"file:{path}?mode=ro&immutable=1", uri=True,
                               timeout=timeout_s)
    db = sqlite3.connect(path, timeout=timeout_s)
    db.execute("PRAGMA query_only = ON")
    return db


def _initialise(db: sqlite3.Connection) -> None:
    with db:
        db.executescript(_SCHEMA)
        db.executemany("INSERT INTO meta VALUES (?, ?)", [
            ("format", FORMAT), ("schema", str(SCHEMA_VERSION)), ("created_at", _now()),
            ("created_by", f"fieldprop {__version__}")])


def _migrate(db: sqlite3.Connection) -> None:
    """Bring a validated store of an older schema up to SCHEMA_VERSION (one
    transaction per step; a store another process migrated first is left)."""
    while True:
        with db:
            db.execute("BEGIN IMMEDIATE")
            schema = int(db.execute("SELECT value FROM meta WHERE name = 'schema'")
                         .fetchone()[0])
            if schema >= SCHEMA_VERSION:
                return
            for statement in _MIGRATIONS[schema]:
                db.execute(statement)


def _validate_file(path: Path, shown: str, verify: bool = True) -> None:
    """Refuse anything at ``path`` that is not a readable fieldprop store of a
    schema this version reads (``verify``: nor one SQLite's full check finds
    damaged); never writes to it."""
    try:
        with open(path, "rb") as fh:
            header = fh.read(len(_SQLITE_HEADER))
    except OSError as exc:
        raise InputError(f"{shown}: cannot be read ({exc.strerror})") from None
    if header != _SQLITE_HEADER:
        what = "an empty file" if not header else "not an SQLite database"
        raise InputError(f"{shown}: is {what}, not a fieldprop store; give --store another "
                         "path (the file is left as it is)")
    try:
        db = _read_only_connection(path)
    except sqlite3.Error as exc:
        raise InputError(f"{shown}: cannot be opened ({exc})") from None
    try:
        try:
            tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master "
                                               "WHERE type = 'table'")}
            meta = (dict(db.execute("SELECT name, value FROM meta").fetchall())
                    if "meta" in tables else {})
        except sqlite3.DatabaseError as exc:
            raise InputError(f"{shown}: corrupt SQLite database ({exc}); move it away and "
                             "rerun to start a new store") from None
        if meta.get("format") != FORMAT:
            raise InputError(f"{shown}: an SQLite database but not a fieldprop store (no "
                             f"'{FORMAT}' mark); give --store another path")
        try:
            schema = int(meta.get("schema", ""))
        except ValueError:
            raise InputError(f"{shown}: fieldprop store with an unreadable schema "
                             f"{meta.get('schema')!r}") from None
        if schema > SCHEMA_VERSION:
            raise InputError(f"{shown}: written by a newer fieldprop (store schema {schema}, "
                             f"this version reads {SCHEMA_VERSION}); upgrade fieldprop or give "
                             "--store another path")
        if schema < SCHEMA_VERSION and schema not in _MIGRATIONS:
            raise InputError(f"{shown}: store schema {schema} is older than this version's "
                             f"{SCHEMA_VERSION} and has no migration; give --store a new path")
        check = _quick_check(db) if verify else "ok"
        if check != "ok":
            raise InputError(f"{shown}: corrupt SQLite database ({check}); move it away "
                             "and rerun to start a new store")
    finally:
        db.close()


def _quick_check(db: sqlite3.Connection) -> str:
    """SQLite's ``PRAGMA quick_check`` of the whole file: "ok", or its first
    complaint on one line."""
    try:
        check = db.execute("PRAGMA quick_check").fetchone()[0]
    except sqlite3.DatabaseError as exc:
        check = str(exc)
    if check == "ok":
        return check
    return " ".join(str(check).replace("*** in database main ***", "").split())[:160]
