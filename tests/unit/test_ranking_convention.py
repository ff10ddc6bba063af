"""The ranked table of a screen in either convention: the convention named in
a column, beta and gamma invariants scaled (1/2, 1/6: the perturbation
convention, REFERENCES sect. 1), alpha and the depolarisation ratio not, and
the old ranking key still taken though no longer offered. No PySCF."""

import csv
import io

import pytest

from fieldprop.outputs import ranking


def _entry(name, beta_hrs, gamma_parallel):
    document = {"formula": "H2O", "job": {"model": {"method": "hf", "basis": "sto-3g"}},
                "tensors": {},
                "invariants": {"alpha_iso": {"value": 8.0, "error": 1e-6},
                               "beta_hrs": {"value": beta_hrs, "error": 1e-4},
                               "beta_hrs_depolarisation_ratio": {"value": 4.2, "error": 1e-5},
                               "gamma_parallel": {"value": gamma_parallel, "error": 1e-2}}}
    return ranking.entry_from(name, document)


@pytest.mark.parametrize("convention, beta, gamma", [("taylor", 1.0, 1.0),
                                                      ("perturbation", 0.5, 1.0 / 6.0)])
def test_the_ranked_csv_names_and_applies_its_convention(convention, beta, gamma):
    rows = ranking.rank([_entry("a", 30.0, 600.0), _entry("b", -50.0, 900.0)], "beta_hrs")
    out = io.StringIO()
    ranking.write_csv(rows, "au", out, convention)
    table = list(csv.DictReader(io.StringIO(out.getvalue())))
    assert [r["name"] for r in table] == ["b", "a"]
    assert {r["convention"] for r in table} == {convention}
    assert float(table[0]["beta_hrs_au"]) == pytest.approx(-50.0 * beta)
    assert float(table[0]["beta_hrs_error_au"]) == pytest.approx(1e-4 * beta)
    assert float(table[0]["gamma_parallel_au"]) == pytest.approx(900.0 * gamma)
    assert float(table[0]["alpha_iso_au"]) == 8.0
    # Dimensionless: no unit in its column names, the same in both conventions.
    assert float(table[0]["beta_hrs_depolarisation_ratio"]) == 4.2
    assert "beta_hrs_depolarisation_ratio_error" in table[0]


def test_the_old_vector_norm_key_ranks_but_is_not_offered():
    assert "beta_vec" not in ranking.RANK_KEYS
    assert ranking.resolve_key("beta_vec") == "beta_vector_norm" in ranking.RANK_KEYS
