"""Bad point stores through the real command line (``python -m fieldprop``).

Contract: a store path that cannot serve as a fieldprop store (a directory, not
SQLite, an empty file, another SQLite database, a newer or older schema, a
corrupt or truncated database, a folder that does not exist or cannot be
written, a file that cannot be written) is bad input: exit 2, ONE stderr line
``fieldprop: error: ...`` naming the store path, no traceback, the store left
byte-identical and no result written. The same for ``plan``, ``collect`` and
``inspect``, which only read stores. ``collect`` of points that are not stored
is incomplete, exit 3, naming the missing point ids.

Every case runs as a separate process, as a user would start it; only one of
them computes anything (the store that the corruption cases damage).
"""

from __future__ import annotations

import hashlib
import os
import random
import re
import sqlite3
import subprocess
from pathlib import Path

import pytest

from cli_support import fieldprop as run_fieldprop  # noqa: E402

H2_JOB = '''[molecule]
geometry = """
H 0 0 0
H 0 0 0.74
"""

[model]
method = "hf"
basis = "sto-3g"

[response]
properties = ["alpha"]
field_au = 0.001
levels = {levels}
'''
#: The job the cases run: 13 field points on 2 levels, ~0.1 s of SCF when it is
#: computed at all.
JOB = H2_JOB.format(levels=2)
RESULT = "job.result.json"  # the default result path beside job.toml
PAGE = 4096  # SQLite's default page size, which the store keeps

IS_ROOT = hasattr(os, "geteuid") and os.geteuid() == 0
needs_permissions = pytest.mark.skipif(IS_ROOT, reason="root ignores file permissions")


def fieldprop(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    return run_fieldprop(*args, cwd=cwd, timeout=300)


def snapshot(root: Path) -> dict[str, bytes | None]:
    """Every path under ``root`` with its bytes (None for a folder)."""
    out = {}
    for p in sorted(root.rglob("*")):
        out[str(p.relative_to(root))] = None if p.is_dir() else p.read_bytes()
    return out


def digest_of(path: Path) -> str | None:
    return hashlib.sha256(path.read_bytes()).hexdigest() if path.is_file() else None


def journal_files(store: Path) -> set[str]:
    """SQLite's WAL companions of ``store`` (``-wal``, ``-shm``), if any."""
    return {store.name + s for s in ("-wal", "-shm", "-journal")
            if (store.parent / (store.name + s)).exists()}


def write_job(folder: Path, text: str = JOB) -> Path:
    path = folder / "job.toml"
    path.write_text(text, encoding="utf-8")
    return path


# --------------------------------------------------------------------------- the stores

@pytest.fixture(scope="module")
def computed_store(tmp_path_factory) -> bytes:
    """A real store holding the job's 13 points and its model (one real run)."""
    folder = tmp_path_factory.mktemp("computed")
    write_job(folder)
    proc = fieldprop(folder, "run", "job.toml", "--store", "points.sqlite", "--quiet")
    assert proc.returncode == 0, proc.stderr
    store = folder / "points.sqlite"
    # The writer checkpointed its WAL on close: every row is in the file itself,
    # so what the corruption cases damage is the whole store.
    assert not (folder / "points.sqlite-wal").exists()
    data = store.read_bytes()
    assert len(data) >= 8 * PAGE and len(data) % PAGE == 0, len(data)
    return data


def _fresh_store(path: Path, schema: str | None = None) -> None:
    from fieldprop.points.store import PointStore

    PointStore.open(path).close()
    if schema is not None:
        with sqlite3.connect(path) as db:
            db.execute("UPDATE meta SET value = ? WHERE name = 'schema'", (schema,))
        db.close()
    assert not journal_files(path)  # a WAL database closed by its last user leaves none


def _quick_check(path: Path) -> str:
    db = sqlite3.connect(f"file:{path}?mode=ro&immutable=1", uri=True)  # no -shm
    try:
        return db.execute("PRAGMA quick_check").fetchone()[0]
    except sqlite3.DatabaseError as exc:
        return f"raises: {exc}"
    finally:
        db.close()


def _meta_readable(path: Path) -> bool:
    db = sqlite3.connect(f"file:{path}?mode=ro&immutable=1", uri=True)  # no -shm
    try:
        return dict(db.execute("SELECT name, value FROM meta").fetchall()).get(
            "format") == "fieldprop-store"
    except sqlite3.DatabaseError:
        return False
    finally:
        db.close()


def make_directory(tmp, request):
    path = tmp / "points.sqlite"
    path.mkdir()
    return path


def make_not_sqlite(tmp, request):
    path = tmp / "points.sqlite"
    rng = random.Random(1)
    path.write_text("".join(rng.choice("abcdefgh \n") for _ in range(3000)), encoding="ascii")
    return path


def make_empty(tmp, request):
    path = tmp / "points.sqlite"
    path.write_bytes(b"")
    return path


def make_header_then_garbage(tmp, request):
    """The 16-byte SQLite magic, then noise: passes the header test only."""
    path = tmp / "points.sqlite"
    path.write_bytes(b"SQLite format 3\x00" + random.Random(2).randbytes(3 * PAGE))
    return path


def make_foreign_sqlite(tmp, request):
    path = tmp / "points.sqlite"
    with sqlite3.connect(path) as db:
        db.execute("CREATE TABLE results (name TEXT, value REAL)")
        db.execute("INSERT INTO results VALUES ('alpha', 3.07)")
    db.close()
    return path


def make_foreign_meta(tmp, request):
    """An SQLite database with a ``meta`` table of its own, without the mark."""
    path = tmp / "points.sqlite"
    with sqlite3.connect(path) as db:
        db.execute("CREATE TABLE meta (name TEXT PRIMARY KEY, value TEXT)")
        db.execute("INSERT INTO meta VALUES ('schema', '1')")
    db.close()
    return path


def make_newer_schema(tmp, request):
    path = tmp / "points.sqlite"
    _fresh_store(path, "99")
    return path


def make_older_schema(tmp, request):
    path = tmp / "points.sqlite"
    _fresh_store(path, "0")
    return path


def make_unreadable_schema(tmp, request):
    path = tmp / "points.sqlite"
    _fresh_store(path, "one")
    return path


def make_corrupt_pages(tmp, request):
    """Every page from 2 on (meta, models, points, indexes) overwritten with noise."""
    path = tmp / "points.sqlite"
    data = bytearray(request.getfixturevalue("computed_store"))
    data[PAGE:] = random.Random(3).randbytes(len(data) - PAGE)
    path.write_bytes(bytes(data))
    assert _quick_check(path) != "ok"
    return path


def make_corrupt_cells(tmp, request):
    """The middle half of every page from 4 on overwritten with noise: the schema
    and the meta table still read, so only PRAGMA quick_check can see it."""
    path = tmp / "points.sqlite"
    data = bytearray(request.getfixturevalue("computed_store"))
    rng = random.Random(0)
    for start in range(3 * PAGE, len(data), PAGE):
        data[start + PAGE // 4:start + 3 * PAGE // 4] = rng.randbytes(PAGE // 2)
    path.write_bytes(bytes(data))
    assert _meta_readable(path), "the meta table must survive for this case"
    assert _quick_check(path) != "ok"
    return path


def make_truncated(tmp, request):
    """A store cut short inside page 4 (a disk that filled up, a copy interrupted)."""
    path = tmp / "points.sqlite"
    path.write_bytes(request.getfixturevalue("computed_store")[:3 * PAGE + 100])
    assert _quick_check(path) != "ok"
    return path


def make_missing_folder(tmp, request):
    return tmp / "no-such-folder" / "points.sqlite"


def _read_only(folder: Path, request) -> None:
    folder.chmod(0o555)
    request.addfinalizer(lambda: folder.chmod(0o755))


def make_new_store_in_read_only_folder(tmp, request):
    folder = tmp / "locked"
    folder.mkdir()
    _read_only(folder, request)
    return folder / "points.sqlite"


def make_store_in_read_only_folder(tmp, request):
    """A valid store whose folder cannot take the WAL journal files."""
    folder = tmp / "locked"
    folder.mkdir()
    _fresh_store(folder / "points.sqlite")
    _read_only(folder, request)
    return folder / "points.sqlite"


def make_read_only_file(tmp, request):
    path = tmp / "points.sqlite"
    _fresh_store(path)
    path.chmod(0o444)
    request.addfinalizer(lambda: path.chmod(0o644))
    return path


# (id, builder, words the message must hold besides the path, marks)
CASES = [
    ("directory", make_directory, ["is a directory"], ()),
    ("not_sqlite", make_not_sqlite, ["not an SQLite database"], ()),
    ("empty_file", make_empty, ["empty"], ()),
    ("sqlite_header_then_garbage", make_header_then_garbage, ["corrupt"], ()),
    ("foreign_sqlite", make_foreign_sqlite, ["not a fieldprop store"], ()),
    ("foreign_meta_table", make_foreign_meta, ["not a fieldprop store"], ()),
    ("newer_schema", make_newer_schema, ["newer", "99"], ()),
    ("older_schema", make_older_schema, ["schema 0", "older"], ()),
    ("unreadable_schema", make_unreadable_schema, ["schema", "'one'"], ()),
    ("corrupt_pages", make_corrupt_pages, ["corrupt"], ()),
    ("corrupt_cells", make_corrupt_cells, ["corrupt"], ()),
    ("truncated", make_truncated, ["corrupt"], ()),
    ("missing_folder", make_missing_folder, ["does not exist"], ()),
    ("new_store_in_read_only_folder", make_new_store_in_read_only_folder, ["not writable"],
     (needs_permissions,)),
    ("store_in_read_only_folder", make_store_in_read_only_folder, ["not writable"],
     (needs_permissions,)),
    ("read_only_file", make_read_only_file, ["not writable"], (needs_permissions,)),
]
_BY_ID = {c[0]: c for c in CASES}
#: Cases that make the store path a readable file or folder: the read-only
#: commands must refuse them too. (A missing file is "nothing stored yet" for
#: plan and collect; an unwritable one is fine to read.)
READABLE_BAD = ["directory", "not_sqlite", "empty_file", "foreign_sqlite", "newer_schema",
                "older_schema", "corrupt_pages", "corrupt_cells"]
assert set(READABLE_BAD) <= set(_BY_ID)


def build(case_id: str, tmp: Path, request) -> Path:
    """The bad store of ``case_id`` under ``tmp`` (the corrupt ones damage a copy
    of the computed store)."""
    return _BY_ID[case_id][1](tmp, request)


def check_refused(proc: subprocess.CompletedProcess, store: Path, words: list[str]) -> None:
    err = proc.stderr
    assert "Traceback" not in err and "Traceback" not in proc.stdout, err
    assert proc.returncode == 2, f"exit code {proc.returncode}, stderr: {err!r}"
    lines = err.splitlines()
    assert len(lines) == 1, f"stderr must be one line, got {len(lines)}: {err!r}"
    assert lines[0].startswith("fieldprop: error: bad input: "), lines[0]
    assert str(store) in lines[0], f"the store path {store} is not named: {lines[0]!r}"
    for word in words:
        assert word in lines[0], f"{word!r} not in {lines[0]!r}"
    assert proc.stdout == "", proc.stdout


def _without_journal(files: dict, store: Path, root: Path) -> dict:
    """The snapshot less the store's SQLite companions (checked on their own,
    by test_a_refused_store_gets_no_journal_files)."""
    rel = str(store.relative_to(root))
    return {k: v for k, v in files.items() if k not in {rel + "-wal", rel + "-shm"}}


# --------------------------------------------------------------------------- run

@pytest.mark.parametrize("case_id", [pytest.param(c[0], marks=c[3]) for c in CASES])
def test_run_refuses_a_bad_store(case_id, tmp_path, request):
    job = write_job(tmp_path)
    store = build(case_id, tmp_path, request)
    before_store = digest_of(store)
    before = snapshot(tmp_path)
    proc = fieldprop(tmp_path, "run", job.name, "--store", str(store))
    check_refused(proc, store, _BY_ID[case_id][2])
    assert digest_of(store) == before_store, "the store file changed"
    assert not (tmp_path / RESULT).exists(), "a result was written"
    after = snapshot(tmp_path)
    before, after = (_without_journal(f, store, tmp_path) for f in (before, after))
    assert after == before, "files changed: " + ", ".join(
        sorted(k for k in set(before) | set(after) if before.get(k, 0) != after.get(k, 0)))


@pytest.mark.parametrize("case_id", ["newer_schema", "older_schema", "corrupt_cells"])
def test_a_refused_store_gets_no_journal_files(case_id, tmp_path, request):
    """Refusing a store writes nothing beside it either: no ``-wal`` or ``-shm``
    file is left next to a file that was refused as bad input (the user is told
    to move the store away, and would leave them behind)."""
    job = write_job(tmp_path)
    store = build(case_id, tmp_path, request)
    proc = fieldprop(tmp_path, "run", job.name, "--store", str(store))
    assert proc.returncode == 2, proc.stderr
    assert journal_files(store) == set()


# --------------------------------------------------------------------------- plan, collect, inspect

def _read_command(command: str, store: Path) -> list[str]:
    if command == "inspect":
        return ["inspect", str(store)]
    return [command, "job.toml", "--store", str(store)]


@pytest.mark.parametrize("command", ["plan", "collect", "inspect"])
@pytest.mark.parametrize("case_id", READABLE_BAD)
def test_reading_commands_refuse_a_bad_store(command, case_id, tmp_path, request):
    write_job(tmp_path)
    store = build(case_id, tmp_path, request)
    before_store = digest_of(store)
    before = snapshot(tmp_path)
    proc = fieldprop(tmp_path, *_read_command(command, store))
    check_refused(proc, store, _BY_ID[case_id][2])
    assert digest_of(store) == before_store
    assert not (tmp_path / RESULT).exists()
    assert _without_journal(snapshot(tmp_path), store, tmp_path) == \
        _without_journal(before, store, tmp_path)


@needs_permissions
def test_a_valid_store_in_a_read_only_folder_can_still_be_read(tmp_path, computed_store,
                                                               request):
    """A store shared read-only (another user's folder, a read-only mount) is not
    bad input for the commands that only read: plan, collect and inspect."""
    folder = tmp_path / "shared"
    folder.mkdir()
    store = folder / "points.sqlite"
    store.write_bytes(computed_store)
    write_job(tmp_path)
    _read_only(folder, request)
    for args in (["plan", "job.toml", "--store", str(store)],
                 ["collect", "job.toml", "--store", str(store), "--quiet"],
                 ["inspect", str(store)]):
        proc = fieldprop(tmp_path, *args)
        assert proc.returncode == 0, (args[0], proc.stderr)
    assert store.read_bytes() == computed_store


def test_inspect_of_a_missing_store_is_bad_input(tmp_path):
    store = tmp_path / "nothing.sqlite"
    proc = fieldprop(tmp_path, "inspect", str(store))
    check_refused(proc, store, ["no such file"])
    assert not store.exists()


# --------------------------------------------------------------------------- collect: incomplete

_ID = re.compile(r"\b[0-9a-f]{12}\b")


def test_collect_names_the_points_the_store_lacks(tmp_path, computed_store):
    """The store holds the 2-level job; the 3-level one of the same model needs
    the 0.004 au points too: exit 3, naming exactly those (short ids)."""
    from fieldprop.engine.prepare import prepare
    from fieldprop.inputs.job import load_job
    from fieldprop.points.keys import short_id
    from fieldprop.points.store import PointStore

    store = tmp_path / "points.sqlite"
    store.write_bytes(computed_store)
    # Control: the stored job itself collects (so exit 3 below is about the
    # missing points, not about the store).
    write_job(tmp_path)
    control = fieldprop(tmp_path, "collect", "job.toml", "--store", str(store), "--quiet")
    assert control.returncode == 0, control.stderr
    (tmp_path / RESULT).unlink()

    job_path = write_job(tmp_path, H2_JOB.format(levels=3))
    job = load_job(job_path)
    tasks = prepare(job).computed_tasks
    with PointStore.open(store, read_only=True) as opened:
        stored = opened.get_points(t.key for t in tasks)
    missing = {short_id(t.key) for t in tasks if t.key not in stored}
    assert 0 < len(missing) <= 8  # all of them fit in the message (it lists 8)
    before = snapshot(tmp_path)

    proc = fieldprop(tmp_path, "collect", "job.toml", "--store", str(store))
    assert "Traceback" not in proc.stderr, proc.stderr
    assert proc.returncode == 3, proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("fieldprop: error: incomplete: "), proc.stderr
    assert set(_ID.findall(lines[0])) == missing, lines[0]
    assert f"{len(missing)} of the {len(tasks)} field points to compute" in lines[0]
    assert not (tmp_path / RESULT).exists()
    assert _without_journal(snapshot(tmp_path), store, tmp_path) == \
        _without_journal(before, store, tmp_path)


@pytest.mark.parametrize("store_option", [[], ["--store", "elsewhere.sqlite"]],
                         ids=["default_store", "given_store"])
def test_collect_without_a_store_file_is_incomplete(tmp_path, store_option):
    write_job(tmp_path)
    before = snapshot(tmp_path)
    proc = fieldprop(tmp_path, "collect", "job.toml", *store_option)
    assert "Traceback" not in proc.stderr, proc.stderr
    assert proc.returncode == 3, proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("fieldprop: error: incomplete: "), proc.stderr
    name = store_option[-1] if store_option else "fieldprop-points.sqlite"
    assert name in lines[0], lines[0]
    assert snapshot(tmp_path) == before, "collect created a file"


def test_a_damaged_zero_field_reference_is_bad_input(tmp_path, computed_store):
    """A model row whose reference blob cannot be read (SQLite's own checks see
    nothing wrong) is refused with one line naming the store, not a traceback."""
    job = write_job(tmp_path)
    store = tmp_path / "points.sqlite"
    store.write_bytes(computed_store)
    with sqlite3.connect(store) as db:
        db.execute("UPDATE models SET reference = x'00010203'")
        db.execute("DELETE FROM points")  # so that the run needs the reference
    db.close()
    proc = fieldprop(tmp_path, "run", job.name, "--store", str(store), "--quiet")
    check_refused(proc, store, ["zero-field reference", "damaged"])
    assert not (tmp_path / RESULT).exists()


def test_a_schema_1_store_is_read_as_it_is_and_migrated_when_written(tmp_path):
    """Schema 1 (before points.energy_scale_au) stays readable without being
    written (plan, inspect, collect), and a run's writable open migrates it in
    place, through every later schema: the column and the to-do lists' table are
    added, the schema mark becomes the current one, old rows keep their values
    (the new column reads as 0: unknown)."""
    from fieldprop.points import store as store_module
    from fieldprop.points.store import PointStore

    path = tmp_path / "points.sqlite"
    old_schema = store_module._SCHEMA.replace("    energy_scale_au REAL,\n", "").replace(
        "    relaxation TEXT,\n", "").replace("    orientation TEXT,\n", "").replace(
        ",\n    correlation_energy_change_au REAL,\n    amplitude_change REAL,\n"
        "    tolerances TEXT\n", "\n").replace(
        store_module._TO_DO_LISTS_TABLE + ";", "").replace(
        store_module._GEOMETRIES_TABLE + ";", "")
    assert "energy_scale_au" not in old_schema and "todo_lists" not in old_schema
    assert "geometries" not in old_schema and "relaxation" not in old_schema
    assert "tolerances" not in old_schema and "amplitude_change" not in old_schema
    assert "orientation" not in old_schema
    with sqlite3.connect(path) as db:
        db.executescript(old_schema)
        db.executemany("INSERT INTO meta VALUES (?, ?)", [
            ("format", store_module.FORMAT), ("schema", "1"), ("created_at", "then")])
        db.execute("INSERT INTO points (point_key, model_key, field_vector_au, origin_bohr, "
                   "quantities, status, energy_au, scf_energy_au, scf_cycles, attempts, s2, "
                   "occupied_overlap, gradient_norm, dipole_error_au, state_issue, wall_time_s, "
                   "host, version, created_at) VALUES ('k1', 'm1', '[0,0,0]', '[0,0,0]', '{}', "
                   "'ok', -1.5, -1.5, 7, '[\"newton\"]', 0.0, 1.0, 1e-12, 0.0, '', 0.1, 'h', "
                   "'0.1.0', 'then')")
    db.close()
    before = path.read_bytes()
    with PointStore.open(path, read_only=True) as store:
        row = store.get_points(["k1"])["k1"]
        assert store.get_todo("any") is None  # no to-do lists in schema 1
        assert store.get_geometry("any") is None  # nor geometries
    assert row.fields["energy_au"] == -1.5 and row.fields["energy_scale_au"] == 0.0
    assert row.fields["relaxation"] is None  # a column schema 1 lacks reads as NULL
    assert row.fields["correlation_energy_change_au"] is None
    assert row.fields["orientation"] is None
    assert path.read_bytes() == before and not journal_files(path)
    with PointStore.open(path) as store:
        row = store.get_points(["k1"])["k1"]
        assert row.fields["scf_cycles"] == 7 and row.fields["energy_scale_au"] == 0.0
        store.put_todo("plan", ["k1", "k2"])
        assert store.get_todo("plan")[0] == ["k1", "k2"]
        store.put_geometry("g", {"coords_bohr": [[0.0, 0.0, 0.0]]})
        assert store.get_geometry("g") == {"coords_bohr": [[0.0, 0.0, 0.0]]}
    with sqlite3.connect(path) as db:
        schema = db.execute("SELECT value FROM meta WHERE name = 'schema'").fetchone()[0]
        columns = {r[1] for r in db.execute("PRAGMA table_info(points)")}
    db.close()
    assert schema == str(store_module.SCHEMA_VERSION) == "6"
    assert "energy_scale_au" in columns and "relaxation" in columns
    assert {"correlation_energy_change_au", "amplitude_change", "tolerances",
            "orientation"} <= columns


def test_point_refuses_a_corrupt_store_without_the_full_check(tmp_path, request):
    """``point`` (every job-array element) and ``plan`` skip SQLite's full check
    of the file, whose cost grows with the store: a store whose pages they
    read are damaged is still refused with one line, and left as it is (plan:
    corrupt_cells above, where only the points' pages are damaged)."""
    job = write_job(tmp_path)
    store = build("corrupt_pages", tmp_path, request)
    before_store = digest_of(store)
    proc = fieldprop(tmp_path, "point", job.name, "--zero-field", "--store", str(store))
    check_refused(proc, store, ["corrupt"])
    assert digest_of(store) == before_store
