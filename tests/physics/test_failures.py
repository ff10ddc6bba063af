"""Failures the user must see: an SCF point that needs retries, one that never
converges, and a field point that lands on another electronic state."""

import json
import textwrap

import numpy as np
import pytest

from fieldprop import backend_pyscf
from fieldprop.cli import main
from fieldprop.errors import ScfNotConvergedError

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
    route = "energy"
    field_au = 0.002
    {extra}
    """)


def test_scf_retries_are_recorded(tmp_path, capsys):
    # Eight DIIS cycles cannot reach 1e-11 Eh from the zero-field density, so the
    # ladder (more damping and a level shift, then second-order SCF) must act.
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra="[scf]\nmax_cycle = 10\nenergy_conv_tol_au = 1e-11"))
    assert main(["run", str(job), "--quiet"]) == 0
    doc = json.loads((tmp_path / "water.result.json").read_text())
    retries = doc["scf_retries"]
    assert retries, "no point needed a retry: the test lost its premise"
    assert all(r["attempts"][0] == "diis" and len(r["attempts"]) >= 2 for r in retries)
    capsys.readouterr()


def test_a_point_that_never_converges_fails_the_job(tmp_path, capsys, monkeypatch):
    target = "L1(+1,0,0)"
    real = backend_pyscf._converge

    def stubborn(mf, dm0, label):
        if label == target:  # every strategy of the ladder fails at this point
            raise ScfNotConvergedError(f"SCF did not converge at field point {label} after "
                                       "diis, diis+damping+level_shift, second_order")
        return real(mf, dm0, label)

    monkeypatch.setattr(backend_pyscf, "_converge", stubborn)
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra=""))
    assert main(["run", str(job), "--quiet"]) == 1
    err = capsys.readouterr().err
    assert target in err and "did not converge" in err
    assert not (tmp_path / "water.result.json").exists()  # no number formed


def test_a_state_switch_at_one_field_point_is_caught(tmp_path, capsys, monkeypatch):
    # At the point F = (0, 0, +h), steer the SCF onto another electronic state:
    # the determinant with the highest occupied orbital of the zero-field ground
    # state replaced by the lowest virtual one, held there by the maximum-overlap
    # method (PySCF's scf.addons.mom_occ). An excited SCF solution is a
    # stationary point too, as a strong field or a poor start can reach
    # (common practice); fieldprop must refuse to difference across it.
    from pyscf import scf

    real = backend_pyscf._apply_field

    def steer(mf, mol, molecule, field_vector_au):
        r = real(mf, mol, molecule, field_vector_au)
        if tuple(field_vector_au) == (0.0, 0.0, 0.002):
            ground = scf.RHF(mol).run()
            occ = ground.mo_occ.copy()
            homo = int(np.where(occ > 0)[0][-1])
            occ[homo], occ[homo + 1] = 0.0, 2.0
            scf.addons.mom_occ(mf, ground.mo_coeff, occ)
        return r

    monkeypatch.setattr(backend_pyscf, "_apply_field", steer)
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra=""))
    assert main(["run", str(job), "--quiet"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "state switch at field point L0(0,0,+1)" in err[0], err
    assert "field_vector_au=[0.0, 0.0, 0.002]" in err[0]
    assert not (tmp_path / "water.result.json").exists()


def test_failures_are_reported_from_worker_processes(tmp_path, capsys, monkeypatch):
    # Through a real process pool (Linux forks the workers, so they inherit the
    # stubborn SCF below): two points fail, both are listed, nothing is written.
    targets = {"L0(0,+1,0)", "L2(0,0,-1)"}
    real = backend_pyscf._converge

    def stubborn(mf, dm0, label):
        if label in targets:
            raise ScfNotConvergedError(f"SCF did not converge at field point {label}")
        return real(mf, dm0, label)

    monkeypatch.setattr(backend_pyscf, "_converge", stubborn)
    job = tmp_path / "water.toml"
    job.write_text(WATER.format(extra=""))
    assert main(["run", str(job), "--quiet", "--workers", "2"]) == 1
    err = capsys.readouterr().err
    assert all(t in err for t in targets) and "and 1 more point" in err
    assert "Traceback" not in err
    assert not (tmp_path / "water.result.json").exists()
