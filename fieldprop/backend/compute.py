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
import copy
import dataclasses
import functools
import io
import logging
import math
import os
import tempfile
import time
import warnings

import numpy as np

from fieldprop.errors import FieldpropError, InputError, ScfNotConvergedError
from fieldprop.inputs.job import DEFAULT_GRID_LEVEL, Job
from fieldprop.numerics.methods import METHODS
from fieldprop.points.records import (CPHF_RTOL, DIIS, LINE_START, MIRROR_START, NEWTON, ONE_ELECTRON,
                               ORIENTATION, REFERENCE_START, RESPONSE_START, Orientation,
                               PointRecord, PointTask, SymmetryOperation, ZeroFieldReference)
from fieldprop.numerics.units import BACKEND_BOHR_ANGSTROM

logger = logging.getLogger(__name__)

#: Smallest singular value of the occupied-space overlap with zero field below
#: which a point is on another state. Small fields rotate occupied orbitals by
#: ~F <r> / gap ~ 1e-2, leaving singular values ~0.9999; a swapped orbital gives ~0.
MIN_OCCUPIED_OVERLAP = 0.9
#: Largest change of <S^2> from zero field before a point counts as another state:
#: field-induced changes are O(F^2) ~ 1e-4, a spin flip or new contamination ~0.1-1.
MAX_S2_CHANGE = 0.01
#: Largest distance (bohr) between an atom's image under one of the abelian
#: operations PySCF's detection found and an atom of the same element, for the
#: operation to enter the state checks (symmetry_operations). Looser than PySCF's
#: own detection tolerance (symm.geom.TOLERANCE, 1e-5), so that every operation
#: it found passes; unrelated to symmetry.SYMMETRY_TOLERANCE_BOHR, the framework's
#: own point-group detection.
ATOM_IMAGE_MATCH_BOHR = 1e-4
#: A zero-field character this far from an integer means the state does not have
#: that operation's symmetry (a broken-symmetry solution): the operation is not used.
CHARACTER_TOLERANCE = 0.05
#: Grid points per block when integrating basis-function products (memory bound).
_GRID_BLOCK = 20000
#: PySCF grid level on which <chi_mu | R chi_nu> is integrated for the state
#: checks' characters: ~1e-6 accurate for the overlap, so characters land within
#: ~1e-5 of their integers, far inside CHARACTER_TOLERANCE.
CHARACTER_GRID_LEVEL = 3
#: A character differing from zero field's by more than this has changed: a
#: change of occupation by symmetry moves a character by 2 (an orbital's +1
#: becomes -1), the grid's error by ~1e-5.
CHARACTER_CHANGE = 0.5
#: A symmetry operation keeps a field F when |R F - F| <= this times
#: max(|F|, FIELD_NORM_FLOOR_AU): a kept field moves only by rounding
#: (~1e-16 |F|), a field it does not keep by ~|F|. The floor (au) lies far
#: below any field point; zero field is kept by every operation.
FIELD_KEPT_RTOL = 1e-9
FIELD_NORM_FLOOR_AU = 1e-300

#: The Newton step's relative residual (_newton) is kept within these bounds:
#: no looser than 0.1 (each step still removes ~90 % of the gradient), no
#: tighter than 1e-8 (the step's own quadratic error and the next Fock build's
#: rounding dominate long before); and it need not beat NEWTON_TARGET_SHARE of
#: the target (the rest of the target is left to the step's quadratic error).
NEWTON_RTOL_BOUNDS = (1e-8, 0.1)
NEWTON_TARGET_SHARE = 0.3
#: A CG solve counts as converged when its true residual is within this many
#: times the tolerance asked: SciPy's cg checks its own recursively updated
#: residual, which drifts from the true one by rounding; a residual 10x over
#: means the solve stalled (a near-zero mode), not rounding.
CG_RESIDUAL_SLACK = 10
#: Two solved field vectors lie on one line through zero field (the line start)
#: when they agree to this (au) after scaling: field vectors are exact
#: multiples of their offsets (plan.field_vector), so only rounding separates
#: points on a line, ~1e-19 au at fields ~1e-3.
LINE_START_ATOL_AU = 1e-12
#: Below this t (the tangent of a rotation angle) arctan(t)/t is 1 to double
#: precision (its series is 1 - t^2/3): _rotation_from_reference takes 1 there.
SMALL_ROTATION = 1e-8
#: Iterations a coupled-cluster amplitude solve may take at least (the SCF's
#: max_cycle when larger): CCSD from MP2 amplitudes converges to 1e-12 Eh in
#: 10-50 iterations for the molecules measured, with DIIS.
MIN_AMPLITUDE_ITERATIONS = 100

#: PySCF's ladder (_ladder), after plain DIIS: a level shift (Eh) of the
#: virtual orbitals, DIIS only from cycle LADDER_DIIS_START_CYCLE (the first,
#: damped and shifted cycles are far from convergence and would crowd its
#: subspace), and damping (the share of the old Fock matrix mixed in; not for
#: ROHF, where PySCF's damping fails): the usual cures of an SCF oscillating
#: among near-degenerate orbitals.
LADDER_LEVEL_SHIFT_AU = 0.2
LADDER_DIIS_START_CYCLE = 4
LADDER_DAMPING = 0.3

#: The SCF inside a geometry optimisation (each step's and the final one):
#: an energy to 1e-10 Eh (far below the criteria's energy change, 1e-6 Eh) and
#: an orbital gradient of 1e-6, which moved PySCF's nuclear gradient of water
#: by 2e-9 (HF/6-31G) and 4e-8 Eh/bohr (B3LYP) from a converged SCF's, below
#: the tightest criteria's largest gradient (2e-6 Eh/bohr).
OPTIMISATION_ENERGY_TOL_AU = 1e-10
OPTIMISATION_GRADIENT_TOL = 1e-6


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


def build_mole(molecule, basis, where: str = "[model] basis", cartesian: bool = False):
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
                        spin=molecule.spin, cart=cartesian, verbose=0)
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


#: Atoms closer than this fraction of the sum of their covalent radii (PySCF's
#: table, pyscf.data.radii.COVALENT) are refused as a likely unit mistake: the
#: shortest real bonds are ~0.75 of it; O-H given in angstrom but read as bohr
#: comes out at 0.53 of it, C-C at 0.54.
CLOSE_FRACTION = 0.6


def _refuse_close_atoms(job: Job, molecule) -> None:
    """One line naming the pair, the distance and the other unit, unless the job
    sets [molecule] allow_close_atoms = true."""
    from pyscf.data import radii
    from pyscf.data.elements import charge as atomic_number

    if job.molecule.allow_close_atoms:
        return
    coords = np.asarray(molecule.coords_bohr)
    symbols = molecule.symbols
    covalent = [float(radii.COVALENT[atomic_number(s)]) for s in symbols]
    to_unit = 1.0 / job.molecule.unit_scale
    other = "bohr" if job.molecule.units == "angstrom" else "angstrom"
    for i in range(len(symbols)):
        for j in range(i):
            d = float(np.linalg.norm(coords[i] - coords[j]))
            bond = covalent[i] + covalent[j]
            if d < CLOSE_FRACTION * bond:
                raise InputError(
                    f"{job.path}: [molecule] units = \"{job.molecule.units}\": atoms {j + 1} "
                    f"({symbols[j]}) and {i + 1} ({symbols[i]}) are {d * to_unit:.3f} "
                    f"{job.molecule.units} apart, {d / bond:.2f} of their covalent bond length "
                    f"({bond * to_unit:.3f} {job.molecule.units}); were the coordinates in "
                    f"{other}? Set units = \"{other}\", or allow_close_atoms = true if the "
                    "structure is meant")


def backend_versions(method: str) -> dict:
    """The versions this process computes a model with, as backend facts
    (keys.BACKEND_VERSION_FACTS): PySCF's, and for DFT the libxc library's."""
    import pyscf

    versions = {"pyscf_version": pyscf.__version__}
    if method == "dft":
        from pyscf.dft import libxc

        versions["libxc_version"] = libxc.libxc_version()
    return versions


def validate(job: Job, molecule) -> dict:
    """Check what only PySCF can judge (basis, functional) before any work.

    Returns facts for provenance: number of basis functions, Cartesian or
    spherical functions, the electrons each atom's effective core potential
    replaces (0 without one), the functional as libxc parses it, PySCF's version
    and for DFT libxc's (backend_versions).
    """
    import pyscf
    from pyscf.data.nist import BOHR
    from pyscf.dft import libxc

    if BOHR != BACKEND_BOHR_ANGSTROM:
        # The job's angstrom was turned into bohr with units.BACKEND_BOHR_ANGSTROM,
        # which no longer is PySCF's: the molecule would not be the one PySCF
        # builds from the same XYZ.
        raise FieldpropError(f"PySCF {pyscf.__version__} converts angstrom with a bohr of "
                             f"{BOHR!r} angstrom, fieldprop's default is PySCF's former "
                             f"{BACKEND_BOHR_ANGSTROM!r}; update fieldprop, or set "
                             f"[molecule] bohr_angstrom = {BOHR!r} in {job.path}")
    _refuse_close_atoms(job, molecule)
    mol = build_mole(molecule, job.model.basis, f"{job.path}: [model] basis",
                     job.model.cartesian)
    facts = {**backend_versions(job.model.method), "n_basis_functions": int(mol.nao),
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
    if job.model.density_fit is not None:
        facts.update(auxiliary_basis(job, mol))
    if not METHODS[job.model.method].mean_field:
        frozen = frozen_orbitals(mol, job.model)
        facts["frozen_core_orbitals"] = frozen
        facts["correlated_electrons"] = int(mol.nelectron) - 2 * frozen
    return facts


def auxiliary_basis(job: Job, mol) -> dict:
    """The density-fitting basis of ``job`` checked on ``mol``: its name (PySCF's
    choice for "auto") and number of functions, for provenance."""
    from pyscf import df

    name = job.model.density_fit
    aux = df.make_auxbasis(mol) if name == "auto" else name
    try:
        # PySCF explains a missing basis on stdout and in a warning: the one
        # line below says it.
        with contextlib.redirect_stdout(io.StringIO()), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            auxmol = df.addons.make_auxmol(mol, aux)
    except (KeyError, RuntimeError, ValueError, TypeError, OSError) as exc:
        why = " ".join(str(exc).split())
        raise InputError(f"{job.path}: [model] density_fit {name!r} is not an auxiliary basis "
                         f"PySCF has for every element ({type(exc).__name__}: {why}); use "
                         "true for PySCF's default, or a name such as def2-universal-jkfit"
                         ) from None
    label = aux if isinstance(aux, str) else {k: v if isinstance(v, str) else "generated"
                                              for k, v in sorted(aux.items())}
    return {"auxiliary_basis": label, "n_auxiliary_functions": int(auxmol.nao)}


def frozen_orbitals(mol, model) -> int:
    """Core orbitals a correlated method leaves out (PySCF's chemcore, which
    counts an effective core potential's electrons as gone), or 0."""
    from pyscf.data.elements import chemcore

    return int(chemcore(mol)) if model.frozen_core else 0


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
    if model.density_fit is not None:
        mf = mf.density_fit(auxbasis=None if model.density_fit == "auto" else model.density_fit)
    mf.conv_tol = scf_spec.energy_conv_tol_au
    mf.conv_tol_grad = scf_spec.gradient_conv_tol
    mf.max_cycle = scf_spec.max_cycle
    mf.verbose = 0
    # No checkpoint file: the store keeps what is needed, and PySCF's temporary
    # file, inherited by forked workers, would be deleted twice.
    mf.chkfile, mf._chkfile = None, None
    return mf


def _apply_field(mf, context, field_vector_au) -> None:
    """Add -mu_op.F to the Hamiltonian of ``mf``, measured from the job's origin
    (the dipole integrals and the field-free core Hamiltonian come from the
    context, computed once)."""
    f = np.asarray(field_vector_au, dtype=float)
    h = context.hcore + np.einsum("x,xij->ij", f, context.r)
    e_nuc = context.energy_nuc - float(f @ context.molecule.nuclear_dipole_au())
    mf.get_hcore = lambda *args, **kwargs: h
    mf.energy_nuc = lambda *args, **kwargs: e_nuc


#: DFT integration grid (PySCF level) of the exchange-correlation kernel in the
#: Newton steps' orbital Hessian (see ModelContext.response).
NEWTON_GRID_LEVEL = 2


class ModelContext:
    """What the field does not change, computed once per molecule, model and
    process and shared by every point computed there.

    The molecule (PySCF ``Mole``), the field-free core Hamiltonian, overlap and
    dipole integrals (about the job's origin), and a template mean-field object
    holding the two-electron integrals in memory when they fit (PySCF's own
    rule, ``_is_mem_enough``) and, for DFT, the built integration grid; each
    point's mean-field object is a shallow copy of it with the field applied, so
    it shares them. With a zero-field ``reference`` (attached once computed),
    also its density-response function (J, K and, for DFT, the
    exchange-correlation kernel at the zero-field density), used by the Newton
    steps of every point.
    """

    def __init__(self, molecule, model, scf_spec, reference: ZeroFieldReference | None = None):
        self.molecule, self.model, self.scf = molecule, model, scf_spec
        self.mol = build_mole(molecule, model.basis, cartesian=model.cartesian)
        self.template = _mean_field(self.mol, model, scf_spec)
        self.hcore = self.template.get_hcore()
        self.overlap = self.template.get_ovlp()
        self.energy_nuc = self.mol.energy_nuc()
        with self.mol.with_common_orig(molecule.origin_bohr):
            self.r = self.mol.intor_symmetric("int1e_r", comp=3)
        template = self.template
        template.get_ovlp = lambda *args, **kwargs: self.overlap
        if model.density_fit is not None:
            template.with_df.build()  # the three-index integrals, once per process
        elif self.mol.nelectron > 1 and (template._is_mem_enough() or self.mol.incore_anyway):
            template._eri = self.mol.intor("int2e", aosym="s8")
        if model.method == "dft":
            template.grids.build()
        self.reference: ZeroFieldReference | None = None
        #: Converged rotations (from the zero-field orbitals) of the points
        #: solved in this process or handed in, by field vector: starts for
        #: the points at the opposite field and further along the same line.
        self.solved: dict[tuple[float, float, float], np.ndarray] = {}
        #: The orientation constraints of a reference that breaks a rotational
        #: symmetry of the molecule (orientation_constraints); empty otherwise.
        self.constraints: tuple[np.ndarray, ...] = ()
        if reference is not None:
            self.attach(reference)

    def attach(self, reference: ZeroFieldReference) -> None:
        """Use ``reference`` as every later point's start and state reference."""
        self.reference = reference
        self.solved = {}
        self.__dict__.pop("response", None)
        self.constraints = ()
        if reference.mo_coeff is not None:
            self.template.mo_coeff = reference.mo_coeff
            self.template.mo_occ = reference.mo_occ
            if _has_hessian(self.template):
                self.constraints = orientation_constraints(self, reference.mo_coeff,
                                                           reference.mo_occ)

    @functools.cached_property
    def response(self):
        """The zero-field density-response function used by the Newton steps
        (None without one). For DFT its exchange-correlation kernel is
        integrated on a coarse grid (NEWTON_GRID_LEVEL): each Hessian product
        then costs a fraction of a Fock build, and the step it gives is exact
        to the grid's accuracy, far better than the steps need (the gradient
        that decides convergence is always that of the job's own grid)."""
        if self.reference is None or self.reference.mo_coeff is None or not _has_hessian(
                self.template):
            return None
        solver = self.template
        if self.model.method == "dft" and (self.scf.grid_level or 0) > NEWTON_GRID_LEVEL:
            from pyscf import dft

            solver = copy.copy(self.template)
            solver._eri, solver._opt = self.template._eri, self.template._opt
            solver.grids = dft.gen_grid.Grids(self.mol)
            solver.grids.level = NEWTON_GRID_LEVEL
            solver.grids.verbose = 0
            solver.grids.build()
        return response_function(solver)

    def mean_field(self, field_vector_au):
        """A mean-field object for one field point, sharing the context's integrals."""
        mf = copy.copy(self.template)
        # PySCF's copy leaves out the integrals and the screening data (its
        # __getstate__); the point shares the template's instead.
        mf._eri = self.template._eri
        mf._opt = self.template._opt
        for key in ("mo_coeff", "mo_occ", "mo_energy"):
            setattr(mf, key, None)
        mf.converged, mf.e_tot = False, 0.0
        _apply_field(mf, self, field_vector_au)
        return mf

#: An orbital set whose rotation about a symmetry axis of the molecule changes
#: it by less than this (norm of the generator's occupied-virtual block) keeps
#: that symmetry: no orientation constraint.
ORIENTATION_MIN_NORM = 1e-6
#: Largest orientation drift (the constrained density coherence, ~ the angle in
#: radians by which the state turned about the axis) before a point counts as
#: another state than zero field's.
MAX_ORIENTATION_DRIFT = 1e-5
#: Smallest anisotropy of the unpaired density (e bohr^2) that fixes an
#: orientation to align; below it the state is left as converged.
ORIENTATION_MIN_ANISOTROPY = 1e-8
#: A turn (radians) below which a state counts as aligned already.
ORIENTATION_MIN_TURN = 1e-12


def _angular_momentum(mol, centre) -> np.ndarray:
    """<chi_mu | ((r - centre) x grad)_k | chi_nu>, shape (3, nao, nao): real,
    antisymmetric; exp(theta S^-1 L_k) turns orbitals by -theta about axis k."""
    with mol.with_common_orig(centre):
        return mol.intor("int1e_cg_irxp", comp=3)


def _restricted_open(mo_occ) -> bool:
    """Occupations of a restricted open shell (ROHF, ROKS): one orbital set with
    doubly and singly occupied orbitals."""
    occ = np.asarray(mo_occ)
    return occ.ndim == 1 and bool(np.any(occ == 1))


def _set_blocks(mo_coeff, mo_occ):
    """(occupied, virtual) coefficients per spin density and the density weight:
    alpha and beta (unrestricted; a restricted open shell, whose alpha electrons
    occupy the doubly and singly occupied orbitals and beta the doubly occupied
    ones), or the one closed-shell set (two electrons per orbital)."""
    occ = np.asarray(mo_occ)
    if occ.ndim == 2:
        return [(c[:, o > 0], c[:, o == 0]) for c, o in zip(mo_coeff, occ)], 1.0
    if _restricted_open(occ):
        return [(mo_coeff[:, occ > 0], mo_coeff[:, occ == 0]),
                (mo_coeff[:, occ == 2], mo_coeff[:, occ < 2])], 1.0
    return [(mo_coeff[:, occ > 0], mo_coeff[:, occ == 0])], 2.0


def _pairs(mo_occ) -> np.ndarray:
    """The non-redundant rotations of one orbital set, (nmo, nmo) bool: p (row)
    less occupied than q (column). For a closed shell the virtual-occupied
    block; for a restricted open shell also open-core and virtual-open (PySCF's
    ROHF gradient has this layout, row by row)."""
    occ = np.asarray(mo_occ)
    return occ[:, None] < occ[None, :]


def _spin_occupations(mo_occ) -> np.ndarray:
    """(2, nmo) alpha and beta occupations of a restricted open shell."""
    occ = np.asarray(mo_occ)
    return np.array([occ > 0, occ == 2], dtype=float)


def _restricted_open_layout(c, mo_occ, matrices) -> np.ndarray:
    """sum_s (n_q^s - n_p^s) [C^T M_s C]_pq over the non-redundant pairs (p, q)
    (_pairs) of a restricted open shell: PySCF's ROHF gradient for the alpha and
    beta Fock matrices M_s (one AO matrix ``matrices`` serves both spins; a
    Roothaan Fock matrix gives its alpha and beta ones)."""
    if getattr(matrices, "focka", None) is not None:
        matrices = (matrices.focka, matrices.fockb)
    elif np.ndim(matrices) == 2:
        matrices = (matrices, matrices)
    out = 0.0
    for n, m in zip(_spin_occupations(mo_occ), matrices):
        out = out + (n[None, :] - n[:, None]) * (c.T @ m @ c)
    return out[_pairs(mo_occ)]


def orientation_constraints(context, mo_coeff, mo_occ) -> tuple[np.ndarray, ...]:
    """The orientations a field point must keep, for a zero-field state that
    breaks a rotational symmetry of its molecule (rotation_axes).

    Turning such a state about the axis costs no energy at zero field (a zero
    mode of the orbital Hessian), and a field off the axis turns it at second
    order: the point would leave the zero-field state's orientation (the energy
    route's mixed points), or crawl along the flat mode (a DFT grid's slight
    anisotropy), and no derivative would belong to one state. fieldprop keeps
    each point at the orientation of zero field, which gives the tensors of the
    zero-field determinant, those an analytic CPHF/CPKS code gives it.

    Each constraint is a symmetric AO matrix W (one per orbital set, stacked for
    unrestricted orbitals): c(D) = sum_sets tr(W D) vanishes at zero field and
    changes by the angle (radians) of a small turn about the axis; the Newton
    steps keep c = 0 and leave the gradient along dc free (its Lagrange
    multiplier). With c fixed, dE/dF is still -mu: both routes stay consistent.
    """
    centre, axes = context.molecule.rotation_axes()
    if not len(axes):
        return ()
    lmat = np.einsum("kx,xij->kij", axes, _angular_momentum(context.mol, centre))
    blocks, _ = _set_blocks(mo_coeff, mo_occ)
    s = context.overlap
    out = []
    for lk in lmat:
        n = [cv.T @ lk @ co for co, cv in blocks]
        norm = float(np.sqrt(sum(np.sum(b * b) for b in n)))
        if norm <= ORIENTATION_MIN_NORM:
            continue
        w = [s @ cv @ (b / norm) @ co.T @ s for (co, cv), b in zip(blocks, n)]
        w = np.array([0.5 * (m + m.T) for m in w])
        out.append(w if len(w) == 2 else w[0])
    return tuple(out)


def _constraint_values(constraints, dm) -> np.ndarray:
    """c_k(D) of each constraint (radians of turn from the zero-field orientation)."""
    dm = np.asarray(dm)
    return np.array([float(np.sum(w * np.swapaxes(dm, -1, -2))) for w in constraints])


def _unpaired_second_moment(context, mf) -> np.ndarray:
    """int (r - c)(r - c)^T (rho_alpha - rho_beta) (3, 3; e bohr^2) about the
    point c of the molecule's rotation axes (rotation_axes)."""
    centre, _ = context.molecule.rotation_axes()
    dm = np.asarray(mf.make_rdm1())
    unpaired = dm[0] - dm[1] if dm.ndim == 3 else dm
    with context.mol.with_common_orig(centre):
        return np.einsum("xij,ji->x", context.mol.intor_symmetric("int1e_rr", comp=9),
                         unpaired).reshape(3, 3)


def _orientation(context, mf) -> np.ndarray | None:
    """The active rotation (3x3) that takes the unpaired density's principal
    axes to the molecule's orientation frame (MoleculeSpec.orientation_frame):
    for a linear molecule, the in-plane axis of its largest second moment onto
    u; for an atom, the three axes onto x, y, z (largest moment first). None
    when the molecule has no rotation axis, the state breaks none, or the
    density is too isotropic to tell."""
    from scipy.spatial.transform import Rotation

    _, axes = context.molecule.rotation_axes()
    if not len(axes) or not orientation_constraints(context, mf.mo_coeff, mf.mo_occ):
        return None
    second = _unpaired_second_moment(context, mf)
    if len(axes) == 1:
        e1, e2, n = context.molecule.orientation_frame()
        q11, q22, q12 = e1 @ second @ e1, e2 @ second @ e2, e1 @ second @ e2
        if np.hypot(q11 - q22, 2 * q12) < ORIENTATION_MIN_ANISOTROPY:
            return None
        phi = 0.5 * np.arctan2(2 * q12, q11 - q22)  # principal axis, from e1 towards e2
        return Rotation.from_rotvec(-phi * n).as_matrix()
    values, vectors = np.linalg.eigh(second)
    if np.ptp(values) < ORIENTATION_MIN_ANISOTROPY:
        return None
    vectors = vectors[:, ::-1]
    if np.linalg.det(vectors) < 0:
        vectors[:, 2] *= -1
    return vectors.T


#: A zero-field state lies in its orientation frame when its unpaired density's
#: second moments there have off-diagonal elements below this fraction of their
#: spread (about the angle, in radians, by which it is off; the alignment leaves
#: ~1e-12 at HF and ~1e-6 at DFT).
ORIENTATION_ALIGNED = 1e-4


def orientation_record(context, mf) -> Orientation | None:
    """The orientation a degenerate open shell's zero-field state ``mf`` has
    (None when it breaks no rotational symmetry): the molecule's orientation
    frame, where _align put it, or, for a state not turned there (PySCF's
    ladder alone, ``[scf] solver = "diis"``), the unpaired density's own
    principal axes in the same order; and its second moments along them,
    measured on the state."""
    if not context.constraints:
        return None
    centre, axes = context.molecule.rotation_axes()
    linear = len(axes) == 1
    frame = context.molecule.orientation_frame()
    second = _unpaired_second_moment(context, mf)
    moments = frame @ second @ frame.T
    diagonal = np.diag(moments)
    spread = np.ptp(diagonal[:2] if linear else diagonal)
    ordered = diagonal[0] >= diagonal[1] if linear else bool(np.all(np.diff(diagonal) <= 0))
    if not (ordered and np.abs(moments - np.diag(diagonal)).max() <= ORIENTATION_ALIGNED * spread):
        rotation = _orientation(context, mf)  # principal axes -> frame: the axes are its rows
        frame = frame @ rotation
        moments = frame @ second @ frame.T
    return Orientation("linear" if linear else "atom",
                       tuple(tuple(float(v) for v in row) for row in frame),
                       tuple(float(v) for v in np.diag(moments)),
                       tuple(float(v) for v in centre))


def _align(mf, context) -> bool:
    """Turn a zero-field state that breaks a rotational symmetry of its molecule
    to the orientation of _orientation (the same energy: the Hamiltonian has
    that symmetry), so that its tensors come out in a reproducible frame.
    Returns whether it turned."""
    from scipy.linalg import expm
    from scipy.spatial.transform import Rotation

    rotation = _orientation(context, mf)
    if rotation is None:
        return False
    centre, _ = context.molecule.rotation_axes()
    omega = Rotation.from_matrix(rotation).as_rotvec()
    if np.linalg.norm(omega) < ORIENTATION_MIN_TURN:
        return False
    generator = np.einsum("x,xij->ij", omega, _angular_momentum(context.mol, centre))
    turn = expm(-np.linalg.solve(context.overlap, generator))
    c = np.asarray(mf.mo_coeff)
    mf.mo_coeff = np.array([turn @ cs for cs in c]) if c.ndim == 3 else turn @ c
    return True


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


def _element_counts(mol) -> list[tuple[str, int]]:
    """(symbol, count) of the molecule's atoms, in order of first appearance."""
    counts: dict[str, int] = {}
    for i in range(mol.natm):
        counts[mol.atom_pure_symbol(i)] = counts.get(mol.atom_pure_symbol(i), 0) + 1
    return list(counts.items())


def symmetry_operations(mol, mf) -> tuple[SymmetryOperation, ...]:
    """The operations of the molecule's largest abelian point subgroup (D2h and
    its subgroups) that the zero-field state ``mf`` shares, with their action on
    the basis functions.

    PySCF's detection gives the symmetry frame; each of the seven sign changes
    of its axes is kept if it maps every atom onto an atom of the same element
    (same basis). <chi_mu | R chi_nu> is integrated on a DFT grid
    (CHARACTER_GRID_LEVEL), so characters come out within ~1e-5 of their
    integers; state_issues allows CHARACTER_CHANGE.
    """
    import itertools

    from pyscf import dft, symm
    from pyscf.lib.exceptions import PointGroupSymmetryError

    try:
        group, origin, axes = symm.detect_symm(mol._atom)
        group, axes = symm.as_subgroup(group, axes)
    except (PointGroupSymmetryError, AssertionError) as exc:
        # What PySCF's detection raises for a framework it cannot classify:
        # its own error, or (a near-icosahedral one taken for T or O) an
        # assertion of its search. Called once per model (at zero field).
        formula = "".join(f"{s}{n if n > 1 else ''}" for s, n in _element_counts(mol))
        logger.warning("%s: PySCF's point-group detection failed (%s%s); the "
                       "occupation-by-symmetry check is skipped for this model (the "
                       "occupied-overlap and <S^2> checks still apply)", formula,
                       type(exc).__name__, f": {exc}" if str(exc) else "")
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
                   np.linalg.norm(image[i] - coords[j]) < ATOM_IMAGE_MATCH_BOHR
                   for j in range(mol.natm)) for i in range(mol.natm)):
            chosen.append((signs, matrix))
    if not chosen:
        return ()
    grids = dft.gen_grid.Grids(mol)
    grids.level = CHARACTER_GRID_LEVEL
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
        if np.linalg.norm(op.matrix @ f - f) > FIELD_KEPT_RTOL * max(np.linalg.norm(f),
                                                                      FIELD_NORM_FLOOR_AU):
            continue  # the field breaks this symmetry: its characters may change
        chars = _characters(sets, op.representation)
        if any(abs(c - c0) > CHARACTER_CHANGE for c, c0 in zip(chars, op.characters)):
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


def _has_hessian(mf) -> bool:
    """RHF, UHF, RKS and UKS have the orbital Hessian of _OrbitalHessian,
    ROHF and ROKS that of _RestrictedOpenHessian (every mean field fieldprop
    builds; not PySCF's generalised or relativistic ones)."""
    from pyscf.scf import hf, uhf

    return isinstance(mf, (hf.RHF, uhf.UHF))


def _gradient_norm(mf, fock=None, constraints=(), c=None, occ=None) -> float:
    """|orbital gradient| of orbitals ``c`` (default mf's), without its part
    along the orientation ``constraints``' gradients (their multipliers')."""
    c = mf.mo_coeff if c is None else c
    occ = mf.mo_occ if occ is None else occ
    if fock is None:
        fock = mf.get_fock()
    g = mf.get_grad(c, occ, fock)
    if constraints:
        gradients = _constraint_gradients(c, occ, constraints)
        g = g - gradients @ np.linalg.lstsq(gradients, g, rcond=None)[0]
    return float(np.linalg.norm(g))


def _constraint_gradients(c, occ, constraints) -> np.ndarray:
    """d c_k / d x for the occupied-virtual rotations x of orbitals ``c`` (columns),
    in the layout of PySCF's gradient and of the orbital Hessians."""
    if _restricted_open(occ):
        return np.array([2.0 * _restricted_open_layout(c, occ, w) for w in constraints]).T
    blocks, weight = _set_blocks(c, occ)
    columns = []
    for w in constraints:
        ws = w if np.ndim(w) == 3 else [w]
        columns.append(np.concatenate([(2.0 * weight * cv.T @ m @ co).ravel()
                                       for m, (co, cv) in zip(ws, blocks)]))
    return np.array(columns).T


def _semicanonical(c, occ, fock):
    """Orbitals that diagonalise the Fock matrix within the occupied and within
    the virtual space (for a restricted open shell: within the doubly, singly
    and unoccupied spaces, with Roothaan's Fock matrix; the densities are
    unchanged), and those diagonal values."""
    if np.asarray(occ).ndim == 2:
        pairs = [_semicanonical(c[k], occ[k], fock[k]) for k in range(2)]
        return np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
    c = np.array(c, copy=True)
    energies = np.zeros(c.shape[1])
    for value in np.unique(occ):  # doubly, singly (restricted open shell) and unoccupied
        mask = occ == value
        block = c[:, mask]
        values, vectors = np.linalg.eigh(block.T @ fock @ block)
        c[:, mask] = block @ vectors
        energies[mask] = values
    return c, energies


def _rotate(c, occ, x):
    """c exp(K) with K_vo = x, K_ov = -x^T per orbital set (x: the sets' virtual x
    occupied blocks, concatenated; for a restricted open shell K = x on the
    pairs of _pairs): the rotation whose density change the orbital Hessians'
    matvec assumes."""
    from scipy.linalg import expm

    if _restricted_open(occ):  # one set, the pairs of _pairs
        k = np.zeros((c.shape[1], c.shape[1]))
        k[_pairs(occ)] = x
        return c @ expm(k - k.T)
    sets = [c] if np.asarray(occ).ndim == 1 else list(c)
    occs = [occ] if np.asarray(occ).ndim == 1 else list(occ)
    out, start = [], 0
    for cs, os_ in zip(sets, occs):
        o, v = np.where(os_ > 0)[0], np.where(os_ == 0)[0]
        block = np.asarray(x[start:start + v.size * o.size]).reshape(v.size, o.size)
        start += block.size
        k = np.zeros((cs.shape[1], cs.shape[1]))
        k[np.ix_(v, o)] = block
        k[np.ix_(o, v)] = -block.T
        out.append(cs @ expm(k))
    return out[0] if len(out) == 1 else np.array(out)


#: Newton steps at most per point; a step that does not lower the gradient
#: below STALL_RATIO times the previous one is stalled, and MAX_STALLED_STEPS
#: in a row end the Newton finish.
MAX_NEWTON_STEPS = 12
#: The Newton step's relative residual per unit (Eh) of the gradient it removes.
NEWTON_RTOL_PER_GRADIENT = 1.0
STALL_RATIO = 0.5
MAX_STALLED_STEPS = 3
#: Gradient to which DIIS takes a cold (zero-field) SCF before Newton steps
#: finish it: where DIIS still converges fast; and the DIIS cycles after which
#: the Newton steps take over wherever DIIS got to (a flat mode, such as the
#: orientation of a degenerate open shell, keeps DIIS wandering: OH at UKS
#: took 220 cycles to 1e-6, the Newton steps 10 from 1e-4).
DIIS_HANDOVER = 1e-6
DIIS_HANDOVER_CYCLES = 40


def _newton(mf, context, c, occ, target: float,
            constraints=()) -> tuple[int, float, np.ndarray]:
    """Newton steps with the orbital Hessian from orbitals ``c`` towards gradient
    ``target``; leaves the best state reached in ``mf`` (semi-canonical
    orbitals, energies, e_tot). Returns (Fock builds and Hessian products, the
    gradient reached, the Fock matrix of that state).

    Each step builds the Fock matrix (one build), semi-canonicalises, and solves
    (A + B) x = -F_vo by preconditioned conjugate gradients (one
    build-like product per iteration) to a relative residual that the quadratic
    convergence makes sufficient (tighter as the target nears). The response
    function is the context's zero-field one (exact for HF, whose J and K do not
    depend on the density; the DFT kernel changes by O(F), which slows but does
    not stop the convergence). A step may raise the gradient (a soft mode, such
    as the rotation of a degenerate open shell's orbitals about a linear
    molecule's axis, takes several); the best state reached is kept, and
    MAX_STALLED_STEPS steps in a row that do not halve the gradient end the
    finish: the gradient has reached the floor double precision allows.

    With orientation ``constraints`` (orientation_constraints) each step keeps
    them (projected solve, plus the least step that restores c = 0), and the
    gradient that decides is the one orthogonal to their gradients.
    """
    h1e, s1e = mf.get_hcore(), context.overlap
    work, best, stalled, steps, last = 0, None, 0, 0, np.inf
    while True:
        dm = mf.make_rdm1(c, occ)
        vhf = mf.get_veff(mf.mol, dm)
        work += 1
        fock = mf.get_fock(h1e, s1e, vhf, dm)
        c, energies = _semicanonical(c, occ, fock)
        g = _gradient_norm(mf, fock, constraints, c, occ)
        if not np.isfinite(g):
            break
        if best is None or g < best[0]:
            best = (g, c, energies, float(mf.energy_tot(dm, h1e, vhf)), fock)
        stalled = stalled + 1 if g > STALL_RATIO * last else 0
        last = g
        if g <= target or stalled >= MAX_STALLED_STEPS or steps >= MAX_NEWTON_STEPS:
            break
        mf.mo_coeff, mf.mo_occ, mf.mo_energy = c, occ, energies
        hessian = _orbital_hessian(mf, context.response, constraints, fock)
        # The step's linear-solve error (rtol g) need not beat the quadratic
        # error of an exact step (~g^2 per Eh, measured 0.5-1 for water), nor
        # a share of the target.
        rtol = float(np.clip(max(NEWTON_TARGET_SHARE * target / g,
                                 NEWTON_RTOL_PER_GRADIENT * g), *NEWTON_RTOL_BOUNDS))
        try:
            x = hessian.solve(-hessian.vo(fock), rtol, "Newton step")
        except ScfNotConvergedError:
            work += hessian.products
            break  # leave it to the ladder
        work += hessian.products
        if constraints:
            drift = _constraint_values(constraints, dm)
            x = x - np.linalg.lstsq(hessian.constraint_gradients.T, drift, rcond=None)[0]
        c = _rotate(c, occ, x)
        steps += 1
    g, c, energies, e_tot, fock = best
    mf.mo_coeff, mf.mo_occ, mf.mo_energy, mf.e_tot = c, occ, energies, e_tot
    return work, g, fock


def _start_orbitals(context, field_vector_au) -> tuple[np.ndarray, str]:
    """The start of a point at field F, and its name: the zero-field orbitals
    rotated by

    - ``mirror_start``: kappa(-F) + 2 kappa_1 F, when the point at -F was solved
      in this process (kappa(F) = kappa_1 F + kappa_2 F^2 + O(F^3): exact to
      second order);
    - ``line_start``: kappa_1 F + (kappa(a) + kappa(-a)) / (2 t^2), when the
      points at a = t F and -a were (the quadratic term from the pair; exact to
      second order);
    - ``response_start``: kappa_1 F, the linear response (first order).

    kappa are the occupied-virtual rotations of _rotate; a solved point's comes
    from its converged orbitals (_rotation_from_reference).
    """
    ref = context.reference
    if ref.field_rotations is None or not np.size(ref.field_rotations):
        return ref.mo_coeff, REFERENCE_START
    f = np.asarray(field_vector_au, dtype=float)
    linear = np.einsum("j,jn->n", f, ref.field_rotations)
    solved = context.solved
    mirror = solved.get(field_key(-f))
    if mirror is not None:
        return _rotate(ref.mo_coeff, ref.mo_occ, mirror + 2.0 * linear), MIRROR_START
    best = None
    for key, x in solved.items():
        a = np.asarray(key)
        t = float(a @ f) / float(f @ f)
        partner = solved.get(field_key(-a))
        if (0.0 < t < 1.0 and partner is not None and np.allclose(a, t * f, rtol=0.0,
                                                                  atol=LINE_START_ATOL_AU)
                and (best is None or t > best[0])):
            best = (t, x, partner)
    if best is not None:
        t, x, partner = best
        return (_rotate(ref.mo_coeff, ref.mo_occ, linear + (x + partner) / (2.0 * t * t)),
                LINE_START)
    return _rotate(ref.mo_coeff, ref.mo_occ, linear), RESPONSE_START


def field_key(field) -> tuple[float, float, float]:
    """A field vector as a dictionary key (exact floats; -0.0 is 0.0)."""
    return tuple(float(v) + 0.0 for v in field)


def _rotation_from_reference(ref_c, ref_occ, c, overlap) -> np.ndarray:
    """The occupied-virtual rotation x (_rotate's layout) that takes the
    reference orbitals to the occupied space of ``c``, exactly: per set
    M = X Y^-1 with X = C0_v^T S C_o, Y = C0_o^T S C_o (independent of rotations
    within the occupied space) is x Sigma^-1 tan(Sigma), Sigma = (x^T x)^(1/2),
    so M^T M = tan(Sigma)^2 and x = M f(M^T M), f(T) = arctan(T^1/2) / T^1/2.
    A restricted open shell: _restricted_open_rotation."""
    if _restricted_open(ref_occ):
        return _restricted_open_rotation(ref_c, ref_occ, c, overlap)
    sets = [ref_c] if np.asarray(ref_occ).ndim == 1 else list(ref_c)
    occs = [ref_occ] if np.asarray(ref_occ).ndim == 1 else list(ref_occ)
    new = [c] if np.asarray(ref_occ).ndim == 1 else list(c)
    parts = []
    for c0, o, c1 in zip(sets, occs, new):
        occupied, virtual = c0[:, o > 0], c0[:, o == 0]
        c1_occ = c1[:, o > 0]
        x = virtual.T @ overlap @ c1_occ
        y = occupied.T @ overlap @ c1_occ
        m = np.linalg.solve(y.T, x.T).T
        w, v = np.linalg.eigh(m.T @ m)
        root = np.sqrt(np.clip(w, 0.0, None))
        f = np.ones_like(root)
        big = root > SMALL_ROTATION
        f[big] = np.arctan(root[big]) / root[big]
        parts.append((m @ (v * f) @ v.T).ravel())
    return np.concatenate(parts)


#: Passes of _restricted_open_rotation at most, and the size of a correction
#: (radians) below which it has converged: the first pass errs by O(K^3), each
#: further one shrinks that by about |K| (random rotations of 1e-2 radians:
#: corrections 7e-10, 8e-12, 7e-14), so four leave a start far closer than the
#: Newton steps need.
ROTATION_PASSES = 4
ROTATION_CONVERGED = 1e-12


def _restricted_open_rotation(ref_c, ref_occ, c, overlap) -> np.ndarray:
    """The rotation x on the pairs of _pairs that takes the reference orbitals
    of a restricted open shell to the doubly and singly occupied spaces of
    ``c``: U = C0^T S C1 is exp(K) times a rotation within each space; turning
    U's diagonal blocks symmetric (their polar factors) leaves exp(K) but for
    O(K^3) (the antisymmetric part of K^3's diagonal blocks), whose logarithm's
    non-redundant part is K to that order; passes on the remainder exp(-x) U
    refine it (ROTATION_PASSES)."""
    from scipy.linalg import logm

    u = ref_c.T @ overlap @ c
    pairs = _pairs(ref_occ)
    spaces = [ref_occ == value for value in np.unique(ref_occ)]
    x = np.zeros(int(pairs.sum()))
    for _ in range(ROTATION_PASSES):
        rest = _rotate(np.eye(len(ref_occ)), ref_occ, -x) @ u
        for space in spaces:
            w, _, vt = np.linalg.svd(rest[np.ix_(space, space)])
            rest[:, space] = rest[:, space] @ (vt.T @ w.T)
        step = np.real(logm(rest))[pairs]
        x = x + step
        if np.abs(step).max(initial=0.0) < ROTATION_CONVERGED:
            break
    return x


def _ladder(mf, dm0, target: float, attempts: list[str]) -> int:
    """PySCF's own SCF along a ladder of strategies, from ``dm0``, until one
    converges to ``target``: DIIS; a level shift (with damping, except for
    restricted open shells, where PySCF's damping fails); second-order SCF.
    Leaves the best state reached in ``mf``; returns the cycles."""
    from pyscf.scf import rohf

    restricted_open = isinstance(mf, rohf.ROHF)
    shift = {"level_shift": LADDER_LEVEL_SHIFT_AU, "diis_start_cycle": LADDER_DIIS_START_CYCLE}
    if not restricted_open:
        shift["damp"] = LADDER_DAMPING
    strategies = [(DIIS, {}), ("diis+level_shift" if restricted_open else
                                 "diis+damping+level_shift", shift), ("second_order", None)]
    cycles, best = 0, None
    mf.conv_tol_grad = target
    for name, settings in strategies:
        attempts.append(name)
        if settings is None:
            solver = mf.newton()
            solver.verbose = 0
            solver.kernel(mf.make_rdm1() if mf.mo_coeff is not None else dm0)
            cycles += int(getattr(solver, "cycles", 0) or 0)
            if solver.mo_coeff is not None:
                for key in ("mo_coeff", "mo_occ", "mo_energy", "e_tot"):
                    setattr(mf, key, getattr(solver, key))
        else:
            for key, value in settings.items():
                setattr(mf, key, value)
            mf.kernel(dm0)
            cycles += int(getattr(mf, "cycles", 1) or 1)
        g = _gradient_norm(mf)
        if best is None or g < best[0]:
            best = (g, mf.mo_coeff, mf.mo_occ, mf.mo_energy, mf.e_tot)
        if g <= target:
            break
        dm0 = mf.make_rdm1()
    for key, value in zip(("mo_coeff", "mo_occ", "mo_energy", "e_tot"), best[1:]):
        setattr(mf, key, value)
    mf.level_shift, mf.damp = 0.0, 0.0
    return cycles


def _converge(mf, context, point, scf=None) -> tuple[list[str], int, np.ndarray | None]:
    """Converge the SCF of one field point; returns the strategies tried, the
    cycles (Fock builds and Hessian products) and the Fock matrix of the final
    state when the Newton steps built it (None otherwise).

    With ``[scf] solver = "newton"`` (every mean field: RHF, UHF, ROHF, RKS,
    UKS, ROKS): a field point starts from the zero-field orbitals rotated by their
    linear response to the field ("response start", exact to first order) and
    takes Newton steps to the target; zero field itself takes DIIS to
    DIIS_HANDOVER from PySCF's initial guess, then Newton steps. Anything that
    does not reach the target goes down PySCF's ladder (_ladder). A point that
    ends at a gradient at most ScfSpec.gradient_accepted (it stalled at the
    floor double precision allows, where its derivatives need no more) is
    accepted: the noise model uses the gradient reached. Otherwise it fails.
    ``scf``: the point's own settings (a tightened point's targets; default the
    context's).
    """
    scf = scf or context.scf
    target, accepted = scf.gradient_conv_tol, scf.gradient_accepted
    reference = context.reference
    if mf.mol.nelectron == 1:
        # No electron-electron terms (PySCF's HF1e): one diagonalisation of the
        # core Hamiltonian is the exact solution.
        mf.kernel()
        mf.converged = True
        return [ONE_ELECTRON], 1, None
    attempts, cycles, g, fock = [], 0, np.inf, None
    newton_ok = scf.solver == "newton" and _has_hessian(mf)
    constraints = context.constraints
    if newton_ok and reference is None:
        attempts.append(DIIS)
        mf.conv_tol_grad = max(target, DIIS_HANDOVER)
        mf.conv_tol = max(scf.energy_conv_tol_au, DIIS_HANDOVER ** 2)
        mf.max_cycle = min(scf.max_cycle, DIIS_HANDOVER_CYCLES)
        mf.kernel()
        cycles += int(getattr(mf, "cycles", 1) or 1)
        mf.conv_tol, mf.conv_tol_grad = scf.energy_conv_tol_au, target
        mf.max_cycle = scf.max_cycle
        start = mf.mo_coeff
        occ = mf.mo_occ
        newton_ok = start is not None
        if newton_ok and _align(mf, context):
            attempts.append(ORIENTATION)
            start = mf.mo_coeff
        if newton_ok:
            constraints = context.constraints = orientation_constraints(context, start, occ)
    elif newton_ok:
        occ = reference.mo_occ
        start, how = _start_orbitals(context, point.field_vector_au)
        attempts.append(how)
    if newton_ok:
        attempts.append(NEWTON)
        work, g, fock = _newton(mf, context, start, occ, target, constraints)
        cycles += work
        if reference is None and constraints and _align(mf, context):
            # The first turn was judged on DIIS orbitals: turn the converged
            # state by what is left (~1e-6 rad at DFT) and finish again.
            constraints = context.constraints = orientation_constraints(context, mf.mo_coeff, occ)
            work, g, fock = _newton(mf, context, mf.mo_coeff, occ, target, constraints)
            cycles += work
    if g > accepted:  # a stall where the derivatives need no more is accepted as is
        dm0 = (mf.make_rdm1() if mf.mo_coeff is not None else
               reference.density if reference is not None else None)
        cycles += _ladder(mf, dm0, target, attempts)
        g, fock = _gradient_norm(mf, constraints=constraints), None
    if g <= accepted:
        mf.converged = True
        return attempts, cycles, fock
    raise ScfNotConvergedError(
        f"SCF did not converge at field point {point.label}: orbital gradient {g:.1e} reached after "
        f"{', '.join(attempts)} ({cycles} cycles); the derivatives need at most "
        f"{accepted:.1e} (target {target:.1e}); no number is formed from it")


def _correlated_energy(mf, model, scf_spec, label: str
                       ) -> tuple[float, float | None, float | None]:
    """The correlated energy of a converged mean-field object, and for the
    amplitude solvers the convergence reached (PointRecord.
    correlation_energy_change_au, amplitude_change; None for MP2)."""
    from pyscf import cc, mp

    frozen = frozen_orbitals(mf.mol, model) or None
    if model.method == "mp2":
        solver = mp.MP2(mf, frozen=frozen)
        solver.verbose = 0
        e_corr = solver.kernel()[0]
        return float(mf.e_tot + e_corr), None, None
    wanted = scf_spec.correlation
    solver = cc.CCSD(mf, frozen=frozen)
    solver.verbose = 0
    solver.conv_tol = wanted.energy_change_au
    solver.conv_tol_normt = wanted.amplitude_change
    solver.max_cycle = max(scf_spec.max_cycle, MIN_AMPLITUDE_ITERATIONS)
    eris = solver.ao2mo()
    solver.kernel(eris=eris)
    # The convergence reached: one more (Jacobi) iteration from the final
    # amplitudes, without DIIS. Its energy change, signed, estimates the
    # remaining error (measured: the true error was -1.2 to -2.1 times it, HF
    # molecule and water, stopping at 1e-8..1e-13 Eh), at the cost of one
    # iteration of the 10-50 the solve took.
    t1, t2 = solver.update_amps(solver.t1, solver.t2, eris)
    step = solver.amplitudes_to_vector(t1, t2) - solver.amplitudes_to_vector(solver.t1,
                                                                             solver.t2)
    amplitude = float(np.linalg.norm(step))
    change = float(solver.energy(t1, t2, eris)) - float(solver.e_corr)
    if not solver.converged and abs(change) > wanted.accepted_au:
        raise ScfNotConvergedError(
            f"CCSD amplitudes did not converge at field point {label}: one more iteration "
            f"changes the energy by {abs(change):.1e} Eh after {solver.cycles} iterations "
            f"(tolerance {wanted.energy_change_au:g} Eh, amplitude change "
            f"{wanted.amplitude_change:g}); no number is formed")
    e = float(solver.e_tot)
    if model.method == "ccsd(t)":
        e += float(solver.ccsd_t(eris=eris))
    return e, change, amplitude


#: Conjugate-gradient iterations at most per solve, and the level shift (Eh) that
#: removes a (near-)zero mode of the orbital Hessian when they do not suffice.
CG_MAX_ITERATIONS = 150
SINGULAR_SHIFT = 1e-4


class _HessianSolver:
    """What the orbital Hessians share: the orientation constraints, the
    projected, preconditioned conjugate-gradient solve and the dipole change of
    a rotation. A subclass sets ``weight`` (electrons per orbital and spin
    density), ``diagonal`` (the preconditioner, positive) and ``products``, and
    defines ``matvec`` and ``vo`` (the layout of rotations, gradients and
    perturbations: a perturbation M enters the gradient as vo(M))."""

    def _constrain(self, constraints) -> None:
        #: The constraints' gradients (columns: d c_k / d x) and an orthonormal
        #: basis of them; the solver works in the space orthogonal to them.
        self.constraint_gradients = np.zeros((self.diagonal.size, 0))
        if constraints:
            self.constraint_gradients = np.array(
                [2.0 * self.weight * self.vo(w) for w in constraints]).T
        self._q = np.linalg.qr(self.constraint_gradients)[0]

    def project(self, x) -> np.ndarray:
        """x without its part along the constraints' gradients."""
        x = np.asarray(x).ravel()
        return x - self._q @ (self._q.T @ x) if self._q.shape[1] else x

    def solve(self, rhs, rtol: float, what: str) -> np.ndarray:
        """x with H x = rhs, to relative residual ``rtol``.

        Preconditioned conjugate gradients (the Hessian of a stable SCF is
        positive definite), in the space orthogonal to the constraints'
        gradients (an orientation constraint: orientation_constraints). A
        Hessian with a (near-)zero mode, such as the rotation of a degenerate
        open shell's unpaired orbital about the axis of a linear molecule (OH,
        2Pi), stalls them; then the system is solved again with the Hessian
        shifted by SINGULAR_SHIFT, which leaves the other modes' share of x
        changed by a relative SINGULAR_SHIFT / their eigenvalue (~1e-4 for
        eigenvalues ~ the orbital-energy gaps).
        """
        from scipy.sparse.linalg import LinearOperator, cg

        rhs = self.project(rhs)
        norm = np.linalg.norm(rhs)
        if norm == 0.0:
            return np.zeros_like(rhs)
        n = self.diagonal.size
        b = rhs / norm
        residual = np.inf
        project = self.project
        for sigma in (0.0, SINGULAR_SHIFT):
            operator = LinearOperator(
                (n, n), matvec=lambda v, s=sigma: project(self.matvec(project(v))) + s * v,
                dtype=float)
            precondition = LinearOperator(
                (n, n), matvec=lambda v, s=sigma: project(project(v) / (self.diagonal + s)),
                dtype=float)
            x, info = cg(operator, b, rtol=rtol, atol=0.0, M=precondition,
                         maxiter=CG_MAX_ITERATIONS)
            residual = np.linalg.norm(operator.matvec(x) - b)
            if info == 0 and residual <= CG_RESIDUAL_SLACK * rtol:
                return x * norm
        raise ScfNotConvergedError(f"{what} did not converge (residual {residual:.1e}); "
                                   "the SCF may be unstable")

    def density_trace(self, rmo, x) -> float:
        """-tr(r dD) for the rotation x: the dipole change it causes (one component)."""
        return float(-2.0 * self.weight * (rmo @ x))


class _OrbitalHessian(_HessianSolver):
    """The real orbital Hessian A + B of a converged RHF, UHF, RKS or UKS object,
    as a preconditioned conjugate-gradient solver over occupied-virtual blocks.

    x_ai (one block per spin; one block for closed shells) maps to the density
    change dD = n_w (C_v x C_o^T + transpose), n_w = 2 for closed shells and 1
    per spin otherwise; the operator is (e_a - e_i) x + [V(dD)]_ai with V PySCF's
    response function. One-electron systems have no two-electron response
    (PySCF's generic response function would add one: 18.4 instead of 4.48 for
    the polarizability of H).
    """

    def __init__(self, mf, response=None, constraints=()):
        from pyscf.scf import uhf

        if isinstance(mf, uhf.UHF):
            coeffs, energies, occs, self.weight = mf.mo_coeff, mf.mo_energy, mf.mo_occ, 1.0
        else:
            coeffs, energies, occs, self.weight = ([mf.mo_coeff], [mf.mo_energy], [mf.mo_occ],
                                                   2.0)
        self.blocks = []
        for c, e, occ in zip(coeffs, energies, occs):
            o, v = occ > 0, occ == 0
            self.blocks.append((c[:, o], c[:, v], e[v][:, None] - e[o][None, :]))
        self.sizes = [b[2].size for b in self.blocks]
        self.diagonal = np.concatenate([de.ravel() for (co, cv, de) in self.blocks])
        self._mf = mf
        self.products = 0  # Hessian-vector products so far (each ~ one Fock build)
        if response is not None:
            self.__dict__["response"] = response  # shared: see ModelContext.response
        self._constrain(constraints)

    @functools.cached_property
    def response(self):
        """PySCF's response function (built on first use: for DFT it holds the
        exchange-correlation kernel on the grid); None for one electron."""
        return response_function(self._mf)

    def _split(self, x):
        parts, start = [], 0
        for (co, cv, de), n in zip(self.blocks, self.sizes):
            parts.append(x[start:start + n].reshape(de.shape))
            start += n
        return parts

    def matvec(self, x):
        self.products += 1
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


#: Smallest preconditioner entry (Eh) of the restricted open-shell Hessian: its
#: diagonal is built from the alpha and beta Fock matrices, not from the
#: orbital energies of the Roothaan matrix the orbitals diagonalise, and need
#: not be positive far from convergence; the floor keeps the preconditioner
#: positive definite. Below every entry measured (smallest at OH's points:
#: 0.67 Eh at ROHF, 0.024 Eh at ROKS/PBE, the pair of the two pi orbitals).
MIN_PRECONDITIONER = 1e-3


class _RestrictedOpenHessian(_HessianSolver):
    """The exact orbital Hessian of a restricted open shell (ROHF, ROKS).

    One set of orbitals C carries the alpha density (doubly and singly occupied
    orbitals, occupations n^a) and the beta one (doubly occupied, n^b). Turning
    them by exp(K), K antisymmetric with the non-redundant pairs of _pairs
    (open-core, virtual-core, virtual-open), gives to second order

        E(K) = E + sum_s tr(F^s [K, n^s]) + 1/2 sum_s tr(F^s [K, [K, n^s]])
                 + 1/2 sum_s tr(dD^s V^s(dD)),   dD^s = [K, n^s]

    (MO basis; F^s the spin Fock matrices, V PySCF's UHF response function,
    which ROHF and ROKS share). Its gradient over the pairs is twice PySCF's
    ROHF gradient; the operator here is half its Hessian, so that H x = -g
    with PySCF's g is the Newton step. The Fock terms are kept whole (the
    orbital energies of the Roothaan matrix do not give them), so the Hessian
    is exact at any orbitals, converged or not: 7e-8 relative from central
    differences of PySCF's ROHF gradient for OH (PySCF's own second-order
    solver's ROHF Hessian, which drops some of them, differed by 2.5e-4).
    """

    weight = 1.0

    def __init__(self, mf, response=None, constraints=(), fock=None):
        self.c, self.occ = np.asarray(mf.mo_coeff), np.asarray(mf.mo_occ)
        self.pairs = _pairs(self.occ)
        self.spins = _spin_occupations(self.occ)
        if fock is None:
            fock = mf.get_fock()
        self.fock_mo = [self.c.T @ f @ self.c for f in (fock.focka, fock.fockb)]
        diagonal = sum((n[None, :] - n[:, None]) * (np.diag(f)[:, None] - np.diag(f)[None, :])
                       for n, f in zip(self.spins, self.fock_mo))
        self.diagonal = np.maximum(diagonal[self.pairs], MIN_PRECONDITIONER)
        self._mf = mf
        self.products = 0
        if response is not None:
            self.__dict__["response"] = response
        self._constrain(constraints)

    @functools.cached_property
    def response(self):
        """PySCF's response function of the alpha and beta densities (for ROKS
        the exchange-correlation kernel at this one's)."""
        return response_function(self._mf)

    def matvec(self, x):
        self.products += 1
        k = np.zeros(self.pairs.shape)
        k[self.pairs] = np.asarray(x).ravel()
        k = k - k.T
        out = np.zeros_like(k)
        dms = []
        for n, f in zip(self.spins, self.fock_mo):
            first = k * (n[None, :] - n[:, None])  # [K, n]
            fk = f @ k - k @ f  # [F, K]
            # The derivative of 1/2 tr(F [K, [K, n]]) along a pair:
            # M = 1/2 ([[K, n], F] + [n, [F, K]]), entry (p, q) gets M_qp - M_pq.
            m = 0.5 * (first @ f - f @ first + n[:, None] * fk - fk * n[None, :])
            out += m.T - m
            dms.append(self.c @ first @ self.c.T)
        for n, v in zip(self.spins, self.response(np.array(dms))):
            g = (n[:, None] - n[None, :]) * (self.c.T @ v @ self.c)  # [n, V]
            out += g.T - g
        return 0.5 * out[self.pairs]

    def vo(self, matrices) -> np.ndarray:
        """A perturbation's (or Fock matrix's) gradient over the pairs: AO
        matrices for alpha and beta, or one for both (_restricted_open_layout)."""
        return _restricted_open_layout(self.c, self.occ, matrices)


def _orbital_hessian(mf, response=None, constraints=(), fock=None) -> _HessianSolver:
    """The orbital Hessian of a converged (or nearly converged) mean field:
    _RestrictedOpenHessian for ROHF and ROKS (``fock``: its Roothaan Fock
    matrix at these orbitals when at hand, else built), _OrbitalHessian for the
    others."""
    if not _has_hessian(mf):
        raise TypeError(f"no orbital Hessian for {type(mf).__name__}")
    if _restricted_open(mf.mo_occ):
        return _RestrictedOpenHessian(mf, response, constraints, fock)
    return _OrbitalHessian(mf, response, constraints)


def response_function(mf):
    """PySCF's density-response function of a converged RHF, UHF, RKS or UKS
    object (J, K and the exchange-correlation kernel at its density); for ROHF
    and ROKS the unrestricted one of its alpha and beta densities; None for
    one electron, which has no electron-electron terms."""
    if mf.mol.nelectron == 1:
        return None
    if _restricted_open(mf.mo_occ):
        c = np.asarray(mf.mo_coeff)
        return mf.gen_response(mo_coeff=(c, c), mo_occ=tuple(_spin_occupations(mf.mo_occ)),
                               hermi=1)
    return (mf.gen_response(hermi=1) if np.asarray(mf.mo_occ).ndim == 2
            else mf.gen_response(singlet=None, hermi=1))


def analytic_polarizability(mf, r, constraints=()) -> np.ndarray:
    """Static alpha_ij = d mu_i / dF_j (au) from the coupled-perturbed equations.

    For a converged mean-field object ``mf`` and dipole integrals ``r``
    (3, nao, nao) about the job's origin. The perturbation +F_j r_j enters the
    one-electron Hamiltonian; the first-order orbital rotations x_ai solve the
    symmetric positive definite system (A + B) x = -r_ai (:class:`_OrbitalHessian`,
    stable real SCF), by preconditioned conjugate gradients to CPHF_RTOL; then
    alpha_ij = -n sum_ai r_i,ai x^(j)_ai with n = 4 for closed shells (two
    electrons per orbital, dD = 2(x + x^T)) and n = 2 per spin otherwise (a
    restricted open shell: _RestrictedOpenHessian, n = 2). With orientation
    ``constraints`` the rotations keep the orientation.
    """
    hessian = _orbital_hessian(mf, constraints=constraints)
    rmo = np.array([hessian.vo(r[j]) for j in range(3)])
    alpha = np.zeros((3, 3))
    for j in range(3):
        x = hessian.solve(-rmo[j], CPHF_RTOL, "CPHF equations")
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


#: Relative residual of the zero-field response rotations: they only start the
#: points (an error of 1e-6 of a first-order term is far below what Newton removes).
START_RTOL = 1e-6


def compute_reference(context: ModelContext,
                      task: PointTask) -> tuple[PointRecord, ZeroFieldReference]:
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
                                   np.asarray(mf.mo_coeff), np.asarray(mf.mo_occ))
    context.attach(reference)
    work = 0
    if _has_hessian(mf):
        # The start needs the rotations to a small fraction of a first-order
        # term only: the Newton steps' (coarse-grid) response serves.
        hessian = _orbital_hessian(mf, context.response, context.constraints)
        rotations = np.array([hessian.solve(-hessian.vo(context.r[j]), START_RTOL,
                                            "zero-field response") for j in range(3)])
        work = hessian.products
        reference = dataclasses.replace(reference, field_rotations=rotations)
        context.reference = reference  # the same orbitals: the response stays valid
    record = dataclasses.replace(record, scf_cycles=record.scf_cycles + work,
                                 orientation=orientation_record(context, mf))
    return record, reference


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
        alpha = tuple(tuple(float(v) for v in row)
                      for row in analytic_polarizability(mf, r, constraints))
    record = PointRecord(point, energy, float(mf.e_tot), dipole, cycles, tuple(attempts), s2,
                         overlap, gradient, alpha, dipole_error, "; ".join(issues),
                         time.perf_counter() - start, _energy_scale(mf),
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


# ----------------------------------------------------------- geometry optimisation

def optimisation_model(job: Job):
    """The model the geometry is optimised at: [geometry] method, functional
    and basis where given, else the job's model."""

    g = job.geometry
    model = job.model
    if g.method is not None and g.method != model.method:
        model = dataclasses.replace(model, method=g.method, functional=g.functional,
                                    frozen_core=False if g.method in ("hf", "dft") else
                                    model.frozen_core)
    elif g.functional is not None:
        model = dataclasses.replace(model, functional=g.functional)
    if g.basis is not None:
        model = dataclasses.replace(model, basis=g.basis)
    return model


_GEOMETRIC_LOG_CONFIG = """[loggers]
keys=root
[handlers]
keys=errors
[formatters]
keys=plain
[logger_root]
level=ERROR
handlers=errors
[handler_errors]
class=NullHandler
level=ERROR
formatter=plain
args=()
[formatter_plain]
format=%(message)s
"""


def optimize_geometry(job: Job, molecule) -> dict:
    """Optimise ``molecule`` (a MoleculeSpec) at the job's optimisation model
    with geomeTRIC through PySCF, at zero field, to the job's criteria.

    Returns a document: coordinates (bohr), energy, steps, the largest
    remaining gradient component, the criteria, the model. Raises
    ScfNotConvergedError (named) when it does not converge in max_steps, or
    when the SCF at the geometry it ends at does not converge.
    """
    from pyscf.geomopt import geometric_solver

    from fieldprop.errors import ScfNotConvergedError

    model = optimisation_model(job)
    where = "[geometry] basis" if job.geometry.basis is not None else "[model] basis"
    mol = build_mole(molecule, model.basis, f"{job.path}: {where}", model.cartesian)
    scf_spec = job.scf
    if model.method == "dft" and scf_spec.grid_level is None:
        scf_spec = dataclasses.replace(scf_spec, grid_level=DEFAULT_GRID_LEVEL)
    mf = _mean_field(mol, model, scf_spec)
    mf.conv_tol, mf.conv_tol_grad = OPTIMISATION_ENERGY_TOL_AU, OPTIMISATION_GRADIENT_TOL
    method = mf
    if model.method == "mp2":
        from pyscf import mp

        method = mp.MP2(mf, frozen=frozen_orbitals(mol, model) or None)
    thresholds = job.geometry.thresholds()
    params = {f"convergence_{k}": v for k, v in thresholds.items()}
    steps = []
    try:
        with warnings.catch_warnings(), contextlib.redirect_stdout(io.StringIO()), \
                tempfile.TemporaryDirectory() as folder:
            warnings.simplefilter("ignore")
            # geomeTRIC logs every step (and its banner) to stderr through a
            # logging configuration file; ours keeps only its errors.
            quiet = os.path.join(folder, "log.ini")
            with open(quiet, "w", encoding="utf-8") as out:
                out.write(_GEOMETRIC_LOG_CONFIG)
            converged, mol_eq = geometric_solver.kernel(
                method, maxsteps=job.geometry.max_steps, assert_convergence=False,
                callback=lambda env: steps.append(1), logIni=quiet, **params)
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        raise ScfNotConvergedError(f"{job.path}: [geometry] optimize: the optimisation failed "
                                   f"inside the backend ({type(exc).__name__}: "
                                   f"{' '.join(str(exc).split())[:200]})") from exc
    if not converged:
        raise ScfNotConvergedError(f"{job.path}: [geometry] optimize: not converged in "
                                   f"max_steps = {job.geometry.max_steps} steps; raise it, or "
                                   "start from a better geometry")
    final = _mean_field(mol_eq, model, scf_spec)
    final.conv_tol, final.conv_tol_grad = OPTIMISATION_ENERGY_TOL_AU, OPTIMISATION_GRADIENT_TOL
    final.kernel()
    if not final.converged:
        # Its gradient, energy and coordinates would be those of no state.
        raise ScfNotConvergedError(
            f"{job.path}: [geometry] optimize: the SCF at the optimised geometry did not "
            f"converge in [scf] max_cycle = {final.max_cycle} cycles (orbital gradient "
            f"{_gradient_norm(final):.1e}, target {final.conv_tol_grad:g}); no geometry is "
            "formed from it")
    target = final
    if model.method == "mp2":
        from pyscf import mp

        target = mp.MP2(final, frozen=frozen_orbitals(mol_eq, model) or None).run()
    gradient = target.nuc_grad_method().kernel()
    return {"coords_bohr": [[float(v) for v in row] for row in mol_eq.atom_coords()],
            "energy_au": float(target.e_tot), "steps": len(steps),
            "largest_gradient_au": float(np.max(np.abs(gradient))),
            "criteria": job.geometry.criteria, "thresholds": thresholds,
            "optimiser": "geomeTRIC through PySCF",
            "model": {"method": model.method, "functional": model.functional,
                      "basis": model.basis if isinstance(model.basis, str) else
                      dict(model.basis), "reference": model.reference}}


# ----------------------------------------------------------- nuclear relaxation

def atom_masses(molecule) -> np.ndarray:
    """Masses (u) of the most abundant isotopes (PySCF's table), per atom."""
    from pyscf.data.elements import COMMON_ISOTOPE_MASSES

    return np.array([COMMON_ISOTOPE_MASSES[int(z)] for z in molecule.nuclear_charges])


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
                            (scf_spec.gradient_conv_tol, STRUCTURE_POLISH_CYCLES)):
        mf.conv_tol_grad = tolerance
        mf.max_cycle = min(scf_spec.max_cycle, most)
        mf.kernel(dm0 if mf.mo_coeff is None else mf.make_rdm1())
        cycles += int(getattr(mf, "cycles", 1) or 1)
        g = _gradient_norm(mf) if mf.mo_coeff is not None else math.inf
        if g <= scf_spec.gradient_conv_tol:
            break
    mf.max_cycle = scf_spec.max_cycle
    if g <= scf_spec.gradient_accepted:
        return cycles, g
    attempts.clear()
    cycles += _ladder(mf, mf.make_rdm1() if mf.mo_coeff is not None else dm0,
                      scf_spec.gradient_conv_tol, attempts)
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
    where = f"{job.path}: [response] nuclear_relaxation"
    x0 = np.asarray(molecule.coords_bohr, dtype=float)
    masses = atom_masses(molecule)
    zero = StructureEvaluator(molecule, job.model, job.scf, (0.0, 0.0, 0.0), label="0")
    first = zero(x0)
    gradient = first.gradient
    largest = float(np.abs(gradient).max())
    atom = int(np.unravel_index(np.abs(gradient).argmax(), gradient.shape)[0])
    if largest > relaxation.MINIMUM_GRADIENT_AU:
        raise InputError(f"{where}: the geometry is not a minimum of the job's model (largest "
                         f"gradient component {largest:.1e} Eh/bohr, on atom {atom + 1} "
                         f"{molecule.symbols[atom]}; at most {relaxation.MINIMUM_GRADIENT_AU:g} "
                         "accepted); set [geometry] optimize = true with the job's model, or "
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
    return PointRecord(point, float(relaxed.evaluation.energy_au), float(mf.e_tot), dipole,
                       evaluate.cycles, tuple(evaluate.attempts), s2, overlap, g, None,
                       dipole_error, "; ".join(issues), time.perf_counter() - start,
                       _energy_scale(mf), document)
