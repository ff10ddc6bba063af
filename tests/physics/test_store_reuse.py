"""The point store in use: extending a job computes only its new points, a change
that alters the numbers reuses none, and ``check`` after ``run`` computes only
the analytic-alpha points.

Small LiH/STO-3G jobs (6 basis functions): the counts are the point, not the
numbers, but the numbers of a job assembled from reused points must equal those
of the same job computed from scratch. Symmetry is off, so that every planned
point is computed and the counts are the plans' (reuse with symmetry:
tests/cli/test_store_runs.py).
"""

import json
import re
import textwrap

import numpy as np
import pytest

pytest.importorskip("pyscf")

from fieldprop.cli import main  # noqa: E402
from fieldprop.engine.run import compute  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402
from fieldprop.points.store import PointStore  # noqa: E402

LIH = """
[molecule]
geometry = \"\"\"
Li 0.0 0.0 0.0
H  0.3 0.4 1.5
\"\"\"
[model]
method = "hf"
basis = "{basis}"
[response]
properties = {properties}
symmetry = false
{response}
"""


def write_job(tmp_path, name="job.toml", basis="sto-3g", properties='["alpha", "beta"]',
              response="field_au = 0.002\nlevels = 3"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(LIH.format(basis=basis, properties=properties,
                                               response=response)))
    return load_job(path)


def run(job, store):
    return compute(job, progress=False, store=store)


def test_one_more_level_computes_only_the_new_points(tmp_path):
    with PointStore.open(tmp_path / "points.sqlite") as store:
        short = run(write_job(tmp_path, "a.toml"), store)
        longer = run(write_job(tmp_path, "b.toml", response="field_au = 0.002\nlevels = 4"),
                     store)
    assert short.counts.computed == len(short.plan.points) and short.counts.reused == 0
    # Every field vector of the 3-level ladder lies on the 4-level one (ratio 2:
    # the doubled offsets of the top level are the next level's unit offsets).
    assert longer.counts.reused == len(short.plan.points)
    assert longer.counts.computed == len(longer.plan.points) - len(short.plan.points) > 0
    # A result from reused points equals one computed from scratch to within
    # the SCF's noise (a point's start depends on the neighbours solved before
    # it in the same process, so not bit for bit): far inside the error bars.
    fresh = compute(write_job(tmp_path, "c.toml", response="field_au = 0.002\nlevels = 4"),
                    progress=False)
    for name in ("alpha", "beta"):
        a, b = longer.tensors[name], fresh.tensors[name]
        assert np.all(np.abs(a.value_au - b.value_au) <= 1e-3 * np.maximum(a.error_au,
                                                                            b.error_au))


def test_gamma_after_beta_and_the_automatic_window_after_a_fixed_field_reuse_every_point(
        tmp_path):
    with PointStore.open(tmp_path / "points.sqlite") as store:
        beta = run(write_job(tmp_path, "beta.toml", properties='["beta"]'), store)
        both = run(write_job(tmp_path, "gamma.toml", properties='["gamma", "beta"]'), store)
        fixed = run(write_job(tmp_path, "fixed.toml", properties='["alpha"]',
                              response="field_au = 0.001\nlevels = 3"), store)
        auto = run(write_job(tmp_path, "auto.toml", properties='["alpha"]', response=""),
                   store)
        full = run(write_job(tmp_path, "full.toml", properties='["alpha"]',
                             response='window = "full"'), store)
    assert both.counts.reused == len(beta.plan.points)
    assert both.counts.computed == len(both.plan.points) - len(beta.plan.points) > 0
    # The automatic ladder for alpha starts at 2.5e-4 au with ratio 2: its third,
    # fourth and fifth levels are 0.001, 0.002 and 0.004 au, the fixed job's ladder
    # (0.00025 * 4 is 0.001 exactly in binary), where the adaptive window starts:
    # every point it starts from is reused, and only its growth is computed.
    assert auto.job.response.field_au_source == "automatic window"
    assert auto.counts.reused == len(fixed.plan.points)
    assert auto.counts.computed == auto.counts.planned - len(fixed.plan.points)
    # The whole ladder then computes only what neither used.
    assert full.counts.reused == auto.counts.planned
    assert full.counts.computed == len(full.plan.points) - auto.counts.planned > 0


@pytest.mark.parametrize("change", ["basis", "origin", "scf"])
def test_a_change_that_alters_the_numbers_reuses_nothing(tmp_path, change):
    with PointStore.open(tmp_path / "points.sqlite") as store:
        run(write_job(tmp_path, "a.toml", properties='["alpha"]'), store)
        if change == "basis":
            job = write_job(tmp_path, "b.toml", basis="6-31g", properties='["alpha"]')
        elif change == "origin":
            job = write_job(tmp_path, "b.toml", properties='["alpha"]',
                            response="field_au = 0.002\nlevels = 3\norigin = \"zero\"")
        else:
            job = write_job(tmp_path, "b.toml", properties='["alpha"]',
                            response="field_au = 0.002\nlevels = 3\n[scf]\n"
                                     "energy_conv_tol_au = 1e-9")
        other = run(job, store)
    assert other.counts.reused == 0 and other.counts.computed == len(other.plan.points)


def _counts(stderr: str) -> list[tuple[int, int, int]]:
    """(planned, computed, reused) of each closing line on stderr."""
    return [tuple(int(x) for x in m) for m in re.findall(
        r"(\d+) field points: (\d+) computed, (\d+) reused", stderr)]


def test_check_after_run_computes_only_the_analytic_alpha_points(tmp_path, capsys):
    job = write_job(tmp_path, "lih.toml")
    assert main(["run", str(tmp_path / "lih.toml")]) == 0
    run_counts = _counts(capsys.readouterr().err)
    assert main(["check", str(tmp_path / "lih.toml")]) == 0
    check_counts = _counts(capsys.readouterr().err)
    planned = run_counts[0][0]
    assert run_counts == [(planned, planned, 0)]
    # The job's own route again: all reused; then the alpha route: all new (each
    # point also computes the analytic alpha, a different stored quantity).
    assert check_counts[0] == (planned, 0, planned)
    assert check_counts[1][1] == check_counts[1][0] and check_counts[1][2] == 0
    # And check alone stores what it computes: a second check computes nothing.
    assert main(["check", str(tmp_path / "lih.toml")]) == 0
    again = _counts(capsys.readouterr().err)
    assert all(computed == 0 for _, computed, _ in again)
    doc = json.loads((tmp_path / "lih.result.json").read_text())
    assert doc["points"]["store"].endswith("fieldprop-points.sqlite")
    assert job.model.method == "hf"


def test_a_stored_failure_is_not_retried_unless_asked(tmp_path, capsys, monkeypatch):
    from fieldprop.backend import points as backend_points
    from fieldprop.errors import ScfNotConvergedError

    target = "L1(0,0,+1)"
    real = backend_points._converge

    def stubborn(mf, context, point, *rest):
        if point.label == target:
            raise ScfNotConvergedError(f"SCF did not converge at field point {point.label}")
        return real(mf, context, point, *rest)

    write_job(tmp_path, "lih.toml", properties='["alpha"]')
    monkeypatch.setattr(backend_points, "_converge", stubborn)
    assert main(["run", str(tmp_path / "lih.toml")]) == 1
    first = capsys.readouterr().err
    assert target in first and "--retry-failed" in first
    planned, computed, reused = _counts(first)[0]
    assert computed == planned and reused == 0  # the others finished and were stored
    # Fixed or not, a stored failure fails the job again without an SCF ...
    monkeypatch.setattr(backend_points, "_converge", real)
    assert main(["run", str(tmp_path / "lih.toml")]) == 1
    second = capsys.readouterr().err
    assert target in second and _counts(second)[0] == (planned, 0, planned)
    # ... until asked: then only the failed point is computed, and the job succeeds.
    assert main(["run", str(tmp_path / "lih.toml"), "--retry-failed"]) == 0
    assert _counts(capsys.readouterr().err)[0] == (planned, 1, planned - 1)


@pytest.mark.parametrize("method", ["hf", "dft"])
def test_points_of_another_backend_version_are_not_mixed_into_one_table(tmp_path, capsys,
                                                                        monkeypatch, method):
    """A store whose model was computed with one PySCF (for DFT: one libxc) is
    not extended by another (simulated by changing the version the backend
    reports): one line names both versions (exit 2) and nothing is computed
    or stored. What is stored is still read (the stored job again: nothing to
    compute, nothing mixed)."""
    import pyscf
    from pyscf.dft import libxc

    job_path = tmp_path / "lih.toml"
    write_job(tmp_path, "lih.toml", properties='["alpha"]')
    if method == "dft":
        job_path.write_text(job_path.read_text().replace(
            'method = "hf"', 'method = "dft"\nfunctional = "pbe"'))
    assert main(["run", str(job_path), "--quiet"]) == 0
    store_path = tmp_path / "fieldprop-points.sqlite"

    def stored():
        with PointStore.open(store_path, read_only=True) as store:
            (model,) = store.summary()
            return model["points_ok"] + model["points_failed"], store.get_facts(
                model["model_key"])

    count, facts = stored()
    assert facts["pyscf_version"] == pyscf.__version__
    if method == "dft":
        assert facts["libxc_version"] == libxc.libxc_version()
        old, new = f"libxc {libxc.libxc_version()}", "libxc 0.0.1"
        monkeypatch.setattr(libxc, "libxc_version", lambda: "0.0.1")
    else:
        assert "libxc_version" not in facts  # HF evaluates no functional
        old, new = f"PySCF {pyscf.__version__}", "PySCF 0.0.1"
        monkeypatch.setattr(pyscf, "__version__", "0.0.1")
    capsys.readouterr()
    assert main(["run", str(job_path), "--quiet"]) == 0
    capsys.readouterr()
    # One more level: new points of the stored model, refused.
    job_path.write_text(job_path.read_text().replace("levels = 3", "levels = 4"))
    assert main(["run", str(job_path), "--quiet"]) == 2
    err = capsys.readouterr().err
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("fieldprop: error: bad input: "), err
    assert old in lines[0] and new in lines[0] and str(store_path) in lines[0], lines[0]
    assert stored() == (count, facts)


def test_a_zero_field_stored_as_failed_stops_every_entrance_in_one_line(tmp_path, capsys,
                                                                       monkeypatch):
    """The zero-field point failed and was stored so: run, a job-array element
    and collect each fail in one line naming it (no traceback, nothing else
    computed), until --retry-failed asks for it again."""
    from fieldprop.backend import points as backend_points
    from fieldprop.errors import ScfNotConvergedError

    real = backend_points.compute_reference

    def stubborn(context, task, *rest):
        raise ScfNotConvergedError(f"SCF did not converge at field point {task.point.label}")

    write_job(tmp_path, "lih.toml", properties='["alpha"]')
    job = str(tmp_path / "lih.toml")
    monkeypatch.setattr(backend_points, "compute_reference", stubborn)
    assert main(["run", job, "--quiet"]) == 1
    capsys.readouterr()
    monkeypatch.setattr(backend_points, "compute_reference", real)
    assert main(["plan", job, "--ids"]) == 0
    some_id = capsys.readouterr().out.split()[-1]
    for argv in (["run", job, "--quiet"], ["point", job, "--zero-field", "--quiet"],
                 ["point", job, "--id", some_id, "--quiet"], ["collect", job, "--quiet"]):
        assert main(argv) == 1, argv
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "did not converge" in err[0] and "Traceback" not in err[0]
        assert "--retry-failed" in err[0] or argv[0] == "collect"
    assert main(["run", job, "--quiet", "--retry-failed"]) == 0
