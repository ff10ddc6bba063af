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

from fieldprop.job import ModelSpec, ScfSpec
from fieldprop.keys import Quantities, model_key, point_key
from fieldprop.molecule import MoleculeSpec
from fieldprop.plan import FieldPoint
from fieldprop.records import PointRecord, PointTask
from fieldprop.store import PointStore

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
    from fieldprop import store as store_module

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
