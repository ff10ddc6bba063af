"""Shell pipelines and job arrays: plan, point, collect, report, as scripts call them.

Every point is computed in its own process, as a job-array element or an
``xargs -P`` child would; the assembled result must be the one ``run`` gives.
"""

import csv
import os
import subprocess
import sys
import io
import json
import random
import textwrap
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from scipy import constants

from cli_support import environment, fieldprop  # noqa: E402

pytest.importorskip("pyscf")

#: LiH off every axis, dipole route: 1 + 6 x 2 = 13 points for mu and alpha,
#: every one computed (symmetry off), so that the cases can pick any point;
#: SYMMETRIC_JOB is the same with its linear symmetry used.
JOB = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    Li 0.0 0.0 0.0
    H  0.3 0.4 1.5
    \"\"\"
    [model]
    method = "hf"
    basis = "sto-3g"
    [response]
    properties = ["dipole", "alpha"]
    field_au = 0.002
    levels = 2
    symmetry = false
    """)
SYMMETRIC_JOB = JOB.replace("symmetry = false", "symmetry = true")




def one_error_line(proc, code, *words):
    """A refusal: exit ``code``, one line on stderr, naming ``words``."""
    assert proc.returncode == code, (proc.returncode, proc.stderr)
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    for word in words:
        assert word in lines[0], (word, lines[0])
    return lines[0]


def plan_lines(cwd, *extra):
    done = fieldprop("plan", "lih.toml", "--json-lines", *extra, cwd=cwd)
    assert done.returncode == 0, done.stderr
    return [json.loads(line) for line in done.stdout.splitlines()]


def assert_same_result(a, b, exact=True):
    """Two result documents agree: every tensor entry within the sum of both
    error bars (the points' SCF starts differ between a run and single points,
    so their last digits do), the zero-field dipole and energy to the last bit
    (``exact``) or to 1e-11 (a symmetrised geometry and a turned frame change
    the last bits; two zero-field SCFs agree to ~1e-12 in the dipole)."""
    for name in b["tensors"]:
        if name == "dipole" and not exact:
            continue
        va = np.array(a["tensors"][name]["value"], dtype=float)
        vb = np.array(b["tensors"][name]["value"], dtype=float)
        ea = np.array(a["tensors"][name]["error"], dtype=float)
        eb = np.array(b["tensors"][name]["error"], dtype=float)
        assert np.all(np.abs(va - vb) <= ea + eb), (name, va - vb, ea + eb)
    if exact:
        assert a["tensors"]["dipole"]["value"] == b["tensors"]["dipole"]["value"]
        assert a["energy_au"] == b["energy_au"]
    else:
        assert np.allclose(a["tensors"]["dipole"]["value"], b["tensors"]["dipole"]["value"],
                           rtol=0, atol=1e-11)
        assert abs(a["energy_au"] - b["energy_au"]) < 1e-12


@pytest.fixture(scope="module")
def reference_run(tmp_path_factory):
    """The same job computed by ``run`` in one process, no store."""
    folder = tmp_path_factory.mktemp("run")
    (folder / "lih.toml").write_text(JOB)
    done = fieldprop("run", "lih.toml", "--no-store", "--quiet", "--json", "-", cwd=folder)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def test_points_in_shuffled_order_two_at_a_time_collect_what_run_gives(tmp_path,
                                                                        reference_run):
    """plan --json-lines, then one process per id in shuffled order, two at a
    time (from the start: both need the zero-field reference at once, and one
    computes it while the other waits), then collect."""
    (tmp_path / "lih.toml").write_text(JOB)
    points = plan_lines(tmp_path)
    assert len(points) == 13 and {p["stored"] for p in points} == {"missing"}
    ids = [p["id"] for p in points]
    random.Random(7).shuffle(ids)
    with ThreadPoolExecutor(max_workers=2) as pool:
        runs = list(pool.map(lambda i: fieldprop("point", "lih.toml", "--id", i,
                                                 cwd=tmp_path), ids))
    assert all(r.returncode == 0 for r in runs), [r.stderr for r in runs if r.returncode]
    log = "".join(r.stderr for r in runs)
    assert log.count("computing the zero-field reference") == 1, log
    assert {p["stored"] for p in plan_lines(tmp_path)} == {"stored"}
    done = fieldprop("collect", "lih.toml", "--json", "-", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    doc = json.loads(done.stdout)
    assert doc["points"]["planned"] == 13 and doc["points"]["reused"] == 13
    assert_same_result(doc, reference_run)
    csv = fieldprop("collect", "lih.toml", "--format", "csv", "--quiet", cwd=tmp_path)
    assert csv.returncode == 0
    rows = [line.split(",") for line in csv.stdout.splitlines()]
    assert rows[0] == ["file", "part", "tensor", "component", "value", "error", "unit",
                       "convention", "frame", "status", "entry"]
    by_name = {r[3]: r for r in rows[1:]}
    alpha_zz = doc["tensors"]["alpha"]["value"][2][2]
    # A header, the dipole's three components and alpha's six unique ones.
    assert float(by_name["alpha_zz"][4]) == alpha_zz and len(rows) == 1 + 3 + 6
    assert {r[7] for r in rows[1:]} == {"taylor"} and {r[1] for r in rows[1:]} == {"electronic"}
    assert {r[8] for r in rows[1:]} == {"input"}
    # The store exported as point lines assembles the same result elsewhere.
    export = fieldprop("inspect", "fieldprop-points.sqlite", "--json-lines", cwd=tmp_path)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / "lih.toml").write_text(JOB)
    again = fieldprop("collect", "lih.toml", "--points", "-", "--json", "-", cwd=elsewhere,
                      stdin=export.stdout)
    assert again.returncode == 0, again.stderr
    assert json.loads(again.stdout)["tensors"] == doc["tensors"]


def test_the_array_element_script_run_by_a_shell_loop_collects_what_run_gives(
        tmp_path, reference_run):
    """configs/array_element.sh as a batch scheduler would run it: each element
    with its index in the scheduler's variable (here SLURM_ARRAY_TASK_ID, set
    by a shell loop, and one element through SGE_TASK_ID, 1-based), then
    collect over the folder of point lines gives run's tensors."""
    import shutil

    root = Path(__file__).resolve().parents[2]
    shutil.copy(root / "configs" / "array_element.sh", tmp_path)
    (tmp_path / "lih.toml").write_text(JOB)
    bin_dir = tmp_path / "bin"  # `fieldprop` as installed: this interpreter's module
    bin_dir.mkdir()
    (bin_dir / "fieldprop").write_text(f'#!/bin/sh\nexec "{sys.executable}" -m fieldprop "$@"\n')
    (bin_dir / "fieldprop").chmod(0o755)
    env = {**environment(), "PATH": f"{bin_dir}{os.pathsep}{os.environ.get('PATH', '')}"}
    assert fieldprop("point", "lih.toml", "--zero-field", "--quiet", cwd=tmp_path).returncode == 0
    n = int(fieldprop("plan", "lih.toml", "--count", cwd=tmp_path).stdout)
    assert n > 2
    loop = subprocess.run(
        ["sh", "-c", f'for i in $(seq 0 {n - 2}); do SLURM_ARRAY_TASK_ID=$i '
         f'sh array_element.sh lih.toml points || exit 1; done; '
         f'SGE_TASK_ID={n} sh array_element.sh lih.toml points'],
        cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600)
    assert loop.returncode == 0, loop.stderr
    assert len(list((tmp_path / "points").glob("1-*.jsonl"))) == n
    assert not list((tmp_path / "points").glob("*.part"))
    done = fieldprop("collect", "lih.toml", "--points", "points", "--json", "-", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert_same_result(json.loads(done.stdout), reference_run)
    unset = subprocess.run(["sh", "array_element.sh", "lih.toml", "points"], cwd=tmp_path,
                           env={k: v for k, v in env.items() if "TASK" not in k
                                and k not in ("PBS_ARRAY_INDEX", "LSB_JOBINDEX")},
                           capture_output=True, text=True)
    assert unset.returncode == 2 and "no array index" in unset.stderr


def test_a_symmetric_job_computes_only_its_representatives(tmp_path, reference_run):
    """With symmetry, plan --ids lists only the points to compute; one process
    computes them all; collect fills in the images and gives run's numbers.
    An image asked for by id is refused, naming the point it is an image of."""
    (tmp_path / "lih.toml").write_text(SYMMETRIC_JOB)
    points = plan_lines(tmp_path)
    images = {p["id"]: p["image_of"] for p in points if p["stored"] == "image"}
    ids = fieldprop("plan", "lih.toml", "--ids", cwd=tmp_path).stdout.split()
    assert len(points) == 13 and images and len(ids) + len(images) == 13
    assert not set(ids) & set(images) and set(images.values()) <= set(ids)
    image, rep = next(iter(images.items()))
    refused = fieldprop("point", "lih.toml", "--id", image, cwd=tmp_path)
    one_error_line(refused, 2, f"--id {image}", f"image of point {rep}")
    done = fieldprop("point", "lih.toml", "--quiet", *sum((["--id", i] for i in ids), []),
                     cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    done = fieldprop("collect", "lih.toml", "--json", "-", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    doc = json.loads(done.stdout)
    assert doc["points"]["reused"] == len(ids) and doc["points"]["images"] == len(images)
    assert doc["symmetry"]["kind"] == "linear" and doc["symmetry"]["frame"] is not None
    assert_same_result(doc, reference_run, exact=False)


def test_point_lines_on_stdout_collect_without_the_store(tmp_path, reference_run):
    """The multi-node recipe: zero field into the store, the rest as point
    lines on stdout (the store only read), collected from the lines."""
    (tmp_path / "lih.toml").write_text(JOB)
    assert fieldprop("point", "lih.toml", "--zero-field", "--quiet", cwd=tmp_path).returncode == 0
    store = tmp_path / "fieldprop-points.sqlite"
    before = store.read_bytes()
    ids = fieldprop("plan", "lih.toml", "--ids", cwd=tmp_path).stdout.split()
    done = fieldprop("point", "lih.toml", "--id", "-", "--stdout", "--threads", "1",
                     cwd=tmp_path, stdin="\n".join(ids) + "\n")
    assert done.returncode == 0, done.stderr
    assert "computing the zero-field reference" not in done.stderr  # read from the store
    assert store.read_bytes() == before  # never written
    lines = done.stdout.splitlines()
    assert [json.loads(line)["id"] for line in lines] == ids
    (tmp_path / "points.jsonl").write_text(done.stdout)
    # The store alone lacks the points; the lines complete it.
    incomplete = fieldprop("collect", "lih.toml", "--json", "-", cwd=tmp_path)
    assert incomplete.returncode == 3
    done = fieldprop("collect", "lih.toml", "--points", "-", "--json", "-", cwd=tmp_path,
                     stdin=(tmp_path / "points.jsonl").read_text())
    assert done.returncode == 0, done.stderr
    assert_same_result(json.loads(done.stdout), reference_run)
    # ... and the lines alone (no store at all), the backend facts coming with them.
    store.unlink()
    done = fieldprop("collect", "lih.toml", "--points", "points.jsonl", "--json", "-",
                     cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert_same_result(json.loads(done.stdout), reference_run)


def test_missing_points_are_named_and_partial_results_marked(tmp_path):
    """collect: exit 3 naming exactly the missing ids; --allow-partial reports
    what the points found determine (here alpha_xx alone: the x line gives
    d mu_i/dF_x, and with the index symmetry assumed alpha_xy and alpha_xz are
    d mu_x/dF_y and d mu_x/dF_z, on the other lines; mu at zero field) and
    marks the rest missing, exit 3 all the same."""
    (tmp_path / "lih.toml").write_text(JOB)
    points = plan_lines(tmp_path)
    on_x = [p["id"] for p in points if p["offsets"][1:] == [0, 0]]  # zero field and the x line
    assert len(on_x) == 5
    done = fieldprop("point", "lih.toml", *sum((["--id", i] for i in on_x), []), "--quiet",
                     cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    missing = {p["id"] for p in points} - set(on_x)
    listed = fieldprop("plan", "lih.toml", "--missing", "--ids", cwd=tmp_path).stdout.split()
    assert set(listed) == missing
    done = fieldprop("collect", "lih.toml", cwd=tmp_path)
    line = one_error_line(done, 3, "8 of the 13 field points to compute are not in")
    assert set(line.split(": ")[-1].split()) == missing
    assert not (tmp_path / "lih.result.json").exists()

    done = fieldprop("collect", "lih.toml", "--allow-partial", "--json", "-", cwd=tmp_path)
    assert done.returncode == 3
    assert done.stderr.strip().splitlines()[-1].startswith("fieldprop: error: incomplete: ")
    doc = json.loads(done.stdout)
    assert {m["id"] for m in doc["points"]["missing"]} == missing
    alpha = {c["name"]: c for c in doc["tensors"]["alpha"]["components"]}
    determined = {n for n, c in alpha.items() if c["status"] != "missing"}
    assert determined == {"alpha_xx"}
    assert all(alpha[n]["value"] is None and alpha[n]["reason"] for n in alpha
               if n not in determined)
    assert all(isinstance(alpha[n]["value"], float) for n in determined)
    assert doc["tensors"]["alpha"]["value"][0][1] is None  # alpha_xy = alpha_yx: its y line
    assert doc["tensors"]["dipole"]["components"][0]["status"] == "ok-zero-field"
    assert doc["invariants"]["alpha_iso"]["value"] is None
    assert "missing components" in doc["invariants"]["alpha_iso"]["reason"]
    table = fieldprop("collect", "lih.toml", "--allow-partial", "--json", "p.json",
                      cwd=tmp_path)
    assert table.returncode == 3 and "alpha_yy     missing" in table.stdout


def test_a_repeated_point_is_not_recomputed(tmp_path):
    (tmp_path / "lih.toml").write_text(JOB)
    ident = plan_lines(tmp_path)[3]["id"]
    done = fieldprop("point", "lih.toml", "--id", ident, "--id", ident, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "given more than once: computed once" in done.stderr
    assert done.stderr.count("SCF cycles") == 1  # computed once (zero field before it)
    assert done.stderr.count("computing the zero-field reference") == 1
    again = fieldprop("point", "lih.toml", "--id", ident, cwd=tmp_path)
    assert again.returncode == 0
    assert f"point {ident} " in again.stderr and "stored already" in again.stderr
    assert "SCF cycles" not in again.stderr and "computing" not in again.stderr


def test_index_covers_every_missing_point_exactly_once(tmp_path):
    """plan --count fixes the to-do list; point --index N for N = 0..count-1,
    one process each, computes each missing point once, however many of the
    others are done when an element starts; N = count is bad input."""
    (tmp_path / "lih.toml").write_text(JOB)
    assert fieldprop("point", "lih.toml", "--zero-field", "--quiet", cwd=tmp_path).returncode == 0
    count = fieldprop("plan", "lih.toml", "--count", cwd=tmp_path)
    assert count.returncode == 0, count.stderr
    n = int(count.stdout)
    assert n == 12
    missing = set(fieldprop("plan", "lih.toml", "--missing", "--ids", cwd=tmp_path).stdout.split())
    computed = []
    for index in range(n):  # one after the other: the missing set shrinks meanwhile
        done = fieldprop("point", "lih.toml", "--index", str(index), cwd=tmp_path)
        assert done.returncode == 0, done.stderr
        computed += [w for line in done.stderr.splitlines() if "SCF cycles" in line
                     for w in line.split()[2:3]]
    assert sorted(computed) == sorted(missing) and len(set(computed)) == n
    assert fieldprop("plan", "lih.toml", "--count", cwd=tmp_path).stdout.strip() == "0"
    over = fieldprop("point", "lih.toml", "--index", "0", cwd=tmp_path)
    one_error_line(over, 2, "--index 0", "empty")


def test_bad_point_lines_are_refused_with_one_line(tmp_path):
    """A corrupt line, a line of another model, a line not in the plan, a line
    whose key does not match its contents, an id not in the plan: exit 2, one
    line each, and no result written."""
    (tmp_path / "lih.toml").write_text(JOB)
    ids = [p["id"] for p in plan_lines(tmp_path)]
    good = fieldprop("point", "lih.toml", "--id", ids[0], "--id", ids[1], "--stdout",
                     cwd=tmp_path)
    assert good.returncode == 0, good.stderr
    zero_line, point_line = good.stdout.splitlines()
    other = tmp_path / "other"
    other.mkdir()
    (other / "lih.toml").write_text(JOB.replace('"sto-3g"', '"6-31g"'))
    foreign = fieldprop("point", "lih.toml", "--zero-field", "--stdout", cwd=other).stdout
    (other / "lih.toml").write_text(JOB.replace("field_au = 0.002", "field_au = 0.003"))
    off_plan = fieldprop("point", "lih.toml", "--id",
                         plan_lines(other)[1]["id"], "--stdout", cwd=other).stdout
    edited = json.loads(point_line)
    edited["field_vector_au"][0] *= 2
    cases = {
        "corrupt": (zero_line + "\n" + point_line[:57] + "\n", ["stdin line 2", "not JSON"]),
        "foreign": (foreign, ["stdin line 1", "another molecule or model", "6-31g"]),
        "off_plan": (zero_line + "\n" + off_plan, ["stdin line 2", "not in this job's plan"]),
        "edited": (json.dumps(edited) + "\n", ["stdin line 1", "does not match its"]),
        "not_a_point": ('{"schema": "fieldprop-result-1"}\n', ["not a fieldprop point line"]),
    }
    for name, (text, words) in cases.items():
        done = fieldprop("collect", "lih.toml", "--points", "-", cwd=tmp_path, stdin=text)
        one_error_line(done, 2, "bad input", *words)
        assert not (tmp_path / "lih.result.json").exists(), name
    # Lines in files of a directory: the bad one is named by its file.
    lines = tmp_path / "lines"
    lines.mkdir()
    (lines / "1-0.jsonl").write_text(zero_line + "\n")
    (lines / "1-1.jsonl").write_text(point_line[:57] + "\n")
    done = fieldprop("collect", "lih.toml", "--points", "lines", cwd=tmp_path)
    one_error_line(done, 2, "bad input", str(lines.relative_to(tmp_path) / "1-1.jsonl")
                   + " line 1", "not JSON")
    (lines / "1-1.jsonl").write_text(point_line + "\n")
    done = fieldprop("plan", "lih.toml", "--points", "lines", "-", "--ids", "--missing",
                     cwd=tmp_path, stdin="")
    assert done.returncode == 0 and ids[0] not in done.stdout and ids[1] not in done.stdout
    empty = tmp_path / "empty"
    empty.mkdir()
    # A folder a job array has not written into yet holds zero points: collect
    # finds every point missing (exit 3), plan lists them all to compute.
    done = fieldprop("collect", "lih.toml", "--points", "empty", cwd=tmp_path)
    assert done.returncode == 3 and "incomplete" in done.stderr, done.stderr
    assert not (tmp_path / "lih.result.json").exists()
    done = fieldprop("plan", "lih.toml", "--points", "empty", "--ids", "--missing",
                     cwd=tmp_path)
    assert done.returncode == 0 and ids[1] in done.stdout.split(), done.stderr
    done = fieldprop("point", "lih.toml", "--id", "0123456789ab", cwd=tmp_path)
    one_error_line(done, 2, "--id 0123456789ab", "not in this job's plan")
    # plan --count writes the store: a basis the backend lacks is refused
    # first, and no store is left behind.
    (other / "bad.toml").write_text(JOB.replace('"sto-3g"', '"sto-9zz"'))
    done = fieldprop("plan", "bad.toml", "--count", cwd=other)
    one_error_line(done, 2, "bad.toml", "[model] basis 'sto-9zz'")
    assert not (other / "fieldprop-points.sqlite").exists()
    done = fieldprop("point", "lih.toml", "--index", "0", "--stdout", cwd=tmp_path)
    one_error_line(done, 2, "no to-do list", "plan lih.toml --count")


#: The OH radical (X 2Pi) at ROHF on a tilted axis: a degenerate open shell,
#: whose zero-field point carries the orientation of its determinant.
RADICAL_JOB = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    O 0.2 -0.1 0.3
    H 0.5233333333 0.5466666667 0.9466666667
    \"\"\"
    units = "angstrom"
    multiplicity = 2
    [model]
    method = "hf"
    basis = "6-31g"
    reference = "restricted"
    [response]
    properties = ["dipole", "alpha"]
    field_au = 0.001
    levels = 2
    """)


def test_a_degenerate_open_shells_orientation_travels_with_its_zero_field_point(tmp_path):
    """The orientation and the averages reach every result: run (tables and
    JSON), collect from the store, collect from point lines alone; a point
    line whose orientation is damaged is refused in one line."""
    (tmp_path / "oh.toml").write_text(RADICAL_JOB)
    done = fieldprop("run", "oh.toml", "--json", "run.json", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "degenerate open shell (linear): its unpaired density lies along u" in done.stdout
    assert "alpha in the orientation frame (u, v, n) and its cylindrical average" in done.stdout
    run = json.loads((tmp_path / "run.json").read_text())
    orientation = run["orientation"]
    assert orientation["kind"] == "linear" and orientation["average"] == "cylindrical"
    assert np.allclose(orientation["axes"]["n"], np.array([1.0, 2.0, 2.0]) / 3.0, atol=1e-8)
    average = run["tensors"]["alpha"]["rotational_average"]
    collected = fieldprop("collect", "oh.toml", "--json", "-", cwd=tmp_path)
    assert collected.returncode == 0, collected.stderr
    collected = json.loads(collected.stdout)
    assert collected["orientation"] == orientation
    assert collected["tensors"]["alpha"]["rotational_average"] == average

    folder = tmp_path / "lines"
    folder.mkdir()
    (folder / "oh.toml").write_text(RADICAL_JOB)
    ids = fieldprop("plan", "oh.toml", "--ids", cwd=folder).stdout
    done = fieldprop("point", "oh.toml", "--id", "-", "--stdout", cwd=folder, stdin=ids)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    zero = next(json.loads(x) for x in lines if not any(json.loads(x)["field_vector_au"]))
    assert zero["orientation"]["kind"] == "linear"
    assert all(json.loads(x).get("orientation") is None for x in lines
               if any(json.loads(x)["field_vector_au"]))
    done = fieldprop("collect", "oh.toml", "--points", "-", "--json", "-", cwd=folder,
                     stdin=done.stdout)
    assert done.returncode == 0, done.stderr
    from_lines = json.loads(done.stdout)
    assert from_lines["orientation"]["axes"] == orientation["axes"]
    assert_same_result(from_lines, run, exact=False)
    damaged = dict(zero, orientation={"kind": "planar"})
    done = fieldprop("collect", "oh.toml", "--points", "-", cwd=folder,
                     stdin=json.dumps(damaged) + "\n")
    one_error_line(done, 2, "bad input", "stdin line 1", "orientation")


def test_a_failed_point_gives_exit_1_and_collect_names_it(tmp_path, capsys, monkeypatch):
    """A point whose SCF never converges: point exits 1 naming it, the failure
    is stored, and collect exits 1 with the same reason."""
    from fieldprop.backend import points as backend_points
    from fieldprop.cli import main
    from fieldprop.errors import ScfNotConvergedError

    (tmp_path / "lih.toml").write_text(JOB)
    job = str(tmp_path / "lih.toml")
    ids = [p["id"] for p in plan_lines(tmp_path)]
    real = backend_points._converge

    def stubborn(mf, context, point, *rest):
        if point.label == "L1(0,+1,0)":
            raise ScfNotConvergedError(f"SCF did not converge at field point {point.label} "
                                       "(injected)")
        return real(mf, context, point, *rest)

    monkeypatch.setattr(backend_points, "_converge", stubborn)
    assert main(["point", job, *sum((["--id", i] for i in ids), [])]) == 1
    err = capsys.readouterr().err
    assert "L1(0,+1,0)" in err and err.strip().splitlines()[-1].startswith(
        "fieldprop: error: SCF not converged: ")
    assert main(["collect", job, "--quiet"]) == 1
    assert "did not converge at field point L1(0,+1,0)" in capsys.readouterr().err


def test_report_converts_units_and_conventions_without_computing(tmp_path):
    """report: the invariants of result files in esu and the perturbation (B)
    convention, as CSV with one column per value and error bar; the factors
    checked against CODATA through scipy.constants, written out here."""
    job = JOB.replace('["dipole", "alpha"]', '["dipole", "alpha", "beta"]').replace(
        "levels = 2", "levels = 3")
    (tmp_path / "lih.toml").write_text(job)
    done = fieldprop("run", "lih.toml", "--no-store", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    doc = json.loads((tmp_path / "lih.result.json").read_text())
    done = fieldprop("report", "lih.result.json", "--units", "esu", "--convention",
                     "perturbation", "--format", "csv", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    header, row = [line.split(",") for line in done.stdout.splitlines()]
    values = dict(zip(header, row))
    assert header[:6] == ["file", "formula", "model", "route", "convention", "part"]
    assert header[-1] == "status" and values["convention"] == "perturbation"
    assert values["formula"] == "HLi" and values["status"] == "ok"
    # Gaussian units: 1 C = 10 c statC (c in m/s), a0 in cm, Eh in erg; one
    # atomic unit of beta is e^3 a0^3 / Eh^2 (common practice).
    e_statc = constants.e * constants.c * 10.0
    a0_cm = constants.physical_constants["Bohr radius"][0] * 100.0
    eh_erg = constants.physical_constants["Hartree energy"][0] * 1e7
    beta_esu = (e_statc * a0_cm) ** 3 / eh_erg ** 2 * 1e30  # in the customary 1e-30 esu
    inv = doc["invariants"]
    assert float(values["beta_hrs_1e-30_esu"]) == pytest.approx(inv["beta_hrs"]["value"] * beta_esu
                                                          / 2, rel=1e-9)
    assert float(values["beta_hrs_error_1e-30_esu"]) == pytest.approx(
        inv["beta_hrs"]["error"] * beta_esu / 2, rel=1e-9)
    angstrom3 = (constants.physical_constants["Bohr radius"][0] / constants.angstrom) ** 3
    assert float(values["alpha_iso_angstrom3"]) == pytest.approx(
        inv["alpha_iso"]["value"] * angstrom3, rel=1e-12)  # alpha: the same in both conventions
    debye = e_statc * a0_cm / 1e-18
    # (10 c statC per C holds for mu0 = 4 pi 1e-7 exactly; since the 2019 SI it
    # differs from 1 / sqrt(4 pi eps0), the factor fieldprop uses, by ~1e-10.)
    assert float(values["dipole_norm_debye"]) == pytest.approx(
        inv["dipole_norm"]["value"] * debye, rel=1e-9)
    # One row per component, Taylor, atomic units: the JSON's own numbers.
    done = fieldprop("report", "lih.result.json", "--components", "--format", "json",
                     cwd=tmp_path)
    table = json.loads(done.stdout)
    rows = {r[3]: r for r in table["rows"]}
    beta_zzz = next(c for c in doc["tensors"]["beta"]["components"] if c["name"] == "beta_zzz")
    assert rows["beta_zzz"][4] == beta_zzz["value"] and rows["beta_zzz"][6] == "au"
    # Every command that shows tensors takes the convention, names it in its
    # CSV and halves beta (gamma: a sixth) in the perturbation one; the JSON
    # stays Taylor.
    taylor = {c["name"]: c["value"] for c in doc["tensors"]["beta"]["components"]}
    for command in (["run", "lih.toml", "--json", "again.json", "--quiet"],
                    ["collect", "lih.toml", "--json", "collected.json", "--quiet"],
                    ["report", "lih.result.json", "--components"]):
        done = fieldprop(*command, "--convention", "perturbation", "--format", "csv",
                         cwd=tmp_path)
        assert done.returncode == 0, (command, done.stderr)
        rows = list(csv.DictReader(io.StringIO(done.stdout)))
        beta = {r["component"]: r for r in rows if r["tensor"] == "beta"}
        assert {r["convention"] for r in rows} == {"perturbation"}, command
        assert float(beta["beta_zzz"]["value"]) == pytest.approx(taylor["beta_zzz"] / 2,
                                                                 rel=1e-6), command
        if command[0] == "run":
            assert json.loads((tmp_path / "again.json").read_text())["convention"] == "taylor"
    table = fieldprop("report", "lih.result.json", "--convention", "perturbation",
                      cwd=tmp_path).stdout
    assert "convention: perturbation" in table
    # A table on screen; a file that is not a result: one line, exit 2.
    shown = fieldprop("report", "lih.result.json", "lih.result.json", cwd=tmp_path)
    assert shown.returncode == 0 and shown.stdout.count("lih.result.json") == 2
    one_error_line(fieldprop("report", "lih.toml", cwd=tmp_path), 2, "lih.toml", "not JSON")
    one_error_line(fieldprop("report", "nothing.json", cwd=tmp_path), 2, "nothing.json",
                   "no such file")
