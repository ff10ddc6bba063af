"""The pure side of nuclear relaxation (fieldprop.numerics.relaxation): the Eckart basis
and the Newton steps on synthetic surfaces whose minima are known, no PySCF."""

import numpy as np
import pytest

from fieldprop.numerics.relaxation import (Evaluation, Frame, NotRelaxed, double_harmonic_alpha,
                                  eckart_basis, eckart_residuals, relax)

RNG = np.random.default_rng(11)
# A bent triatomic and a linear one (bohr), masses of 16O and 1H (u).
BENT = np.array([[0.0, 0.1, 0.2], [1.4, 1.1, 0.0], [-1.5, 1.0, 0.3]])
LINEAR = np.array([[0.0, 0.0, -2.2], [0.0, 0.0, 0.0], [0.0, 0.0, 2.2]])


@pytest.mark.parametrize("coords, masses, n", [
    (BENT, np.array([15.995, 1.008, 1.008]), 3),
    (LINEAR, np.array([15.995, 12.0, 15.995]), 4),
    (BENT[:2], np.array([15.995, 1.008]), 1),
    (BENT[:1], np.array([15.995]), 0)], ids=["bent", "linear", "diatomic", "atom"])
def test_the_eckart_basis_spans_the_vibrations_only(coords, masses, n):
    b = eckart_basis(coords, masses)
    assert b.shape == (coords.size, n)
    root = np.repeat(np.sqrt(masses), 3)
    # Mass-weighted orthonormal columns ...
    assert np.allclose((b * root[:, None]).T @ (b * root[:, None]), np.eye(n), atol=1e-12)
    # ... every one of which keeps the Eckart conditions (computed here).
    centred = coords - masses @ coords / masses.sum()
    for column in b.T:
        moved = coords + 0.05 * column.reshape(-1, 3)
        assert np.abs(masses @ (moved - coords)).max() < 1e-13
        assert np.abs((masses[:, None] * np.cross(centred, moved)).sum(axis=0)).max() < 1e-13
        assert max(eckart_residuals(coords, moved, masses)) < 1e-13
    # A rigid rotation breaks them.
    turned = coords @ np.array([[1.0, -0.01, 0.0], [0.01, 1.0, 0.0], [0.0, 0.0, 1.0]]).T
    if n and np.ptp(coords[:, :2]) > 0:
        assert eckart_residuals(coords, turned, masses)[1] > 1e-4


class Surface:
    """E(x; F) = 1/2 d^T K d + c sum d_i^3 - F.(mu0 + M d), d = x - x0 (Cartesian),
    rotation- and translation-invariant K and M built from internal
    displacements, so the exact relaxation in the Eckart frame is known."""

    def __init__(self, coords, masses, cubic=0.0):
        self.x0, self.c = coords, cubic
        b = eckart_basis(coords, masses)
        # The projector onto internal displacements along the Eckart basis:
        # P = B (B^T M B)^-1 B^T M; K and M act on P d only.
        m3 = np.repeat(masses, 3)
        p = b @ np.linalg.solve(b.T @ (m3[:, None] * b), b.T * m3)
        a = RNG.normal(size=(b.shape[1], b.shape[1]))
        k_int = a @ a.T + b.shape[1] * np.eye(b.shape[1])
        w = np.linalg.pinv(b)
        self.k = p.T @ w.T @ k_int @ w @ p
        self.m = RNG.normal(size=(3, b.shape[1])) @ w @ p
        self.evaluations = 0

    def __call__(self, field):
        def evaluate(x):
            self.evaluations += 1
            d = (x - self.x0).ravel()
            e = 0.5 * d @ self.k @ d + self.c * np.sum(d**3) - field @ (self.m @ d)
            g = self.k @ d + 3 * self.c * d**2 - self.m.T @ field
            return Evaluation(float(e), g.reshape(-1, 3), self.m @ d)
        return evaluate


def test_a_harmonic_surface_relaxes_at_the_first_order_start_and_gives_m_k_m():
    masses = np.array([15.995, 1.008, 1.008])
    surface = Surface(BENT, masses)
    frame = Frame.build(BENT, masses, surface.k, surface.m)
    field = np.array([0.003, -0.002, 0.004])
    relaxed = relax(frame, field, surface(field), dipole_matters=True)
    assert relaxed.steps == 1  # exact at the start
    # The relaxed dipole is alpha^nr F with alpha^nr the double-harmonic tensor.
    assert np.allclose(relaxed.evaluation.dipole_au, double_harmonic_alpha(frame) @ field,
                       rtol=1e-10, atol=1e-14)
    assert max(eckart_residuals(BENT, relaxed.coords_bohr, masses)) < 1e-13


def test_an_anharmonic_surface_takes_newton_steps_to_the_tolerances():
    masses = np.array([15.995, 1.008, 1.008])
    surface = Surface(BENT, masses, cubic=0.3)
    frame = Frame.build(BENT, masses, surface.k, surface.m)
    field = np.array([0.02, -0.01, 0.015])
    relaxed = relax(frame, field, surface(field), dipole_matters=True,
                    energy_tolerance=1e-16, dipole_tolerance=1e-12)
    assert 2 <= relaxed.steps <= 6
    assert relaxed.energy_change_au <= 1e-16 and relaxed.dipole_change_au <= 1e-12
    # A minimum within the Eckart structures: the internal gradient is zero ...
    g = frame.basis.T @ surface(field)(relaxed.coords_bohr).gradient.ravel()
    assert np.abs(g).max() < 1e-7
    # ... and no Eckart-allowed move lowers the energy.
    e = surface(field)(relaxed.coords_bohr).energy_au
    for column in frame.basis.T:
        for t in (1e-3, -1e-3):
            moved = relaxed.coords_bohr + t * column.reshape(-1, 3)
            assert surface(field)(moved).energy_au > e
    with pytest.raises(NotRelaxed, match="not relaxed in 1 steps"):
        relax(frame, field, surface(field), dipole_matters=True, max_steps=1,
              energy_tolerance=1e-16)
