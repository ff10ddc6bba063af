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


def test_the_summary_picture_signs_scales_and_names_its_model(tmp_path, monkeypatch):
    """A negative beta_parallel draws to the left of zero, the power of ten is
    in the axis label (no offset text at the axis end), and the title names
    the model and the convention."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figures = []
    monkeypatch.setattr(plt, "close", lambda fig: figures.append(fig))

    def entry(name, value):
        document = {"formula": "C2H2", "job": {"model": {"method": "hf", "basis": "6-31g"}},
                    "tensors": {},
                    "invariants": {"alpha_iso": {"value": 20.0, "error": 1e-6},
                                   "beta_parallel": {"value": value, "error": 1.0}}}
        return ranking.entry_from(name, document)

    rows = ranking.rank([entry("push", 300.0), entry("pull", -800.0)], "beta_parallel")
    ranking.write_png(rows, "beta_parallel", "esu", tmp_path / "s.png", "perturbation")
    assert (tmp_path / "s.png").stat().st_size > 1000
    (fig,) = figures
    bars = fig.axes[0]
    widths = sorted(p.get_width() for p in bars.patches)
    assert widths[0] < 0 < widths[1]  # signed
    # esu values ~1e-30: the label carries the power, the bars are of order 1.
    assert "10^-" in bars.get_xlabel() and "esu" in bars.get_xlabel()
    assert 0.1 < abs(widths[0]) < 100
    title = fig._suptitle.get_text()
    assert "HF/6-31G" in title.upper() and "perturbation" in title
    assert ranking._scaled([2.0, -3.0], "au") == (1.0, "au")
