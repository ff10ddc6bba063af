"""Nuclear relaxation in a static field: the Eckart frame, the constrained
Newton steps, and the double-harmonic limit. Pure NumPy, no PySCF: the
backend supplies the energy, gradient and dipole at a geometry.

In a static field F the nuclei move to the minimum of E(R; F). A polar
molecule would also turn its dipole towards the field and, an ion, drift along
it; the nuclear-relaxation contributions to alpha and beta are those of the
vibrations alone (Bishop, Hasan and Kirtman, J. Chem. Phys. 103, 4157 (1995)),
so the relaxed structure is held to the Eckart conditions relative to the
zero-field minimum R0 (masses m_A, centre of mass C):

    sum_A m_A (R_A - R0_A) = 0,    sum_A m_A (R0_A - C) x R_A = 0,

both linear in R. Their solutions are R = R0 + B q, where the columns of B
(:func:`eckart_basis`) are Cartesian displacements whose mass-weighted forms
are orthonormal and orthogonal to the three translations and the three (two,
linear) rotations of R0: q are mass-weighted vibrational coordinates, and the
internal Hessian B^T H B has the squared harmonic frequencies as eigenvalues.

The relaxed energy is stationary in q, so its error from stopping early is
second order in the remaining gradient: one more Newton step would lower it by
1/2 g^T H^-1 g, which is the energy's optimiser error; the dipole's is first
order, |dmu/dq . H^-1 g|. :func:`relax` stops when both are below their
tolerances (the dipole's only where the dipole is differentiated) and returns
them, and the noise model adds them to the point's noise, so the error bars
include the optimiser's tolerance.

Because dE/dq = 0 at the relaxed structure, dE/dF = -mu(F, R(F)) exactly
(the constraint directions are fixed): the energy and dipole routes give the
same total (electronic plus nuclear-relaxation) response. To first order in F
the relaxation is q = H^-1 (dmu/dq)^T F, so the total alpha exceeds the
electronic one by (dmu/dq) H^-1 (dmu/dq)^T = sum_a (dmu/dQ_a)^2 / omega_a^2,
the double-harmonic nuclear-relaxation polarizability (Bishop, Rev. Mod. Phys.
62, 343 (1990)): :func:`double_harmonic_alpha`.

>>> import numpy as np
>>> x = np.array([[0.0, 0.0, -0.7], [0.0, 0.0, 0.7]]); m = np.array([1.0, 3.0])
>>> b = eckart_basis(x, m)
>>> b.shape   # a diatomic: one vibration
(6, 1)
>>> moved = x + (b[:, 0] * 0.1).reshape(2, 3)
>>> [float(round(v, 12)) for v in eckart_residuals(x, moved, m)]
[0.0, 0.0]
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

#: A further Newton step predicted to lower the energy by less than this (Eh)
#: ends the relaxation: a tenth of the rounding noise of a total energy of a
#: small molecule (4 ulp of ~100 Eh ~ 1e-13 Eh), so the optimiser adds less
#: than the SCF to an energy-route error bar. It asks the internal gradient to
#: fall to ~sqrt(2 k 1e-14) ~ 1e-7 Eh/bohr for a stiff mode (k ~ 0.5).
ENERGY_TOLERANCE_AU = 1e-14
#: ... and to change the dipole by less than this (au), where the dipole is
#: differentiated (dipole route): a few SCF dipole noises (~1e-11 au closed
#: shell) more would dominate beta's floor at the smallest fields.
DIPOLE_TOLERANCE_AU = 1e-10
#: Newton steps allowed per field point. From the first-order start the error
#: is O(F^2) and each step with the zero-field Hessian (BFGS-updated) cuts it
#: by O(F) or better: 2-5 steps for stiff molecules; a soft anharmonic mode
#: takes more (formamide's NH2 wag, 579 cm^-1 at HF/6-31G: up to 12).
MAX_STEPS = 20
#: Where the Newton steps stop improving (the gradient's own noise), errors
#: up to this many tolerances are accepted, and reported as they are.
STALL_FACTOR = 100.0
#: Largest Cartesian move of one step (bohr): a trust radius far above any
#: field-induced displacement (~1e-3 bohr), against a step along a soft mode.
MAX_STEP_BOHR = 0.2
#: A zero-field geometry whose largest gradient component exceeds this
#: (Eh/bohr) is not the job model's minimum: refused (optimise it first).
#: Optimisers' standard criteria leave ~4.5e-4; a structure from another model
#: or a force field leaves 1e-2 and more. Below it the structure is polished
#: (the same Newton steps at zero field) to the tolerances above.
MINIMUM_GRADIENT_AU = 1e-3
#: Field step (au) of the central differences of gradients that give dmu/dR
#: at the minimum (the start of every relaxation and the dipole estimate):
#: truncation ~ 1e-8 relative, gradient noise / step ~ 1e-9 / 1e-4; both far
#: below what a start or an error estimate needs.
DIPOLE_DERIVATIVE_FIELD_AU = 1e-4


@dataclass(frozen=True, eq=False)
class Frame:
    """The zero-field minimum and what every relaxation in a field starts from.

    ``coords_bohr`` (N, 3): the Eckart reference R0; ``masses`` (N,) (u);
    ``basis`` (3N, n): the Eckart displacements (:func:`eckart_basis`);
    ``hessian`` (n, n): B^T H B at R0; ``dipole_derivatives`` (3, n): dmu/dq.
    """

    coords_bohr: np.ndarray
    masses: np.ndarray
    basis: np.ndarray
    hessian: np.ndarray
    dipole_derivatives: np.ndarray

    @classmethod
    def build(cls, coords_bohr, masses, hessian_cartesian, dipole_derivatives_cartesian=None):
        """The frame at ``coords_bohr`` from the Cartesian Hessian (3N, 3N) and
        dmu/dR (3, 3N; None: zero, as for the polishing at zero field)."""
        x = np.asarray(coords_bohr, dtype=float)
        m = np.asarray(masses, dtype=float)
        b = eckart_basis(x, m)
        h = np.asarray(hessian_cartesian, dtype=float)
        h = 0.5 * (h + h.T)
        d = (np.zeros((3, x.size)) if dipole_derivatives_cartesian is None
             else np.asarray(dipole_derivatives_cartesian, dtype=float))
        return cls(x, m, b, b.T @ h @ b, d @ b)

    def structure(self, q) -> np.ndarray:
        """R0 + B q, (N, 3)."""
        return self.coords_bohr + (self.basis @ np.asarray(q, dtype=float)).reshape(-1, 3)

    def start(self, field_au) -> np.ndarray:
        """The first-order relaxation q = H^-1 (dmu/dq)^T F."""
        return np.linalg.solve(self.hessian, self.dipole_derivatives.T @ np.asarray(field_au))

    def frequencies_cm(self) -> np.ndarray:
        """Harmonic wavenumbers (cm^-1) of the internal Hessian, ascending;
        an imaginary one as a negative number."""
        from fieldprop.numerics.units import HARTREE_TO_CM, AMU_TO_ME

        lam = np.linalg.eigvalsh(self.hessian) / AMU_TO_ME
        return np.sign(lam) * np.sqrt(np.abs(lam)) * HARTREE_TO_CM


def eckart_basis(coords_bohr, masses) -> np.ndarray:
    """Cartesian displacements (3N, n) spanning the solutions of the Eckart
    conditions about ``coords_bohr``: M^-1/2 L, the columns of L orthonormal
    and orthogonal to the mass-weighted translations and rotations (n = 3N - 6,
    3N - 5 linear, 0 for an atom). Deterministic (an SVD)."""
    x = np.asarray(coords_bohr, dtype=float)
    m = np.asarray(masses, dtype=float)
    n = len(m)
    root = np.sqrt(m)
    centred = x - (m @ x) / m.sum()
    external = []
    for k in range(3):
        t = np.zeros((n, 3))
        t[:, k] = root
        external.append(t.ravel())
        e = np.zeros(3)
        e[k] = 1.0
        external.append((np.cross(e, centred) * root[:, None]).ravel())
    u, s, _ = np.linalg.svd(np.array(external).T, full_matrices=True)
    rank = int(np.sum(s > 1e-8 * s.max()))
    internal = u[:, rank:]
    return internal / np.repeat(root, 3)[:, None]


def eckart_residuals(reference_bohr, coords_bohr, masses) -> tuple[float, float]:
    """|sum m (R - R0)| / sum m (bohr) and |sum m (R0 - C) x R| / sum m
    (bohr^2): the translation and rotation of ``coords_bohr`` relative to
    ``reference_bohr`` (both zero when the Eckart conditions hold)."""
    r0 = np.asarray(reference_bohr, dtype=float)
    r = np.asarray(coords_bohr, dtype=float)
    m = np.asarray(masses, dtype=float)
    centred = r0 - (m @ r0) / m.sum()
    shift = m @ (r - r0) / m.sum()
    turn = (m[:, None] * np.cross(centred, r)).sum(axis=0) / m.sum()
    return float(np.linalg.norm(shift)), float(np.linalg.norm(turn))


def double_harmonic_alpha(frame: Frame) -> np.ndarray:
    """alpha^nr = (dmu/dq) H^-1 (dmu/dq)^T = sum_a (dmu/dQ_a)^2 / omega_a^2 (au)."""
    d = frame.dipole_derivatives
    return d @ np.linalg.solve(frame.hessian, d.T) if d.shape[1] else np.zeros((3, 3))


@dataclass(frozen=True)
class Evaluation:
    """The backend's answer at one structure: energy (Eh), Cartesian gradient
    (N, 3) (Eh/bohr), dipole (au, or None) and whatever it wants back."""

    energy_au: float
    gradient: np.ndarray
    dipole_au: np.ndarray | None
    payload: object = None


@dataclass(frozen=True)
class Relaxed:
    """A relaxed structure: the last evaluation, the steps taken, and the
    optimiser's remaining errors (what one more Newton step would change)."""

    coords_bohr: np.ndarray
    evaluation: Evaluation
    steps: int
    energy_change_au: float
    dipole_change_au: float
    largest_gradient_au: float

    def document(self) -> dict:
        return {"coords_bohr": [[float(v) for v in row] for row in self.coords_bohr],
                "steps": self.steps, "energy_change_au": self.energy_change_au,
                "dipole_change_au": self.dipole_change_au,
                "largest_gradient_au": self.largest_gradient_au}


class NotRelaxed(RuntimeError):
    """The Newton steps did not reach the tolerances."""


def relax(frame: Frame, field_au, evaluate: Callable[[np.ndarray], Evaluation],
          dipole_matters: bool, energy_tolerance: float = ENERGY_TOLERANCE_AU,
          dipole_tolerance: float = DIPOLE_TOLERANCE_AU, max_steps: int = MAX_STEPS,
          start=None) -> Relaxed:
    """Minimise E(R; F) over the Eckart structures R0 + B q: from the
    first-order start (or ``start``), Newton steps with the zero-field internal
    Hessian, BFGS-updated with each step's change of gradient, until one more
    step would lower the energy by at most ``energy_tolerance`` and (when
    ``dipole_matters``) change the dipole by at most ``dipole_tolerance``.

    Raises NotRelaxed (with the last errors) after ``max_steps`` evaluations.
    """
    q = frame.start(field_au) if start is None else np.asarray(start, dtype=float)
    hessian = frame.hessian.copy()
    previous = None
    de = dmu = gmax = float("nan")
    for step in range(1, max_steps + 1):
        x = frame.structure(q)
        ev = evaluate(x)
        g = frame.basis.T @ np.asarray(ev.gradient, dtype=float).ravel()
        if previous is not None:
            s, y = q - previous[0], g - previous[1]
            sy = float(s @ y)
            if sy > 1e-14 * float(np.linalg.norm(s) * np.linalg.norm(y)) and sy > 0.0:
                hs = hessian @ s
                hessian = hessian + np.outer(y, y) / sy - np.outer(hs, hs) / float(s @ hs)
        dq = -np.linalg.solve(hessian, g) if g.size else g
        de = float(-0.5 * g @ dq)
        dmu = float(np.linalg.norm(frame.dipole_derivatives @ dq))
        # The internal gradient as Cartesian forces: m_A (B g)_A (Eh/bohr).
        gmax = (float(np.abs(np.repeat(frame.masses, 3) * (frame.basis @ g)).max())
                if g.size else 0.0)
        if de <= energy_tolerance and (not dipole_matters or dmu <= dipole_tolerance):
            return Relaxed(x, ev, step, max(de, 0.0), dmu, gmax)
        # At the gradient's own noise the steps stop improving: accept there when
        # the remaining errors are still small (they go into the error bars).
        if (previous is not None and step >= 3 and de > 0.25 * previous[2]
                and de <= STALL_FACTOR * energy_tolerance
                and (not dipole_matters or dmu <= STALL_FACTOR * dipole_tolerance)):
            return Relaxed(x, ev, step, max(de, 0.0), dmu, gmax)
        move = float(np.abs(frame.basis @ dq).max())
        if move > MAX_STEP_BOHR:
            dq = dq * (MAX_STEP_BOHR / move)
        previous = (q, g, de)
        q = q + dq
    raise NotRelaxed(f"not relaxed in {max_steps} steps (a further step would still lower the "
                     f"energy by {de:.1e} Eh and move the dipole by {dmu:.1e} au)")
