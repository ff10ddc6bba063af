"""The model context and the field term.

The field term is applied in one place, :func:`_apply_field`, for every method:
the core Hamiltonian gets +F.<r - O> (electrons carry charge -1, so -mu_op.F adds
+F.r per electron) and the nuclear repulsion gets -F.sum_A Z_A (R_A - O). MP2,
CCSD and CCSD(T) then run on the field-perturbed orbitals and integrals, because
they take the core Hamiltonian and nuclear energy from the mean-field object.

:class:`ModelContext` holds what the field does not change (integrals, grid,
the zero-field reference and its response function), computed once per
molecule, model and process.
"""

from __future__ import annotations

import copy
import functools

import numpy as np

from fieldprop.backend.molecule import _mean_field, build_mole
from fieldprop.backend.orbital_hessian import _has_hessian, response_function
from fieldprop.backend.orientation import orientation_constraints
from fieldprop.points.records import ZeroFieldReference


def _orbital_energies(mf):
    """The diagonal of the Fock matrix in orbitals mf.mo_coeff (semi-canonical
    zero-field orbitals: their energies)."""
    fock = mf.get_fock()
    c = np.asarray(mf.mo_coeff)
    if c.ndim == 3:
        return np.array([np.einsum("pi,pq,qi->i", c[k], fock[k], c[k]) for k in range(2)])
    return np.einsum("pi,pq,qi->i", c, fock, c)


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
#: Newton steps' orbital Hessian (see ModelContext.response). Measured on a
#: 10-atom push-pull polyene, B3LYP/6-31G, job grid 5, 42 field points: level 2
#: 10 cycles and 4.5 s per point (a product 0.22 s); level 1 the same cycles in
#: 3.7 s; level 0 14 cycles (a third Newton step nearly everywhere), 4.1 s.
NEWTON_GRID_LEVEL = 1


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
            # With the basis functions' screening per block of grid points, as
            # PySCF's own SCF builds it (a grid built bare has none): an
            # exchange-correlation build of a 22-atom push-pull polyene, B3LYP/
            # 6-31G, level 5, took 4.7 s instead of 8.1 s, the same energy to 1e-14.
            template.grids.build(with_non0tab=True)
        self.reference: ZeroFieldReference | None = None
        #: Converged rotations (from the zero-field orbitals) of the points
        #: solved in this process or handed in, by field vector: starts for
        #: the points at the opposite field and further along the same line.
        self.solved: dict[tuple[float, float, float], np.ndarray] = {}
        #: The orientation constraints of a reference that breaks a rotational
        #: symmetry of the molecule (orientation_constraints); empty otherwise.
        self.constraints: tuple[np.ndarray, ...] = ()
        #: The orbital gradient from which the zero-field Newton steps stopped
        #: halving it (solver._newton; 0 where they never stalled).
        self.gradient_floor = 0.0
        #: The zero field's Newton solves (orbitals, occupations, their
        #: (direction, product) pairs): they deflate its response solves
        #: (response.zero_field_response) and join the points' subspace.
        self.newton_pairs: list = []
        #: An AO density the zero-field SCF starts from (None: PySCF's guess).
        self.guess = None
        if reference is not None:
            self.attach(reference)

    def attach(self, reference: ZeroFieldReference) -> None:
        """Use ``reference`` as every later point's start and state reference."""
        self.reference = reference
        self.solved = {}
        self.gradient_floor = reference.gradient_floor
        self.__dict__.pop("response", None)
        self.__dict__.pop("subspace", None)
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
        return self.response_at(self.reference.mo_coeff, self.reference.mo_occ)

    def response_at(self, mo_coeff, mo_occ):
        """The density-response function at orbitals ``mo_coeff`` (the zero
        field's Newton steps, before there is a reference), with the kernel
        on the coarse grid of :attr:`response`."""
        solver = self._coarse_solver
        if solver is self.template:
            solver = copy.copy(self.template)
            solver._eri, solver._opt = self.template._eri, self.template._opt
        solver.mo_coeff, solver.mo_occ = mo_coeff, mo_occ
        return response_function(solver)

    @property
    def coarse_kernel(self) -> bool:
        """The Newton steps' exchange-correlation kernel lies on a coarser grid
        than the job's (DFT above NEWTON_GRID_LEVEL)."""
        return self._coarse_solver is not self.template

    @functools.cached_property
    def _coarse_solver(self):
        """The template, or for DFT on a finer grid than NEWTON_GRID_LEVEL a
        copy of it on that grid (built once)."""
        if self.model.method == "dft" and (self.scf.grid_level or 0) > NEWTON_GRID_LEVEL:
            from pyscf import dft

            solver = copy.copy(self.template)
            solver._eri, solver._opt = self.template._eri, self.template._opt
            solver.grids = dft.gen_grid.Grids(self.mol)
            solver.grids.level = NEWTON_GRID_LEVEL
            solver.grids.verbose = 0
            solver.grids.build(with_non0tab=True)
            return solver
        return self.template

    @functools.cached_property
    def subspace(self):
        """The ResponseSubspace that deflates the Newton steps' solves: the
        reference's own, or (a reference read from a store, which does not
        keep it) its zero-field response solved again here, once per
        process (not refined: the stored rotations are). None without an
        orbital Hessian."""
        from fieldprop.backend.orbital_hessian import ResponseSubspace
        from fieldprop.backend.response import zero_field_response

        ref = self.reference
        if ref is None or ref.mo_coeff is None or not _has_hessian(self.template):
            return None
        if ref.response_subspace is not None:
            return ResponseSubspace(ref.mo_coeff, ref.mo_occ, *ref.response_subspace)
        mf = copy.copy(self.template)
        mf._eri, mf._opt = self.template._eri, self.template._opt
        mf.mo_coeff, mf.mo_occ = ref.mo_coeff, ref.mo_occ
        mf.mo_energy = _orbital_energies(mf)
        return zero_field_response(mf, self, refine=False)[1]

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
