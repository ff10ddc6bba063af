"""Output files are replaced whole or not at all: every writer of a result,
a structure, a ranked table or a picture writes a temporary file of its own
beside the target, flushes it to disk and renames it into place.

Two writers of one path (two runs of one job, a campaign and a rerun) must
both succeed, leaving one of the two complete documents; an interruption
(an exception, Ctrl-C, SIGTERM's exit) before the rename leaves the old file
as it was and no temporary file behind.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from types import SimpleNamespace

import pytest


def _json(path: Path, n: int) -> None:
    from fieldprop.outputs.documents import write_json_atomic

    write_json_atomic({"writer": n, "values": [float(n)] * (2000 + 1000 * n)}, path)


def _relaxed_structure(path: Path, n: int) -> None:
    from fieldprop.outputs.documents import write_relaxed_structure

    document = {"field_au": [0.0, 0.0, 0.001 * (n + 1)], "symbols": ["H"] * (10 + 5 * n),
                "energy_relaxed_au": -1.0 - n,
                "relaxed_bohr": [[0.0, 0.0, 1.4 * i] for i in range(10 + 5 * n)]}
    write_relaxed_structure(document, path, "job.toml", 0.52917721092)


def _xyz(path: Path, n: int) -> None:
    from fieldprop.cli.commands import write_xyz

    atoms = [SimpleNamespace(symbol="H", coords_bohr=(0.0, 0.0, 1.4 * i))
             for i in range(10 + 5 * n)]
    job = SimpleNamespace(molecule=SimpleNamespace(bohr_angstrom=0.52917721092, atoms=atoms),
                          optimisation={"energy_au": -1.0 - n}, path=f"job{n}.toml")
    write_xyz(job, path)


def _ranked_rows(n: int):
    from fieldprop.outputs import ranking

    entries = [ranking.Entry(f"m{i}", {"invariants": {"alpha_iso": {
        "value": 1.0 + i, "error": 0.01}}, "tensors": {}}, "H2", "hf/sto-3g")
        for i in range(2 + n)]
    return ranking.rank(entries, "alpha_iso")


def _png(path: Path, n: int) -> None:
    from fieldprop.outputs import ranking

    ranking.write_png(_ranked_rows(n), "alpha_iso", "au", path)


def _csv(path: Path, n: int) -> None:
    from fieldprop.outputs import ranking

    ranking.write_csv_file(_ranked_rows(n), "au", path)


WRITERS = {"result_json": _json, "relaxed_xyz": _relaxed_structure, "optimised_xyz": _xyz,
           "ranking_png": _png, "ranking_csv": _csv}


def _documents(writer, tmp_path: Path) -> list[bytes]:
    """The two complete documents ``writer`` writes, each written alone."""
    out = []
    for n in (0, 1):
        alone = tmp_path / f"alone{n}" / "out"
        alone.parent.mkdir()
        writer(alone, n)
        out.append(alone.read_bytes())
    assert out[0] != out[1]
    return out


def _leftovers(folder: Path, name: str) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name != name)


@pytest.mark.parametrize("name", list(WRITERS))
def test_two_writers_of_one_path_both_succeed_and_one_complete_document_remains(
        name, tmp_path, monkeypatch):
    """Writer 0 is between writing and renaming when writer 1 writes the same
    path from start to end (its rename runs first): both finish, the file is
    writer 0's document, complete, and nothing else is left in the folder."""
    writer = WRITERS[name]
    documents = _documents(writer, tmp_path)
    folder = tmp_path / "shared"
    folder.mkdir()
    path = folder / "out"
    replace = os.replace
    interleaved = []

    def second_writer_first(src, dst, *args, **kwargs):
        if not interleaved:
            interleaved.append(src)
            writer(path, 1)  # the other writer, start to end
        return replace(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "replace", second_writer_first)
    writer(path, 0)
    assert interleaved, "the writer did not rename a temporary file into place"
    assert path.read_bytes() in documents
    assert path.read_bytes() == documents[0]  # the last rename wins
    assert _leftovers(folder, "out") == []


@pytest.mark.parametrize("interruption", [KeyboardInterrupt, SystemExit, OSError])
@pytest.mark.parametrize("name", list(WRITERS))
def test_an_interrupted_write_leaves_the_old_file_and_no_temporary(name, interruption,
                                                                   tmp_path, monkeypatch):
    """Ctrl-C (KeyboardInterrupt), SIGTERM's exit (SystemExit) or a full disk
    (OSError) while the new file goes to disk: the old file is intact and no
    temporary file is left beside it."""
    writer = WRITERS[name]
    folder = tmp_path / "target"
    folder.mkdir()
    path = folder / "out"
    path.write_bytes(b"the old document\n")
    calls = []

    def interrupted(fd):
        calls.append(fd)
        raise interruption()

    monkeypatch.setattr(os, "fsync", interrupted)
    with pytest.raises(interruption):
        writer(path, 0)
    assert calls, "the new file was not flushed to disk before the rename"
    assert path.read_bytes() == b"the old document\n"
    assert _leftovers(folder, "out") == []


def test_the_helper_writes_text_and_bytes_with_the_usual_permissions(tmp_path):
    from fieldprop.outputs import files as atomic_files

    path = tmp_path / "out.json"
    with atomic_files.replacing(path) as fh:
        json.dump({"a": 1}, fh)
    assert json.loads(path.read_text()) == {"a": 1}
    umask = os.umask(0)
    os.umask(umask)
    assert path.stat().st_mode & 0o777 == 0o666 & ~umask  # not mkstemp's private 0600
    with atomic_files.replacing(path, binary=True) as fh:
        fh.write(b"\x00\x01")
    assert path.read_bytes() == b"\x00\x01"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.json"]


def test_an_exception_inside_the_block_leaves_no_temporary(tmp_path):
    from fieldprop.outputs import files as atomic_files

    path = tmp_path / "out.txt"
    path.write_text("old\n")
    with pytest.raises(KeyboardInterrupt):
        with atomic_files.replacing(path) as fh:
            fh.write("half of the new")
            raise KeyboardInterrupt
    assert path.read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]


def test_a_device_a_pipe_or_a_link_is_not_replaced_by_a_file(tmp_path):
    """``--json /dev/null`` must not turn the device into a file (as root it
    could), a named pipe's reader must get the document, and a symbolic link
    keeps pointing at the file it names, which gets the new contents."""
    import stat
    import threading

    from fieldprop.outputs import files as atomic_files

    with atomic_files.replacing("/dev/null") as fh:
        fh.write("thrown away\n")
    assert stat.S_ISCHR(os.stat("/dev/null").st_mode)
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    got = []
    reader = threading.Thread(target=lambda: got.append(fifo.read_text()))
    reader.start()
    with atomic_files.replacing(fifo) as fh:
        fh.write("through the pipe\n")
    reader.join(timeout=10)
    assert got == ["through the pipe\n"] and stat.S_ISFIFO(os.stat(fifo).st_mode)
    real, link = tmp_path / "real.json", tmp_path / "link.json"
    real.write_text("old\n")
    link.symlink_to(real)
    with atomic_files.replacing(link) as fh:
        fh.write("new\n")
    assert link.is_symlink() and real.read_text() == "new\n"
