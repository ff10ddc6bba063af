"""The state checks: what marks a field point as another electronic state
than zero field's. The occupied orbitals per set, <S^2>, the operations of the
molecule's abelian point subgroup that the zero-field state shares (with their
action on the basis functions and the occupied orbitals' characters), and the
verdict on one point (occupied overlap, <S^2>, occupation by symmetry).
"""

from __future__ import annotations

import logging

import numpy as np

from fieldprop.points.records import SymmetryOperation, ZeroFieldReference

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
