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
``SAME_RMSD_BOHR`` after the best superposition, equivalent atoms matched
where the caller's RMSD does) are one minimum, counted once. The
hyper-Rayleigh quantities, square roots of orientational averages of
intensities, are averaged as intensities (:func:`incoherent`, and the
depolarisation ratio as a ratio of the mixture's intensities: the
conformers scatter incoherently); every other invariant linearly.

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


def duplicates(energies_au, coords_bohr, rmsd=None) -> list[int | None]:
    """Per conformer, the earlier conformer whose minimum it is (None: its
    own). ``rmsd(a, b)`` (bohr): the caller's, matching equivalent atoms
    (default :func:`superposed_rmsd`, atoms in order)."""
    rmsd = rmsd or superposed_rmsd
    out: list[int | None] = []
    for i, (e, x) in enumerate(zip(energies_au, coords_bohr)):
        same = next((j for j in range(i) if out[j] is None
                     and abs(energies_au[j] - e) <= SAME_ENERGY_AU
                     and rmsd(coords_bohr[j], x) <= SAME_RMSD_BOHR), None)
        out.append(same)
    return out


def weighted(values, errors, weights) -> tuple[float, float, float, float]:
    """(sum w P, sum w err, min P, max P)."""
    v, e, w = (np.asarray(x, dtype=float) for x in (values, errors, weights))
    return float(w @ v), float(w @ e), float(v.min()), float(v.max())


def incoherent(values, errors, weights) -> tuple[float, float, float, float]:
    """An intensity-like quantity, P = sqrt(<beta^2>) (hyper-Rayleigh): the
    conformers scatter incoherently, so their intensities add:
    (sqrt(sum w P^2), its bar sum w P err / P, min P, max P)."""
    v, e, w = (np.asarray(x, dtype=float) for x in (values, errors, weights))
    total = float(np.sqrt(w @ (v * v)))
    error = float(w @ (v * e)) / total if total > 0 else float(w @ e)
    return total, error, float(v.min()), float(v.max())


def intensity_ratio(zzz, zzz_errors, xzz, xzz_errors, weights) -> tuple[float, float]:
    """The hyper-Rayleigh depolarisation ratio of the mixture,
    sum w <b_ZZZ^2> / sum w <b_XZZ^2>, and its bar."""
    a_v, a_e, b_v, b_e, w = (np.asarray(x, dtype=float)
                             for x in (zzz, zzz_errors, xzz, xzz_errors, weights))
    a, b = float(w @ (a_v * a_v)), float(w @ (b_v * b_v))
    da, db = float(w @ (2 * a_v * a_e)), float(w @ (2 * b_v * b_e))
    ratio = a / b
    return ratio, ratio * (da / a + db / b)
