"""The noise model's double-precision floors (fieldprop.engine.noise_model), without PySCF."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from fieldprop.engine import ENERGY_ULPS, noise_model
from fieldprop.molecule import MoleculeSpec
from fieldprop.plan import FieldPoint
from fieldprop.records import PointRecord


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
