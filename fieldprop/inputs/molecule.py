"""The molecule as the backend needs it: nuclei in bohr, electrons, origin.

Tensors are reported in the frame of the input geometry: nothing here reorients
or recentres the molecule. Only the origin of the multipole operator is chosen,
by default the centre of nuclear charge.

Example
-------
>>> from fieldprop.inputs.job import Atom, MoleculeInput
>>> m = MoleculeInput((Atom("H", (0.0, 0.0, 0.0)), Atom("H", (0.0, 0.0, 1.4))), 0, 1,
...                   "bohr", "inline")
>>> spec = build_molecule(m, "nuclear-charge")
>>> spec.origin_bohr, spec.formula
((0.0, 0.0, 0.7), 'H2')
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

import numpy as np

from fieldprop.inputs.atomic_weights import ATOMIC_WEIGHTS
from fieldprop.inputs.job import MoleculeInput


#: Largest distance (bohr) of a nucleus from the line through the others for a
#: molecule to count as linear (geometries given to 1e-6 angstrom pass).
LINEAR_TOLERANCE_BOHR = 1e-5


@dataclass(frozen=True)
class MoleculeSpec:
    """Everything that fixes the nuclear framework and the electron count.

    ``coords_bohr`` and ``origin_bohr`` are plain tuples so the spec pickles and
    hashes (a field point carries it to any worker process).
    """

    symbols: tuple[str, ...]
    nuclear_charges: tuple[int, ...]
    coords_bohr: tuple[tuple[float, float, float], ...]
    charge: int
    multiplicity: int
    origin_bohr: tuple[float, float, float]
    #: Electrons an effective core potential replaces, per atom (empty: none).
    core_electrons: tuple[int, ...] = ()

    @property
    def n_electrons(self) -> int:
        return sum(self.nuclear_charges) - self.charge

    @property
    def spin(self) -> int:
        """2S = number of unpaired electrons (PySCF's ``Mole.spin``)."""
        return self.multiplicity - 1

    @property
    def formula(self) -> str:
        """Hill order: C first, then H, then the rest alphabetically."""
        counts = Counter(self.symbols)
        order = (["C", "H"] if "C" in counts else []) + sorted(
            s for s in counts if not ("C" in counts and s in ("C", "H")))
        return "".join(s + (str(counts[s]) if counts[s] > 1 else "") for s in order)

    def nuclear_dipole_au(self) -> np.ndarray:
        """sum_A Z_A (R_A - O), shape (3,), in e bohr.

        With effective core potentials Z_A is the core's charge, Z_A minus the
        electrons the potential replaces: the electrons left are the valence
        ones, and the dipole of a neutral molecule stays origin independent.
        """
        z = np.asarray(self.nuclear_charges, dtype=float)
        if self.core_electrons:
            z = z - np.asarray(self.core_electrons, dtype=float)
        r = np.asarray(self.coords_bohr) - np.asarray(self.origin_bohr)
        return z @ r

    def nuclear_moment_sum_au(self) -> float:
        """sum_A Z_A |R_A - O| (core charges with effective core potentials), in
        e bohr: the size of the terms whose difference is the dipole."""
        z = np.asarray(self.nuclear_charges, dtype=float)
        if self.core_electrons:
            z = z - np.asarray(self.core_electrons, dtype=float)
        r = np.asarray(self.coords_bohr) - np.asarray(self.origin_bohr)
        return float(z @ np.linalg.norm(r, axis=1))

    def rotation_axes(self) -> tuple[np.ndarray, np.ndarray]:
        """The axes of the rotations that map the nuclear framework onto itself
        by any angle, and a point they pass through: the three Cartesian axes
        through an atom's nucleus; a linear molecule's own axis; none (shape
        (0, 3)) for anything else. A determinant may break such a symmetry (a
        degenerate open shell: OH's 2Pi, an atom's P state), and every angle
        of it is then an equally good solution.
        """
        coords = np.asarray(self.coords_bohr, dtype=float)
        centre = coords[0]
        if len(coords) == 1:
            return centre, np.eye(3)
        offsets = coords - centre
        far = offsets[np.argmax(np.linalg.norm(offsets, axis=1))]
        axis = far / np.linalg.norm(far)
        off_axis = offsets - np.outer(offsets @ axis, axis)
        if np.abs(off_axis).max() > LINEAR_TOLERANCE_BOHR:
            return centre, np.zeros((0, 3))
        return centre, axis[None, :]

    def orientation_frame(self) -> np.ndarray | None:
        """The frame (rows: unit vectors in the input frame, right-handed) to
        which a degenerate open shell's unpaired density is turned: for a
        linear molecule (u, v, n), n its axis (rotation_axes), u the Cartesian
        axis most perpendicular to n projected onto the plane normal to it,
        v = n x u; for an atom x, y, z. None for anything else.

        >>> from fieldprop.inputs.job import Atom, MoleculeInput
        >>> m = MoleculeInput((Atom("O", (0.0, 0.0, 0.0)), Atom("H", (0.0, 0.0, 1.8))), 0, 2,
        ...                   "bohr", "inline")
        >>> build_molecule(m, "zero").orientation_frame().round(12).tolist()
        [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]
        """
        _, axes = self.rotation_axes()
        if len(axes) == 3:
            return np.eye(3)
        if len(axes) != 1:
            return None
        n = axes[0]
        u = np.eye(3)[int(np.argmin(np.abs(n)))]
        u = u - (u @ n) * n
        u /= np.linalg.norm(u)
        return np.array([u, np.cross(n, u), n])


def centre_of_nuclear_charge(charges, coords_bohr) -> tuple[float, float, float]:
    """sum_A Z_A R_A / sum_A Z_A in bohr."""
    z = np.asarray(charges, dtype=float)
    c = (z @ np.asarray(coords_bohr, dtype=float)) / z.sum()
    return tuple(float(v) for v in c)


def centre_of_mass(charges, coords_bohr) -> tuple[float, float, float]:
    """sum_A m_A R_A / sum_A m_A in bohr, with the standard (isotope-averaged)
    atomic weights of :mod:`fieldprop.inputs.atomic_weights` (PySCF's values, without
    PySCF), by nuclear charge."""
    m = np.array([ATOMIC_WEIGHTS[int(z)] for z in charges])
    c = (m @ np.asarray(coords_bohr, dtype=float)) / m.sum()
    return tuple(float(v) for v in c)


def build_molecule(mol: MoleculeInput, origin: str | tuple[float, float, float]) -> MoleculeSpec:
    """Resolve the origin ("nuclear-charge", "centre-of-mass", "zero" or bohr
    coordinates) and freeze."""
    charges = tuple(a.charge for a in mol.atoms)
    coords = tuple(tuple(float(v) for v in a.coords_bohr) for a in mol.atoms)
    if origin == "nuclear-charge":
        origin_bohr = centre_of_nuclear_charge(charges, coords)
    elif origin == "centre-of-mass":
        origin_bohr = centre_of_mass(charges, coords)
    elif origin == "zero":
        origin_bohr = (0.0, 0.0, 0.0)
    else:
        origin_bohr = tuple(float(v) for v in origin)
    return MoleculeSpec(tuple(a.symbol for a in mol.atoms), charges, coords, mol.charge,
                        mol.multiplicity, origin_bohr)
