"""Conformer ensembles without PySCF: Boltzmann weights (k T from CODATA via
scipy.constants), intensities averaged as intensities, and one minimum found
twice with its equivalent hydrogens swapped counted once."""

import numpy as np
import pytest
from scipy import constants

from fieldprop.numerics import ensemble


def test_boltzmann_weights_follow_the_energy_gap():
    kt = constants.k * 298.15 / constants.physical_constants["Hartree energy"][0]
    w = ensemble.boltzmann_weights([0.0, kt * np.log(3.0)], 298.15)
    assert w == pytest.approx([0.75, 0.25])


def test_hyper_rayleigh_intensities_add():
    # Two conformers, half each: the mixture scatters (100^2 + 0^2)/2.
    value, error, low, high = ensemble.incoherent([100.0, 0.0], [1.0, 1.0], [0.5, 0.5])
    assert value == pytest.approx(100.0 / np.sqrt(2.0))
    assert (low, high) == (0.0, 100.0)
    assert error == pytest.approx(0.5 * 100.0 * 1.0 / value)
    # The depolarisation ratio of the mixture is its intensities' ratio.
    ratio, _ = ensemble.intensity_ratio([2.0, 1.0], [0, 0], [1.0, 1.0], [0, 0], [0.5, 0.5])
    assert ratio == pytest.approx((4.0 + 1.0) / (1.0 + 1.0))


def test_one_minimum_with_its_hydrogens_swapped_is_counted_once():
    pytest.importorskip("rdkit")
    from fieldprop.inputs.structures import (ConformerOptions, conformers_from_smiles,
                                             symmetric_rmsd)

    structure = conformers_from_smiles("CC(=O)O", ConformerOptions(keep=2))[0][0]
    a = np.asarray(structure.coords_angstrom) / 0.529177
    swapped = a[[0, 1, 2, 3, 5, 4, 6, 7]]  # two methyl hydrogens exchanged
    assert ensemble.superposed_rmsd(a, swapped) > 1.0  # in atom order: far apart
    same = ensemble.duplicates([-1.0, -1.0], [a, swapped],
                               lambda x, y: symmetric_rmsd("CC(=O)O", x, y, 0.529177))
    assert same == [None, 0]
