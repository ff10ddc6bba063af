"""The point store across connections, without PySCF: readers that started
before a writer see its commits, a store in a read-only folder stays readable,
and reading never holds a transaction open while output is written.

Rows are synthetic (a made-up H2 model): what is tested is the file, not the
numbers.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

from fieldprop.inputs.job import ModelSpec, ScfSpec
from fieldprop.points.keys import Quantities, model_key, point_key
from fieldprop.inputs.molecule import MoleculeSpec
from fieldprop.numerics.plan import FieldPoint
from fieldprop.points.records import PointRecord, PointTask
from fieldprop.points.store import PointStore

H2 = MoleculeSpec(("H", "H"), (1, 1), ((0.0, 0.0, 0.0), (0.0, 0.0, 1.4)), 0, 1, (0.0, 0.0, 0.7))
MODEL = ModelSpec("hf", "sto-3g", "restricted")
SCF = ScfSpec(1e-11, 1e-8, 200, None)
QUANTITIES = Quantities(dipole=True)
MODEL_KEY = model_key(H2, MODEL, SCF)


def task(n: int) -> PointTask:
    """The n-th synthetic field point along z (n = 0: zero field)."""
    field = (0.0, 0.0, 0.001 * n)
    point = FieldPoint(n, (0, 0, n), 0, field)
    return PointTask(H2, MODEL, SCF, point, QUANTITIES,
                     point_key(MODEL_KEY, H2.origin_bohr, QUANTITIES, field), MODEL_KEY)


def record(t: PointTask) -> PointRecord:
    f = t.point.field_vector_au[2]
    return PointRecord(t.point, -1.117 - 0.5 * 6.4 * f * f, -1.117, (0.0, 0.0, 6.4 * f), 5,
                       ("response_start", "newton"), 0.0, 1.0, 1e-12)


def write_points(path: Path, numbers) -> None:
    with PointStore.open(path) as store:
        for n in numbers:
            t = task(n)
            store.put_point(t, record(t))


def checkpoint(path: Path) -> None:
    """Move every committed page from the WAL into the store file itself."""
    db = sqlite3.connect(path)
    try:
        busy, _, _ = db.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
        assert busy == 0, "the checkpoint was blocked by a reader"
    finally:
        db.close()


def test_a_reader_opened_before_a_writer_sees_its_points_and_a_clean_store(tmp_path):
    """A read-only view opened while no writer had the store open (monitoring
    a run, ``plan --missing`` beside a job array) reads what a writer commits
    and checkpoints afterwards, and the full check finds the store clean:
    no stale pages from a view that assumed the file never changes."""
    path = tmp_path / "points.sqlite"
    write_points(path, [0])
    assert not Path(str(path) + "-wal").exists()  # no writer has it open now
    with PointStore.open(path, read_only=True) as reader:
        assert set(reader.get_points(task(n).key for n in range(40))) == {task(0).key}
        write_points(path, range(1, 40))  # enough rows to split pages
        checkpoint(path)
        seen = reader.get_points(task(n).key for n in range(40))
        assert set(seen) == {task(n).key for n in range(40)}
        assert seen[task(39).key].fields["dipole_au"] == record(task(39)).dipole_au
        assert reader.check() == "ok"


def companions(path: Path) -> set[str]:
    return {s for s in ("-wal", "-shm", "-journal") if Path(str(path) + s).exists()}


def test_a_read_only_view_leaves_the_store_as_it_found_it(tmp_path):
    """In a writable folder the view makes SQLite's companions while open and
    they go with it: no file beside the store, the store's bytes unchanged."""
    path = tmp_path / "points.sqlite"
    write_points(path, range(3))
    before = path.read_bytes()
    with PointStore.open(path, read_only=True) as reader:
        assert len(reader.get_points(task(n).key for n in range(3))) == 3
    assert companions(path) == set()
    assert path.read_bytes() == before


def test_a_store_in_a_folder_this_process_cannot_write_is_read_as_it_stands(tmp_path,
                                                                            monkeypatch):
    """Where SQLite cannot make the ``-shm`` file (a read-only folder: another
    user's, a read-only mount), the view reads the file as immutable: every
    row, and no file made beside it. (Permissions are simulated, so that the
    test also runs as root; tests/cli/test_store_input.py has the real folder.)"""
    from fieldprop.points import store as store_module

    path = tmp_path / "points.sqlite"
    write_points(path, range(3))
    writable = store_module._writable
    monkeypatch.setattr(store_module, "_writable",
                        lambda p: False if Path(p) == tmp_path else writable(p))
    opened: list[str] = []
    connect = sqlite3.connect
    monkeypatch.setattr(store_module.sqlite3, "connect",
                        lambda target, *a, **k: opened.append(str(target)) or
                        connect(target, *a, **k))
    with PointStore.open(path, read_only=True) as reader:
        rows = reader.get_points(task(n).key for n in range(3))
        assert companions(path) == set()
    assert set(rows) == {task(n).key for n in range(3)}
    assert opened and all("immutable=1" in target for target in opened), opened
    with pytest.raises(store_module.InputError, match="not writable"):
        PointStore.open(path)


class SlowReader:
    """An output stream whose consumer is slow (a pipe into a busy process):
    while the export waits on its first line, another process writes a point
    and checkpoints the store's journal."""

    def __init__(self, path: Path):
        self.path, self.lines, self.checkpoint_busy = path, [], None

    def write(self, text: str) -> None:
        if self.checkpoint_busy is None:
            write_points(self.path, [99])
            db = sqlite3.connect(self.path, timeout=0.2)
            try:
                self.checkpoint_busy = db.execute(
                    "PRAGMA wal_checkpoint(TRUNCATE)").fetchone()[0]
            finally:
                db.close()
        self.lines.append(text)


@pytest.mark.parametrize("batch", [None, 2], ids=["one_batch", "batches_of_2"])
def test_a_writer_checkpoints_while_an_export_is_consumed_slowly(tmp_path, monkeypatch, batch):
    """``inspect --json-lines`` holds no read transaction while it writes:
    a writer's checkpoint is not blocked by an export that waits on its
    reader, and every point is exported once, in order."""
    import json

    from fieldprop.points import store as store_module
    from fieldprop.outputs.listings import write_store_lines

    if batch is not None:
        monkeypatch.setattr(store_module, "EXPORT_BATCH", batch)
    path = tmp_path / "points.sqlite"
    write_points(path, range(7))
    out = SlowReader(path)
    with PointStore.open(path, read_only=True) as reader:
        write_store_lines(reader, out)
    assert out.checkpoint_busy == 0, "the export held a read transaction open while writing"
    exported = [json.loads(line) for line in "".join(out.lines).splitlines()]
    keys = [d["key"] for d in exported]
    assert len(keys) == len(set(keys)) and set(keys) >= {task(n).key for n in range(7)}
    order = [(d["model_key"], d["created_at"], d["key"]) for d in exported]
    assert order == sorted(order)


def test_only_a_verifying_open_reads_the_whole_file(tmp_path, monkeypatch):
    """The full check (PRAGMA quick_check: every page) runs when asked
    (``verify``: once per job, and ``inspect``), not on every open."""
    from fieldprop.points import store as store_module

    path = tmp_path / "points.sqlite"
    write_points(path, range(3))
    checks: list[int] = []
    full = store_module._quick_check
    monkeypatch.setattr(store_module, "_quick_check", lambda db: checks.append(1) or full(db))
    for read_only in (False, True):
        PointStore.open(path, read_only=read_only).close()
    assert checks == []
    for read_only in (False, True):
        PointStore.open(path, read_only=read_only, verify=True).close()
    assert checks == [1, 1]


def test_a_row_that_does_not_decode_is_bad_input_naming_the_store(tmp_path):
    """Damage the full check cannot see (a value's bytes) or was not run to
    see: a read that meets it is one InputError naming the store."""
    from fieldprop.errors import InputError

    path = tmp_path / "points.sqlite"
    write_points(path, range(3))
    db = sqlite3.connect(path)
    with db:
        db.execute("UPDATE points SET dipole_au = '[0.0, 0.0' WHERE point_key = ?",
                   (task(1).key,))
    db.close()
    with PointStore.open(path, read_only=True, verify=True) as reader:
        assert reader.check() == "ok"
        assert len(reader.get_points([task(0).key, task(2).key])) == 2
        with pytest.raises(InputError, match=f"store {path}: corrupt"):
            reader.get_points([task(1).key])
        with pytest.raises(InputError, match="corrupt"):
            list(reader.iter_points())


def test_every_field_of_a_record_has_its_column():
    """The store's columns are derived from PointRecord's fields (a field added
    to the record is stored without a second list to keep): the schema of a
    new store has a column for each. Round trips of every kind of record are
    the pipeline and store tests'."""
    import dataclasses

    from fieldprop.points import store as store_module
    from fieldprop.points.records import PointRecord

    names = {f.name for f in dataclasses.fields(PointRecord)} - {"point", "wall_time_s"}
    assert set(store_module._RECORD_COLUMNS) == names
    for name in names:
        assert f"    {name} " in store_module._SCHEMA, name


def test_a_point_line_carries_every_field_the_store_keeps():
    """Point lines check each record field's JSON kind; their table names
    exactly the store's record columns (which PointRecord's fields define), so
    a field added to the record cannot be dropped from point lines unseen."""
    from fieldprop.points import pointlines
    from fieldprop.points import store as store_module

    assert set(pointlines._RECORD) | set(pointlines._OPTIONAL) == set(
        store_module._RECORD_COLUMNS)
