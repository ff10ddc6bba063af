"""Conformer ensembles: Boltzmann weights from the model's energies, the
weighted invariants, and conformers that optimised to the same minimum.
Pure NumPy and SciPy's constants.

At temperature T each distinct conformer i (energy E_i at its own optimised
minimum, the model's zero-field energy) has the weight
w_i = exp(-(E_i - E_min) / k T) / sum_j exp(-(E_j - E_min) / k T); an
invariant's ensemble value is sum_i w_i P_i, its bar sum_i w_i err_i (the
conformers' numerical bars; the weights' own uncertainty, from the model's
relative energies, is not in it). Two conformers whose optimised structures
coincide (energies within ``SAME_ENERGY_AU`` and RMSD within
``SAME_RMSD_BOHR`` after the best superposition) are one minimum, counted once.

>>> w = boltzmann_weights([0.0, 0.0], 298.15)
>>> [round(float(x), 12) for x in w]
[0.5, 0.5]
"""

from __future__ import annotations

import numpy as np

#: Two optimised conformers within this energy (Eh) and ...
SAME_ENERGY_AU = 1e-5
#: ... this RMSD (bohr, best superposition) are one minimum.
SAME_RMSD_BOHR = 0.1


def kelvin_in_hartree(temperature_k: float) -> float:
    from scipy import constants

    return constants.k * temperature_k / constants.physical_constants["Hartree energy"][0]


def boltzmann_weights(energies_au, temperature_k: float) -> np.ndarray:
    e = np.asarray(energies_au, dtype=float)
    x = np.exp(-(e - e.min()) / kelvin_in_hartree(temperature_k))
    return x / x.sum()


def superposed_rmsd(a, b) -> float:
    """RMSD of two structures (same atom order) after the best rotation and
    translation (Kabsch), in their units."""
    p = np.asarray(a, dtype=float) - np.mean(a, axis=0)
    q = np.asarray(b, dtype=float) - np.mean(b, axis=0)
    u, _, vt = np.linalg.svd(p.T @ q)
    d = np.sign(np.linalg.det(u @ vt))
    r = u @ np.diag([1.0, 1.0, d]) @ vt
    return float(np.sqrt(np.mean(np.sum((p @ r - q) ** 2, axis=1))))


def duplicates(energies_au, coords_bohr) -> list[int | None]:
    """Per conformer, the earlier conformer whose minimum it is (None: its own)."""
    out: list[int | None] = []
    for i, (e, x) in enumerate(zip(energies_au, coords_bohr)):
        same = next((j for j in range(i) if out[j] is None
                     and abs(energies_au[j] - e) <= SAME_ENERGY_AU
                     and superposed_rmsd(coords_bohr[j], x) <= SAME_RMSD_BOHR), None)
        out.append(same)
    return out


def weighted(values, errors, weights) -> tuple[float, float, float, float]:
    """(sum w P, sum w err, min P, max P)."""
    v, e, w = (np.asarray(x, dtype=float) for x in (values, errors, weights))
    return float(w @ v), float(w @ e), float(v.min()), float(v.max())
