"""Stencil planner: the field vectors to compute and the weights that turn their
energies (or dipoles) into every unique tensor component.

Pure numerics: plain data in, frozen dataclasses out, no PySCF.

Model
-----
A field point is a lattice vector ``offsets`` (three small integers) on ladder
level k, with field vector ``offsets * field_au * ratio**k`` (au). A derivative
of order d_x + d_y + d_z of a quantity q (the energy, or one dipole component) is
estimated at level k, step h_k = field_au * ratio**k, as

    D(h_k) = sign * sum_p w_p q(h_k * o_p) / h_k**n   (n = d_x + d_y + d_z)

The weights solve the Taylor-matching conditions sum_p w_p o_p^m / m! = delta_{m,d}
for every multi-index m with |m| <= n, with the inversion symmetry
w(-o) = (-1)^n w(o). That symmetry makes every term of the other parity vanish,
so each estimate is exact to O(h^2) and its error series holds even powers of h
only: Richardson extrapolation in h^2 applies to every component, diagonal or
mixed. Components are planned diagonal first; a mixed component uses the points
already planned and adds the fewest new inversion pairs that satisfy the
conditions (alpha_xy needs only (+1,+1) and (-1,-1) beside the axis points), with
the minimum-norm weights when several solutions exist.

Routes
------
``energy``: q = E and sign = -1 (Taylor convention, E = E0 - mu F - alpha F^2/2
- ...); a tensor of order n needs the n-th derivative, one per unique sorted
index tuple (3, 6, 10, 15 components).
``dipole``: q = mu_i and sign = +1 (mu_i(F) = mu_i + alpha_ij F_j + ...); a tensor
of order n needs derivatives of order n - 1 of the mu_i. A static response
tensor is symmetric in all its indices (each is a derivative of one energy),
so with ``index_symmetry = "assume"`` (the default) each unique component is
one derivative of one mu_i, the one that needs the fewest field directions at
once, and fills every permutation of its indices: beta_xxy is d2 mu_y/dF_x^2,
on the x axis, not d2 mu_x/dF_x dF_y, on a diagonal line; of beta's ten
unique components only beta_xyz needs a diagonal line (d2 mu_x/dF_y dF_z).
With ``"test"`` every derivative of every mu_i is computed, so the first
index is differentiated separately from the others and the tensor's
index-permutation symmetry is a check of the numbers rather than a
construction (three diagonal lines for beta).
``alpha``: q = the analytic (CPHF/CPKS) alpha_ij(F), sign = +1; beta and gamma
are its first and second derivatives, two orders below the energy route (the
reference route of ``fieldprop check``); the dipole is the analytic one.

Identical field vectors are planned once: the zero point is shared by all levels,
and for an integer ratio r an offset divisible by r at level k is the offset / r
point of level k + 1 (both identified in integers, never by comparing floats).

Example
-------
>>> plan = plan_fields(("alpha",), field_au=0.001, ratio=2.0, levels=2, route="energy")
>>> len(plan.components), len(plan.points)
(6, 25)
>>> [c.indices for c in plan.components][:3]
[(0, 0), (0, 1), (0, 2)]
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from fieldprop.numerics.methods import Route
from fieldprop.numerics.units import PROPERTY_ORDER

AXES = "xyz"


@dataclass(frozen=True)
class FieldPoint:
    """One uniform field to compute: an independent, picklable unit of work.

    ``index`` is the point's position in its plan; ``offsets`` and ``level`` are
    its identity; ``field_vector_au`` is derived once, in :func:`field_vector`.
    """

    index: int
    offsets: tuple[int, int, int]
    level: int
    field_vector_au: tuple[float, float, float]

    @property
    def label(self) -> str:
        """Compact text form, e.g. ``L1(+1,-1,0)``."""
        return f"L{self.level}(" + ",".join(f"{o:+d}" if o else "0" for o in self.offsets) + ")"


@dataclass(frozen=True)
class Stencil:
    """Weights of one derivative estimate at one ladder level.

    The estimate is ``sign * sum(w * q[point]) / step_au**order`` over ``terms``
    (point index, weight w).
    """

    level: int
    step_au: float
    terms: tuple[tuple[int, float], ...]

    @property
    def weight_norm(self) -> float:
        """sum |w|: the factor by which noise in q enters the estimate (times 1/h^n)."""
        return float(sum(abs(w) for _, w in self.terms))


@dataclass(frozen=True)
class ComponentPlan:
    """How one tensor component is obtained.

    ``quantity`` is the per-point quantity differentiated (the route's: energy,
    dipole or analytic alpha) and ``element`` which element of it: () for the
    energy, (i,) for mu_i, (i, j) for alpha_ij. ``derivative`` counts the
    differentiations along x, y, z; ``indices`` are the tensor indices it fills
    (with all permutations of the differentiated ones; with ``symmetric``,
    all permutations of every index: the dipole route's index_symmetry =
    "assume").
    """

    tensor: str
    indices: tuple[int, ...]
    quantity: Route
    element: tuple[int, ...]
    derivative: tuple[int, int, int]
    sign: float
    stencils: tuple[Stencil, ...]  # one per ladder level, level 0 first
    symmetric: bool = False

    @property
    def order(self) -> int:
        return sum(self.derivative)

    @property
    def name(self) -> str:
        """Component name such as ``beta_xyy``."""
        return self.tensor + "_" + "".join(AXES[i] for i in self.indices)

    @property
    def source(self) -> str:
        """The differentiated quantity as text: ``energy``, ``dipole_x``, ``alpha_xy``."""
        if not self.element:
            return self.quantity.value
        return self.quantity.value + "_" + "".join(AXES[i] for i in self.element)


@dataclass(frozen=True)
class FieldPlan:
    """Field points and component recipes for one job."""

    route: Route
    field_au: float
    ratio: float
    levels: int
    points: tuple[FieldPoint, ...]
    components: tuple[ComponentPlan, ...]
    #: Rows: the axes (in the input frame) along which the offsets run and the
    #: components are differentiated; None: the input frame's x, y, z.
    frame: tuple[tuple[float, float, float], ...] | None = None

    def steps_au(self) -> tuple[float, ...]:
        """The ladder h_k = field_au * ratio**k, k = 0..levels-1."""
        return tuple(step_au(self.field_au, self.ratio, k) for k in range(self.levels))


def step_au(field_au: float, ratio: float, level: int) -> float:
    """Field strength of ladder level ``level`` (the one place it is computed)."""
    return field_au * ratio**level


def field_vector(offsets: tuple[int, int, int], field_au: float, ratio: float,
                 level: int, frame=None) -> tuple[float, float, float]:
    """offsets * field_au * ratio**level, in au, along the input axes or
    those of ``frame`` (rows: its axes in the input frame)."""
    h = step_au(field_au, ratio, level)
    if frame is None:
        return tuple(float(o * h) for o in offsets)
    return tuple(float(sum(o * h * axis[i] for o, axis in zip(offsets, frame) if o))
                 for i in range(3))


@lru_cache(maxsize=None)
def central_weights(d: int) -> tuple[tuple[int, float], ...]:
    """One-dimensional central weights for the d-th derivative, error O(h^2).

    Solves sum_o w(o) o^j / j! = delta_{jd} for j = 0..2m on o = -m..m,
    m = ceil(d/2); zero weights are dropped.

    >>> central_weights(2)
    ((-1, 1.0), (0, -2.0), (1, 1.0))
    >>> central_weights(3)
    ((-2, -0.5), (-1, 1.0), (1, -1.0), (2, 0.5))
    """
    if d == 0:
        return ((0, 1.0),)
    m = (d + 1) // 2
    offsets = np.arange(-m, m + 1)
    rows = np.array([offsets.astype(float) ** j / math.factorial(j) for j in range(2 * m + 1)])
    rhs = np.zeros(2 * m + 1)
    rhs[d] = 1.0
    w = np.linalg.solve(rows, rhs)
    # The exact weights are small rationals; remove solver round-off (~1e-16) so
    # that symmetric pairs cancel exactly.
    w = np.round(w * 720.0) / 720.0
    return tuple((int(o), float(x)) for o, x in zip(offsets, w) if x != 0.0)


def _orbit_rep(o: tuple[int, ...]) -> tuple[int, ...]:
    """Representative of {o, -o}: first nonzero coordinate positive."""
    for v in o:
        if v:
            return o if v > 0 else tuple(-x for x in o)
    return o


def _moment_matrix(orbits, derivative: tuple[int, int, int]):
    """Taylor-matching rows for orbit weights u (w(o) = u, w(-o) = (-1)^n u).

    Rows are the monomials o^m / m! with |m| <= n and |m| = n mod 2 over the
    differentiated axes (the others are zero on every candidate); the other
    parity vanishes identically by the inversion symmetry of the weights.
    """
    n = sum(derivative)
    axes = [a for a in range(3) if derivative[a]]
    monomials = []
    for degree in range(n % 2, n + 1, 2):
        for combo in itertools.combinations_with_replacement(axes, degree):
            monomials.append(tuple(combo.count(a) for a in range(3)))
    rows = np.zeros((len(monomials), len(orbits)))
    for r, m in enumerate(monomials):
        norm = math.prod(math.factorial(k) for k in m)
        for c, o in enumerate(orbits):
            value = math.prod(float(o[a]) ** m[a] for a in range(3)) / norm
            rows[r, c] = value if o == (0, 0, 0) else 2.0 * value
    rhs = np.array([1.0 if m == derivative else 0.0 for m in monomials])
    return rows, rhs


def _solve_orbits(orbits, derivative):
    """Minimum-norm orbit weights satisfying the conditions, or None if impossible."""
    if not orbits:
        return None
    rows, rhs = _moment_matrix(orbits, derivative)
    u, *_ = np.linalg.lstsq(rows, rhs, rcond=None)
    if np.max(np.abs(rows @ u - rhs)) > 1e-10:
        return None
    return u


def sparse_weights(derivative: tuple[int, int, int],
                   available: frozenset = frozenset()) -> dict[tuple[int, int, int], float]:
    """Weights over lattice offsets for d^n / dx^dx dy^dy dz^dz, using few new points.

    Candidates are the offsets o with |o_a| <= ceil(d_a / 2) on the differentiated
    axes (zero elsewhere), taken in inversion pairs. Offsets already in
    ``available`` are used freely; new pairs are added, fewest and nearest first,
    until the Taylor-matching conditions can be met; the weights are the
    minimum-norm solution (least noise amplification).

    >>> sorted(sparse_weights((1, 1, 0), frozenset({(0, 0, 0), (1, 0, 0), (-1, 0, 0),
    ...                                              (0, 1, 0), (0, -1, 0)})).items())
    ... # doctest: +NORMALIZE_WHITESPACE
    [((-1, 0, 0), 0.5), ((-1, 1, 0), -0.5), ((0, -1, 0), 0.5), ((0, 0, 0), -1.0),
     ((0, 1, 0), 0.5), ((1, -1, 0), -0.5), ((1, 0, 0), 0.5)]
    """
    n = sum(derivative)
    if n == 0:
        return {(0, 0, 0): 1.0}
    ranges = [range(-((d + 1) // 2), (d + 1) // 2 + 1) if d else range(0, 1) for d in derivative]
    box = {_orbit_rep(o) for o in itertools.product(*ranges)}
    if n % 2:
        box.discard((0, 0, 0))  # an odd derivative gives the zero field no weight
    have = sorted(o for o in box if o in available or tuple(-x for x in o) in available)
    new = sorted((o for o in box if o not in have),
                 key=lambda o: (sum(1 for x in o if x), sum(abs(x) for x in o), o))
    for t in range(len(new) + 1):
        for extra in itertools.combinations(new, t):
            orbits = have + list(extra)
            u = _solve_orbits(orbits, derivative)
            if u is None:
                continue
            u = np.round(u * 2**20) / 2**20  # weights are dyadic-friendly rationals
            out: dict[tuple[int, int, int], float] = {}
            for o, x in zip(orbits, u):
                if abs(x) < 1e-12:
                    continue
                out[o] = float(x)
                if o != (0, 0, 0):
                    out[tuple(-v for v in o)] = float(x) * (-1) ** n
            return out
    raise ValueError(f"no stencil found for derivative {derivative}")  # unreachable: full box works


def _integer_ratio(ratio: float, power: int) -> int | None:
    """round(ratio**power) if ratio**power is an integer > 1, else None."""
    f = ratio**power
    r = round(f)
    return r if r > 1 and abs(f - r) < 1e-9 * r else None


def canonical(offsets: tuple[int, int, int], level: int, ratio: float,
              levels: int) -> tuple[tuple[int, int, int], int]:
    """The representative (offsets, level) of a field vector on the ladder.

    The zero vector is ``((0, 0, 0), 0)``; an offset vector divisible by an integer
    ratio**j moves up j levels while the ladder has them. All in integers.
    """
    if offsets == (0, 0, 0):
        return offsets, 0
    for j in range(levels - 1 - level, 0, -1):
        r = _integer_ratio(ratio, j)
        if r is not None and all(o % r == 0 for o in offsets):
            return tuple(o // r for o in offsets), level + j
    return offsets, level


#: [response] index_symmetry: the dipole route's one derivative per unique
#: component ("assume") or every derivative of every mu_i ("test").
INDEX_SYMMETRY = ("assume", "test")


def component_recipes(properties, route: Route | str, index_symmetry: str = "assume") -> list[
        tuple[str, tuple[int, ...], Route, tuple[int, ...], tuple[int, int, int], float, bool]]:
    """(tensor, indices, quantity, element, derivative counts, sign, symmetric)
    per component needed (symmetric: it fills every permutation of its
    indices, ComponentPlan.symmetric)."""
    try:
        route = Route(route)
    except ValueError:
        raise ValueError(f"route must be 'energy', 'dipole' or 'alpha', got {route!r}") from None
    if index_symmetry not in INDEX_SYMMETRY:
        raise ValueError(f"index_symmetry must be one of {INDEX_SYMMETRY}, got {index_symmetry!r}")
    recipes = []
    for prop in properties:
        n = PROPERTY_ORDER[prop]
        if route is Route.ENERGY:
            for idx in itertools.combinations_with_replacement(range(3), n):
                counts = tuple(idx.count(a) for a in range(3))
                recipes.append((prop, idx, Route.ENERGY, (), counts, -1.0, False))
        elif n == 1 or (route is Route.DIPOLE and index_symmetry == "test"):
            # The dipole route, and the dipole itself on the alpha route: d^(n-1) mu_i.
            for i in range(3):
                for rest in itertools.combinations_with_replacement(range(3), n - 1):
                    counts = tuple(rest.count(a) for a in range(3))
                    recipes.append((prop, (i, *rest), Route.DIPOLE, (i,), counts, 1.0, False))
        elif route is Route.DIPOLE:
            # One derivative of one mu_i per unique component: the mu_i whose
            # derivative runs along the fewest axes at once (then the first).
            for idx in itertools.combinations_with_replacement(range(3), n):
                i = min(sorted(set(idx)), key=lambda a: len(set(_without(idx, a))))
                rest = _without(idx, i)
                counts = tuple(rest.count(a) for a in range(3))
                recipes.append((prop, (i, *rest), Route.DIPOLE, (i,), counts, 1.0, True))
        else:
            for i, j in itertools.combinations_with_replacement(range(3), 2):
                for rest in itertools.combinations_with_replacement(range(3), n - 2):
                    counts = tuple(rest.count(a) for a in range(3))
                    recipes.append((prop, (i, j, *rest), Route.ALPHA, (i, j), counts, 1.0,
                                    False))
    return recipes


def _without(idx: tuple[int, ...], a: int) -> tuple[int, ...]:
    """``idx`` (sorted) with one ``a`` taken out."""
    k = idx.index(a)
    return idx[:k] + idx[k + 1:]


def plan_fields(properties, field_au: float, ratio: float, levels: int,
                route: str = "energy", forced_zero=None, frame=None,
                index_symmetry: str = "assume") -> FieldPlan:
    """Plan the field points and per-component stencils.

    Parameters
    ----------
    properties : names from ("dipole", "alpha", "beta", "gamma").
    field_au : h0, the smallest field strength (au), > 0.
    ratio : ladder ratio a > 1; h_k = h0 * a**k.
    levels : number of field strengths K >= 1.
    route : "energy" (differentiate E) or "dipole" (differentiate mu_i).
    forced_zero : optional predicate on a component's tensor indices: True for
        a component the molecule's symmetry makes zero, which is planned with
        no stencil and needs no point (indices in ``frame``).
    frame : optional rows of an orthogonal matrix, the axes (in the input
        frame) along which offsets run and components are differentiated:
        the plan then gives the tensors in that frame (a molecule's symmetry
        frame; the engine turns them back).
    index_symmetry : on the dipole route, "assume" (one derivative per unique
        component, filling every permutation of its indices) or "test" (every
        derivative of every mu_i).

    Returns
    -------
    FieldPlan; points are deduplicated and ordered zero field first, then by
    level and offsets; every component has one stencil per level (a component
    that is a plain zero-field value, the dipole on the dipole route, has one).
    """
    if field_au <= 0 or ratio <= 1 or levels < 1:
        raise ValueError("need field_au > 0, ratio > 1, levels >= 1")
    route = Route(route)
    recipes = component_recipes(properties, route, index_symmetry)
    # The zero-field point is always computed: it gives E0 and the warm start.
    keys: dict[tuple[tuple[int, int, int], int], None] = {((0, 0, 0), 0): None}
    raw: list[tuple[tuple, list[tuple[int, list]]]] = []
    available: set[tuple[int, int, int]] = {(0, 0, 0)}
    # Diagonal components first, so mixed ones can reuse the axis points.
    order = sorted(range(len(recipes)), key=lambda r: (
        sum(1 for d in recipes[r][4] if d), sum(recipes[r][4]), r))
    for r in order:
        recipe = recipes[r]
        counts = recipe[4]
        if forced_zero is not None and forced_zero(recipe[1]):
            raw.append((r, recipe, []))
            continue
        weights = sparse_weights(counts, frozenset(available))
        available.update(weights)
        per_level = []
        n_levels = 1 if sum(counts) == 0 else levels
        for k in range(n_levels):
            terms = []
            for off, w in sorted(weights.items()):
                key = canonical(off, k, ratio, levels)
                keys[key] = None
                terms.append((key, w))
            per_level.append((k, terms))
        raw.append((r, recipe, per_level))
    raw.sort()
    ordered = sorted(keys, key=lambda kl: (kl[0] != (0, 0, 0), kl[1], kl[0]))
    index = {key: i for i, key in enumerate(ordered)}
    if frame is not None:
        frame = tuple(tuple(float(v) for v in row) for row in frame)
    points = tuple(FieldPoint(i, off, lvl, field_vector(off, field_au, ratio, lvl, frame))
                   for i, (off, lvl) in enumerate(ordered))
    components = []
    for _, (tensor, idx, quantity, element, counts, sign, symmetric), per_level in raw:
        stencils = tuple(Stencil(k, step_au(field_au, ratio, k),
                                 tuple((index[key], w) for key, w in terms))
                         for k, terms in per_level)
        components.append(ComponentPlan(tensor, idx, quantity, element, counts, sign, stencils,
                                        symmetric))
    return FieldPlan(route, field_au, ratio, levels, points, tuple(components), frame)


def stencil_estimate(component: ComponentPlan, stencil: Stencil, energies_au, dipoles_au,
                     alphas_au=None) -> float:
    """Evaluate one stencil on computed point data.

    ``energies_au`` has shape (n_points,), ``dipoles_au`` shape (n_points, 3) (or
    None on the energy route), ``alphas_au`` shape (n_points, 3, 3) (alpha route
    only), indexed by point; point 0 is the zero field.
    Returns the raw (unextrapolated) derivative estimate in au.
    """
    if component.quantity is Route.ENERGY:
        q = np.asarray(energies_au, dtype=float)
    elif component.quantity is Route.ALPHA:
        i, j = component.element
        q = np.asarray(alphas_au, dtype=float)[:, i, j]
    else:
        q = np.asarray(dipoles_au, dtype=float)[:, component.element[0]]
    # The weights of a derivative of order >= 1 sum to zero, so subtracting the
    # zero-field value changes nothing but the rounding: E ~ -100 Eh while the
    # differences that matter are ~1e-8 Eh.
    ref = q[0] if component.order > 0 else 0.0
    total = math.fsum(w * (q[point] - ref) for point, w in stencil.terms)
    return component.sign * total / stencil.step_au ** component.order
