r"""Zero-point vibrational averaging: the first-order correction from
properties and gradients at displaced geometries. Pure NumPy, no PySCF.

A property P (mu, alpha, beta, gamma: any array) of the molecule at its
zero-field minimum differs from its average over the vibrational ground state.
To first order in the anharmonicity (perturbation theory in the cubic force
constants and the property's curvature), in the dimensionless normal
coordinates x_a = sqrt(omega_a) Q_a (Q_a mass-weighted, atomic units, hbar =
1), whose ground state has <x_a^2> = 1/2,

    V = sum_a omega_a x_a^2 / 2 + (1/6) sum_abc phi_abc x_a x_b x_c + ...,

    dP = 1/4 sum_a d2P/dx_a2 - 1/4 sum_a (dP/dx_a / omega_a) sum_b phi_abb,

the first term the curvature averaged over the harmonic ground state, the
second the shift of the vibrationally averaged structure, <x_a> =
-sum_b phi_abb / (4 omega_a). In mass-weighted coordinates this is the form
sum_a d2P/dQ_a2 / (4 omega_a) - sum_a dP/dQ_a sum_b F_abb / (4 omega_a^2
omega_b) of D. M. Bishop, Rev. Mod. Phys. 62, 343 (1990), and of the ZPVA
correction of D. M. Bishop and B. Kirtman, J. Chem. Phys. 95, 2646 (1991)
(their [P]^(0,1) and [P]^(1,0); cited from memory). It leaves out the
second order in the anharmonicity (quartic constants, the cubic ones squared,
higher property derivatives), typically a few per cent of the correction.

The derivatives are central differences at +-s along each mode, for two steps
s (``STEPS``, a fraction of the zero-point amplitude), combined by
Richardson's rule (the s^2 terms cancel); the difference between the two
steps' estimates is the truncation error, and the finite-field error bars of
the properties are carried through linearly. The cubic sums sum_b phi_abb
are second differences of the gradient's component along mode a, dE/dx_a,
along each mode b: one gradient per displaced geometry, the same geometries
whose properties are computed.

>>> import numpy as np
>>> # One mode, omega = 0.01, phi = 0.002; P(x) = 1 + 0.3 x + 0.05 x^2.
>>> steps = STEPS
>>> p = lambda x: np.array(1 + 0.3 * x + 0.05 * x * x)
>>> d = central_differences(p(0.0), 0.0, [[p(s) for s in steps]], [[0.0] * 2],
...                         [[p(-s) for s in steps]], [[0.0] * 2])
>>> g = lambda x: 0.01 * x + 0.002 * x * x / 2   # dE/dx of the cubic potential
>>> cubic = cubic_sums(np.array([g(0.0)]), np.array([[[g(s)] for s in steps]]),
...                    np.array([[[g(-s)] for s in steps]]))
>>> part = correction(np.array([0.01]), d, cubic)
>>> round(float(part.value), 12)   # 0.1 / 4 - 0.3 * 0.002 / (4 * 0.01)
0.01
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: The two dimensionless displacements (x = sqrt(omega) Q) of each mode, the
#: larger first: fractions of the ground state's amplitude (rms 1/sqrt(2)), so
#: the geometries stay where the quartic-and-higher terms are small (their
#: s^2 error is Richardson-eliminated, its size the error estimate), and far
#: enough that the finite-field error bars, divided by s^2, stay small.
STEPS = (0.5, 0.25)
#: Below this harmonic wavenumber (cm^-1) a mode is soft: its zero-point
#: amplitude is large, the perturbation series in the anharmonicity converges
#: slowly (torsions, inversions) and the first-order correction is a rough
#: guide: a warning names the mode.
SOFT_MODE_CM = 200.0


@dataclass(frozen=True)
class Modes:
    """The harmonic modes of a zero-field minimum (fieldprop.numerics.relaxation
    Frame): ``omega_au`` (n,) ascending, and ``displacements`` (n, N, 3), the
    Cartesian displacement (bohr) of a unit step in each dimensionless
    coordinate x_a."""

    omega_au: np.ndarray
    displacements: np.ndarray

    @classmethod
    def from_frame(cls, frame) -> "Modes":
        from fieldprop.numerics.units import AMU_TO_ME

        lam, vectors = np.linalg.eigh(frame.hessian)  # Eh / (u bohr^2), frame's q
        if lam.size and lam.min() <= 0.0:
            raise ValueError("the frame is not a minimum (a non-positive Hessian eigenvalue)")
        omega = np.sqrt(lam / AMU_TO_ME)
        n_atoms = len(frame.masses)
        # x = sqrt(omega) Q, Q = sqrt(AMU_TO_ME) q, Cartesian = B q.
        cart = (frame.basis @ vectors) / np.sqrt(AMU_TO_ME * omega)
        return cls(omega, cart.T.reshape(len(omega), n_atoms, 3))

    def frequencies_cm(self) -> np.ndarray:
        from fieldprop.numerics.units import HARTREE_TO_CM

        return self.omega_au * HARTREE_TO_CM

    def gradient_along(self, gradient_cartesian) -> np.ndarray:
        """dE/dx_a (Eh) of a Cartesian gradient (N, 3) (Eh/bohr)."""
        g = np.asarray(gradient_cartesian, dtype=float).ravel()
        return self.displacements.reshape(len(self.omega_au), -1) @ g


def atom_permutation(operation, coords_bohr, labels, centre, tolerance=1e-6):
    """The atoms' permutation under ``operation`` (3 x 3, about ``centre``):
    atom A goes to atom perm[A] with the same label (charge, mass); None where
    the operation does not map the nuclei onto themselves."""
    x = np.asarray(coords_bohr, dtype=float)
    c = np.asarray(centre, dtype=float)
    moved = (x - c) @ np.asarray(operation).T + c
    perm = []
    for i, y in enumerate(moved):
        hits = [j for j in range(len(x)) if labels[j] == labels[i]
                and np.linalg.norm(x[j] - y) <= tolerance]
        if len(hits) != 1:
            return None
        perm.append(hits[0])
    return tuple(perm)


def symmetrised_hessian(hessian, coords_bohr, charges, operations, centre) -> np.ndarray:
    """The Cartesian Hessian (3N, 3N) averaged over the point group
    ``operations`` (its numerical noise, a DFT grid's in particular, leaves it
    a little off the group): the modes of the averaged one are symmetry-
    adapted, so a displacement along a totally symmetric mode keeps the
    molecule's symmetry exactly, and the others are exactly turned into their
    opposites by some operation."""
    h = np.asarray(hessian, dtype=float)
    n = h.shape[0] // 3
    total = np.zeros_like(h)
    used = 0
    for op in operations:
        perm = atom_permutation(op, coords_bohr, list(charges), centre)
        if perm is None:
            continue
        m = np.zeros_like(h)
        for a, b in enumerate(perm):
            m[3 * b:3 * b + 3, 3 * a:3 * a + 3] = op
        total += m @ h @ m.T
        used += 1
    if not used:
        return h
    out = total / used
    return 0.5 * (out + out.T) if n else out


@dataclass(frozen=True)
class Derivatives:
    """dP/dx_a and d2P/dx_a^2 of a property per mode (leading axis a), and
    their errors (truncation plus the carried error bars)."""

    first: np.ndarray
    first_error: np.ndarray
    second: np.ndarray
    second_error: np.ndarray


def _richardson(fine, coarse, fine_error, coarse_error, ratio: float):
    """The s^2-free combination of a derivative at steps s (fine) and
    ratio * s (coarse), and its error: the two estimates' difference (the
    fine one's truncation) plus the carried errors."""
    r2 = ratio * ratio
    value = (r2 * fine - coarse) / (r2 - 1.0)
    error = np.abs(fine - coarse) / (r2 - 1.0) + (r2 * fine_error + coarse_error) / (r2 - 1.0)
    return value, error


def central_differences(p0, e0, plus, e_plus, minus, e_minus, steps=STEPS) -> Derivatives:
    """First and second derivatives of a property along each mode from its
    values at the minimum (``p0``, error ``e0``) and at +-s for each of the
    two ``steps`` (``plus[a][k]``, ``minus[a][k]``, errors alike; arrays of
    p0's shape, or scalars for the errors)."""
    p0 = np.asarray(p0, dtype=float)
    e0 = np.broadcast_to(np.asarray(e0, dtype=float), p0.shape)
    n = len(plus)
    shape = (n,) + p0.shape
    out = {"first": np.zeros(shape), "first_error": np.zeros(shape),
           "second": np.zeros(shape), "second_error": np.zeros(shape)}
    ratio = steps[0] / steps[1]
    for a in range(n):
        d1, e1, d2, e2 = [], [], [], []
        for k, s in enumerate(steps):
            pp, pm = np.asarray(plus[a][k], dtype=float), np.asarray(minus[a][k], dtype=float)
            ep = np.broadcast_to(np.asarray(e_plus[a][k], dtype=float), p0.shape)
            em = np.broadcast_to(np.asarray(e_minus[a][k], dtype=float), p0.shape)
            d1.append((pp - pm) / (2 * s))
            e1.append((ep + em) / (2 * s))
            d2.append((pp - 2 * p0 + pm) / (s * s))
            e2.append((ep + 2 * e0 + em) / (s * s))
        out["first"][a], out["first_error"][a] = _richardson(d1[1], d1[0], e1[1], e1[0], ratio)
        out["second"][a], out["second_error"][a] = _richardson(d2[1], d2[0], e2[1], e2[0],
                                                               ratio)
    return Derivatives(**out)


@dataclass(frozen=True)
class CubicSums:
    """sum_b phi_abb per mode a (Eh, dimensionless coordinates) and its
    truncation error."""

    value: np.ndarray
    error: np.ndarray


def cubic_sums(g0, g_plus, g_minus, steps=STEPS) -> CubicSums:
    """sum_b phi_abb = sum_b d2(dE/dx_a)/dx_b^2 from the mode gradients
    dE/dx (n,) at the minimum (``g0``) and at +-s along each mode b for each
    step (``g_plus[b][k]``, ``g_minus[b][k]``, each (n,))."""
    g0 = np.asarray(g0, dtype=float)
    g_plus, g_minus = np.asarray(g_plus, dtype=float), np.asarray(g_minus, dtype=float)
    ratio = steps[0] / steps[1]
    value, error = np.zeros_like(g0), np.zeros_like(g0)
    zero = np.zeros_like(g0)
    for b in range(len(g_plus)):
        d2 = [(g_plus[b][k] - 2 * g0 + g_minus[b][k]) / (s * s) for k, s in enumerate(steps)]
        v, e = _richardson(d2[1], d2[0], zero, zero, ratio)
        value += v
        error += e
    return CubicSums(value, error)


@dataclass(frozen=True)
class Correction:
    """The zero-point correction of a property: ``value`` and ``error`` (the
    property's shape), and ``per_mode`` (n, ...) with ``per_mode_error``."""

    value: np.ndarray
    error: np.ndarray
    per_mode: np.ndarray
    per_mode_error: np.ndarray
    curvature: np.ndarray  # (n, ...): 1/4 d2P/dx_a^2
    shift: np.ndarray      # (n, ...): -1/4 dP/dx_a sum_b phi_abb / omega_a


def correction(omega_au, derivatives: Derivatives, cubic: CubicSums) -> Correction:
    """dP = sum_a [1/4 d2P/dx_a^2 - 1/4 dP/dx_a sum_b phi_abb / omega_a] (see the
    module text), mode by mode, with errors added linearly."""
    omega = np.asarray(omega_au, dtype=float)
    extra = (slice(None),) + (None,) * (derivatives.first.ndim - 1)
    factor = (cubic.value / omega)[extra]
    factor_error = (cubic.error / omega)[extra]
    curvature = 0.25 * derivatives.second
    shift = -0.25 * derivatives.first * factor
    per_mode = curvature + shift
    per_mode_error = (0.25 * derivatives.second_error
                      + 0.25 * derivatives.first_error * np.abs(factor)
                      + 0.25 * np.abs(derivatives.first) * factor_error)
    return Correction(per_mode.sum(axis=0), per_mode_error.sum(axis=0), per_mode,
                      per_mode_error, curvature, shift)
