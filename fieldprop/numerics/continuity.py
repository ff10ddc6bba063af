"""Taylor continuity of the field points: is each point on the same smooth curve
as the smaller fields on its line?

Pure numerics: field points, the differentiated quantity at each point (energy,
dipole vector or analytic alpha) and its noise in; a report out. No PySCF.

Every planned field vector lies on a line through zero field (its offsets up to
an integer factor), and most lines carry a ladder of field strengths: the axes,
and the diagonals of mixed components. Along a line the quantity q(s) is a
smooth function of the signed field strength s, as long as the electronic state
stays the same and s lies inside the convergence radius of the Taylor series.
So each point at strength |s| is predicted from the points of its line at the
next smaller strengths (and zero field) by the polynomial through them (Lagrange
extrapolation, degree = number of nodes - 1; see PREDICTING_STRENGTHS), and the
residual

    R = q(s) - sum_j w_j q(s_j)

is compared with two sizes:

* the noise it can carry, ``noise(s) + sum_j |w_j| noise(s_j)``: the
  extrapolation weights are exact, the noises are the measured SCF convergence
  (the same model as the round-off floors);
* the field-induced change at that strength, ``|q(s) - q(0)| + |q(-s) - q(0)|``:
  its even part is at least alpha s^2 (energy) or ~2 alpha s (dipole), never
  zero by symmetry, unlike single components.

A smooth curve inside its convergence radius leaves a residual of the order of
the first Taylor term the polynomial lacks, a factor ~(s / s_conv)^3 below the
change (s_conv ~ sqrt(alpha / gamma) ~ 0.1 au for small molecules);
tests/benchmarks/bench_continuity.py measures it on the validation molecules
over the automatic window. A point on another state
leaves a residual of the order of the change itself: the energy's slope (the
dipole) jumps by the two states' dipole difference, ~1 au, and the dipole route
sees that jump directly. A residual above NOISE_FACTOR noises *and* above
RELATIVE_DEPARTURE of the change is a departure: that point and every larger
field on its line are excluded from the derivatives that would use them.

A line with a single strength (an inversion pair) has no smaller field to
predict from (two nodes, 0 and -s, do not fix a curve); such points are only
checked by the state checks of the backend (occupied overlap, <S^2>, occupation
by symmetry). A point those checks ``flagged`` departs in the same way: it and
the larger fields on its line are excluded, whatever its Taylor residual.

Example
-------
>>> from fieldprop.numerics.plan import plan_fields
>>> plan = plan_fields(("alpha",), field_au=0.001, ratio=2.0, levels=3, route="energy")
>>> import numpy as np
>>> f = np.array([p.field_vector_au for p in plan.points])
>>> energy = -76.0 - 0.5 * (f ** 2 * [9.0, 8.0, 7.0]).sum(axis=1)  # a smooth state
>>> check_continuity(plan.points, energy[:, None], np.full(len(f), 1e-12)).departures
()
>>> energy[[p.label for p in plan.points].index("L2(0,0,+1)")] -= 1e-3  # another state
>>> [d.label for d in check_continuity(plan.points, energy[:, None],
...                                     np.full(len(f), 1e-12)).departures]
['L2(0,0,+1)']
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Residual, as a fraction of the field-induced change, above which a point
#: departs from its line's Taylor curve (see the module text for the sizes).
RELATIVE_DEPARTURE = 0.05
#: ... provided the residual also exceeds this many of its noise.
NOISE_FACTOR = 10.0
#: The prediction uses zero field and the points of the next PREDICTING_STRENGTHS
#: smaller strengths of the line (five nodes: a quartic, exact for a Taylor series
#: through gamma). More nodes would amplify the noise: extrapolating from
#: 0, +-s/2, +-s/4 multiplies it by sum |w| = 129; adding +-s/8 makes it 8359.
PREDICTING_STRENGTHS = 2
#: Relative tolerance for two field strengths on a line to count as equal.
_SAME = 1e-9


@dataclass(frozen=True)
class Departure:
    """A point of a line that leaves the zero-field state's smooth curve.

    ``kind`` is "taylor" (its residual from the smaller fields' prediction is too
    large; the numbers say by how much) or "state" (a state check of the backend
    flagged it; ``reason`` says which, and the numbers are 0).
    """

    index: int  # position in the plan's points
    label: str
    field_vector_au: tuple[float, float, float]
    residual: float  # |q - prediction|, in the quantity's atomic units
    noise: float  # the noise the residual may carry
    change: float  # the field-induced change at this strength
    nodes: int  # points the prediction used
    kind: str = "taylor"
    reason: str = ""

    @property
    def relative(self) -> float:
        return self.residual / self.change if self.change > 0 else math.inf


@dataclass(frozen=True)
class ContinuityReport:
    """Outcome of :func:`check_continuity`.

    ``checked`` counts the points that had a prediction; ``largest_relative``
    is the largest residual / change among the points that passed (how close
    the smooth ones came to the threshold); ``excluded`` holds the indices of
    every departing point and of the larger fields on its line.
    """

    checked: int
    largest_relative: float
    departures: tuple[Departure, ...]
    excluded: frozenset[int]
    cause: dict | None = None  # excluded point index -> label of its line's departure


def _line(offsets: tuple[int, int, int]) -> tuple[tuple[int, int, int], int]:
    """(primitive direction with its first nonzero coordinate positive, integer factor)."""
    g = math.gcd(*(abs(o) for o in offsets))
    prim = tuple(o // g for o in offsets)
    first = next(v for v in prim if v)
    return (prim, g) if first > 0 else (tuple(-v for v in prim), -g)


def lagrange_weights(nodes, target: float) -> np.ndarray:
    """Weights w_j with p(target) = sum_j w_j p(nodes_j) for every polynomial of
    degree < len(nodes).

    >>> lagrange_weights([-1.0, 0.0, 1.0], 2.0).tolist()
    [1.0, -3.0, 3.0]
    """
    x = np.asarray(nodes, dtype=float)
    w = np.ones(len(x))
    for j in range(len(x)):
        for m in range(len(x)):
            if m != j:
                w[j] *= (target - x[m]) / (x[j] - x[m])
    return w


def check_continuity(points, values, noise, flagged=None, relative=RELATIVE_DEPARTURE,
                     factor=NOISE_FACTOR, present=None) -> ContinuityReport:
    """Predict each point from the smaller fields on its line; see the module text.

    ``points`` are the plan's FieldPoints (``points[0]`` zero field), ``values``
    an (n, m) array of the differentiated quantity (m = 1 energy, 3 dipole, 9
    alpha), ``noise`` the (n,) noise of one of its components at each point,
    ``flagged`` {point index: reason} for points the state checks refused,
    ``present`` the indices of the points computed (None: all); the others are
    not on any line.
    """
    flagged = flagged or {}
    values = np.asarray(values, dtype=float).reshape(len(points), -1)
    noise = np.asarray(noise, dtype=float) * math.sqrt(values.shape[1])
    lines: dict[tuple[int, int, int], list[tuple[float, int]]] = {}
    for i, p in enumerate(points):
        if not any(p.offsets) or (present is not None and i not in present):
            continue
        direction, factor_int = _line(p.offsets)
        strength = math.copysign(float(np.linalg.norm(p.field_vector_au)), factor_int)
        lines.setdefault(direction, []).append((strength, i))
    checked, largest, found, cause = 0, 0.0, [], {}
    for members in lines.values():
        members.sort(key=lambda m: abs(m[0]))
        strengths = sorted({abs(s) for s, _ in members})
        groups = []  # distinct strengths, each with its (s, index) members
        for size in strengths:
            if groups and size <= groups[-1][0] * (1 + _SAME):
                continue
            groups.append((size, [m for m in members
                                  if abs(abs(m[0]) - size) <= _SAME * size]))
        node_groups: list[list[tuple[float, int]]] = []
        departed, departed_at = False, ""
        for size, group in groups:
            if departed:
                cause.update((i, departed_at) for _, i in group)
                continue
            refused = [(s, i) for s, i in group if i in flagged]
            for s, i in refused:
                p = points[i]
                found.append(Departure(i, p.label, tuple(p.field_vector_au), 0.0, 0.0, 0.0, 0,
                                       "state", flagged[i]))
                departed = True
            nodes = [(0.0, 0)] + [m for g in node_groups[-PREDICTING_STRENGTHS:] for m in g]
            if not departed and len(nodes) >= 3:
                x = np.array([s for s, _ in nodes]) / size
                change = sum(float(np.linalg.norm(values[i] - values[0])) for _, i in group)
                if len(group) == 1:
                    change *= 2.0
                for s, i in group:
                    w = lagrange_weights(x, s / size)
                    prediction = w @ values[[j for _, j in nodes]]
                    residual = float(np.linalg.norm(values[i] - prediction))
                    sigma = float(noise[i] + np.abs(w) @ noise[[j for _, j in nodes]])
                    checked += 1
                    if residual > factor * sigma and residual > relative * change:
                        p = points[i]
                        found.append(Departure(i, p.label, tuple(p.field_vector_au), residual,
                                               sigma, change, len(nodes)))
                        departed = True
                        break
                    if residual > factor * sigma:
                        largest = max(largest, residual / change if change > 0 else math.inf)
            if departed:
                departed_at = found[-1].label
                cause.update((i, departed_at) for _, i in group)
            else:
                node_groups.append(group)
    found.sort(key=lambda d: d.index)
    return ContinuityReport(checked, largest, tuple(found), frozenset(cause), cause)
