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


def _with_estimate(name, beta_hrs, factor_1064):
    entry = _entry(name, beta_hrs, 1.0)
    entry.document["optical_estimates"] = {"entries": [
        {"wavelength_nm": 1064.0, "process": "second-harmonic", "factor": factor_1064,
         "invariants": {"beta_hrs": {"value": beta_hrs * factor_1064, "error": 1e-4}}},
        {"wavelength_nm": 1064.0, "process": "electro-optic", "factor": None, "resonant": True,
         "invariants": {}}]}
    return entry


def test_a_screen_ranks_by_an_optical_estimate():
    # Static order a > b; at 1064 nm b's dispersion (closer to its band) wins.
    a, b = _with_estimate("a", 100.0, 1.1), _with_estimate("b", 90.0, 1.5)
    assert [r.entry.name for r in ranking.rank([a, b], "beta_hrs")] == ["a", "b"]
    rows = ranking.rank([a, b], "beta_hrs_shg_1064nm")
    assert [r.entry.name for r in rows] == ["b", "a"]
    out = io.StringIO()
    ranking.write_csv(rows, "au", out, "taylor", "beta_hrs_shg_1064nm")
    table = list(csv.DictReader(io.StringIO(out.getvalue())))
    assert float(table[0]["beta_hrs_shg_1064nm_au"]) == pytest.approx(135.0)
    # A resonant estimate has no number: the molecule is not ranked by it.
    rows = ranking.rank([a, b], "beta_hrs_eo_1064nm")
    assert all(r.rank is None and r.status == "resonant" for r in rows)
    assert ranking.estimate_parts("beta_hrs_eo_1550nm") == ("beta_hrs", "electro-optic", 1550.0)
    assert ranking.estimate_parts("alpha_iso_shg_1064nm") is None
    assert not ranking.valid_key("beta_hrs_shg_nm")


def test_an_unknown_ranking_key_is_one_line_exit_2(tmp_path, capsys):
    from fieldprop.cli import main

    path = tmp_path / "set.toml"
    path.write_text('[[molecule]]\nname = "w"\nsmiles = "O"\n[model]\nmethod = "hf"\n'
                    'basis = "sto-3g"\n[response]\nproperties = ["beta"]\n')
    assert main(["screen", str(path), "--rank-by", "beta_hrs_shg"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'beta_hrs_shg' is not a ranking key" in err[0]
    assert main(["screen", str(path), "--rank-by", "beta_hrs_shg_1064nm"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "1064 nm is not among the set's [response] optical_wavelen" in err[0]
    assert not (tmp_path / "set.results").exists()


def test_the_model_named_in_a_ranking_says_which_determinant():
    """An open shell's model is named by its determinant (UHF, ROKS, UMP2),
    not as the closed shell's HF or DFT: the numbers differ between them."""
    def model(method, reference, multiplicity, functional=None):
        document = {"formula": "NH2",
                    "job": {"model": {"method": method, "basis": "6-31g",
                                      "reference": reference,
                                      **({"functional": functional} if functional else {})},
                            "molecule": {"multiplicity": multiplicity}},
                    "tensors": {}, "invariants": {}}
        return ranking.entry_from("amidogen", document).model

    assert model("hf", "restricted", 1) == "HF/6-31g"
    assert model("hf", "unrestricted", 2) == "UHF/6-31g"
    assert model("hf", "restricted", 2) == "ROHF/6-31g"
    assert model("dft", "restricted", 2, "pbe") == "ROKS/pbe/6-31g"
    assert model("dft", "unrestricted", 1, "b3lyp") == "UKS/b3lyp/6-31g"
    assert model("mp2", "unrestricted", 2) == "UMP2/6-31g"
