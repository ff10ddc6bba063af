"""Nuclear gradients in a field and what is built on them: the mean field whose
nuclear gradients include the field, the energy, gradient and dipole at
structures in one field (:class:`StructureEvaluator`), the nuclear Hessian,
the zero-field relaxation frame (:func:`relaxation_frame`) and a field point
with relaxed nuclei (:func:`compute_relaxed_point`).
"""

from __future__ import annotations

import dataclasses
import math
import time

import numpy as np

from fieldprop.backend.context import ModelContext
from fieldprop.backend.molecule import _mean_field, build_mole, frozen_orbitals
from fieldprop.backend.orbital_hessian import _has_hessian
from fieldprop.backend.points import _energy_scale, _evaluate
from fieldprop.backend.response import _dipole_error, _scf_dipole
from fieldprop.backend.solver import _gradient_norm, _ladder
from fieldprop.backend.states import MAX_S2_CHANGE, MIN_OCCUPIED_OVERLAP, _orbital_sets, _s2
from fieldprop.errors import InputError, ScfNotConvergedError
from fieldprop.inputs.job import Job
from fieldprop.numerics.methods import METHODS
from fieldprop.points.records import DIIS, PointRecord, PointTask


def atom_masses(molecule, isotopes=()) -> np.ndarray:
    """Masses (u) per atom: the most abundant isotopes (PySCF's table), but
    ``isotopes`` ((atom index, mass in u): [molecule] isotope_masses)."""
    from pyscf.data.elements import COMMON_ISOTOPE_MASSES

    masses = np.array([COMMON_ISOTOPE_MASSES[int(z)] for z in molecule.nuclear_charges])
    for i, mass in isotopes:
        masses[i] = mass
    return masses


def _with_field_gradients(mf, field_vector_au, origin_bohr) -> None:
    """Make ``mf.nuc_grad_method()`` (which PySCF's SCF and MP2 gradients both
    call) return nuclear gradients of E(R; F): besides the field-free terms,
    the field's move of the basis functions, F . d<mu|r - O|nu>/dR_A (in the
    gradient object's convention, -<d mu/dr| r - O |nu> on the bra), and the
    nuclear term -Z_A F. DFT gradients include the grid's response (the grid
    moves with the atoms), so they are the exact derivatives of the energy
    computed on it."""
    f = np.asarray(field_vector_au, dtype=float)
    make = type(mf).nuc_grad_method

    def field_gradients():
        grad = make(mf)
        if hasattr(grad, "grid_response"):
            grad.grid_response = True
        base_hcore, base_nuc = grad.get_hcore, grad.grad_nuc

        def get_hcore(mol=None):
            mol = grad.mol if mol is None else mol
            with mol.with_common_orig(origin_bohr):
                irp = mol.intor("int1e_irp", comp=9).reshape(3, 3, mol.nao, mol.nao)
            # irp[x, b] = <mu| r_x d_b |nu>, so <d_b mu| r_x |nu> = irp[x, b].T.
            return base_hcore(mol) - np.einsum("x,xbji->bij", f, irp)

        def grad_nuc(mol=None, atmlst=None):
            mol = grad.mol if mol is None else mol
            extra = -np.outer(mol.atom_charges(), f)
            return base_nuc(mol, atmlst) + (extra if atmlst is None else extra[atmlst])

        grad.get_hcore, grad.grad_nuc = get_hcore, grad_nuc
        return grad

    mf.nuc_grad_method = field_gradients
    mf.Gradients = field_gradients


def field_mean_field(molecule, model, scf_spec, field_vector_au):
    """A mean-field object of ``molecule`` in the field (not converged) whose
    nuclear gradients include the field; and the dipole integrals about the
    molecule's origin."""
    mol = build_mole(molecule, model.basis, cartesian=model.cartesian)
    mf = _mean_field(mol, model, scf_spec)
    f = np.asarray(field_vector_au, dtype=float)
    with mol.with_common_orig(molecule.origin_bohr):
        r = mol.intor_symmetric("int1e_r", comp=3)
    h = mf.get_hcore() + np.einsum("x,xij->ij", f, r)
    e_nuc = mol.energy_nuc() - float(f @ molecule.nuclear_dipole_au())
    mf.get_hcore = lambda *args, **kwargs: h
    mf.energy_nuc = lambda *args, **kwargs: e_nuc
    _with_field_gradients(mf, f, molecule.origin_bohr)
    return mf, r


def _at(molecule, coords_bohr):
    return dataclasses.replace(molecule, coords_bohr=tuple(
        tuple(float(v) for v in row) for row in np.asarray(coords_bohr)))


#: DIIS cycles a relaxation's SCF takes to reach the point's accepted
#: gradient (ScfSpec.gradient_accepted; from the last structure's density it
#: needs 5-20), and then at most towards the target: a DFT SCF stalls just
#: above a 1e-11 target at its grid's floor (1-6e-11 measured, formaldehyde
#: B3LYP/6-31G), where 50 more cycles bought nothing and cost 15 s.
STRUCTURE_DIIS_CYCLES = 50
STRUCTURE_POLISH_CYCLES = 8


def _converge_structure(mf, dm0, scf_spec, attempts: list[str]) -> tuple[int, float]:
    """One structure's SCF: DIIS from ``dm0`` to the point's accepted
    gradient, a few cycles more towards the target; else PySCF's ladder
    (_ladder) to the target. Returns the cycles and the orbital gradient."""
    attempts.append(DIIS)
    cycles, g = 0, math.inf
    for tolerance, most in ((scf_spec.gradient_accepted, STRUCTURE_DIIS_CYCLES),
                            (scf_spec.gradient_target, STRUCTURE_POLISH_CYCLES)):
        mf.conv_tol_grad = tolerance
        mf.max_cycle = min(scf_spec.max_iterations, most)
        mf.kernel(dm0 if mf.mo_coeff is None else mf.make_rdm1())
        cycles += int(getattr(mf, "cycles", 1) or 1)
        g = _gradient_norm(mf) if mf.mo_coeff is not None else math.inf
        if g <= scf_spec.gradient_target:
            break
    mf.max_cycle = scf_spec.max_iterations
    if g <= scf_spec.gradient_accepted:
        return cycles, g
    attempts.clear()
    cycles += _ladder(mf, mf.make_rdm1() if mf.mo_coeff is not None else dm0,
                      scf_spec.gradient_target, attempts)
    return cycles, _gradient_norm(mf)


class StructureEvaluator:
    """Energy, nuclear gradient and dipole of one model at structures in one
    field, each SCF started from the last converged density (the structures
    of a relaxation differ by small moves). Counts SCF cycles and gradients."""

    def __init__(self, molecule, model, scf_spec, field_vector_au, density=None,
                 label: str = ""):
        self.molecule, self.model, self.scf = molecule, model, scf_spec
        self.field = np.asarray(field_vector_au, dtype=float)
        self.density, self.label = density, label
        self.cycles = self.gradients = 0
        self.attempts: list[str] = []
        self.last = None  # (mf, r, molecule, orbital gradient) of the last structure

    def __call__(self, coords_bohr):
        from fieldprop.numerics.relaxation import Evaluation

        molecule = _at(self.molecule, coords_bohr)
        mf, r = field_mean_field(molecule, self.model, self.scf, self.field)
        attempts: list[str] = []
        cycles, g = _converge_structure(mf, self.density, self.scf, attempts)
        self.cycles += cycles
        if g > self.scf.gradient_accepted:
            raise ScfNotConvergedError(
                f"SCF not converged at a relaxed structure of field point {self.label} "
                f"(orbital gradient {g:.1e}, needed {self.scf.gradient_accepted:.1e}); "
                "no number is formed")
        self.attempts = attempts
        self.density = mf.make_rdm1()
        if METHODS[self.model.method].mean_field:
            method, energy = mf, float(mf.e_tot)
        else:
            from pyscf import mp

            method = mp.MP2(mf, frozen=frozen_orbitals(mf.mol, self.model) or None)
            method.verbose = 0
            method.kernel()
            energy = float(method.e_tot)
        grad = method.nuc_grad_method()
        grad.verbose = 0
        gradient = np.asarray(grad.kernel())
        self.gradients += 1
        dipole = _scf_dipole(mf, r, molecule)
        self.last = (mf, r, molecule, g)
        return Evaluation(energy, gradient, dipole)


#: Displacement (bohr) of the central differences of analytic gradients that
#: give the Hessian where PySCF has no analytic one (MP2, restricted open
#: shells): truncation ~ (1e-3)^2 relative; it only preconditions the Newton
#: steps and sets the start and the double-harmonic estimate.
HESSIAN_STEP_BOHR = 1e-3


def _has_nuclear_hessian(mf) -> bool:
    """Whether PySCF has the analytic nuclear Hessian of ``mf``: RHF, UHF, RKS
    and UKS (_has_hessian), density-fitted or not; not restricted open shells
    (PySCF de-registers their Hessian, and its density-fitted one fails), nor
    a functional with nonlocal correlation (VV10) where PySCF's Hessian refuses
    it (unrestricted, or more than one such term)."""
    from pyscf.scf import rohf

    if not _has_hessian(mf) or isinstance(mf, rohf.ROHF):
        return False
    if not (hasattr(mf, "do_nlc") and mf.do_nlc()):
        return True
    if np.asarray(mf.mo_occ).ndim == 2:
        return False
    xc = mf.xc if mf._numint.libxc.is_nlc(mf.xc) else mf.nlc
    return len(mf._numint.nlc_coeff(xc)) == 1


def _hessian(evaluate: StructureEvaluator, mf, coords) -> tuple[np.ndarray, str]:
    """The Cartesian Hessian (3N, 3N) at zero field: PySCF's analytic one for
    RHF, UHF, RKS, UKS, else central differences of analytic gradients."""
    n = len(coords)
    # Only a mean-field method's Hessian is the SCF object's (MP2's is not).
    if METHODS[evaluate.model.method].mean_field and _has_nuclear_hessian(mf):
        h = mf.Hessian()
        h.verbose = 0
        value = np.asarray(h.kernel()).transpose(0, 2, 1, 3).reshape(3 * n, 3 * n)
        return value, "analytic"
    value = np.zeros((3 * n, 3 * n))
    for i in range(3 * n):
        step = np.zeros(3 * n)
        step[i] = HESSIAN_STEP_BOHR
        plus = evaluate(coords + step.reshape(n, 3)).gradient.ravel()
        minus = evaluate(coords - step.reshape(n, 3)).gradient.ravel()
        value[i] = (plus - minus) / (2 * HESSIAN_STEP_BOHR)
    return 0.5 * (value + value.T), "central differences of analytic gradients"


def relaxation_frame(job: Job, molecule, dipole_route: bool) -> dict:
    """The zero-field minimum of the job's model and what relaxations in a
    field start from: gradient at the given structure (refused as
    InputError when it is not a minimum), the Hessian, dmu/dR (central
    differences of field gradients), the structure polished to the
    relaxation's tolerances under the Eckart conditions. A document (lists)."""
    from fieldprop.numerics import relaxation

    start = time.perf_counter()
    where = (f"{job.path}: [response] "
             f"{'nuclear_relaxation' if job.response.nuclear_relaxation else 'zero_point'}")
    x0 = np.asarray(molecule.coords_bohr, dtype=float)
    masses = atom_masses(molecule, job.molecule.isotope_masses)
    zero = StructureEvaluator(molecule, job.model, job.scf, (0.0, 0.0, 0.0), label="0")
    first = zero(x0)
    gradient = first.gradient
    largest = float(np.abs(gradient).max())
    atom = int(np.unravel_index(np.abs(gradient).argmax(), gradient.shape)[0])
    if largest > relaxation.MINIMUM_GRADIENT_AU:
        raise InputError(f"{where}: the geometry is not a minimum of the job's model (largest "
                         f"gradient component {largest:.1e} Eh/bohr, on atom {atom + 1} "
                         f"{molecule.symbols[atom]}; at most {relaxation.MINIMUM_GRADIENT_AU:g} "
                         "accepted); set [geometry] optimise = true with the job's model, or "
                         "give its minimum")
    mf = zero.last[0]
    hessian, hessian_source = _hessian(zero, mf, x0)
    derivatives = np.zeros((3, x0.size))
    for k in range(3):
        f = np.zeros(3)
        f[k] = relaxation.DIPOLE_DERIVATIVE_FIELD_AU
        pair = []
        for sign in (1.0, -1.0):
            ev = StructureEvaluator(molecule, job.model, job.scf, sign * f,
                                    density=zero.density, label="dmu/dR")
            pair.append(ev(x0).gradient.ravel())
            zero.cycles += ev.cycles
            zero.gradients += ev.gradients
        # dE/dR = g(R; F) and dE/dF = -mu: d mu_k / dR = -d g / dF_k.
        derivatives[k] = -(pair[0] - pair[1]) / (2 * relaxation.DIPOLE_DERIVATIVE_FIELD_AU)
    frame = relaxation.Frame.build(x0, masses, hessian, derivatives)
    lowest = float(np.linalg.eigvalsh(frame.hessian).min()) if frame.hessian.size else 1.0
    if lowest <= 0.0:
        freq = float(frame.frequencies_cm()[0])
        raise InputError(f"{where}: the geometry is a stationary point but not a minimum of the "
                         f"job's model (a harmonic frequency of {abs(freq):.0f}i cm^-1); "
                         "relax it along that mode first")
    try:
        polished = relaxation.relax(frame, np.zeros(3), zero, dipole_route,
                                    start=np.zeros(frame.hessian.shape[0]))
    except relaxation.NotRelaxed as exc:
        raise ScfNotConvergedError(f"{where}: the zero-field structure was {exc}") from exc
    x = polished.coords_bohr
    frame = relaxation.Frame.build(x, masses, hessian, derivatives)
    return {"coords_bohr": [[float(v) for v in row] for row in x],
            "input_gradient_au": largest,
            "moved_bohr": float(np.abs(x - x0).max()),
            "polish_steps": polished.steps,
            "masses_u": [float(m) for m in masses],
            "hessian_cartesian": [[float(v) for v in row] for row in hessian],
            "hessian_source": hessian_source,
            "dipole_derivatives_cartesian": [[float(v) for v in row] for row in derivatives],
            "frequencies_cm": [float(v) for v in frame.frequencies_cm()],
            "double_harmonic_alpha_au": [[float(v) for v in row]
                                         for row in relaxation.double_harmonic_alpha(frame)],
            "energy_au": float(polished.evaluation.energy_au),
            "gradients": zero.gradients, "scf_cycles": zero.cycles,
            "wall_time_s": time.perf_counter() - start}


def compute_relaxed_point(context: ModelContext, task: PointTask) -> PointRecord:
    """One field point with the nuclei relaxed (task.relax: the frame and
    tolerances): the Newton steps of fieldprop.numerics.relaxation on E(R; F), each
    structure's SCF from the last one's density (the first from the clamped
    point's at this field); the record holds the energy and dipole at the
    relaxed structure, the structure and the optimiser's remaining errors.
    The state checks: <S^2> and the occupied overlap with the zero-field
    reference (across the two structures' basis sets).

    Raises
    ------
    ScfNotConvergedError : an SCF, or the relaxation, did not converge.
    """
    from pyscf import gto

    from fieldprop.numerics import relaxation

    start = time.perf_counter()
    target = task.relax
    point = task.point
    ref = context.reference
    # The density at this field with the nuclei clamped (the solver of every
    # clamped point: response start, Newton steps) starts the first structure's
    # SCF; the zero-field one would cost DIIS 3-4x the cycles.
    clamped = dataclasses.replace(task, relax=None, key="")
    first, mf = _evaluate(context, clamped)
    evaluate = StructureEvaluator(task.molecule, task.model, task.scf, point.field_vector_au,
                                  density=mf.make_rdm1(), label=point.label)
    evaluate.cycles = first.scf_cycles
    try:
        relaxed = relaxation.relax(target.frame, point.field_vector_au, evaluate,
                                   target.dipole_route)
    except relaxation.NotRelaxed as exc:
        raise ScfNotConvergedError(f"field point {point.label}: the structure was {exc}; "
                                   "no number is formed") from exc
    mf, r, molecule, g = evaluate.last
    occupied, s2 = _orbital_sets(mf), _s2(mf)
    overlap, issues = 1.0, []
    if ref is not None:
        cross = gto.intor_cross("int1e_ovlp", context.mol, mf.mol)
        for c_ref, c in zip(ref.occupied, occupied):
            if c.shape[1] != c_ref.shape[1]:
                overlap = 0.0
                break
            if c.shape[1]:
                overlap = min(overlap, float(np.linalg.svd(c_ref.T @ cross @ c,
                                                           compute_uv=False).min()))
        if overlap < MIN_OCCUPIED_OVERLAP:
            issues.append(f"occupied overlap with zero field {overlap:.3f} < "
                          f"{MIN_OCCUPIED_OVERLAP} at the relaxed structure")
        if abs(s2 - ref.s2) > MAX_S2_CHANGE:
            issues.append(f"<S^2> moved from {ref.s2:.4f} to {s2:.4f} at the relaxed structure")
    want = task.quantities
    dipole = tuple(float(v) for v in relaxed.evaluation.dipole_au) if want.dipole else None
    dipole_error = 0.0
    if want.dipole:
        dipole_error = _dipole_error(mf, r, mf.get_fock(), want.newton_dipole_error)
    document = relaxed.document()
    document["gradients"] = evaluate.gradients
    return PointRecord(point=point, energy_au=float(relaxed.evaluation.energy_au),
                       scf_energy_au=float(mf.e_tot), dipole_au=dipole,
                       scf_cycles=evaluate.cycles, attempts=tuple(evaluate.attempts), s2=s2,
                       occupied_overlap=overlap, gradient_norm=g, alpha_au=None,
                       dipole_error_au=dipole_error, state_issue="; ".join(issues),
                       wall_time_s=time.perf_counter() - start,
                       energy_scale_au=_energy_scale(mf), relaxation=document)
