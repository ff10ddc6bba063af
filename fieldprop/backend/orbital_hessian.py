"""Orbital rotations and the orbital Hessian.

The layout of the non-redundant rotations of each kind of mean field (closed
shell, unrestricted, restricted open shell), the real orbital Hessian A + B
over them (:class:`_OrbitalHessian`, :class:`_RestrictedOpenHessian`), its
projected, preconditioned conjugate-gradient solve, and PySCF's
density-response function. The Newton steps of the solver and the
coupled-perturbed solves of the response share them.
"""

from __future__ import annotations

import functools

import numpy as np

from fieldprop.errors import ScfNotConvergedError


#: A CG solve counts as converged when its true residual is within this many
#: times the tolerance asked: the iteration checks its own recursively updated
#: residual, which drifts from the true one by rounding; a residual 10x over
#: means the solve stalled (a near-zero mode), not rounding.
CG_RESIDUAL_SLACK = 10


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


def _has_hessian(mf) -> bool:
    """RHF, UHF, RKS and UKS have the orbital Hessian of _OrbitalHessian,
    ROHF and ROKS that of _RestrictedOpenHessian (every mean field fieldprop
    builds; not PySCF's generalised or relativistic ones)."""
    from pyscf.scf import hf, uhf

    return isinstance(mf, (hf.RHF, uhf.UHF))


#: Conjugate-gradient iterations at most per solve, and the level shift (Eh) that
#: removes a (near-)zero mode of the orbital Hessian when they do not suffice.
CG_MAX_ITERATIONS = 150
SINGULAR_SHIFT = 1e-4


def _pcg(operator, precondition, b, rtol: float, keep=None) -> tuple[np.ndarray, bool]:
    """Preconditioned conjugate gradients for operator(x) = b from x = 0, to
    |r| <= rtol |b| (the recursively updated residual); returns (x, converged).
    Written out (not SciPy's cg) for its search directions and their
    products, which ``keep`` receives (normalised) for a later deflation.
    A non-positive curvature p.Ap (an unstable or singular Hessian) ends it
    unconverged."""
    x = np.zeros_like(b)
    r = b.copy()
    z = precondition(r)
    p = z.copy()
    rz = float(r @ z)
    goal = rtol * float(np.linalg.norm(b))
    for _ in range(CG_MAX_ITERATIONS):
        ap = operator(p)
        curvature = float(p @ ap)
        if not curvature > 0.0:
            return x, False
        if keep is not None:
            scale = 1.0 / float(np.linalg.norm(p))
            keep.append((p * scale, ap * scale))
        step = rz / curvature
        x = x + step * p
        r = r - step * ap
        if np.linalg.norm(r) <= goal:
            return x, True
        z = precondition(r)
        rz, previous = float(r @ z), rz
        p = z + (rz / previous) * p
    return x, False


#: Eigenvalues of a deflation subspace's projected Hessian W^T A W below this
#: share of the largest are left out: its directions (from several solves, or
#: turned into another orbital basis) can be nearly dependent, and inverting
#: such a mode would amplify rounding instead of removing a slow one.
DEFLATION_CUTOFF = 1e-10


def _deflated(diagonal, w, z):
    """A preconditioner that deflates the span of the rows of ``w``
    (directions), given their products ``z`` with this Hessian or one close
    to it, around the diagonal one ``diagonal`` (D^-1): with E = W Z^T
    (symmetrised), Q = W^T E^-1 W and P = I - Z^T E^-1 W,
    M = Q + P^T D^-1 P. Symmetric and positive definite whatever Z is (only
    E's positive modes are kept), so the conjugate gradients stay exact;
    where Z is the Hessian's own product, the span's eigenvalues leave the
    iteration (deflation after Nicolaides, in the balanced form of Mandel's
    balancing Neumann-Neumann preconditioner)."""
    e = w @ z.T
    values, vectors = np.linalg.eigh(0.5 * (e + e.T))
    kept = values > DEFLATION_CUTOFF * max(float(values.max(initial=0.0)), 0.0)
    if not kept.any():
        return diagonal
    inverse = (vectors[:, kept] / values[kept]) @ vectors[:, kept].T

    def apply(v):
        coefficients = inverse @ (w @ v)
        y = diagonal(v - z.T @ coefficients)
        return w.T @ coefficients + y - w.T @ (inverse @ (z @ y))

    return apply


class ResponseSubspace:
    """Directions of the zero-field orbital Hessian's conjugate-gradient
    solves (rows of ``directions``) and their products with it (``products``),
    in the layout of the zero-field orbitals ``mo_coeff``, ``mo_occ``: the
    slow modes a field point's Newton steps meet again. :meth:`mapped` turns
    them into another set of orbitals' layout (a field point's), where they
    deflate the Newton steps' solves (_deflated)."""

    def __init__(self, mo_coeff, mo_occ, directions, products):
        self.mo_coeff, self.mo_occ = np.asarray(mo_coeff), np.asarray(mo_occ)
        self.directions, self.products = np.asarray(directions), np.asarray(products)

    @classmethod
    def from_pairs(cls, mo_coeff, mo_occ, pairs) -> "ResponseSubspace | None":
        if not pairs:
            return None
        return cls(mo_coeff, mo_occ, np.array([p for p, _ in pairs]),
                   np.array([q for _, q in pairs]))

    def mapped(self, hessian, overlap):
        """(W, Z) in ``hessian``'s layout: each occupied-virtual block turned by
        the overlaps of its orbitals with the zero-field ones, T_v x T_o^T
        (the field's O(F) mixing of occupied and virtual orbitals is left
        out: the preconditioner need not be exact). None where the layouts
        differ or for a restricted open shell (its pairs are not blocks)."""
        if not isinstance(hessian, _OrbitalHessian) or _restricted_open(self.mo_occ):
            return None
        sets = [self.mo_coeff] if self.mo_occ.ndim == 1 else list(self.mo_coeff)
        occs = [self.mo_occ] if self.mo_occ.ndim == 1 else list(self.mo_occ)
        if len(sets) != len(hessian.blocks):
            return None
        k = self.directions.shape[0]
        w_parts, z_parts, start = [], [], 0
        for c0, occ, (co, cv, de) in zip(sets, occs, hessian.blocks):
            o0, v0 = c0[:, occ > 0], c0[:, occ == 0]
            if (v0.shape[1], o0.shape[1]) != de.shape:
                return None
            t_o, t_v = co.T @ overlap @ o0, cv.T @ overlap @ v0
            size = de.size
            for source, parts in ((self.directions, w_parts), (self.products, z_parts)):
                block = source[:, start:start + size].reshape(k, *de.shape)
                parts.append((t_v @ block @ t_o.T).reshape(k, size))
            start += size
        return np.concatenate(w_parts, axis=1), np.concatenate(z_parts, axis=1)


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

    def solve(self, rhs, rtol: float, what: str, subspace=None, keep=None,
              verify: bool = True) -> np.ndarray:
        """x with H x = rhs, to relative residual ``rtol``.

        Preconditioned conjugate gradients (_pcg; the Hessian of a stable SCF
        is positive definite), in the space orthogonal to the constraints'
        gradients (an orientation constraint: orientation_constraints). A
        Hessian with a (near-)zero mode, such as the rotation of a degenerate
        open shell's unpaired orbital about the axis of a linear molecule (OH,
        2Pi), stalls them; then the system is solved again with the Hessian
        shifted by SINGULAR_SHIFT, which leaves the other modes' share of x
        changed by a relative SINGULAR_SHIFT / their eigenvalue (~1e-4 for
        eigenvalues ~ the orbital-energy gaps).

        ``subspace``: (W, Z), rows directions and their products with a
        Hessian close to this one (ResponseSubspace.mapped): the
        preconditioner deflates them (_deflated). ``keep``: a list that
        receives the (direction, product) pairs of the solve, normalised.
        ``verify``: check the true residual once converged (one more
        product); a Newton step, whose result the next exact gradient
        judges, need not.
        """
        rhs = self.project(rhs)
        norm = np.linalg.norm(rhs)
        if norm == 0.0:
            return np.zeros_like(rhs)
        b = rhs / norm
        residual = np.inf
        project = self.project
        for sigma in (0.0, SINGULAR_SHIFT):
            def operator(v, s=sigma):
                return project(self.matvec(project(v))) + s * v

            def diagonal(v, s=sigma):
                return project(project(v) / (self.diagonal + s))

            deflate = sigma == 0.0 and subspace is not None and not self._q.shape[1]
            precondition = _deflated(diagonal, *subspace) if deflate else diagonal
            x, converged = _pcg(operator, precondition, b, rtol,
                                keep if sigma == 0.0 else None)
            if converged and not verify:
                return x * norm
            residual = np.linalg.norm(operator(x) - b)
            if converged and residual <= CG_RESIDUAL_SLACK * rtol:
                return x * norm
        raise ScfNotConvergedError(f"{what} did not converge (residual {residual:.1e}); "
                                   "the SCF may be unstable")

    def density_trace(self, rmo, x) -> float:
        """-tr(r dD) for the rotation x: the dipole change it causes (one component)."""
        return float(-2.0 * self.weight * (rmo @ x))

    def matmat(self, xs) -> np.ndarray:
        """The products of the rows of ``xs`` (one matvec each; _OrbitalHessian
        takes them in one pass of the response function)."""
        return np.array([self.matvec(x) for x in xs])


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

    def matmat(self, xs) -> np.ndarray:
        """The products of the rows of ``xs``, with one call of the response
        function for all of them (for DFT one pass over the grid: the basis
        functions' values, a quarter of a Fock build's time, are shared)."""
        xs = np.atleast_2d(np.asarray(xs))
        self.products += len(xs)
        parts = [self._split(x) for x in xs]  # [row][block]
        out = [[de * p[b] for b, (co, cv, de) in enumerate(self.blocks)] for p in parts]
        if self.response is not None:
            dms = np.array([[self.weight * (cv @ p[b] @ co.T) for p in parts]
                            for b, (co, cv, de) in enumerate(self.blocks)])
            dms = dms + dms.transpose(0, 1, 3, 2)  # [block][row]
            v1 = self.response(dms if len(self.blocks) == 2 else dms[0])
            v1 = v1 if len(self.blocks) == 2 else [v1]
            for b, (co, cv, de) in enumerate(self.blocks):
                for k in range(len(xs)):
                    out[k][b] = out[k][b] + cv.T @ v1[b][k] @ co
        return np.array([np.concatenate([o_.ravel() for o_ in row]) for row in out])

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
