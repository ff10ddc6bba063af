"""The method table (fieldprop.methods.METHODS) is the one place that says what
a method can do: the job parser asks its traits, so changing a trait changes
what a job may ask for, with no second list to keep in step."""

from __future__ import annotations

import dataclasses

import pytest

from fieldprop.numerics import methods
from fieldprop.errors import InputError
from fieldprop.inputs.job import load_job

JOB = """
[molecule]
geometry = "H 0 0 0\\nH 0 0 0.74"
[model]
method = "hf"
basis = "sto-3g"
[response]
properties = ["alpha"]
[geometry]
optimize = true
method = "{method}"
{functional}"""


def _load(tmp_path, method):
    path = tmp_path / "job.toml"
    path.write_text(JOB.format(method=method,
                               functional='functional = "pbe"' if method == "dft" else ""))
    return load_job(path)


@pytest.mark.parametrize("method", sorted(methods.METHODS))
def test_a_geometry_optimisation_needs_the_nuclear_gradient_trait(tmp_path, method):
    if methods.METHODS[method].nuclear_gradient:
        assert _load(tmp_path, method).geometry.method == method
    else:
        with pytest.raises(InputError, match=r"\[geometry\] method .*no nuclear gradient"):
            _load(tmp_path, method)


def test_the_geometry_check_follows_the_trait_when_the_table_changes(tmp_path, monkeypatch):
    table = methods.METHODS
    monkeypatch.setitem(table, "ccsd", dataclasses.replace(table["ccsd"],
                                                           nuclear_gradient=True))
    monkeypatch.setitem(table, "mp2", dataclasses.replace(table["mp2"],
                                                          nuclear_gradient=False))
    assert _load(tmp_path, "ccsd").geometry.method == "ccsd"
    with pytest.raises(InputError, match=r"optimise at one of hf, dft, ccsd \("):
        _load(tmp_path, "mp2")
