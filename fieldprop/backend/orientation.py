"""The orientation of a degenerate open shell: a zero-field state that breaks
a rotational symmetry of its molecule (an atom, a linear molecule) is turned
to a reproducible frame (:func:`_align`), recorded (:func:`orientation_record`),
and every field point keeps its orientation (:func:`orientation_constraints`).
"""

from __future__ import annotations

import numpy as np

from fieldprop.backend.orbital_hessian import _set_blocks
from fieldprop.points.records import Orientation


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
