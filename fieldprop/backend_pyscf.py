"""The only module that imports PySCF: field-perturbed SCF and post-HF energies.

The field term is applied in one place, :func:`_apply_field`, for every method:
the core Hamiltonian gets +F.<r - O> (electrons carry charge -1, so -mu_op.F adds
+F.r per electron) and the nuclear repulsion gets -F.sum_A Z_A (R_A - O). MP2,
CCSD and CCSD(T) then run on the field-perturbed orbitals and integrals, because
they take the core Hamiltonian and nuclear energy from the mean-field object.

PySCF objects are built inside the worker from the plain data of a
:class:`~fieldprop.records.PointTask`, with ``verbose=0`` (stdout carries data).
"""

from __future__ import annotations

import contextlib
import functools
import logging
import time
import warnings

import numpy as np

from fieldprop.errors import InputError, ScfNotConvergedError
from fieldprop.job import Job
from fieldprop.methods import METHODS
from fieldprop.records import (CPHF_RTOL, PointRecord, PointTask, SymmetryOperation,
                               ZeroFieldReference)

logger = logging.getLogger(__name__)

#: Smallest singular value of the occupied-space overlap with zero field below
#: which a point is on another state. Small fields rotate occupied orbitals by
#: ~F <r> / gap ~ 1e-2, leaving singular values ~0.9999; a swapped orbital gives ~0.
MIN_OCCUPIED_OVERLAP = 0.9
#: Largest change of <S^2> from zero field before a point counts as another state:
#: field-induced changes are O(F^2) ~ 1e-4, a spin flip or new contamination ~0.1-1.
MAX_S2_CHANGE = 0.01
#: Largest distance (bohr) between an atom's image and an atom of the same element
#: for a symmetry operation to count; PySCF's own detection tolerance is tighter.
SYMMETRY_TOLERANCE_BOHR = 1e-4
#: A zero-field character this far from an integer means the state does not have
#: that operation's symmetry (a broken-symmetry solution): the operation is not used.
CHARACTER_TOLERANCE = 0.05
#: Grid points per block when integrating basis-function products (memory bound).
_GRID_BLOCK = 20000


def _pyscf_basis(basis):
    """A name, or {symbol: name or parsed NWChem-format text} for per-element bases."""
    from pyscf import gto

    if isinstance(basis, str):
        return basis
    out = {}
    for symbol, text in basis:
        out[symbol] = gto.basis.parse(text, symb=symbol) if "\n" in text.strip() else text
    return out


@contextlib.contextmanager
def _quiet_basis_lookup():
    """PySCF's advice to install basis-set-exchange, printed for a basis or ECP name
    it does not know, and NumPy's warnings on normalising a zero or negative
    exponent, would add lines to the one-line errors of bad input: silenced."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*may be available in basis-set-exchange")
        warnings.filterwarnings("ignore", category=RuntimeWarning)
        yield


def _pyscf_ecp(basis, symbols) -> dict[str, str]:
    """{symbol: basis name} for the elements whose named basis comes with an
    effective core potential (def2 and LANL sets on heavy elements, as PySCF's
    basis library defines them); basis text given inline has none."""
    from pyscf import gto

    names = ({s: basis for s in set(symbols)} if isinstance(basis, str)
             else {s: t for s, t in basis if "\n" not in t.strip()})
    out = {}
    for symbol, name in names.items():
        try:
            with _quiet_basis_lookup():
                if gto.basis.load_ecp(name, symbol):
                    out[symbol] = name
        except (KeyError, RuntimeError, ValueError, OSError, IndexError):
            continue  # the basis itself is judged (and refused) by build_mole
    return out


def build_mole(molecule, basis, where: str = "[model] basis"):
    """A PySCF ``Mole`` in bohr, with the basis' effective core potentials where it
    has them; basis problems become InputError naming ``where``."""
    from pyscf import gto

    try:
        if not isinstance(basis, str):
            # Checked before PySCF, which would print a warning line of its own.
            absent = sorted(set(molecule.symbols) - {symbol for symbol, _ in basis})
            if absent:
                raise ValueError(f"no basis given for {', '.join(absent)}")
        with _quiet_basis_lookup():
            mol = gto.M(atom=[(s, c) for s, c in zip(molecule.symbols, molecule.coords_bohr)],
                        unit="Bohr", basis=_pyscf_basis(basis),
                        ecp=_pyscf_ecp(basis, molecule.symbols), charge=molecule.charge,
                        spin=molecule.spin, verbose=0)
        missing = sorted({s for s in molecule.symbols} - {mol.atom_symbol(i) for i in
                                                          range(mol.natm) if mol.atom_nshells(i)})
        if missing:
            raise KeyError(f"no basis functions for {', '.join(missing)}")
        if not np.all(np.isfinite(mol._env)):
            raise ValueError("exponents must be > 0 and coefficients finite")
        return mol
    except (KeyError, RuntimeError, ValueError, OSError, IndexError) as exc:
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        shown = basis if isinstance(basis, str) else {
            sym: (text if "\n" not in text else "<basis text>") for sym, text in basis}
        raise InputError(f"{where} {shown!r} is not available for this molecule "
                         f"({text}); use a basis PySCF knows for every element, such as "
                         "cc-pvdz, aug-cc-pvdz or def2-svp") from None


def validate(job: Job, molecule) -> dict:
    """Check what only PySCF can judge (basis, functional) before any work.

    Returns facts for provenance: number of basis functions, Cartesian or
    spherical functions, the electrons each atom's effective core potential
    replaces (0 without one), the functional as libxc parses it, PySCF's version.
    """
    import pyscf
    from pyscf.dft import libxc

    mol = build_mole(molecule, job.model.basis, f"{job.path}: [model] basis")
    facts = {"pyscf_version": pyscf.__version__, "n_basis_functions": int(mol.nao),
             "basis_functions": "cartesian" if mol.cart else "spherical",
             "core_electrons": [int(mol.atom_nelec_core(i)) for i in range(mol.natm)]}
    if job.model.method == "dft":
        try:
            libxc.parse_xc(job.model.functional)
        except (KeyError, ValueError, TypeError) as exc:
            raise InputError(f"{job.path}: [model] functional {job.model.functional!r} is "
                             f"unknown to libxc ({exc}); use a name such as b3lyp, pbe0, "
                             "pbe, cam-b3lyp") from None
        facts["functional_is_hybrid"] = bool(libxc.is_hybrid_xc(job.model.functional))
        facts["grid_level"] = job.scf.grid_level
    return facts


def _mean_field(mol, model, scf_spec):
    from pyscf import dft, scf

    unrestricted = model.reference == "unrestricted"
    open_shell = mol.spin != 0
    if model.method == "dft":
        cls = dft.UKS if unrestricted else (dft.ROKS if open_shell else dft.RKS)
        mf = cls(mol)
        mf.xc = model.functional
        mf.grids.level = scf_spec.grid_level
    else:
        cls = scf.UHF if unrestricted else (scf.ROHF if open_shell else scf.RHF)
        mf = cls(mol)
    mf.conv_tol = scf_spec.energy_conv_tol_au
    mf.conv_tol_grad = scf_spec.gradient_conv_tol
    mf.max_cycle = scf_spec.max_cycle
    mf.verbose = 0
    return mf


def _apply_field(mf, mol, molecule, field_vector_au):
    """Add -mu_op.F to the Hamiltonian of ``mf``, measured from the job's origin."""
    f = np.asarray(field_vector_au, dtype=float)
    with mol.with_common_orig(molecule.origin_bohr):
        r = mol.intor_symmetric("int1e_r", comp=3)
    h = mf.get_hcore() + np.einsum("x,xij->ij", f, r)
    e_nuc = mol.energy_nuc() - float(f @ molecule.nuclear_dipole_au())
    mf.get_hcore = lambda *args, **kwargs: h
    mf.energy_nuc = lambda *args, **kwargs: e_nuc
    return r


def _scf_dipole(mf, r, molecule) -> np.ndarray:
    dm = mf.make_rdm1()
    if dm.ndim == 3:
        dm = dm[0] + dm[1]
    return molecule.nuclear_dipole_au() - np.einsum("xij,ji->x", r, dm).real


def _dipole_error(mf, r, fock, gradient: float, dipole_route: bool) -> float:
    """|d mu| the remaining orbital gradient leaves in the SCF dipole.

    Closed shells: the diagonal estimate (diagonal_dipole_step). Open shells
    (UHF, UKS): the diagonal misses ~8x, so on the dipole route, where the
    dipole is differentiated, the full-Hessian Newton step (newton_dipole_step,
    0.98-1.01 of the true error measured on NH2 and H2O+, HF and DFT); on the
    energy route the dipole is only reported, and the diagonal estimate will do.
    ROHF: |g|.
    """
    try:
        if dipole_route and np.asarray(mf.mo_occ).ndim == 2:
            return float(np.linalg.norm(newton_dipole_step(mf, r, fock)))
        return float(np.linalg.norm(diagonal_dipole_step(mf, r, fock)))
    except TypeError:  # no orbital Hessian here (ROHF)
        return gradient


def _orbital_sets(mf) -> tuple[np.ndarray, ...]:
    """Occupied orbitals per set, for the state checks: alpha and beta
    (unrestricted); all occupied and doubly occupied (restricted open shell);
    the occupied ones (closed shell)."""
    occ = np.asarray(mf.mo_occ)
    if occ.ndim == 2:
        return tuple(mf.mo_coeff[s][:, occ[s] > 0] for s in range(2))
    if np.any(np.isclose(occ, 1.0)):
        return mf.mo_coeff[:, occ > 0], mf.mo_coeff[:, occ > 1.5]
    return (mf.mo_coeff[:, occ > 0],)


def _characters(sets, representation) -> tuple[float, ...]:
    return tuple(float(np.einsum("pi,pq,qi->", c, representation, c)) for c in sets)


def _operation_name(signs, axes) -> str:
    def vec(v):
        return "(" + ", ".join(f"{x:.3f}" for x in v) + ")"
    minus = [k for k in range(3) if signs[k] < 0]
    if len(minus) == 3:
        return "inversion"
    if len(minus) == 1:
        return f"mirror plane normal to {vec(axes[minus[0]])}"
    plus = next(k for k in range(3) if signs[k] > 0)
    return f"C2 rotation about {vec(axes[plus])}"


def symmetry_operations(mol, mf) -> tuple[SymmetryOperation, ...]:
    """The operations of the molecule's largest abelian point subgroup (D2h and
    its subgroups) that the zero-field state ``mf`` shares, with their action on
    the basis functions.

    PySCF's detection gives the symmetry frame; each of the seven sign changes
    of its axes is kept if it maps every atom onto an atom of the same element
    (same basis). <chi_mu | R chi_nu> is integrated on a DFT grid (level 3,
    ~1e-6 accurate for the overlap), so characters come out within ~1e-5 of
    their integers; the comparison allows 0.5.
    """
    import itertools

    from pyscf import dft, symm

    try:
        group, origin, axes = symm.detect_symm(mol._atom)
        group, axes = symm.as_subgroup(group, axes)
    except Exception as exc:  # noqa: BLE001 - detection is a bonus, never fatal
        logger.debug("no symmetry detection: %s", exc)
        return ()
    if group == "C1":
        return ()
    coords = mol.atom_coords()
    symbols = [mol.atom_symbol(i) for i in range(mol.natm)]
    chosen = []
    for signs in itertools.product((1, -1), repeat=3):
        if signs == (1, 1, 1):
            continue
        matrix = axes.T @ np.diag(signs) @ axes
        image = (coords - origin) @ matrix.T + origin
        if all(any(symbols[i] == symbols[j] and
                   np.linalg.norm(image[i] - coords[j]) < SYMMETRY_TOLERANCE_BOHR
                   for j in range(mol.natm)) for i in range(mol.natm)):
            chosen.append((signs, matrix))
    if not chosen:
        return ()
    grids = dft.gen_grid.Grids(mol)
    grids.level = 3
    grids.verbose = 0
    grids.build()
    reps = [np.zeros((mol.nao, mol.nao)) for _ in chosen]
    for start in range(0, len(grids.weights), _GRID_BLOCK):
        points = grids.coords[start:start + _GRID_BLOCK]
        weighted = dft.numint.eval_ao(mol, points) * grids.weights[start:start + _GRID_BLOCK,
                                                                    None]
        for rep, (signs, matrix) in zip(reps, chosen):
            # (R chi)(r) = chi(R^-1 (r - O) + O), and R^-1 = R for these operations.
            rep += weighted.T @ dft.numint.eval_ao(mol, (points - origin) @ matrix.T + origin)
    sets = _orbital_sets(mf)
    out = []
    for rep, (signs, matrix) in zip(reps, chosen):
        chars = _characters(sets, rep)
        if all(abs(c - round(c)) < CHARACTER_TOLERANCE for c in chars):
            out.append(SymmetryOperation(_operation_name(signs, axes), matrix, rep, chars))
    return tuple(out)


def state_issues(reference: ZeroFieldReference, field_vector_au, sets, s2,
                 overlap) -> list[str]:
    """What marks a point as another state than zero field's (empty: none)."""
    issues = []
    if overlap < MIN_OCCUPIED_OVERLAP:
        issues.append(f"occupied-space overlap with zero field {overlap:.3f} (needs >= "
                      f"{MIN_OCCUPIED_OVERLAP})")
    if abs(s2 - reference.s2) > MAX_S2_CHANGE:
        issues.append(f"<S^2> {s2:.4f} against {reference.s2:.4f} at zero field")
    f = np.asarray(field_vector_au, dtype=float)
    for op in reference.symmetry:
        if np.linalg.norm(op.matrix @ f - f) > 1e-9 * max(np.linalg.norm(f), 1e-300):
            continue  # the field breaks this symmetry: its characters may change
        chars = _characters(sets, op.representation)
        if any(abs(c - c0) > 0.5 for c, c0 in zip(chars, op.characters)):
            shown = "/".join(f"{c:.0f}" for c in chars)
            zero = "/".join(f"{c:.0f}" for c in op.characters)
            issues.append(f"occupation by symmetry changed: under the {op.name}, which the "
                          f"field keeps, the occupied orbitals' character is {shown} "
                          f"(zero field: {zero})")
    return issues


def _s2(mf) -> float:
    if np.asarray(mf.mo_occ).ndim == 2:
        return float(mf.spin_square()[0])
    s = 0.5 * mf.mol.spin
    return s * (s + 1.0)


def _converge(mf, dm0, label: str) -> tuple[list[str], int]:
    """Run the SCF, retrying along a ladder of strategies; returns attempts, cycles."""
    attempts, cycles = [], 0
    strategies = [
        ("diis", {}),
        ("diis+damping+level_shift", {"damp": 0.3, "level_shift": 0.2, "diis_start_cycle": 4}),
        ("second_order", None),
    ]
    for name, settings in strategies:
        attempts.append(name)
        if settings is None:
            solver = mf.newton()
            solver.kernel(mf.make_rdm1() if mf.mo_coeff is not None else dm0)
            cycles += int(getattr(solver, "cycles", 0) or 0)
            if solver.converged:
                for key in ("mo_coeff", "mo_occ", "mo_energy", "e_tot", "converged"):
                    setattr(mf, key, getattr(solver, key))
                return attempts, cycles
            continue
        for key, value in settings.items():
            setattr(mf, key, value)
        mf.kernel(dm0)
        cycles += int(getattr(mf, "cycles", 1) or 1)
        if mf.converged:
            return attempts, cycles
        dm0 = mf.make_rdm1()
    raise ScfNotConvergedError(
        f"SCF did not converge at field point {label} after {', '.join(attempts)} "
        f"(energy tolerance {mf.conv_tol:g} Eh, {mf.max_cycle} cycles each); no number is "
        "formed from it")


def _correlated_energy(mf, model, scf_spec, label: str) -> float:
    from pyscf import cc, mp

    if model.method == "mp2":
        solver = mp.MP2(mf)
        solver.verbose = 0
        e_corr = solver.kernel()[0]
        return float(mf.e_tot + e_corr)
    solver = cc.CCSD(mf)
    solver.verbose = 0
    # CC energies are not variational in the amplitudes: converge them to about
    # the SCF energy tolerance so both noises stay comparable.
    solver.conv_tol = max(scf_spec.energy_conv_tol_au, 1e-12)
    solver.conv_tol_normt = 1e-7
    solver.max_cycle = max(scf_spec.max_cycle, 100)
    solver.kernel()
    if not solver.converged:
        raise ScfNotConvergedError(f"CCSD amplitudes did not converge at field point {label} "
                                   f"(tolerance {solver.conv_tol:g} Eh); no number is formed")
    e = float(solver.e_tot)
    if model.method == "ccsd(t)":
        e += float(solver.ccsd_t())
    return e


class _OrbitalHessian:
    """The real orbital Hessian A + B of a converged RHF, UHF, RKS or UKS object,
    as a preconditioned conjugate-gradient solver over occupied-virtual blocks.

    x_ai (one block per spin; one block for closed shells) maps to the density
    change dD = n_w (C_v x C_o^T + transpose), n_w = 2 for closed shells and 1
    per spin otherwise; the operator is (e_a - e_i) x + [V(dD)]_ai with V PySCF's
    response function. One-electron systems have no two-electron response
    (PySCF's generic response function would add one: 18.4 instead of 4.48 for
    the polarizability of H).
    """

    def __init__(self, mf):
        from pyscf.scf import hf, rohf, uhf

        if isinstance(mf, uhf.UHF):
            coeffs, energies, occs, self.weight = mf.mo_coeff, mf.mo_energy, mf.mo_occ, 1.0
        elif isinstance(mf, hf.RHF) and not isinstance(mf, rohf.ROHF):
            coeffs, energies, occs, self.weight = ([mf.mo_coeff], [mf.mo_energy], [mf.mo_occ],
                                                   2.0)
        else:
            raise TypeError(f"no orbital Hessian for {type(mf).__name__}")
        self.blocks = []
        for c, e, occ in zip(coeffs, energies, occs):
            o, v = occ > 0, occ == 0
            self.blocks.append((c[:, o], c[:, v], e[v][:, None] - e[o][None, :]))
        self.sizes = [b[2].size for b in self.blocks]
        self.diagonal = np.concatenate([de.ravel() for (co, cv, de) in self.blocks])
        self._mf = mf

    @functools.cached_property
    def response(self):
        """PySCF's response function (built on first use: for DFT it holds the
        exchange-correlation kernel on the grid); None for one electron."""
        mf = self._mf
        if mf.mol.nelectron == 1:
            return None
        return (mf.gen_response(hermi=1) if len(self.blocks) == 2
                else mf.gen_response(singlet=None, hermi=1))

    def _split(self, x):
        parts, start = [], 0
        for (co, cv, de), n in zip(self.blocks, self.sizes):
            parts.append(x[start:start + n].reshape(de.shape))
            start += n
        return parts

    def matvec(self, x):
        parts = self._split(np.asarray(x).ravel())
        out = [de * xs for (co, cv, de), xs in zip(self.blocks, parts)]
        if self.response is not None:
            dms = [self.weight * (cv @ xs @ co.T) for (co, cv, de), xs in zip(self.blocks, parts)]
            dms = [d + d.T for d in dms]
            v1 = self.response(np.array(dms) if len(dms) == 2 else dms[0])
            v1 = v1 if len(dms) == 2 else [v1]
            out = [o_ + cv.T @ vs @ co for o_, (co, cv, de), vs in zip(out, self.blocks, v1)]
        return np.concatenate([o_.ravel() for o_ in out])

    def vo(self, matrices) -> np.ndarray:
        """The occupied-virtual blocks of AO matrices (one per block, or one for all)."""
        if np.ndim(matrices) == 2:
            matrices = [matrices] * len(self.blocks)
        return np.concatenate([(cv.T @ m @ co).ravel()
                               for m, (co, cv, de) in zip(matrices, self.blocks)])

    def solve(self, rhs, rtol: float, what: str) -> np.ndarray:
        """x with (A + B) x = rhs, to relative residual ``rtol``."""
        from scipy.sparse.linalg import LinearOperator, cg

        norm = np.linalg.norm(rhs)
        if norm == 0.0:
            return np.zeros_like(rhs)
        n = sum(self.sizes)
        operator = LinearOperator((n, n), matvec=self.matvec, dtype=float)
        precondition = LinearOperator((n, n), matvec=lambda x: np.asarray(x).ravel()
                                      / self.diagonal, dtype=float)
        x, info = cg(operator, rhs / norm, rtol=rtol, atol=0.0, M=precondition, maxiter=500)
        residual = np.linalg.norm(self.matvec(x) - rhs / norm)
        if info != 0 or residual > 10 * rtol:
            raise ScfNotConvergedError(f"{what} did not converge (residual {residual:.1e}); "
                                       "the SCF may be unstable")
        return x * norm

    def density_trace(self, rmo, x) -> float:
        """-tr(r dD) for the rotation x: the dipole change it causes (one component)."""
        return float(-2.0 * self.weight * (rmo @ x))


def analytic_polarizability(mf, r) -> np.ndarray:
    """Static alpha_ij = d mu_i / dF_j (au) from the coupled-perturbed equations.

    For a converged RHF, UHF, RKS or UKS object ``mf`` and dipole integrals ``r``
    (3, nao, nao) about the job's origin. The perturbation +F_j r_j enters the
    one-electron Hamiltonian; the first-order orbital rotations x_ai solve the
    symmetric positive definite system (A + B) x = -r_ai (:class:`_OrbitalHessian`,
    stable real SCF), by preconditioned conjugate gradients to CPHF_RTOL; then
    alpha_ij = -n sum_ai r_i,ai x^(j)_ai with n = 4 for closed shells (two
    electrons per orbital, dD = 2(x + x^T)) and n = 2 per spin otherwise.
    """
    hessian = _OrbitalHessian(mf)
    rmo = np.array([hessian.vo(r[j]) for j in range(3)])
    alpha = np.zeros((3, 3))
    for j in range(3):
        x = hessian.solve(-rmo[j], CPHF_RTOL, "CPHF equations")
        alpha[:, j] = [hessian.density_trace(rmo[i], x) for i in range(3)]
    return 0.5 * (alpha + alpha.T)


#: Relative residual of the Newton step that estimates an open-shell dipole's
#: convergence error: 1e-6 of a ~1e-10 au estimate is far below what matters.
NEWTON_RTOL = 1e-6


def diagonal_dipole_step(mf, r, fock) -> np.ndarray:
    """The dipole change (3,) of the orbital rotation kappa_ai = -F_ai / (e_a - e_i)
    that the remaining gradient asks for, with the Hessian's diagonal alone.

    Enough for closed shells (0.5-0.65 of the true error for water, measured);
    small gaps amplify the error well beyond |g|, which this follows.
    """
    hessian = _OrbitalHessian(mf)
    x = -hessian.vo(fock) / hessian.diagonal
    return np.array([hessian.density_trace(hessian.vo(r[i]), x) for i in range(3)])


def newton_dipole_step(mf, r, fock=None) -> np.ndarray:
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
    hessian = _OrbitalHessian(mf)
    if fock is None:
        fock = mf.get_fock()
    f_vo = hessian.vo(fock)
    x = hessian.solve(-f_vo, NEWTON_RTOL, "Newton step of the dipole")
    return np.array([hessian.density_trace(hessian.vo(r[i]), x) for i in range(3)])


def evaluate_reference(task: PointTask) -> tuple[PointRecord, ZeroFieldReference]:
    """Compute the zero-field point from scratch and the reference it gives every
    other point: its density (the warm start), occupied orbitals, <S^2> and the
    symmetry operations its state has (the state checks).

    Raises
    ------
    ScfNotConvergedError : the SCF (or CC) never converged.
    """
    if not task.is_zero_field:
        raise ValueError(f"the reference is computed at zero field, not at {task.point.label}")
    return _evaluate(task, None)


def evaluate_point(task: PointTask, reference: ZeroFieldReference) -> PointRecord:
    """Compute one field point from the zero-field ``reference``: SCF started
    from its density (retried if needed), state checks against it, post-HF.

    A point on another state than zero field's (occupied overlap, <S^2>,
    occupation by symmetry) is returned with ``state_issue`` set; the analysis
    leaves it out of every derivative.

    Raises
    ------
    ScfNotConvergedError : the SCF (or CC) never converged.
    """
    return _evaluate(task, reference)[0]


def _evaluate(task: PointTask, reference: ZeroFieldReference | None):
    from pyscf import lib

    start = time.perf_counter()
    lib.logger.QUIET = 0
    molecule, model, point = task.molecule, task.model, task.point
    mol = build_mole(molecule, model.basis)
    mf = _mean_field(mol, model, task.scf)
    r = _apply_field(mf, mol, molecule, point.field_vector_au)
    dm0 = reference.density if reference is not None else None
    attempts, cycles = _converge(mf, dm0, point.label)
    occupied, s2 = _orbital_sets(mf), _s2(mf)
    overlap, issues = 1.0, []
    if reference is not None:
        s_ao = mol.intor_symmetric("int1e_ovlp")
        for c_ref, c in zip(reference.occupied, occupied):
            if c.shape[1] != c_ref.shape[1]:
                overlap = 0.0
                break
            if c.shape[1]:
                overlap = min(overlap, float(np.linalg.svd(c_ref.T @ s_ao @ c,
                                                           compute_uv=False).min()))
        issues = state_issues(reference, point.field_vector_au, occupied, s2, overlap)
        if issues:
            logger.debug("point %s is on another state: %s", point.label, "; ".join(issues))
    want = task.quantities
    dipole = tuple(float(v) for v in _scf_dipole(mf, r, molecule)) if want.dipole else None
    energy = (float(mf.e_tot) if METHODS[model.method].mean_field
              else _correlated_energy(mf, model, task.scf, point.label))
    # One Fock build serves the gradient and the dipole's error estimate. A
    # one-electron system has no electron-electron terms (PySCF's HF1e): its Fock
    # matrix is the core Hamiltonian, and the generic build would compute
    # two-electron integrals for nothing.
    if mol.nelectron == 1:
        h = mf.get_hcore()
        fock = np.array([h, h]) if np.asarray(mf.mo_occ).ndim == 2 else h
    else:
        fock = mf.get_fock()
    grad = mf.get_grad(mf.mo_coeff, mf.mo_occ, fock)
    gradient = float(np.linalg.norm(grad))
    dipole_error = 0.0
    if want.dipole:
        dipole_error = _dipole_error(mf, r, fock, gradient, want.newton_dipole_error)
    alpha = None
    if want.alpha:
        alpha = tuple(tuple(float(v) for v in row) for row in analytic_polarizability(mf, r))
    new_reference = None
    if reference is None:
        new_reference = ZeroFieldReference(np.asarray(mf.make_rdm1()), occupied, s2,
                                           symmetry_operations(mol, mf))
    record = PointRecord(point, energy, float(mf.e_tot), dipole, cycles, tuple(attempts), s2,
                         overlap, gradient, alpha, dipole_error, "; ".join(issues),
                         time.perf_counter() - start)
    return record, new_reference
