"""The point store across processes: a run killed with SIGKILL resumes where it
stopped, two runs share one store safely, and a process that cannot import PySCF
assembles the same result from the stored points.

Each command runs as a real ``python -m fieldprop`` process.
"""

import json
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time

import pytest

from cli_support import environment as _env  # noqa: E402
from cli_support import fieldprop  # noqa: E402

pytest.importorskip("pyscf")

#: Water in 6-31+G* (our geometry, as in the physics tests), mu to gamma on the
#: dipole route: 61 points planned, 32 computed (C2v gives the other 29 as
#: images), ~0.05 s each, long enough to kill in the middle.
WATER = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    O   0.000000  0.000000  0.117300
    H   0.000000  0.757200 -0.469200
    H   0.000000 -0.757200 -0.469200
    \"\"\"
    [model]
    method = "hf"
    basis = "6-31+g*"
    [response]
    properties = ["dipole", "alpha", "beta", "gamma"]
    field_au = 0.002
    """)
#: The same job with every point computed (67 with the zero field), for the
#: runs that must still be busy when a signal arrives.
WATER_EVERY_POINT = WATER + "symmetry = false\n"




def stored_points(path) -> int:
    """Committed rows, read as any other process would (WAL: readers never block)."""
    if not path.exists():
        return 0
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)
    try:
        return db.execute("SELECT COUNT(*) FROM points").fetchone()[0]
    except sqlite3.OperationalError:  # the schema is not committed yet
        return 0
    finally:
        db.close()


def _flat(x):
    if isinstance(x, list):
        return [v for item in x for v in _flat(item)]
    return [x]


def assert_same_numbers(a, b):
    """Two results of one job agree: each value within the other's error bar,
    each bar within a factor of 4. A point's start depends on which of its
    neighbours this process solved before it, so a resumed or shared run
    converges the same states to within the SCF's noise, not bit for bit, and
    the noise-limited bars follow the gradients reached (2.2x apart seen for
    gamma)."""
    assert a["energy_au"] == b["energy_au"]  # zero field: the stored reference itself
    for name in a["tensors"]:
        va, vb = _flat(a["tensors"][name]["value"]), _flat(b["tensors"][name]["value"])
        ea, eb = _flat(a["tensors"][name]["error"]), _flat(b["tensors"][name]["error"])
        for x, y, ex, ey in zip(va, vb, ea, eb, strict=True):
            assert (x is None) == (y is None), name
            if x is not None:
                assert abs(x - y) <= max(ex, ey), (name, x, y, ex, ey)
                assert 0.25 * ey <= ex <= 4.0 * ey, (name, ex, ey)


def processes_in(folder) -> list[int]:
    """Ids of the live processes whose working directory is ``folder`` (Linux /proc)."""
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            if os.path.realpath(f"/proc/{entry}/cwd") != os.path.realpath(folder):
                continue
            with open(f"/proc/{entry}/stat") as stat:
                if stat.read().split(")")[-1].split()[0] != "Z":  # not a zombie
                    found.append(int(entry))
        except OSError:
            continue
    return found


def test_a_killed_run_resumes_without_recomputing_and_gives_the_same_numbers(tmp_path):
    """SIGKILL (the parent cannot stop its workers): the worker processes end
    with it, the finished points stay stored, and the same command computes
    only the rest, with the same numbers."""
    (tmp_path / "water.toml").write_text(WATER)
    store = tmp_path / "fieldprop-points.sqlite"
    proc = subprocess.Popen([sys.executable, "-m", "fieldprop", "run", "water.toml", "--quiet",
                             "--workers", "2"],
                            cwd=tmp_path, env=_env(), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 300
    while stored_points(store) < 6 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    workers = [p for p in processes_in(tmp_path) if p != proc.pid]
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert proc.returncode == -signal.SIGKILL, "the run ended before it could be killed"
    if sys.platform.startswith("linux"):
        assert workers, "no worker processes seen: the test lost its premise"
        deadline = time.monotonic() + 10
        while processes_in(tmp_path) and time.monotonic() < deadline:
            time.sleep(0.05)
        assert not processes_in(tmp_path), "worker processes outlived the killed run"
    kept = stored_points(store)
    assert kept >= 6
    assert not (tmp_path / "water.result.json").exists()

    done = fieldprop("run", "water.toml", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    doc = json.loads((tmp_path / "water.result.json").read_text())
    points = doc["points"]
    assert points["reused"] == kept
    assert points["computed"] == points["planned"] - points.get("images", 0) - kept
    assert f"{kept} reused" in done.stderr

    fresh = fieldprop("run", "water.toml", "--no-store", "--json", "fresh.json", "--quiet",
                      cwd=tmp_path)
    assert fresh.returncode == 0, fresh.stderr
    assert_same_numbers(doc, json.loads((tmp_path / "fresh.json").read_text()))


@pytest.mark.parametrize("sig, code, word", [(signal.SIGINT, 130, "interrupted"),
                                             (signal.SIGTERM, 143, "terminated")],
                         ids=["sigint", "sigterm"])
def test_an_interrupted_two_worker_run_stops_promptly_and_keeps_its_points(tmp_path, sig,
                                                                          code, word):
    """Ctrl-C (SIGINT) or a batch system's SIGTERM during a 2-worker run: the
    workers stop within a few seconds (not after every queued point), the
    finished points stay stored, the message says how to resume, and the rerun
    computes only the rest."""
    (tmp_path / "water.toml").write_text(WATER_EVERY_POINT)
    store = tmp_path / "fieldprop-points.sqlite"
    # Ctrl-C's default action restored in the run: a shell starts a command in
    # the background with SIGINT ignored, and the child would inherit that
    # (and, rightly, never see the signal) when the suite itself runs so.
    proc = subprocess.Popen([sys.executable, "-m", "fieldprop", "run", "water.toml",
                             "--workers", "2"], cwd=tmp_path, env=_env(),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    deadline = time.monotonic() + 300
    while stored_points(store) < 8 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    assert proc.poll() is None, "the run ended before it could be interrupted"
    sent = time.monotonic()
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    stopped_after = time.monotonic() - sent
    assert proc.returncode == code, err
    assert stopped_after < 5.0, stopped_after
    assert err.splitlines()[-1] == f"fieldprop: error: {word}: " + (
        "Ctrl-C" if sig == signal.SIGINT else "SIGTERM"), err
    assert "Run the same command again to resume" in err and "Traceback" not in err
    kept = stored_points(store)
    assert kept >= 8
    done = fieldprop("run", "water.toml", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    points = json.loads((tmp_path / "water.result.json").read_text())["points"]
    assert points["reused"] == kept
    assert points["computed"] == points["planned"] - points.get("images", 0) - kept


def test_two_runs_sharing_one_store_write_every_point_once(tmp_path):
    (tmp_path / "water.toml").write_text(WATER)
    (tmp_path / "twin.toml").write_text(WATER)
    procs = [subprocess.Popen([sys.executable, "-m", "fieldprop", "run", name, "--quiet"],
                              cwd=tmp_path, env=_env(), stdout=subprocess.DEVNULL,
                              stderr=subprocess.PIPE, text=True)
             for name in ("water.toml", "twin.toml")]
    errors = [p.communicate(timeout=600)[1] for p in procs]
    assert [p.returncode for p in procs] == [0, 0], errors
    db = sqlite3.connect(tmp_path / "fieldprop-points.sqlite")
    total, distinct = db.execute("SELECT COUNT(*), COUNT(DISTINCT point_key) FROM points"
                                 ).fetchone()
    assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert db.execute("SELECT COUNT(*) FROM models").fetchone()[0] == 1
    db.close()
    docs = [json.loads((tmp_path / f"{n}.result.json").read_text()) for n in ("water", "twin")]
    assert total == distinct == docs[0]["points"]["planned"] - docs[0]["points"]["images"]
    serial = fieldprop("run", "water.toml", "--no-store", "--json", "serial.json", "--quiet",
                       cwd=tmp_path)
    assert serial.returncode == 0, serial.stderr
    reference = json.loads((tmp_path / "serial.json").read_text())
    assert_same_numbers(docs[0], reference)
    assert_same_numbers(docs[1], reference)


#: Runs ``fieldprop collect`` with PySCF made unimportable.
NO_PYSCF = ("import sys; sys.modules['pyscf'] = None; from fieldprop.cli import main; "
            "code = main(sys.argv[1:]); assert 'pyscf' not in [m.split('.')[0] for m in "
            "sys.modules if sys.modules[m] is not None]; sys.exit(code)")


#: Every kind of origin a job may give ([response] origin); the centre of mass
#: needs atomic weights, which must not come from PySCF in collect.
ORIGINS = {"nuclear-charge": '"nuclear-charge"', "centre-of-mass": '"centre-of-mass"',
           "zero": '"zero"', "explicit": "[0.1, -0.2, 0.3]"}


@pytest.mark.parametrize("origin", list(ORIGINS))
def test_the_analysis_of_stored_points_needs_no_pyscf_and_gives_the_same_json(tmp_path,
                                                                              origin):
    (tmp_path / "water.toml").write_text(WATER + f"origin = {ORIGINS[origin]}\n")
    done = fieldprop("run", "water.toml", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    collected = subprocess.run([sys.executable, "-c", NO_PYSCF, "collect", "water.toml",
                                "--json", "collected.json"], cwd=tmp_path, env=_env(),
                               capture_output=True, text=True, timeout=300)
    assert collected.returncode == 0, collected.stderr
    reported = subprocess.run([sys.executable, "-c", NO_PYSCF, "report", "collected.json",
                               "water.result.json"], cwd=tmp_path, env=_env(),
                              capture_output=True, text=True, timeout=300)
    assert reported.returncode == 0, reported.stderr
    # One column per result: every invariant the same in both.
    lines = reported.stdout.splitlines()
    assert sum(1 for line in lines if ".json: " in line) == 2, reported.stdout
    rows = [line.split("  ") for line in lines if line.startswith(("alpha_", "beta_", "dipole_"))]
    cells = [[c.strip() for c in row if c.strip()] for row in rows]
    assert cells and all(len(c) == 3 and c[1] == c[2] for c in cells), reported.stdout
    ran = json.loads((tmp_path / "water.result.json").read_text())
    got = json.loads((tmp_path / "collected.json").read_text())
    for doc in (ran, got):
        for key in ("wall_time_s", "created_utc", "command"):  # when and how: their own
            doc.pop(key)
    planned = ran["points"]["planned"] - ran["points"]["images"]
    assert got["points"] == {**ran["points"], "computed": 0, "reused": planned}
    ran.pop("points"), got.pop("points")
    assert got == ran
    # The tables too, but for the header's note that every point came from the
    # store (its prose wrapped anew: compared word for word).
    assert " ".join(collected.stdout.split()).replace(
        f" ({planned} reused from fieldprop-points.sqlite)", "") == " ".join(done.stdout.split())


def test_a_killed_worker_costs_its_point_one_more_try(tmp_path):
    """A worker process killed while the run goes on (the out-of-memory
    killer's way): one line names the point, it is computed again in a new
    worker, and the run ends with the numbers of a run nobody disturbed, bit
    for bit (the point is sent again with the same starting orbitals)."""
    (tmp_path / "water.toml").write_text(WATER_EVERY_POINT)
    store = tmp_path / "fieldprop-points.sqlite"
    proc = subprocess.Popen([sys.executable, "-m", "fieldprop", "run", "water.toml",
                             "--workers", "2", "--log-every", "1000"],
                            cwd=tmp_path, env=_env(), stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300
    while stored_points(store) < 8 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    workers = [p for p in processes_in(tmp_path) if p != proc.pid]
    assert workers and proc.poll() is None, "the run ended before a worker could be killed"
    os.kill(workers[0], signal.SIGKILL)
    _, stderr = proc.communicate(timeout=600)
    assert proc.returncode == 0, stderr
    lost = [line for line in stderr.splitlines() if "worker process died" in line]
    assert len(lost) >= 1 and "computed again" in lost[0]
    assert "Traceback" not in stderr
    doc = json.loads((tmp_path / "water.result.json").read_text())
    fresh = fieldprop("run", "water.toml", "--no-store", "--json", "fresh.json", "--quiet",
                      "--workers", "2", cwd=tmp_path)
    assert fresh.returncode == 0, fresh.stderr
    other = json.loads((tmp_path / "fresh.json").read_text())
    assert doc["tensors"] == other["tensors"]
