"""fieldprop's table of atomic weights is PySCF's (pyscf.data.elements.MASSES),
value for value, so that the centre-of-mass origin, and the keys of every point
about it, are the same whether or not PySCF is imported."""

import numpy as np
import pytest

pytest.importorskip("pyscf")

from fieldprop.inputs.atomic_weights import ATOMIC_WEIGHTS  # noqa: E402
from fieldprop.inputs.job import ELEMENTS  # noqa: E402


def test_every_atomic_weight_is_pyscfs():
    from pyscf.data.elements import ELEMENTS as PYSCF_ELEMENTS
    from pyscf.data.elements import MASSES

    assert len(ATOMIC_WEIGHTS) == len(MASSES) == len(ELEMENTS)
    assert list(PYSCF_ELEMENTS[1:]) == list(ELEMENTS[1:])
    assert [float(m) for m in MASSES] == list(ATOMIC_WEIGHTS)  # bit for bit


def test_the_centre_of_mass_is_pyscfs():
    """Against PySCF's own centre of mass of a molecule with heavy and light
    atoms (gto.Mole.atom_mass_list: the same standard weights)."""
    from pyscf import gto

    from fieldprop.inputs.molecule import centre_of_mass

    symbols = ("Br", "C", "H", "H", "H")
    coords = np.array([[0.0, 0.0, 1.94], [0.0, 0.0, 0.0], [1.03, 0.0, -0.36],
                       [-0.51, 0.89, -0.36], [-0.51, -0.89, -0.36]])  # angstrom, ours
    mol = gto.M(atom=list(zip(symbols, coords.tolist())), basis="sto-3g", unit="angstrom",
                verbose=0)
    masses = mol.atom_mass_list(isotope_avg=True)
    expected = masses @ mol.atom_coords() / masses.sum()
    got = centre_of_mass(mol.atom_charges(), mol.atom_coords())
    assert np.allclose(got, expected, rtol=0.0, atol=1e-14)  # ~ulp of a few bohr
