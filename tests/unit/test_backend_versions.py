"""Points of two backend versions never meet in one table: the versions a
model's points were computed with (PySCF's; libxc's for DFT) travel with its
backend facts, in the store and in point lines, and gathering points of one
model with two versions is refused, naming both. No PySCF: the versions are
made up."""

from __future__ import annotations

import numpy as np
import pytest

from fieldprop.engine.prepare import prepare
from fieldprop.engine.run import gather
from fieldprop.errors import InputError
from fieldprop.inputs.job import load_job
from fieldprop.points.keys import backend_version_conflict
from fieldprop.points.pointlines import line_document, read_lines
from fieldprop.points.records import ZeroFieldReference
from fieldprop.points.store import PointStore, StoredPoint

JOB = '''[molecule]
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
levels = 2
'''


def facts(pyscf: str, libxc: str | None = None) -> dict:
    out = {"pyscf_version": pyscf, "n_basis_functions": 2, "basis_functions": "spherical",
           "core_electrons": [0, 0]}
    if libxc is not None:
        out["libxc_version"] = libxc
    return out


def test_versions_are_compared_where_both_sides_record_them():
    assert backend_version_conflict(facts("2.14.0"), facts("2.14.0")) is None
    assert backend_version_conflict(facts("2.13.0"), facts("2.14.0")) == ("PySCF 2.13.0",
                                                                          "PySCF 2.14.0")
    # A store written before libxc's version was recorded: PySCF's alone decides.
    assert backend_version_conflict(facts("2.14.0"), facts("2.14.0", "7.0.0")) is None
    assert backend_version_conflict(facts("2.14.0", "6.2.2"), facts("2.14.0", "7.0.0")) == (
        "PySCF 2.14.0, libxc 6.2.2", "PySCF 2.14.0, libxc 7.0.0")


@pytest.fixture
def job(tmp_path):
    path = tmp_path / "h2.toml"
    path.write_text(JOB)
    return load_job(path)


def point_line(task, model_facts: dict) -> str:
    """A computed point of ``task`` as a point line (made-up numbers)."""
    import json

    f = task.point.field_vector_au[2]
    row = StoredPoint(task.key, task.model_key, "ok", {
        "energy_au": -1.117 - 0.5 * 2.7 * f * f, "scf_energy_au": -1.117, "dipole_au": None,
        "alpha_au": None, "scf_cycles": 4, "attempts": ("response_start", "newton"),
        "s2": 0.0, "occupied_overlap": 1.0, "gradient_norm": 1e-12, "dipole_error_au": 0.0,
        "state_issue": "", "energy_scale_au": 0.0, "relaxation": None},
        0.01, "host", "0", "2026-01-01T00:00:00+00:00")
    return json.dumps(line_document(row, task.point.field_vector_au,
                                    task.molecule.origin_bohr, task.quantities.canonical(),
                                    model_facts))


def test_point_lines_of_two_versions_are_refused(job):
    tasks = prepare(job, facts=facts("2.14.0")).tasks
    lines = [point_line(tasks[1], facts("2.14.0")), point_line(tasks[2], facts("2.13.0"))]
    with pytest.raises(InputError) as caught:
        read_lines(lines, "points.jsonl", tasks, tasks[0].model_key)
    message = str(caught.value)
    assert message.startswith("points.jsonl line 2")
    assert "PySCF 2.13.0" in message and "PySCF 2.14.0" in message
    found, found_facts = read_lines(lines[:1], "points.jsonl", tasks, tasks[0].model_key)
    assert set(found) == {tasks[1].key} and found_facts["pyscf_version"] == "2.14.0"


def test_point_lines_of_another_version_than_the_store_are_refused(job, tmp_path):
    prepared = prepare(job, facts=facts("2.14.0"))
    zero = prepared.tasks[0]
    reference = ZeroFieldReference(np.eye(2), (np.ones((2, 1)) / np.sqrt(2.0),), 0.0)
    with PointStore.open(tmp_path / "points.sqlite") as store:
        store.put_model(zero.model_key, prepared.description(), facts("2.14.0"), reference)
        same = [point_line(prepared.tasks[1], facts("2.14.0"))]
        _, rows = gather(job, store, [(same, "same.jsonl")])
        assert prepared.tasks[1].key in rows
        other = [point_line(prepared.tasks[1], facts("2.13.0"))]
        with pytest.raises(InputError) as caught:
            gather(job, store, [(other, "other.jsonl")])
    message = str(caught.value)
    assert message.startswith("other.jsonl: ") and str(tmp_path / "points.sqlite") in message
    assert "PySCF 2.13.0" in message and "PySCF 2.14.0" in message
