"""Point-group symmetry of the nuclear framework, in the input frame: which
planned field points are images of others, and which tensor components vanish.

Pure numerics: symbols, charges and coordinates in; operations (3x3 orthogonal
matrices acting on vectors of the input frame) out. No PySCF, and the molecule
is never reoriented: a molecule placed off its symmetry axes keeps its frame,
and its operations are simply not the coordinate sign changes.

If R maps the nuclei onto nuclei of the same element (about the origin of the
multipole operator), the Hamiltonian at field R F is the one at F turned by R,
so for a state of the molecule's symmetry

    E(R F) = E(F),   mu(R F) = R mu(F),   alpha(R F) = R alpha(F) R^T.

A planned point whose field vector is R F for a point F computed before it is
therefore not computed: its record is the image of F's (:func:`image_record`).
Points are identified by representative plus operation, never by integer
offsets, since a turned molecule's operations do not map lattice offsets onto
lattice offsets. A tensor component is zero by symmetry when every tensor
invariant under the group has that component zero (:meth:`Symmetry.forced_zero`).

Three kinds of group:

- ``finite``: the operations are enumerated, mapping two reference atoms and
  the sense of their cross product onto every candidate pair of the same
  elements and distances;
- ``linear``: C-infinity-v or D-infinity-h about the molecular axis; a field
  relates to another when their components along the axis agree (up to sign
  with a centre of inversion) and their lengths across it do;
- ``atom``: O(3) about the nucleus; fields of the same length relate.

:func:`detect` finds the group of a framework symmetric to within
SYMMETRY_TOLERANCE_BOHR and symmetrises it (each atom moved to the average of
its images under the group) so that the images are exact; ``moved_bohr`` says
how far. A group is used as it stands only where the framework is symmetric to
round-off (:attr:`Symmetry.exact`: the move is within ROUNDOFF_ULPS units in
the last place of the framework's size); a geometry typed to six decimals is
~1e-7 bohr off, and computing it moved would compute another molecule. The
engine decides what to do with a group that is only near.

Only states of the molecule's full symmetry may be mapped: closed shells
(a non-degenerate, totally symmetric ground state); the engine decides when.

>>> water = detect((8, 1, 1), ((0, 0, 0.2217), (0, 1.4309, -0.8867),
...                             (0, -1.4309, -0.8867)))
>>> water.kind, len(water.operations)
('finite', 4)
>>> water.forced_zero((0,)), water.forced_zero((2,))
(True, False)
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

#: Largest distance (bohr) between an atom's image and an atom of the same
#: element for an operation to count; the geometry is then symmetrised exactly.
SYMMETRY_TOLERANCE_BOHR = 1e-5
#: A framework is symmetric "to round-off" when symmetrising it moves no atom
#: by more than this many units in the last place (double precision) of its
#: size (largest distance from the centre, at least 1 bohr). An image is a 3x3
#: product (three roundings per coordinate), the centre a weighted mean, a
#: refined operation exact to a few ulp: a framework exactly symmetric in its
#: digits, or turned by a rotation in double precision, moves by 0-10 ulp
#: (measured: water turned off its axes, 1.6e-16 bohr); one typed to six
#: decimals in angstrom moves by ~1e-7 bohr, ~1e8 ulp.
ROUNDOFF_ULPS = 64
#: A symmetry frame's entries are rounded to this many decimals (keys must not
#: depend on a linear-algebra library's last bits), so each is known to
#: FRAME_ERROR: what a turned tensor entry's error bar carries for it.
FRAME_DECIMALS = 12
FRAME_ERROR = 0.5 * 10.0 ** -FRAME_DECIMALS
#: Relative tolerance for two field vectors to be images of each other.
FIELD_TOLERANCE = 1e-9
#: Rotations about an axis used to stand for the continuous ones (C_n with n
#: above the largest tensor rank, 4, has the same invariant tensors).
_AXIAL_ORDER = 12


@dataclass(frozen=True, eq=False)
class Symmetry:
    """The symmetry operations of a nuclear framework about ``centre``.

    ``operations`` (m, 3, 3) holds every operation of a finite group (identity
    first), or generators standing for a continuous one (linear, atom) in
    :meth:`forced_zero`; ``axis`` is the molecular axis of a linear molecule;
    ``coords_bohr`` the symmetrised framework and ``moved_bohr`` the largest
    move that made it exact.
    """

    kind: str  # "finite", "linear" or "atom"
    operations: np.ndarray
    centre: np.ndarray
    coords_bohr: np.ndarray
    moved_bohr: float
    axis: np.ndarray | None = None
    inversion: bool = False

    @property
    def roundoff_bohr(self) -> float:
        """The move below which the framework counts as symmetric as given:
        ROUNDOFF_ULPS ulp of its size (see ROUNDOFF_ULPS)."""
        return roundoff_tolerance_bohr(self.coords_bohr, self.centre)

    @property
    def exact(self) -> bool:
        """True when the framework was symmetric to round-off as given."""
        return self.moved_bohr <= self.roundoff_bohr

    @property
    def name(self) -> str:
        """A short description: the group's order, or its continuous kind."""
        if self.kind == "atom":
            return "atom (O(3))"
        if self.kind == "linear":
            return "linear (D-inf-h)" if self.inversion else "linear (C-inf-v)"
        return f"{point_group_label(self.operations)}, {len(self.operations)} operations"

    def relate(self, target, source) -> np.ndarray | None:
        """An operation R of the group with R source = target, or None."""
        f, g = np.asarray(target, dtype=float), np.asarray(source, dtype=float)
        size = max(np.linalg.norm(f), np.linalg.norm(g), 1e-300)
        tol = FIELD_TOLERANCE * size
        if abs(np.linalg.norm(f) - np.linalg.norm(g)) > tol:
            return None
        if self.kind == "finite":
            for op in self.operations:
                if np.linalg.norm(op @ g - f) <= tol:
                    return op
            return None
        if self.kind == "atom":
            return _rotation_taking(g, f)
        u = self.axis
        fa, ga = f @ u, g @ u
        flip = np.eye(3)
        if abs(fa - ga) > tol:
            if not (self.inversion and abs(fa + ga) <= tol):
                return None
            flip = np.eye(3) - 2.0 * np.outer(u, u)  # the plane across the axis
            g = flip @ g
        fp, gp = f - (f @ u) * u, g - (g @ u) * u
        if abs(np.linalg.norm(fp) - np.linalg.norm(gp)) > tol:
            return None
        if np.linalg.norm(fp) <= tol:
            return flip
        turn = _rotation_about(u, math.atan2(np.cross(gp, fp) @ u, gp @ fp))
        return turn @ flip

    def in_frame(self, q: np.ndarray) -> "Symmetry":
        """The same group seen in the frame whose axes are the rows of ``q``
        (an orthogonal matrix): operations q R q^T, vectors q v."""
        from dataclasses import replace

        q = np.asarray(q, dtype=float)
        return replace(self, operations=np.array([q @ op @ q.T for op in self.operations]),
                       centre=q @ self.centre, coords_bohr=self.coords_bohr @ q.T,
                       axis=None if self.axis is None else q @ self.axis)

    def lattice_subgroup(self) -> "Symmetry | None":
        """The operations that are signed permutations of the input axes (the
        ones that map an integration grid built in those axes onto itself),
        or None when that leaves only the identity; an atom or a linear
        molecule becomes the finite group of those its axis allows."""
        if self.kind == "finite":
            ops = [op for op in self.operations
                   if _lattice_operations([op], np.eye(3)) == 1]
        else:
            ops = [np.diag(s) @ np.eye(3)[list(p)] for p in itertools.permutations(range(3))
                   for s in itertools.product((1.0, -1.0), repeat=3)]
            if self.kind == "linear":  # the axis onto itself, or reversed with inversion
                ops = [op for op in ops if np.allclose(op @ self.axis, self.axis, atol=1e-8)
                       or (self.inversion and np.allclose(op @ self.axis, -self.axis,
                                                          atol=1e-8))]
        if len(ops) <= 1:
            return None
        from dataclasses import replace

        return replace(self, kind="finite", operations=np.array(ops), axis=None,
                       inversion=False)

    def frame(self) -> np.ndarray | None:
        """The frame to plan field points in: rows are its axes in the input
        frame, chosen so that as many operations as possible map the points
        of a stencil lattice onto lattice points (are signed permutations
        there); None when the input frame does as well (the molecule lies in
        its symmetry axes). Entries are rounded to 1e-12 so that the planned
        field vectors, and with them the points' keys, do not depend on the
        last bits of a linear-algebra library."""
        if self.kind == "atom":
            return None
        if self.kind == "linear":
            u = _canonical_sign(self.axis)
            if np.max(np.abs(u)) > 1.0 - 1e-12:
                return None  # along an input axis already
            k = int(np.argmin(np.abs(u)))  # the input axis most across the molecule
            a = np.eye(3)[k] - u[k] * u
            a /= np.linalg.norm(a)
            return _rounded(np.array([a, np.cross(u, a), u]))
        best, score = None, _lattice_operations(self.operations, np.eye(3))
        axes = _symmetry_axes(self.operations)
        candidates = []
        for i, a in enumerate(axes):
            for b in axes[i + 1:]:
                if abs(a @ b) < 1e-8:
                    candidates.append(np.array([a, b, np.cross(a, b)]))
            k = int(np.argmin(np.abs(a)))
            b = np.eye(3)[k] - a[k] * a
            b /= np.linalg.norm(b)
            candidates.append(np.array([a, b, np.cross(a, b)]))
        for q in candidates:
            n = _lattice_operations(self.operations, q)
            if n > score:
                best, score = q, n
        return None if best is None else _rounded(_nearest_order(best))

    def forced_zero(self, indices: tuple[int, ...]) -> bool:
        """True when the tensor entry ``indices`` is zero for every tensor of
        that rank the group leaves invariant (so the molecule's is zero)."""
        return bool(np.all(np.abs(_invariant_basis(self, len(indices))[
            np.ravel_multi_index(indices, (3,) * len(indices))]) < 1e-8))


def point_group_label(operations) -> str:
    """The Schoenflies symbol of a finite group of 3x3 orthogonal operations
    (C2v, D6h, Td, ...): from its order, inversion, mirrors and the orders and
    directions of its rotation axes."""
    ops = [np.asarray(op, dtype=float) for op in operations]
    h = len(ops)
    inversion = any(np.allclose(op, -np.eye(3), atol=1e-8) for op in ops)
    axes: dict[int, list[np.ndarray]] = {}  # rotation order -> axes
    for op in ops:
        if np.linalg.det(op) < 0 or np.allclose(op, np.eye(3), atol=1e-8):
            continue
        angle = math.acos(max(-1.0, min(1.0, (np.trace(op) - 1.0) / 2.0)))
        n = int(round(2 * math.pi / angle))
        _, _, vt = np.linalg.svd(op - np.eye(3))
        a = vt[-1]
        for m in axes:  # a rotation by 2 pi / n also belongs to the axis of order m
            if m % n == 0 and any(abs(a @ b) > 1 - 1e-8 for b in axes[m]):
                break
        else:
            for m in list(axes):
                if n % m == 0:
                    axes[m] = [b for b in axes[m] if abs(a @ b) <= 1 - 1e-8]
            if not any(abs(a @ b) > 1 - 1e-8 for b in axes.setdefault(n, [])):
                axes[n].append(a)
    mirrors = []
    for op in ops:
        if np.linalg.det(op) < 0 and abs(np.trace(op) - 1.0) < 1e-8:
            _, _, vt = np.linalg.svd(op + np.eye(3))
            mirrors.append(vt[-1])
    if len(axes.get(3, [])) > 1 or len(axes.get(5, [])) > 1:  # cubic and icosahedral
        if axes.get(5):
            return "Ih" if inversion else "I"
        if axes.get(4):
            return "Oh" if inversion else "O"
        return "Th" if inversion else ("Td" if mirrors else "T")
    if not axes:
        return "Cs" if mirrors else ("Ci" if inversion else "C1")
    n = max(axes)
    principal = axes[n][0]
    across = sum(1 for b in axes.get(2, []) if abs(b @ principal) < 1e-8)
    horizontal = any(abs(abs(m @ principal) - 1.0) < 1e-8 for m in mirrors)
    vertical = any(abs(m @ principal) < 1e-8 for m in mirrors)
    if across >= n and n >= 2 and not (n == 2 and across < 2):
        return f"D{n}h" if horizontal else (f"D{n}d" if vertical else f"D{n}")
    if horizontal:
        return f"C{n}h"
    if vertical:
        return f"C{n}v"
    if h == 2 * n:
        return f"S{2 * n}"
    return f"C{n}"


def _canonical_sign(v: np.ndarray) -> np.ndarray:
    """v with its first clearly non-zero entry positive (axes have no sense)."""
    v = np.asarray(v, dtype=float)
    first = next(x for x in v if abs(x) > 1e-8)
    return v if first > 0 else -v


def _symmetry_axes(operations) -> list[np.ndarray]:
    """Rotation axes of the operations and of minus the improper ones (mirror
    normals, rotation-reflection axes), once each, in a fixed sense."""
    axes: list[np.ndarray] = []
    for op in operations:
        rot = op if np.linalg.det(op) > 0 else -op
        if np.allclose(rot, np.eye(3), atol=1e-8):
            continue
        _, s, vt = np.linalg.svd(rot - np.eye(3))
        a = _canonical_sign(vt[-1] / np.linalg.norm(vt[-1]))
        if not any(abs(a @ b) > 1.0 - 1e-8 for b in axes):
            axes.append(a)
    return axes


def _lattice_operations(operations, q: np.ndarray) -> int:
    """How many operations are signed permutations in the frame of ``q``."""
    n = 0
    for op in operations:
        m = q @ op @ q.T
        if np.all((np.abs(m) < 1e-8) | (np.abs(np.abs(m) - 1.0) < 1e-8)):
            n += 1
    return n


def _nearest_order(q: np.ndarray) -> np.ndarray:
    """The axes of ``q`` reordered and signed so that each lies nearest the
    input axis of its place (a proper rotation): labels stay familiar."""
    best, trace = q, -np.inf
    for perm in itertools.permutations(range(3)):
        m = q[list(perm)]
        signs = np.sign(np.diag(m))
        signs[signs == 0] = 1.0
        m = m * signs[:, None]
        if np.linalg.det(m) < 0:  # flip the axis least aligned with its place
            k = int(np.argmin(np.abs(np.diag(m))))
            m[k] = -m[k]
        if np.trace(m) > trace + 1e-12:
            best, trace = m, np.trace(m)
    return best


def _rounded(q: np.ndarray) -> np.ndarray:
    out = np.round(q, FRAME_DECIMALS)
    out[out == 0.0] = 0.0  # no negative zeros
    return out


def _rotation_about(u: np.ndarray, angle: float) -> np.ndarray:
    """Rodrigues: the rotation by ``angle`` about the unit vector ``u``."""
    k = np.array([[0.0, -u[2], u[1]], [u[2], 0.0, -u[0]], [-u[1], u[0], 0.0]])
    return np.eye(3) + math.sin(angle) * k + (1.0 - math.cos(angle)) * (k @ k)


def _rotation_taking(g: np.ndarray, f: np.ndarray) -> np.ndarray:
    """A rotation taking g to f (equal lengths)."""
    ng, nf = np.linalg.norm(g), np.linalg.norm(f)
    if ng == 0.0 or nf == 0.0:
        return np.eye(3)
    a, b = g / ng, f / nf
    axis = np.cross(a, b)
    s, c = np.linalg.norm(axis), float(a @ b)
    if s < 1e-14:
        if c > 0:
            return np.eye(3)
        other = np.eye(3)[np.argmin(np.abs(a))]
        axis = np.cross(a, other)
        return _rotation_about(axis / np.linalg.norm(axis), math.pi)
    return _rotation_about(axis / s, math.atan2(s, c))


def _invariant_basis(sym: Symmetry, rank: int) -> np.ndarray:
    """An orthonormal basis (3^rank, d) of the rank-``rank`` tensors invariant
    under every operation (the null space of the stacked R^(x)rank - 1)."""
    rows = []
    for op in sym.operations:
        big = op
        for _ in range(rank - 1):
            big = np.kron(big, op)
        rows.append(big - np.eye(3 ** rank))
    _, s, vt = np.linalg.svd(np.vstack(rows))
    return vt[np.sum(s > 1e-8):].T


def detect(charges, coords_bohr, centre=None,
           tolerance: float = SYMMETRY_TOLERANCE_BOHR) -> Symmetry | None:
    """The symmetry of the framework about ``centre`` (default: the centre of
    nuclear charge), or None for none but the identity."""
    z = np.asarray(charges, dtype=float)
    xyz = np.asarray(coords_bohr, dtype=float)
    centre = (z @ xyz) / z.sum() if centre is None else np.asarray(centre, dtype=float)
    x = xyz - centre
    r = np.linalg.norm(x, axis=1)
    if np.all(r <= tolerance):
        if len(x) != 1:
            return None
        gens = np.array([_rotation_about(np.eye(3)[2], 2 * math.pi / _AXIAL_ORDER),
                         _rotation_about(np.eye(3)[0], 2 * math.pi / _AXIAL_ORDER), -np.eye(3)])
        return Symmetry("atom", gens, centre, np.array([centre]), float(r[0]))
    far = int(np.argmax(r))
    u = x[far] / r[far]
    across = x - np.outer(x @ u, u)
    if np.all(np.linalg.norm(across, axis=1) <= tolerance):
        return _linear(z, x, u, centre, tolerance)
    # Reference atoms: the first from the smallest class of (element, distance
    # from the centre), farthest out; the second not on a line with it.
    classes: dict[tuple, list[int]] = {}
    for i in range(len(x)):
        match = next((k for k in classes if k[0] == z[i] and abs(k[1] - r[i]) <= tolerance),
                     None)
        classes.setdefault(match or (z[i], r[i]), []).append(i)
    member = {i: k for k, members in classes.items() for i in members}
    order = sorted(range(len(x)), key=lambda i: (len(classes[member[i]]), -r[i]))
    a = next(i for i in order if r[i] > tolerance)
    b = next(i for i in order if np.linalg.norm(np.cross(x[a], x[i])) > tolerance * r[a])
    source = np.column_stack([x[a], x[b], np.cross(x[a], x[b])])
    # An operation built from two reference atoms is as inexact as their
    # symmetry, and the error grows with the distance of the atoms it maps: so
    # atoms are first matched with MATCH_SLACK times the tolerance, the set is
    # required to be a group, and the refined framework must lie within the
    # tolerance of the given one; failing that, the strict tolerance.
    for slack in (MATCH_SLACK, 1.0):
        ops, perms = [], []
        for a2 in classes[member[a]]:
            for b2 in classes[member[b]]:
                if abs(np.linalg.norm(x[a2] - x[b2]) - np.linalg.norm(x[a] - x[b])) > \
                        2 * tolerance:
                    continue
                for sense in (1.0, -1.0):
                    target = np.column_stack([x[a2], x[b2], sense * np.cross(x[a2], x[b2])])
                    m = target @ np.linalg.inv(source)
                    w, _, vt = np.linalg.svd(m)
                    op = w @ vt  # the nearest orthogonal matrix
                    perm = _permutation(op, z, x, slack * tolerance)
                    if perm is not None and not any(np.allclose(op, o, atol=1e-6) for o in ops):
                        ops.append(op)
                        perms.append(perm)
        if len(ops) <= 1 or not _closed(ops):
            continue
        first = next(k for k, op in enumerate(ops) if np.allclose(op, np.eye(3), atol=1e-6))
        ops.insert(0, ops.pop(first))
        perms.insert(0, perms.pop(first))
        ops, sym = _refine(ops, perms, x)
        if ops is None:
            continue
        moved = float(np.max(np.linalg.norm(sym - x, axis=1)))
        if moved <= tolerance:
            return Symmetry("finite", np.array(ops), centre, sym + centre, moved)
    return None


#: Atoms are matched under trial operations with this many tolerances first
#: (see detect).
MATCH_SLACK = 20.0


def roundoff_tolerance_bohr(coords_bohr, centre) -> float:
    """ROUNDOFF_ULPS units in the last place of the framework's size (bohr)."""
    x = np.asarray(coords_bohr, dtype=float) - np.asarray(centre, dtype=float)
    size = max(1.0, float(np.max(np.linalg.norm(x, axis=1))))
    return ROUNDOFF_ULPS * float(np.finfo(float).eps) * size


def symmetrise_like(sym: Symmetry, charges, coords_bohr,
                    tolerance: float = SYMMETRY_TOLERANCE_BOHR) -> np.ndarray | None:
    """``coords_bohr`` made exactly symmetric under the operations of ``sym``
    about its centre (a finite group found on another framework of the same
    atoms, e.g. the starting geometry of an optimisation): each atom moved to
    the average of its images (the average over a group is a projection, so
    one pass suffices). None when an operation maps an atom further than
    ``tolerance`` from every atom of its element (the frameworks do not share
    the group). A framework whose symmetry elements lay on the input axes
    keeps them there exactly, which a detection on the moved framework itself
    (tilted and shifted by an optimiser's noise) would not.
    """
    if sym.kind != "finite":
        return None
    z = np.asarray(charges, dtype=float)
    centre = np.asarray(sym.centre, dtype=float)
    x = np.asarray(coords_bohr, dtype=float) - centre
    perms = [_permutation(op, z, x, tolerance) for op in sym.operations]
    if any(perm is None for perm in perms):
        return None
    return _project(sym.operations, perms, x) + centre


def _project(ops, perms, x) -> np.ndarray:
    """The framework ``x`` (about the centre) averaged over the group: each
    atom to the mean of the images that land on it. Each orbit is then
    rebuilt from one atom by the operations themselves, so that for signed
    permutations (a molecule in its symmetry axes) the images agree bit for
    bit, where summing in a different order per atom would leave an ulp."""
    mean = np.zeros_like(x)
    for op, perm in zip(ops, perms):
        mean[perm] += x @ np.asarray(op).T
    mean /= len(ops)
    out = mean.copy()
    done = np.zeros(len(x), dtype=bool)
    for i in range(len(x)):
        if done[i]:
            continue
        for op, perm in zip(ops, perms):
            j = perm[i]
            if not done[j]:
                out[j] = np.asarray(op) @ mean[i]
                done[j] = True
    return out


def _closed(ops) -> bool:
    """True when every product of two operations is (nearly) one of them."""
    return all(any(np.abs(a @ b - c).max() < 1e-4 for c in ops) for a in ops for b in ops)


#: The symmetrised framework must map onto itself to this (bohr) under the
#: refined operations, and is refined on towards round-off while that gains.
EXACTNESS_BOHR = 1e-11
#: Most alternations of symmetrisation and operation refinement (each gains
#: a factor of a few; from 1e-5 bohr to round-off takes ~10).
REFINE_STEPS = 60


def _refine(ops, perms, x):
    """Operations exact to round-off, and the framework exactly symmetric.

    The operations found from two reference atoms are only as accurate as the
    framework's symmetry (~tolerance / distance); an image's dipole R mu would
    carry that error into every derivative. So alternate: symmetrise the
    framework (each atom to the average of the images that land on it), then
    make each operation the orthogonal matrix that best maps the symmetrised
    framework onto its permuted self (Kabsch, keeping the determinant's sign:
    for a planar framework that picks the operation, not its product with
    the reflection through the plane), until both agree to EXACTNESS_BOHR.
    (None, x) when they do not (no symmetry is then used)."""
    ops = [np.asarray(op, dtype=float) for op in ops]
    sym = x
    exact = roundoff_tolerance_bohr(x, np.zeros(3)) / 4
    worst = np.inf
    for _ in range(REFINE_STEPS):
        sym = _project(ops, perms, sym)
        refined = []
        for op, perm in zip(ops, perms):
            w, _, vt = np.linalg.svd(sym[perm].T @ sym)
            d = np.sign(np.linalg.det(op)) * np.sign(np.linalg.det(w @ vt))
            refined.append(_exact(w @ np.diag([1.0, 1.0, d]) @ vt))
        ops = refined
        last, worst = worst, max(float(np.max(np.abs(sym @ op.T - sym[perm])))
                                 for op, perm in zip(ops, perms))
        # On to round-off (a symmetrised framework is then symmetric as it
        # stands), or as far as the alternation still gains.
        if worst <= exact or (worst <= EXACTNESS_BOHR and worst >= 0.5 * last):
            return ops, sym
    return (ops, sym) if worst <= EXACTNESS_BOHR else (None, x)


def _exact(op: np.ndarray) -> np.ndarray:
    """Entries within 1e-12 of 0 or +-1 made exact (axis-aligned operations
    then map field vectors bit for bit)."""
    out = op.copy()
    for target in (0.0, 1.0, -1.0):
        out[np.abs(out - target) < 1e-12] = target
    return out


def _permutation(op, z, x, tolerance) -> np.ndarray | None:
    """perm[i] = the atom that atom i's image under ``op`` lands on, or None."""
    image = x @ op.T
    perm = np.empty(len(x), dtype=int)
    for i in range(len(x)):
        d = np.linalg.norm(x - image[i], axis=1)
        d[z != z[i]] = np.inf
        j = int(np.argmin(d))
        if d[j] > tolerance:
            return None
        perm[i] = j
    return perm if len(set(perm.tolist())) == len(perm) else None


def _linear(z, x, u, centre, tolerance) -> Symmetry:
    """C-inf-v, or D-inf-h when the reflection across the axis maps the
    framework onto itself; generators for forced zeros."""
    along = x @ u
    sym = np.outer(along, u)
    flip = np.eye(3) - 2.0 * np.outer(u, u)
    inversion = _permutation(flip, z, sym, tolerance) is not None
    if inversion:
        perm = _permutation(flip, z, sym, tolerance)
        sym = 0.5 * (sym + (sym @ flip.T)[np.argsort(perm)])
    other = np.eye(3)[np.argmin(np.abs(u))]
    v = np.cross(u, other)
    v /= np.linalg.norm(v)
    gens = [_rotation_about(u, 2 * math.pi / _AXIAL_ORDER), np.eye(3) - 2.0 * np.outer(v, v)]
    if inversion:
        gens.append(-np.eye(3))
    moved = float(np.max(np.linalg.norm(sym - x, axis=1)))
    return Symmetry("linear", np.array(gens), centre, sym + centre, moved, u, inversion)


def images(field_vectors, sym: Symmetry | None) -> list[tuple[int, np.ndarray | None]]:
    """For each field vector: (index of the earlier vector it is the image of,
    the operation R with R F_rep = F), or (its own index, None) when it is
    computed itself."""
    out: list[tuple[int, np.ndarray | None]] = []
    reps: list[int] = []
    vectors = [np.asarray(f, dtype=float) for f in field_vectors]
    for i, f in enumerate(vectors):
        found = None
        if sym is not None:
            for j in reps:
                op = sym.relate(f, vectors[j])
                if op is not None:
                    found = (j, op)
                    break
        if found is None:
            reps.append(i)
            out.append((i, None))
        else:
            out.append(found)
    return out


def image_record(record, op: np.ndarray, point):
    """The record of the point ``point`` whose field is ``op`` applied to that
    of ``record``'s point: the same energy and state checks, the dipole and
    alpha turned (mu -> R mu, alpha -> R alpha R^T), no SCF cycles of its own."""
    from dataclasses import replace

    dipole = None if record.dipole_au is None else tuple(
        float(v) for v in op @ np.asarray(record.dipole_au))
    alpha = None if record.alpha_au is None else tuple(
        tuple(float(v) for v in row) for row in op @ np.asarray(record.alpha_au) @ op.T)
    return replace(record, point=point, dipole_au=dipole, alpha_au=alpha, scf_cycles=0,
                   wall_time_s=0.0)


__all__ = ["ROUNDOFF_ULPS", "SYMMETRY_TOLERANCE_BOHR", "Symmetry", "detect", "image_record",
           "images", "roundoff_tolerance_bohr", "symmetrise_like"]
