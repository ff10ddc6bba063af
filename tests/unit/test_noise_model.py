"""The noise model's double-precision floors (fieldprop.engine.analyse.noise_model),
without PySCF."""

from __future__ import annotations

import dataclasses
from types import SimpleNamespace

import numpy as np
import pytest

from fieldprop.engine.analyse import ENERGY_ULPS, noise_model
from fieldprop.inputs.molecule import MoleculeSpec
from fieldprop.numerics.plan import FieldPoint
from fieldprop.points.records import PointRecord


def _symmetric_triatomic(half_length_bohr: float) -> MoleculeSpec:
    """O-C-O on z, centred on the origin: its dipole is zero, its nuclear and
    electronic dipole terms are each ~ sum Z |R| = 16 x half_length."""
    coords = ((0.0, 0.0, -half_length_bohr), (0.0, 0.0, 0.0), (0.0, 0.0, half_length_bohr))
    return MoleculeSpec(("O", "C", "O"), (8, 6, 8), coords, 0, 1, (0.0, 0.0, 0.0))


def _record(dipole) -> PointRecord:
    point = FieldPoint(0, (0, 0, 0), 0, (0.0, 0.0, 0.0))
    return PointRecord(point, -187.0, -187.0, dipole, 10, ("newton",), 0.0, 1.0, 0.0)


@pytest.mark.parametrize("half_length", [2.2, 22.0])
def test_dipole_rounding_follows_the_nuclear_terms_not_a_zero_dipole(half_length):
    """Gradient 0 and dipole 0: the only noise left is rounding, which must
    scale with sum_A Z_A |R_A - O| (before: with |mu|, so 0 here)."""
    job = SimpleNamespace(model=SimpleNamespace(method="hf"),
                          scf=SimpleNamespace(energy_conv_tol_au=1e-12))
    molecule = _symmetric_triatomic(half_length)
    noise = noise_model(job, [_record((0.0, 0.0, 0.0))], molecule).dipole_au[0]
    expected = 10.0 * ENERGY_ULPS * np.finfo(float).eps * 16.0 * half_length
    assert noise == pytest.approx(expected, rel=1e-12)
    assert molecule.nuclear_moment_sum_au() == pytest.approx(16.0 * half_length)


def test_energy_rounding_follows_the_energy_terms():
    """A record with its terms' scale (|E_1| + |E_2| + |E_nuc| = 1035 Eh, as for
    3-aminopropenal at HF/6-31G) gets ENERGY_ULPS ulp of it, not of |E| = 246."""
    job = SimpleNamespace(model=SimpleNamespace(method="hf"),
                          scf=SimpleNamespace(energy_conv_tol_au=1e-12))
    record = dataclasses.replace(_record((0.0, 0.0, 0.0)), energy_au=-245.7,
                                 energy_scale_au=1035.5)
    noise = noise_model(job, [record], _symmetric_triatomic(2.2)).energy_au[0]
    assert noise == pytest.approx(ENERGY_ULPS * np.finfo(float).eps * 1035.5, rel=1e-12)
    unknown = dataclasses.replace(record, energy_scale_au=0.0)  # a record from before
    assert noise_model(job, [unknown], _symmetric_triatomic(2.2)).energy_au[0] == pytest.approx(
        ENERGY_ULPS * np.finfo(float).eps * 245.7, rel=1e-12)
