"""Lowering a noise floor, without PySCF: the convergence job keys, tightened
settings and keys, the signed propagation of the amplitude solver's error,
and the adaptive window's decision to tighten."""

from __future__ import annotations

import dataclasses
import textwrap
from types import SimpleNamespace

import numpy as np
import pytest

from fieldprop.engine.analyse import (CC_STEP_FACTOR, CC_STEP_SPREAD, ENERGY_ULPS, NoiseModel,
                                      noise_model)
from fieldprop.engine.prepare import make_plan, make_tasks, tightened_task
from fieldprop.numerics.extrapolate import ComponentEstimate, ComponentStatus
from fieldprop.inputs.job import (CORRELATION_DEFAULTS, MAX_TIGHTENING, TIGHTENING_FACTOR,
                           TIGHTEST_GRADIENT, load_job)
from fieldprop.points.keys import model_document, model_key
from fieldprop.inputs.molecule import MoleculeSpec, build_molecule
from fieldprop.numerics.plan import FieldPoint
from fieldprop.points.records import PointRecord
from fieldprop.numerics.window import TIGHTER, expected_precision, grow, wants


def _job(tmp_path, method="ccsd", properties='["alpha", "gamma"]', extra=""):
    path = tmp_path / "job.toml"
    path.write_text(textwrap.dedent(f"""
        [molecule]
        geometry = "He 0 0 0"
        [model]
        method = "{method}"
        basis = "aug-cc-pvdz"
        [response]
        properties = {properties}
        """) + extra)
    return load_job(path)


def test_correlation_defaults_follow_the_highest_order(tmp_path):
    assert _job(tmp_path).scf.correlation.energy_change_au == CORRELATION_DEFAULTS[4][0]
    alpha = _job(tmp_path, properties='["alpha"]').scf.correlation
    assert (alpha.energy_change_au, alpha.amplitude_change) == CORRELATION_DEFAULTS[2]
    given = _job(tmp_path, extra="[correlation]\nenergy_change_au = 1e-13\n").scf.correlation
    assert given.energy_change_au == 1e-13
    assert given.amplitude_change == CORRELATION_DEFAULTS[4][1]
    assert _job(tmp_path, method="mp2").scf.correlation is None
    assert _job(tmp_path).to_dict()["correlation"]["energy_change_au"] == 1e-12


def test_tightening_divides_every_target_down_to_the_floors(tmp_path):
    scf = _job(tmp_path).scf
    one = scf.tightened(1)
    assert one.gradient_target == pytest.approx(scf.gradient_target / TIGHTENING_FACTOR)
    assert one.correlation.energy_change_au == pytest.approx(
        scf.correlation.energy_change_au / TIGHTENING_FACTOR)
    # A tightened point accepts what the untightened one accepted.
    assert one.gradient_accepted == scf.gradient_accepted
    assert one.correlation.accepted_au == scf.correlation.energy_change_au
    assert scf.tightened(MAX_TIGHTENING).gradient_target >= TIGHTEST_GRADIENT
    assert scf.can_tighten(1) and not scf.can_tighten(MAX_TIGHTENING + 1)
    assert scf.tightened(0) is scf
    at_floor = dataclasses.replace(scf, gradient_target=TIGHTEST_GRADIENT, correlation=None)
    assert not at_floor.can_tighten(1)  # nothing left to tighten


def test_tightened_points_are_other_points_and_untightened_keys_are_unchanged(tmp_path):
    job = _job(tmp_path)
    molecule = build_molecule(job.molecule, job.response.origin)
    tasks = make_tasks(job, molecule, make_plan(job))
    tight = [tightened_task(t, 1) for t in tasks]
    assert tightened_task(tasks[3], 0) is tasks[3]
    assert len({t.key for t in tasks} | {t.key for t in tight}) == 2 * len(tasks)
    assert tightened_task(tasks[3], 1).key == tight[3].key  # the same in any job
    assert tight[3].tolerances["gradient_conv_tol"] == (job.scf.gradient_target
                                                        / TIGHTENING_FACTOR).hex()
    # The correlation settings are part of a CC model's key, and of no other.
    looser = _job(tmp_path, extra="[correlation]\nenergy_change_au = 1e-10\n")
    assert model_key(molecule, job.model, job.scf) != model_key(molecule, looser.model,
                                                                 looser.scf)
    hf = _job(tmp_path, method="hf")
    assert "correlation" in model_document(molecule, job.model, job.scf)
    assert "correlation" not in model_document(molecule, hf.model, hf.scf)


def _cc_record(change, scale=4.9, gradient=0.0):
    point = FieldPoint(0, (0, 0, 0), 0, (0.0, 0.0, 0.0))
    return PointRecord(point, -2.9, -2.85, None, 10, ("newton",), 0.0, 1.0, gradient,
                       energy_scale_au=scale, correlation_energy_change_au=change)


def test_the_amplitude_solvers_error_is_carried_signed_through_a_stencil():
    """Three points whose solver errors follow one smooth trend: the second
    difference sees CC_STEP_FACTOR |sum w change| plus the unsigned spread,
    not sum |w| |change| as an independent noise would."""
    job = SimpleNamespace(model=SimpleNamespace(method="ccsd"), scf=SimpleNamespace())
    molecule = MoleculeSpec(("He",), (2,), ((0.0, 0.0, 0.0),), 0, 1, (0.0, 0.0, 0.0))
    changes = (1.0e-12, 1.1e-12, 1.0e-12)
    noise = noise_model(job, [_cc_record(c) for c in changes], molecule)
    rounding = ENERGY_ULPS * np.finfo(float).eps * 4.9
    assert noise.energy_au[1] == pytest.approx(rounding + CC_STEP_FACTOR * 1.1e-12)
    assert noise.energy_drift_au[0] == pytest.approx(-CC_STEP_FACTOR * 1e-12)
    terms = ((0, 1.0), (1, -2.0), (2, 1.0))
    floor = noise.stencil_floor("energy", terms, 0.01, 2)
    signed = CC_STEP_FACTOR * abs(1e-12 - 2.2e-12 + 1e-12)
    spread = CC_STEP_SPREAD * CC_STEP_FACTOR * (1e-12 + 2.2e-12 + 1e-12)
    assert floor == pytest.approx((4 * rounding + signed + spread) / 1e-4)
    independent = sum(abs(w) * noise.energy_au[p] for p, w in terms) / 1e-4
    assert floor < 0.2 * independent
    # A record stored before the convergence was recorded: the old,
    # conservative model (ten tolerances), no drift.
    old = noise_model(SimpleNamespace(model=job.model, scf=SimpleNamespace(
        correlation=SimpleNamespace(energy_change_au=1e-12))), [_cc_record(None)], molecule)
    assert old.energy_au[0] == pytest.approx(rounding + 1e-11) and old.energy_drift_au[0] == 0


def _estimate(status, error, entry=(3, 2)):
    return ComponentEstimate(7.6, error, entry, status, error, ((7.6,),))


def test_the_window_tightens_only_where_that_lowers_a_floor_that_matters():
    floor, ok = ComponentStatus.NOISE_LIMITED, ComponentStatus.OK
    bar = 10 * expected_precision(4, 7.6)
    # Noise-limited at the ladder's top, bar above what is expected: tighter.
    assert wants(_estimate(floor, bar), (3, 5, 0), 6, 7.6, 4, True) == TIGHTER
    # ... not when the caller says it would not help, nor below the expected bar.
    assert wants(_estimate(floor, bar), (3, 5, 0), 6, 7.6, 4, False) == 0
    assert wants(_estimate(floor, 0.5 * expected_precision(4, 7.6)), (3, 5, 0), 6, 7.6, 4,
                 True) == 0
    # A larger field first, while the ladder has one.
    assert wants(_estimate(floor, bar, (2, 2)), (2, 4, 0), 6, 7.6, 4, True) == 1
    # A truncation-limited entry inside its window whose smaller fields the
    # noise blocks: tighter too.
    assert wants(_estimate(ok, bar, (3, 0)), (2, 5, 0), 6, 7.6, 4, True) == TIGHTER
    assert wants(_estimate(ComponentStatus.UNSTABLE, bar), (0, 5, 0), 6, 7.6, 4, True) == 0
    plan = SimpleNamespace(levels=6, components=[SimpleNamespace(stencils=(1, 2),
                                                                 indices=(0,) * 4)])
    assert grow(plan, ((3, 5, 0),), [_estimate(floor, bar)], [7.6], (True,)) == ((3, 5, 1),)
    assert grow(plan, ((3, 5, 1),), [_estimate(floor, bar)], [7.6]) == ((3, 5, 1),)


def test_expected_precision_is_relative_with_an_absolute_floor():
    assert expected_precision(4, 7.6) == pytest.approx(1e-4)
    assert expected_precision(4, 1e5) == pytest.approx(1.0)
    assert expected_precision(2, 1.36) == pytest.approx(1.36e-6)
    assert NoiseModel(1e-12, 1e-12).stencil_floor("dipole", ((0, 1.0), (1, -1.0)), 0.01, 1) \
        == pytest.approx(2e-10)
