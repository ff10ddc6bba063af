"""Linear response of a converged mean field: the SCF dipole, the analytic
polarizability from the coupled-perturbed equations, and the dipole error the
remaining orbital gradient leaves (diagonal and full-Hessian Newton steps).
"""

from __future__ import annotations

import numpy as np

from fieldprop.backend.orbital_hessian import (ResponseSubspace, _orbital_hessian,
                                               _restricted_open)
from fieldprop.points.records import CPHF_RTOL


def _scf_dipole(mf, r, molecule) -> np.ndarray:
    dm = mf.make_rdm1()
    if dm.ndim == 3:
        dm = dm[0] + dm[1]
    return molecule.nuclear_dipole_au() - np.einsum("xij,ji->x", r, dm).real


def _dipole_error(mf, r, fock, dipole_route: bool, constraints=(), response=None) -> float:
    """|d mu| the remaining orbital gradient leaves in the SCF dipole.

    Closed shells: the diagonal estimate (diagonal_dipole_step). Open shells
    (UHF, UKS, ROHF, ROKS): the diagonal misses ~8x, so on the dipole route,
    where the dipole is differentiated, the full-Hessian Newton step
    (newton_dipole_step, 0.98-1.01 of the true error measured on NH2 and H2O+,
    HF and DFT); on the energy route the dipole is only reported, and the
    diagonal estimate will do. ``response`` is the Newton steps'
    (ModelContext.response: for DFT a coarse-grid kernel, which changes an
    estimate of ~1e-10 au by far less than it matters and saves two thirds of
    an open-shell DFT point's time).
    """
    occ = np.asarray(mf.mo_occ)
    if dipole_route and (occ.ndim == 2 or _restricted_open(occ)):
        return float(np.linalg.norm(newton_dipole_step(mf, r, fock, constraints, response)))
    return float(np.linalg.norm(diagonal_dipole_step(mf, r, fock, constraints)))


#: Relative residual of the zero-field response rotations: they only start the
#: points (an error of 1e-6 of a first-order term is far below what Newton removes).
START_RTOL = 1e-6


def zero_field_response(mf, context, refine: bool = True):
    """The zero-field orbitals' linear response to a field along x, y and z
    (3, n), the ResponseSubspace of their solves (None without one) and the
    Hessian products spent. The Newton steps' response function serves
    (context.response: for DFT a coarse-grid kernel; the rotations are then
    refined on the job's grid, _refined, unless not ``refine``: a caller that
    wants the subspace alone): the subspace only preconditions the points'
    steps.

    The zero field's own Newton solves, kept in the context
    (ModelContext.newton_pairs; not for a reference read from a store),
    deflate the first solve and join the subspace; each solve is deflated by
    those before it. Measured on a 22-atom push-pull polyene at HF/6-31G: 31
    products instead of 38, and 430 cycles over the 46 field points instead
    of 441 (without the Newton directions in the points' subspace, whose own
    solves then keep fewer: 624)."""
    hessian = _orbital_hessian(mf, context.response, context.constraints)
    directions, products = [], []
    if not context.constraints:
        for c, occ, pairs in context.newton_pairs:
            mapped = ResponseSubspace.from_pairs(c, occ, pairs).mapped(hessian, context.overlap)
            if mapped is not None:
                directions.append(mapped[0])
                products.append(mapped[1])
    pairs, rotations = [], []
    rhs = np.array([-hessian.vo(context.r[j]) for j in range(3)])
    for j in range(3):
        before = directions + [np.array([p for p, _ in pairs])] if pairs else directions
        after = products + [np.array([q for _, q in pairs])] if pairs else products
        rotations.append(hessian.solve(rhs[j], START_RTOL, "zero-field response", keep=pairs,
                                       subspace=(np.vstack(before), np.vstack(after))
                                       if before else None))
    if pairs:
        directions.append(np.array([p for p, _ in pairs]))
        products.append(np.array([q for _, q in pairs]))
    rotations, work = np.array(rotations), hessian.products
    deflation = (np.vstack(directions), np.vstack(products)) if directions else None
    if refine and context.coarse_kernel:
        rotations, exact = _refined(mf, context, hessian, rhs, rotations, deflation)
        work = hessian.products + exact
    subspace = (ResponseSubspace(mf.mo_coeff, mf.mo_occ, *deflation)
                if deflation is not None else None)
    return rotations, subspace, work


#: The zero-field response rotations on a coarse-grid kernel (DFT) are refined
#: this many times against the job's own grid. A start extrapolated along a
#: line (solver._start_orbitals) carries their error times the field and the
#: extrapolation's weights (a mirror start 2 F, a line start from one pair
#: 3 F): on a 10-atom push-pull polyene at B3LYP/6-31G the coarse kernel's
#: rotations (relative residual 3e-5 on the job's grid) started the mirror and
#: line points at 0.004 au at orbital gradients of 1e-6 to 6e-6, a second
#: Newton step for most; refined once (5e-9; twice: 1e-12) at 4e-10 to 5e-7,
#: one step, and the median point took 2.1 s instead of 3.1 s. Rounds until a
#: verified 1e-8 started no point better and cost formaldehyde's alpha at
#: B3LYP/aug-cc-pVDZ (13 points) 4.1 s of 31 (one round: 1.3 s). The round is
#: not verified: the rotations only start the points, whose own gradients
#: judge them.
REFINEMENTS = 1
#: Relative residual of a refinement's coarse solves.
REFINEMENT_RTOL = 1e-4


def _refined(mf, context, hessian, rhs, rotations, deflation) -> tuple[np.ndarray, int]:
    """``rotations`` (the rows solve ``hessian`` x = rhs, its kernel on the
    coarse grid) refined against the Hessian on the job's own grid: each round
    takes the exact residual of all three at once (one pass over the grid,
    _OrbitalHessian.matmat) and removes it with the coarse Hessian (iterative
    refinement: a round leaves about the coarse kernel's relative error of
    the residual before it, ~1e-4). Returns the rotations and the exact
    products spent."""
    exact = _orbital_hessian(mf, constraints=context.constraints)
    for _ in range(REFINEMENTS):
        residual = rhs - exact.matmat(rotations)
        rotations = rotations + np.array([
            hessian.solve(exact.project(r), REFINEMENT_RTOL, "zero-field response",
                          subspace=deflation, verify=False)
            for r in residual])
    return rotations, exact.products


def analytic_polarizability(mf, r, constraints=(), subspace=None) -> np.ndarray:
    """Static alpha_ij = d mu_i / dF_j (au) from the coupled-perturbed equations.

    For a converged mean-field object ``mf`` and dipole integrals ``r``
    (3, nao, nao) about the job's origin. The perturbation +F_j r_j enters the
    one-electron Hamiltonian; the first-order orbital rotations x_ai solve the
    symmetric positive definite system (A + B) x = -r_ai (:class:`_OrbitalHessian`,
    stable real SCF), by preconditioned conjugate gradients to CPHF_RTOL; then
    alpha_ij = -n sum_ai r_i,ai x^(j)_ai with n = 4 for closed shells (two
    electrons per orbital, dD = 2(x + x^T)) and n = 2 per spin otherwise (a
    restricted open shell: _RestrictedOpenHessian, n = 2). With orientation
    ``constraints`` the rotations keep the orientation. ``subspace``: the
    zero-field ResponseSubspace (ModelContext.subspace), which deflates the
    solves at a field point (the solution changes by O(F) from the
    zero-field one, which lies in it).
    """
    hessian = _orbital_hessian(mf, constraints=constraints)
    deflation = (subspace.mapped(hessian, mf.get_ovlp())
                 if subspace is not None and not constraints else None)
    rmo = np.array([hessian.vo(r[j]) for j in range(3)])
    alpha = np.zeros((3, 3))
    for j in range(3):
        x = hessian.solve(-rmo[j], CPHF_RTOL, "CPHF equations", subspace=deflation)
        alpha[:, j] = [hessian.density_trace(rmo[i], x) for i in range(3)]
    return 0.5 * (alpha + alpha.T)


#: Relative residual of the Newton step that estimates an open-shell dipole's
#: convergence error: 1e-6 of a ~1e-10 au estimate is far below what matters.
NEWTON_RTOL = 1e-6


def diagonal_dipole_step(mf, r, fock, constraints=()) -> np.ndarray:
    """The dipole change (3,) of the orbital rotation kappa_ai = -F_ai / (e_a - e_i)
    that the remaining gradient asks for, with the Hessian's diagonal alone.

    Enough for closed shells (0.5-0.65 of the true error for water, measured);
    small gaps amplify the error well beyond |g|, which this follows.
    """
    hessian = _orbital_hessian(mf, constraints=constraints, fock=fock)
    x = hessian.project(-hessian.project(hessian.vo(fock)) / hessian.diagonal)
    return np.array([hessian.density_trace(hessian.vo(r[i]), x) for i in range(3)])


def newton_dipole_step(mf, r, fock=None, constraints=(), response=None) -> np.ndarray:
    """The dipole change (3,) of the Newton step that removes the remaining orbital
    gradient of a converged SCF: (A + B) x = -F_ai, d mu_i = -tr(r_i dD(x)).

    An SCF stopped at orbital gradient g leaves an orbital error ~g / gap along
    its slowest modes; for open shells the Hessian's diagonal (e_a - e_i) misses
    the resulting dipole error by ~8x (NH2 radical, UHF/6-31+G*, measured), the
    full Hessian does not: |d mu| came out at 0.98-1.01 of the true error, and
    mu + d mu within 0.2-5 % of the step of a second-order SCF converged to 1e-13
    (NH2 and H2O+, UHF, UKS). fieldprop uses |d mu| as the dipole's convergence
    error on the dipole route for open shells; it does not add the step (the
    error bars of a corrected dipole could not be made as sharp as it is accurate).
    """
    if fock is None:
        fock = mf.get_fock()
    hessian = _orbital_hessian(mf, response, constraints, fock)
    f_vo = hessian.vo(fock)
    x = hessian.solve(-f_vo, NEWTON_RTOL, "Newton step of the dipole")
    return np.array([hessian.density_trace(hessian.vo(r[i]), x) for i in range(3)])
