"""What one clamped field point does: the zero-field reference
(:func:`compute_reference`) and every other point (:func:`compute_point`):
the SCF (solver), the state checks, the correlated energy, the dipole and its
convergence error, the analytic polarizability where asked.
"""

from __future__ import annotations

import dataclasses
import logging
import time

import numpy as np

from fieldprop.backend.context import ModelContext
from fieldprop.backend.correlated import _correlated_energy
from fieldprop.backend.orbital_hessian import _has_hessian
from fieldprop.backend.orientation import (MAX_ORIENTATION_DRIFT, _constraint_values,
                                           orientation_record)
from fieldprop.backend.response import (_dipole_error, _scf_dipole, analytic_polarizability,
                                        zero_field_response)
from fieldprop.backend.solver import _converge, _gradient_norm, _rotation_from_reference, field_key
from fieldprop.backend.states import _orbital_sets, _s2, state_issues, symmetry_operations
from fieldprop.numerics.methods import METHODS
from fieldprop.points.records import PointRecord, PointTask, ZeroFieldReference

logger = logging.getLogger(__name__)


def compute_reference(context: ModelContext, task: PointTask,
                      check_geometry: bool = True) -> tuple[PointRecord, ZeroFieldReference]:
    """Compute the zero-field point from scratch, and the reference it gives every
    other point: density, orbitals, <S^2>, the symmetry operations its state has
    (the state checks) and the orbitals' linear response to a field (the start
    of every point). Attaches the reference to ``context``.

    Raises
    ------
    ScfNotConvergedError : the SCF (or CC) never converged.
    """
    if not task.is_zero_field:
        raise ValueError(f"the reference is computed at zero field, not at {task.point.label}")
    record, mf = _evaluate(context, task)
    reference = ZeroFieldReference(np.asarray(mf.make_rdm1()), _orbital_sets(mf), record.s2,
                                   symmetry_operations(context.mol, mf),
                                   np.asarray(mf.mo_coeff), np.asarray(mf.mo_occ),
                                   gradient_floor=context.gradient_floor,
                                   nuclear_gradient=(_nuclear_gradient(mf, context)
                                                     if check_geometry else None))
    context.attach(reference)
    work = 0
    if _has_hessian(mf):
        rotations, subspace, work = zero_field_response(mf, context)
        reference = dataclasses.replace(
            reference, field_rotations=rotations,
            response_subspace=None if subspace is None else (subspace.directions,
                                                             subspace.products))
        context.reference = reference  # the same orbitals: the response stays valid
    record = dataclasses.replace(record, scf_cycles=record.scf_cycles + work,
                                 orientation=orientation_record(context, mf))
    return record, reference


#: Above this many basis functions the zero-field geometry check uses a
#: density-fitted nuclear gradient (PySCF's default auxiliary basis) at the
#: converged orbitals: 0.44 s instead of 1.5 s for a 10-atom polyene at
#: HF/6-31G (55 functions), 2.2 s instead of 6 s at 22 atoms (121), within
#: 4e-5 Eh/bohr of the exact one, far below the 1e-3 that decides.
GEOMETRY_CHECK_FIT_ABOVE = 30
#: The geometry check's own SCF (geometry_check): energy and orbital-gradient
#: tolerances.
GEOMETRY_CHECK_ENERGY_TOL_AU = 1e-9
GEOMETRY_CHECK_GRADIENT_TOL = 1e-6
#: ... and its DIIS cycles at most: the stored reference waits for the check,
#: and an SCF that needs more (a hard open shell) leaves the geometry unchecked.
GEOMETRY_CHECK_MAX_CYCLES = 60


def _checks_geometry(context) -> bool:
    """The geometry check applies: a mean-field model (its energy's nuclear
    gradient is the backend's SCF gradient) of more than one atom."""
    return METHODS[context.model.method].mean_field and context.mol.natm > 1


def _nuclear_gradient(mf, context) -> tuple[float, int] | None:
    """The geometry check: (largest |component| of the nuclear gradient at
    zero field, Eh/bohr; its atom) for a mean-field model (HF, DFT), from the
    converged zero-field SCF ``mf``; None for other methods, one atom, or
    where the backend has no gradient for it (a failure is logged, never
    fatal: the check only warns)."""
    if not _checks_geometry(context):
        return None
    try:
        solver = mf
        if context.mol.nao > GEOMETRY_CHECK_FIT_ABOVE and getattr(mf, "with_df", None) is None:
            solver = mf.density_fit()
            for key in ("mo_coeff", "mo_occ", "mo_energy", "e_tot", "converged"):
                setattr(solver, key, getattr(mf, key))
        gradient = np.asarray(solver.nuc_grad_method().kernel())
    except Exception:  # noqa: BLE001 - the check is advice; the job goes on without it
        logger.debug("no nuclear gradient for the geometry check", exc_info=True)
        return None
    atom = int(np.unravel_index(np.abs(gradient).argmax(), gradient.shape)[0])
    return float(np.abs(gradient).max()), atom


def geometry_check(context: ModelContext) -> tuple[float, int] | None:
    """The geometry check (_nuclear_gradient) from an SCF of its own at zero
    field (PySCF's, from its initial guess; the context's integrals), for a
    worker that would otherwise wait for the reference: None where the model
    has no nuclear gradient or that SCF does not converge."""
    if not _checks_geometry(context):  # before an SCF for nothing
        return None
    mf = context.mean_field((0.0, 0.0, 0.0))
    # Converged far enough for a gradient to ~1e-6 Eh/bohr, against the 1e-3
    # that decides (not the points' 1e-12).
    mf.conv_tol, mf.conv_tol_grad = GEOMETRY_CHECK_ENERGY_TOL_AU, GEOMETRY_CHECK_GRADIENT_TOL
    mf.max_cycle = min(mf.max_cycle, GEOMETRY_CHECK_MAX_CYCLES)  # the reference waits for it
    mf.kernel()
    return _nuclear_gradient(mf, context) if mf.converged else None


def compute_point(context: ModelContext, task: PointTask, solved=None) -> PointRecord:
    """Compute one field point from the context's zero-field reference: SCF
    (response, mirror or line start and Newton finish, or the ladder), state
    checks against the reference, post-HF. ``solved``: {field: rotation} of
    points converged elsewhere (another worker), for the start; the point's
    own converged rotation joins ``context.solved``.

    A point on another state than zero field's (occupied overlap, <S^2>,
    occupation by symmetry) is returned with ``state_issue`` set; the analysis
    leaves it out of every derivative.

    Raises
    ------
    ScfNotConvergedError : the SCF (or CC) never converged.
    """
    if context.reference is None:
        raise ValueError("compute the zero-field reference first (compute_reference)")
    if solved:
        context.solved.update(solved)
    record, mf = _evaluate(context, task)
    ref = context.reference
    if (ref.mo_coeff is not None and mf.mo_coeff is not None and not record.state_issue
            and np.asarray(mf.mo_occ).shape == np.asarray(ref.mo_occ).shape):
        context.solved[field_key(task.point.field_vector_au)] = _rotation_from_reference(
            ref.mo_coeff, ref.mo_occ, np.asarray(mf.mo_coeff), context.overlap)
    return record


def _evaluate(context: ModelContext, task: PointTask):
    start = time.perf_counter()
    molecule, model, point = task.molecule, task.model, task.point
    reference = context.reference
    mf = context.mean_field(point.field_vector_au)
    r, mol = context.r, context.mol
    attempts, cycles, fock = _converge(mf, context, point, task.scf)
    occupied, s2 = _orbital_sets(mf), _s2(mf)
    overlap, issues = 1.0, []
    if reference is not None:
        for c_ref, c in zip(reference.occupied, occupied):
            if c.shape[1] != c_ref.shape[1]:
                overlap = 0.0
                break
            if c.shape[1]:
                overlap = min(overlap, float(np.linalg.svd(c_ref.T @ context.overlap @ c,
                                                           compute_uv=False).min()))
        issues = state_issues(reference, point.field_vector_au, occupied, s2, overlap)
        if context.constraints:
            drift = float(np.abs(_constraint_values(context.constraints,
                                                    np.asarray(mf.make_rdm1()))).max())
            if drift > MAX_ORIENTATION_DRIFT:
                issues.append(f"the state turned by {drift:.1e} rad about the molecule's "
                              f"rotation axis from its zero-field orientation")
        if issues:
            logger.debug("point %s is on another state: %s", point.label, "; ".join(issues))
    want = task.quantities
    dipole = tuple(float(v) for v in _scf_dipole(mf, r, molecule)) if want.dipole else None
    energy, correlation_change, amplitude_change = (
        (float(mf.e_tot), None, None) if METHODS[model.method].mean_field
        else _correlated_energy(mf, model, task.scf, point.label))
    # One Fock build serves the gradient and the dipole's error estimate: the
    # Newton steps' own, when they ended the SCF. A one-electron system has no
    # electron-electron terms (PySCF's HF1e): its Fock matrix is the core
    # Hamiltonian, and the generic build would compute two-electron integrals
    # for nothing.
    if mol.nelectron == 1:
        h = mf.get_hcore()
        fock = np.array([h, h]) if np.asarray(mf.mo_occ).ndim == 2 else h
    elif fock is None:
        fock = mf.get_fock()
    constraints = context.constraints
    gradient = _gradient_norm(mf, fock, constraints)
    dipole_error = 0.0
    if want.dipole:
        dipole_error = _dipole_error(mf, r, fock, want.newton_dipole_error,
                                     constraints, context.response)
    alpha = None
    if want.alpha:
        tensor = analytic_polarizability(mf, r, constraints, context.subspace)
        alpha = tuple(tuple(float(v) for v in row) for row in tensor)
    record = PointRecord(point=point, energy_au=energy, scf_energy_au=float(mf.e_tot),
                         dipole_au=dipole, scf_cycles=cycles, attempts=tuple(attempts), s2=s2,
                         occupied_overlap=overlap, gradient_norm=gradient, alpha_au=alpha,
                         dipole_error_au=dipole_error, state_issue="; ".join(issues),
                         wall_time_s=time.perf_counter() - start,
                         energy_scale_au=_energy_scale(mf),
                         correlation_energy_change_au=correlation_change,
                         amplitude_change=amplitude_change)
    return record, mf


def _energy_scale(mf) -> float:
    """|E_1| + |E_2| + |E_nuc| of the converged SCF (E_2 = E - E_1 - E_nuc):
    the energy is their difference, and its rounding follows their size."""
    dm = np.asarray(mf.make_rdm1())
    h = mf.get_hcore()
    e1 = float(np.sum(h * np.swapaxes(dm, -1, -2)))
    e_nuc = float(mf.energy_nuc())
    return abs(e1) + abs(float(mf.e_tot) - e1 - e_nuc) + abs(e_nuc)
