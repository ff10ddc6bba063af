"""The commands as users' scripts call them: exit codes, stdout, the result JSON."""

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from cli_support import fieldprop  # noqa: E402

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
    properties = ["dipole", "alpha", "beta"]
    field_au = 0.002
    """)




def test_plan_json_lines_parse_and_match_the_run(tmp_path):
    (tmp_path / "lih.toml").write_text(JOB)
    done = fieldprop("plan", "lih.toml", "--json-lines", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    points = [json.loads(line) for line in done.stdout.splitlines()]
    assert points[0]["offsets"] == [0, 0, 0] and points[0]["index"] == 0
    vectors = {tuple(p["field_vector_au"]) for p in points}
    assert len(vectors) == len(points)  # every field vector planned once
    # Ids are the first 12 hex digits of the store key, unique within the plan.
    assert all(p["key"].startswith(p["id"]) and len(p["key"]) == 64 for p in points)
    assert len({p["id"] for p in points}) == len(points)
    # Nothing computed yet; LiH is linear, so some points are images of others.
    assert {p["stored"] for p in points} == {"missing", "image"}
    table = fieldprop("plan", "lih.toml", cwd=tmp_path)
    assert table.returncode == 0 and f"{len(points)} field points" in table.stdout
    # --format json is one document, as on every command; jsonl the lines.
    whole = json.loads(fieldprop("plan", "lih.toml", "--format", "json", cwd=tmp_path).stdout)
    assert whole["schema"] == "fieldprop-plan-1" and whole["points"] == points
    lines = fieldprop("plan", "lih.toml", "--format", "jsonl", cwd=tmp_path).stdout
    assert [json.loads(line) for line in lines.splitlines()] == points


def test_run_writes_the_contract_json_beside_the_job(tmp_path):
    pytest.importorskip("pyscf")
    (tmp_path / "lih.toml").write_text(JOB)
    done = fieldprop("run", "lih.toml", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "beta_hrs" in done.stdout and "+- error" in done.stdout
    # The structure used, in the job's units, with its shortest distance
    # (Li-H: sqrt(0.3^2 + 0.4^2 + 1.5^2) = 1.5811 angstrom).
    assert "geometry (angstrom, inline):" in done.stdout
    assert "shortest distance 1.5811 angstrom: atoms 1 (Li) and 2 (H)" in done.stdout
    doc = json.loads((tmp_path / "lih.result.json").read_text())
    assert doc["schema"] == "fieldprop-result-1" and doc["units"] == "au"
    assert doc["convention"] == "taylor"
    assert set(doc["tensors"]) == {"dipole", "alpha", "beta"}
    assert len(doc["tensors"]["alpha"]["value"]) == 3
    assert len(doc["tensors"]["beta"]["error"][2][1]) == 3
    assert set(doc["invariants"]) == {"dipole_norm", "alpha_iso", "alpha_aniso",
                                      "beta_parallel", "beta_vector_norm", "beta_vec",
                                      "beta_hrs", "beta_hrs_zzz", "beta_hrs_xzz",
                                      "beta_hrs_depolarisation_ratio", "beta_dipolar_norm",
                                      "beta_octupolar_norm"}
    for inv in doc["invariants"].values():
        assert inv["value"] is not None and inv["error"] > 0
    ratio = doc["invariants"]["beta_hrs_depolarisation_ratio"]
    # Dimensionless, and between its pure octupolar (J = 3: 3/2) and pure
    # dipolar (J = 1: 9) values (beta_spherical_parts' averages).
    assert ratio["converted"] == {} and 1.5 <= ratio["value"] <= 9.0
    # Provenance: static tensors, when, where, by which command and versions,
    # from which job file (its hash as it is now).
    import datetime
    import hashlib

    assert doc["response_frequency_au"] == 0.0
    made = datetime.datetime.strptime(doc["created_utc"], "%Y-%m-%dT%H:%M:%SZ")
    now = datetime.datetime.now(datetime.timezone.utc).replace(tzinfo=None)
    assert abs((now - made).total_seconds()) < 3600
    assert doc["command"].startswith("fieldprop run lih.toml") and doc["host"]
    assert doc["job_sha256"] == hashlib.sha256((tmp_path / "lih.toml").read_bytes()).hexdigest()
    assert set(doc["versions"]) == {"fieldprop", "pyscf", "libxc", "numpy", "scipy", "python"}
    assert doc["versions"]["pyscf"] and doc["versions"]["numpy"] and doc["versions"]["python"]
    # The old name of beta_vector_norm still works for a while, marked deprecated.
    old, new = doc["invariants"]["beta_vec"], doc["invariants"]["beta_vector_norm"]
    assert old["value"] == new["value"] and "renamed beta_vector_norm" in old["deprecated"]
    # LiH is linear: some planned points are images of others, not computed.
    assert doc["points"]["planned"] - doc["points"]["images"] == doc["points"]["computed"] > 1
    assert doc["points"]["images"] > 0
    assert doc["job"]["model"]["reference"] == "restricted"
    assert doc["job"]["scf"]["energy_conv_tol_au"] > 0
    assert len(doc["origin_bohr"]) == 3 and doc["energy_au"] < -7.0
    # The dipole points from H- to Li+ (physics sign convention, REFERENCES
    # sect. 5: LiH polarity Li+H-): here H sits at +z, so mu_z < 0.
    assert doc["tensors"]["dipole"]["value"][2] < 0


def test_version_and_help_exit_zero(tmp_path):
    assert fieldprop("--version", cwd=tmp_path).stdout.startswith("fieldprop ")
    assert fieldprop("run", "--help", cwd=tmp_path).returncode == 0


def test_run_plot_writes_one_png_per_property_with_every_component(tmp_path):
    pytest.importorskip("pyscf")
    (tmp_path / "lih.toml").write_text(JOB)
    (tmp_path / "pictures").mkdir()
    done = fieldprop("run", "lih.toml", "--quiet", "--plot", "pictures", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    files = sorted(p.name for p in (tmp_path / "pictures").iterdir())
    # The dipole on the dipole route is a zero-field value: no table to draw.
    assert files == ["alpha.png", "beta.png"]
    for name in files:
        data = (tmp_path / "pictures" / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000

    # The panels are the computed components (6 for alpha, 10 for beta on this
    # route, the index symmetry assumed).
    from fieldprop.engine.run import compute
    from fieldprop.inputs.job import load_job
    from fieldprop.outputs.plots import write_plots

    result = compute(load_job(tmp_path / "lih.toml"), progress=False)
    written = write_plots(result.tensors, result.plan, tmp_path / "pictures")
    assert written["alpha.png"] == [c.plan.name for c in result.tensors["alpha"].components]
    assert len(written["beta.png"]) == 10 and "beta_xyz" in written["beta.png"]


def test_run_plot_into_a_missing_folder_makes_it_and_a_file_is_refused(tmp_path):
    (tmp_path / "lih.toml").write_text(JOB)
    (tmp_path / "taken").write_text("a file")
    done = fieldprop("run", "lih.toml", "--plot", "taken", cwd=tmp_path)
    assert done.returncode == 2 and "--plot" in done.stderr and "is a file" in done.stderr
    assert not (tmp_path / "lih.result.json").exists()
    done = fieldprop("run", "lih.toml", "--plot", "new/pictures", "--quiet", "--no-store",
                     cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "new" / "pictures" / "beta.png").stat().st_size > 1000


def test_check_takes_one_floor_or_four(tmp_path):
    from fieldprop.cli.commands import _agreement_rule
    from fieldprop.cli.parser import build_parser
    from fieldprop.errors import InputError

    parse = build_parser().parse_args
    rule = _agreement_rule(parse(["check", "j.toml", "--abs-floor-au", "1e-4"]))
    assert rule.abs_floor_au == {1: 1e-4, 2: 1e-4, 3: 1e-4, 4: 1e-4}
    rule = _agreement_rule(parse(["check", "j.toml", "--abs-floor-au", "1", "2", "3", "4"]))
    assert rule.abs_floor_au == {1: 1.0, 2: 2.0, 3: 3.0, 4: 4.0}
    with pytest.raises(InputError, match="one number .* or four"):
        _agreement_rule(parse(["check", "j.toml", "--abs-floor-au", "1", "2"]))


def test_run_plot_into_an_unwritable_folder_is_refused_before_work(tmp_path, capsys,
                                                                  monkeypatch):
    """A folder the process may not write (simulated: this may run as root, who
    may write anywhere) is refused before any work, not after it."""
    import fieldprop.cli.commands
    from fieldprop.cli import main

    (tmp_path / "lih.toml").write_text(JOB)
    (tmp_path / "locked").mkdir()
    real_access = os.access
    monkeypatch.setattr(fieldprop.cli.commands.os, "access", lambda path, mode: (
        False if str(path).endswith("locked") else real_access(path, mode)))
    monkeypatch.chdir(tmp_path)
    assert main(["run", "lih.toml", "--plot", "locked"]) == 2
    assert "--plot locked: folder is not writable" in capsys.readouterr().err
    assert not (tmp_path / "lih.result.json").exists()


def test_check_refuses_a_restricted_open_shell_before_any_work(tmp_path):
    # ROHF has no analytic polarizability in fieldprop: refused with one line
    # (exit 2) before any SCF, rather than failing after the whole run.
    (tmp_path / "triplet.toml").write_text(textwrap.dedent("""
        [molecule]
        geometry = "H 0 0 0\\nH 0 0 0.74"
        multiplicity = 3
        [model]
        method = "hf"
        basis = "sto-3g"
        reference = "restricted"
        [response]
        properties = ["alpha"]
        """))
    done = fieldprop("check", "triplet.toml", "--no-store", cwd=tmp_path)
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "restricted open shell" in lines[0] and "Traceback" not in lines[0]
    assert not list(tmp_path.glob("*.sqlite"))


def test_check_strict_refuses_the_floors_options_before_any_work(tmp_path):
    (tmp_path / "lih.toml").write_text(JOB)
    done = fieldprop("check", "lih.toml", "--strict", "--abs-floor-au", "1e-5",
                     "--json", "check.json", cwd=tmp_path)
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("fieldprop: error: bad input: ")
    assert "--strict" in lines[0] and "--abs-floor-au" in lines[0] and done.stdout == ""
    assert sorted(p.name for p in tmp_path.iterdir()) == ["lih.toml"]


def test_json_dash_means_stdout_for_run_collect_and_check(tmp_path):
    pytest.importorskip("pyscf")
    (tmp_path / "lih.toml").write_text(JOB)
    done = fieldprop("run", "lih.toml", "--quiet", "--json", "-", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    doc = json.loads(done.stdout)  # the JSON alone, no tables around it
    assert doc["schema"] == "fieldprop-result-1"
    assert not (tmp_path / "-").exists() and not (tmp_path / "lih.result.json").exists()
    collected = fieldprop("collect", "lih.toml", "--quiet", "--json", "-", cwd=tmp_path)
    assert collected.returncode == 0, collected.stderr
    assert json.loads(collected.stdout)["tensors"] == doc["tensors"]
    checked = fieldprop("check", "lih.toml", "--quiet", "--json", "-", cwd=tmp_path)
    assert checked.returncode == 0, checked.stderr
    checked_doc = json.loads(checked.stdout)
    assert "AGREE" in checked_doc["verdict"] and checked_doc["agree"] is True
    assert "fieldprop check: AGREE" in checked.stderr
    assert not (tmp_path / "-").exists()
    # --strict: the error bars alone; the boolean says what the exit code says.
    strict = fieldprop("check", "lih.toml", "--quiet", "--strict", "--json", "-", cwd=tmp_path)
    strict_doc = json.loads(strict.stdout)
    assert strict_doc["strict"] is True and strict_doc["floors"] is None
    assert strict_doc["agree"] is (strict.returncode == 0) and strict.returncode in (0, 1)
    assert all(c["bound"] == "error-bars" for rows in strict_doc["tensors"].values()
               for c in rows if c["bound"] is not None)


def test_a_reader_that_closes_stdout_early_is_not_a_failure(tmp_path):
    """`fieldprop run job | true`: the reader is gone before the first table line
    (as `| head` is after its lines); the result file is written, exit code 0."""
    pytest.importorskip("pyscf")
    (tmp_path / "lih.toml").write_text(JOB)
    done = subprocess.run(f"{sys.executable} -m fieldprop run lih.toml --quiet | true; "
                          "exit ${PIPESTATUS[0]}", shell=True, executable="/bin/bash",
                          capture_output=True, text=True, cwd=tmp_path, timeout=600)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert json.loads((tmp_path / "lih.result.json").read_text())["tensors"]


def test_error_vocabulary_is_the_documented_one():
    """The first words after 'fieldprop: error: ' come from a fixed vocabulary,
    each documented in the README's exit codes (one word list, no drift)."""
    from pathlib import Path

    from fieldprop import errors
    from fieldprop.cli.commands import CHECK_DISAGREES

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text()
    kinds = {cls.kind for cls in vars(errors).values()
             if isinstance(cls, type) and issubclass(cls, errors.FieldpropError)}
    for word in kinds | {CHECK_DISAGREES, "interrupted", "terminated"}:
        assert f"`{word}`" in readme, word


def test_batch_logs_get_progress_lines_and_quiet_silences_them(tmp_path):
    """stderr not a terminal (a batch log): progress lines, not a bar."""
    pytest.importorskip("pyscf")
    (tmp_path / "lih.toml").write_text(JOB)
    done = fieldprop("run", "lih.toml", "--no-store", "--log-every", "0", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    lines = [ln for ln in done.stderr.splitlines() if "SCF cycles," in ln]
    total = int(lines[-1].split("/")[1].split()[0])
    assert lines[-1].startswith(f"fieldprop: {total}/{total} field points, ")
    # A line per point with --log-every 0, the zero field's included.
    assert "elapsed, ~0:00:00 left" in lines[-1] and len(lines) == total
    assert "\r" not in done.stderr  # no bar redrawn into the log
    quiet = fieldprop("run", "lih.toml", "--no-store", "--quiet", "--log-every", "0",
                      cwd=tmp_path)
    # Quiet: no progress or log lines; warnings still (this sketch is not a
    # minimum of its model), each one line.
    assert quiet.returncode == 0
    assert all("not a minimum" in ln for ln in quiet.stderr.splitlines()), quiet.stderr
    # --verbose: also a line per point, with its cycles, time and SCF path.
    assert not any(ln.startswith("fieldprop: point ") for ln in done.stderr.splitlines())
    verbose = fieldprop("run", "lih.toml", "--no-store", "--verbose", cwd=tmp_path)
    points = [ln for ln in verbose.stderr.splitlines() if ln.startswith("fieldprop: point ")]
    assert verbose.returncode == 0 and len(points) == total, verbose.stderr
    assert "L0(0,0,0): " in points[0] and "SCF cycles" in points[0] and "newton" in points[0]


def test_a_zero_field_failure_inside_the_backend_is_named_not_a_traceback(tmp_path, capsys,
                                                                          monkeypatch):
    pytest.importorskip("pyscf")
    import fieldprop.backend.points
    from fieldprop.cli import main

    def broken(context, task, *rest):
        raise RuntimeError("injected inside PySCF")

    # Where the zero-field task looks it up (backend.tasks imports it from there).
    monkeypatch.setattr(fieldprop.backend.points, "compute_reference", broken)
    (tmp_path / "lih.toml").write_text(JOB)
    assert main(["run", str(tmp_path / "lih.toml"), "--quiet", "--no-store"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("fieldprop: error: backend failure: the zero-field point failed "
                          "inside the backend (RuntimeError: injected inside PySCF)"), err


def test_status_words_agree_with_the_readme_and_help(tmp_path):
    """Every component status fieldprop can print is explained in the README
    table and in `run --help`, and nothing else is."""
    import re
    from pathlib import Path

    from fieldprop.numerics.extrapolate import ComponentStatus

    words = {s.value for s in ComponentStatus}
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text()
    section = readme.split("## Reading the tables")[1].split("\n## ")[0]
    assert set(re.findall(r"^\| `([a-z-]+)` \|", section, re.M)) == words
    help_text = fieldprop("run", "--help", cwd=tmp_path).stdout
    for word in words:
        assert f" {word} " in help_text, word
    assert "h<k>, <m> steps" in help_text and "h<k>, <m> steps" in section


@pytest.mark.parametrize("system, label, factor, power", [
    ("esu", "10^-30 esu", "esu_factor", 1e30), ("si", "C m^3 V^-2", "si_factor", 1.0)])
def test_tables_in_esu_or_si_convert_every_component(tmp_path, system, label, factor, power):
    """--units: the tables' components are the JSON's atomic units times the
    CODATA factor (the JSON stays in au); beta in esu in the customary
    10^-30 esu (common practice), said in the table's title."""
    pytest.importorskip("pyscf")
    from fieldprop.numerics import units

    (tmp_path / "lih.toml").write_text(JOB)
    done = fieldprop("run", "lih.toml", "--quiet", "--units", system, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    doc = json.loads((tmp_path / "lih.result.json").read_text())
    section = done.stdout.split(f"beta, electronic: nuclei clamped ({label}; "
                                "d2 mu_i/dF_j dF_k, one per unique component")[1].split("\n\n")[0]
    row = next(line for line in section.splitlines() if line.startswith("beta_zzz "))
    shown = float(row.split()[1])
    au = doc["tensors"]["beta"]["value"][2][2][2]
    assert shown == pytest.approx(au * getattr(units, factor)(3) * power, rel=1e-5)


def test_every_command_has_worked_examples_and_the_exit_codes_are_listed():
    import argparse

    from fieldprop.cli.parser import build_parser

    parser = build_parser()
    for word in ("0    success", "2    bad input", "3    incomplete", "130"):
        assert word in parser.epilog
    commands = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    for name, sub in commands.choices.items():
        assert "examples:" in (sub.epilog or ""), name
        assert f"fieldprop {name} " in sub.epilog, name


@pytest.mark.parametrize("content", [None, "garbage", "{}"],
                         ids=["missing", "not json", "no address"])
def test_a_scheduler_file_that_names_no_scheduler_is_one_line(tmp_path, content):
    """A missing scheduler file (Dask would wait for it for ever) or one of
    other content (Dask asserts): one line naming the option, exit 2, nothing
    computed or written."""
    (tmp_path / "lih.toml").write_text(JOB)
    path = tmp_path / "scheduler.json"
    if content is not None:
        path.write_text(content)
    done = fieldprop("run", "lih.toml", "--scheduler-file", str(path), cwd=tmp_path,
                     timeout=120)
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert lines[-1].startswith("fieldprop: error: bad input: --scheduler-file"), lines
    assert "Traceback" not in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        ["lih.toml"] + (["scheduler.json"] if content is not None else []))


def test_a_job_rebuilt_from_its_result_gives_the_same_tensors(tmp_path):
    """report --format job writes the job file of a result (its echo, in the
    job file's own keys); run on it, it computes the same tensors, and its
    own result rebuilds to the same text."""
    pytest.importorskip("pyscf")
    (tmp_path / "lih.toml").write_text(JOB)
    assert fieldprop("run", "lih.toml", "--quiet", "--no-store", cwd=tmp_path).returncode == 0
    first = json.loads((tmp_path / "lih.result.json").read_text())
    rebuilt = fieldprop("report", "lih.result.json", "--format", "job", cwd=tmp_path)
    assert rebuilt.returncode == 0, rebuilt.stderr
    (tmp_path / "again.toml").write_text(rebuilt.stdout)
    done = fieldprop("run", "again.toml", "--quiet", "--no-store", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    again = json.loads((tmp_path / "again.result.json").read_text())
    for name in ("dipole", "alpha", "beta"):
        a, b = (np.array(d["tensors"][name]["value"]) for d in (first, again))
        bars = np.array(first["tensors"][name]["error"]) + np.array(
            again["tensors"][name]["error"])
        assert (np.abs(a - b) <= bars + 1e-12).all(), name
    assert again["job"] == {**first["job"], "derived": again["job"]["derived"]}
    twice = fieldprop("report", "again.result.json", "--format", "job", cwd=tmp_path).stdout
    assert twice.splitlines()[1:] == rebuilt.stdout.splitlines()[1:]
    one_more = fieldprop("report", "lih.result.json", "again.result.json", "--format", "job",
                         cwd=tmp_path)
    assert one_more.returncode == 2 and "one result file" in one_more.stderr
