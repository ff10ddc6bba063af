"""Failures the user must see: an SCF point that needs retries, one that never
converges, and a field point that lands on another electronic state."""

import json
import textwrap

import numpy as np
import pytest

pytest.importorskip("pyscf")

from fieldprop.backend import context as backend_context  # noqa: E402
from fieldprop.backend import points as backend_points  # noqa: E402
from fieldprop.backend import states as backend_states  # noqa: E402
from fieldprop.cli import main  # noqa: E402
from fieldprop.errors import ScfNotConvergedError  # noqa: E402

WATER = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    O   0.000000  0.000000  0.117300
    H   0.000000  0.757200 -0.469200
    H   0.000000 -0.757200 -0.469200
    \"\"\"
    [model]
    method = "hf"
    basis = "6-31g"
    [response]
    properties = ["dipole", "alpha"]
    differentiate = "energy"
    field_au = 0.002
    {extra}
    """)


def test_scf_retries_are_recorded(tmp_path, capsys):
    # Eight DIIS cycles cannot reach 1e-11 Eh from the zero-field density, so the
    # ladder (more damping and a level shift, then second-order SCF) must act.
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra="[scf]\nmax_iterations = 10\nenergy_conv_tol_au = 1e-11\n"
                                      "solver = \"diis\""))
    assert main(["run", str(job), "--quiet"]) == 0
    doc = json.loads((tmp_path / "water.result.json").read_text())
    retries = doc["scf_retries"]
    assert retries, "no point needed a retry: the test lost its premise"
    assert all(r["attempts"][0] == "diis" and len(r["attempts"]) >= 2 for r in retries)
    capsys.readouterr()


def test_a_normal_run_lists_no_scf_retries(tmp_path, capsys):
    """Water HF/STO-3G, dipole, alpha and beta: every point converges on the
    solver's own path (zero field: DIIS then Newton; field points: a response,
    mirror or line start, then Newton), so ``scf_retries`` is empty. The job is
    run in one process, where the mirror and line starts occur."""
    job = tmp_path / "water.toml"
    job.write_text(WATER.replace('"6-31g"', '"sto-3g"').replace('["dipole", "alpha"]',
                                                                '["dipole", "alpha", "beta"]')
                   .format(extra=""))
    assert main(["run", str(job), "--quiet", "--workers", "1"]) == 0
    doc = json.loads((tmp_path / "water.result.json").read_text())
    assert doc["scf_retries"] == [], doc["scf_retries"]
    capsys.readouterr()


def test_a_point_that_never_converges_fails_the_job(tmp_path, capsys, monkeypatch):
    target = "L1(-1,0,0)"  # computed (L1(+1,0,0) is its mirror image by symmetry)
    real = backend_points._converge

    def stubborn(mf, context, point, *rest):
        if point.label == target:  # every strategy of the ladder fails at this point
            raise ScfNotConvergedError(f"SCF did not converge at field point {point.label} "
                                       "after diis, diis+damping+level_shift, second_order")
        return real(mf, context, point, *rest)

    monkeypatch.setattr(backend_points, "_converge", stubborn)
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra=""))
    assert main(["run", str(job), "--quiet"]) == 1
    err = capsys.readouterr().err
    assert target in err and "did not converge" in err
    assert err.splitlines()[-1].startswith("fieldprop: error: SCF not converged: ")
    assert not (tmp_path / "water.result.json").exists()  # no number formed


#: The jobs whose SCF is steered onto another state use PySCF's own SCF.
STEERED = "[scf]\nsolver = \"diis\""


def _steer_to_excited_state(monkeypatch, at_field):
    """At the field vector ``at_field``, steer the SCF onto another electronic state:
    the determinant with the zero-field ground state's highest occupied orbital
    replaced by its lowest virtual one (1b1^2 -> 4a1^2 in water), held by the
    maximum-overlap method (occupy the orbitals most like that determinant's). An
    excited SCF solution is a stationary point too, as a strong field or a poor
    start can reach (common practice); fieldprop must not difference across it.
    The occupation is steered through PySCF's own SCF: the jobs take [scf]
    solver = "diis" (STEERED)."""
    from pyscf import scf

    real = backend_context._apply_field

    def steer(mf, context, field_vector_au):
        real(mf, context, field_vector_au)
        mol = context.mol
        if tuple(field_vector_au) == at_field:
            ground = scf.RHF(mol).run()
            nocc = mol.nelectron // 2
            target = ground.mo_coeff[:, list(range(nocc - 1)) + [nocc]]
            s_ao = mol.intor_symmetric("int1e_ovlp")

            def get_occ(mo_energy=None, mo_coeff=None):
                weight = ((target.T @ s_ao @ mo_coeff) ** 2).sum(axis=0)
                occ = np.zeros(len(weight))
                occ[np.argsort(-weight)[:nocc]] = 2.0
                return occ

            mf.get_occ = get_occ

    monkeypatch.setattr(backend_context, "_apply_field", steer)


def test_a_state_switch_at_the_smallest_field_leaves_no_number(tmp_path, capsys, monkeypatch):
    _steer_to_excited_state(monkeypatch, (0.0, 0.0, 0.002))
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra=STEERED))
    assert main(["run", str(job), "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "field point L0(0,0,+1), field_vector_au=[0.0, 0.0, 0.002]" in err
    assert "another state than zero field" in err
    # Every field strength on the z axis is beyond the switch: dipole_z and
    # alpha_zz have no number, the other components do.
    assert "unstable" in err and "alpha_zz" in err and "dipole_z" in err
    assert err.splitlines()[-1].startswith("fieldprop: error: unstable: ")
    doc = json.loads((tmp_path / "water.result.json").read_text())
    assert doc["tensors"]["alpha"]["value"][2][2] is None
    assert doc["tensors"]["alpha"]["value"][0][0] > 1.0
    departures = doc["state_checks"]["taylor_continuity"]["departures"]
    assert [d["point"] for d in departures] == ["L0(0,0,+1)"]
    assert "L1(0,0,-1)" in doc["state_checks"]["taylor_continuity"]["excluded_points"]


def test_a_state_switch_at_a_larger_field_shortens_the_ladder(tmp_path, capsys, monkeypatch):
    _steer_to_excited_state(monkeypatch, (0.0, 0.0, 0.008))
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra="levels = 4\n" + STEERED))
    assert main(["run", str(job), "--quiet"]) == 0
    err = capsys.readouterr().err
    assert "field point L2(0,0,+1), field_vector_au=[0.0, 0.0, 0.008]" in err
    doc = json.loads((tmp_path / "water.result.json").read_text())
    comps = {c["name"]: c for c in doc["tensors"]["alpha"]["components"]}
    # alpha_zz keeps levels 0 and 1 only: nothing is extrapolated through the switch.
    assert len(comps["alpha_zz"]["richardson_table"][0]) == 2
    assert comps["alpha_zz"]["value"] is not None
    assert len(comps["alpha_xx"]["richardson_table"][0]) == 4
    assert sorted(doc["state_checks"]["taylor_continuity"]["excluded_points"]) == [
        "L2(0,0,+1)", "L2(0,0,-1)", "L3(0,0,+1)", "L3(0,0,-1)"]


def test_the_occupation_by_symmetry_alone_catches_the_switch(tmp_path, capsys, monkeypatch):
    # With the overlap and <S^2> checks switched off, the characters of the
    # occupied space under the C2 axis and mirror planes the field keeps must
    # still see that an a1 orbital replaced a b1 one.
    monkeypatch.setattr(backend_states, "MIN_OCCUPIED_OVERLAP", -1.0)
    monkeypatch.setattr(backend_states, "MAX_S2_CHANGE", np.inf)
    _steer_to_excited_state(monkeypatch, (0.0, 0.0, 0.002))
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra=STEERED))
    assert main(["run", str(job), "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "occupation by symmetry changed" in err and "C2 rotation about (0.000, 0.000, " \
        "1.000)" in err
    assert "overlap" not in err.split("L0(0,0,+1)")[1].split("\n")[0]


def test_failures_are_reported_from_worker_processes(tmp_path, capsys, monkeypatch):
    # Through a real process pool (Linux forks the workers, so they inherit the
    # stubborn SCF below): two points fail, both are listed, nothing is written.
    targets = {"L0(0,-1,0)", "L2(0,0,-1)"}  # computed points, not symmetry images
    real = backend_points._converge

    def stubborn(mf, context, point, *rest):
        if point.label in targets:
            raise ScfNotConvergedError(f"SCF did not converge at field point {point.label}")
        return real(mf, context, point, *rest)

    monkeypatch.setattr(backend_points, "_converge", stubborn)
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra=""))
    assert main(["run", str(job), "--quiet", "--workers", "2"]) == 1
    err = capsys.readouterr().err
    assert all(t in err for t in targets) and "and 1 more point" in err
    assert "Traceback" not in err
    assert not (tmp_path / "water.result.json").exists()


def test_a_strong_field_that_moves_the_electron_pair_of_stretched_lih_is_caught(tmp_path):
    # LiH stretched to 10 bohr (our geometry): the field along the bond moves its
    # electron pair between the two ends, and with it the dipole from -5 au to
    # +11 au by 0.032 au (a field-induced change of the ground state; the occupied
    # overlap with zero field falls to 0.65). The ladder of this job reaches
    # 0.064 au; the tool must leave 0.032 au and beyond out, say where, and still
    # give alpha from the smaller fields, agreeing with CPHF (analytic_reference).
    from analytic_reference import cphf_polarizability
    from support import agree, mean_field, run_job

    job, result = run_job(tmp_path, """
        [molecule]
        geometry = \"\"\"
        Li 0 0 0
        H  0 0 10.0
        \"\"\"
        units = "bohr"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["alpha"]
        differentiate = "dipole"
        field_au = 0.004
        levels = 5
        """)
    report = result.continuity
    departed = {d.label: d.kind for d in report.departures}
    assert departed.get("L3(0,0,+1)") == "state", departed
    assert all(label.startswith("L3") for label in departed), departed
    excluded = {result.plan.points[i].label for i in report.excluded}
    assert {"L3(0,0,+1)", "L3(0,0,-1)", "L4(0,0,+1)", "L4(0,0,-1)"} <= excluded
    assert any("L3(0,0,+1)" in w and "field_vector_au=[0.0, 0.0, 0.032]" in w
               for w in result.warnings)
    alpha = result.tensors["alpha"]
    assert alpha.stable.all()
    zz = next(c for c in alpha.components if c.plan.name == "alpha_zz")
    assert len(zz.estimate.table[0]) == 3  # 0.004, 0.008 and 0.016 au only
    reference = cphf_polarizability(mean_field(job), result.molecule.origin_bohr)
    assert reference[2, 2] > 300.0  # the huge axial response of the stretched bond
    assert agree(alpha.value_au, alpha.error_au, reference, 1e-6).all(), (
        alpha.value_au, alpha.error_au, reference)
