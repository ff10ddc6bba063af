"""The adaptive field window: which ladder levels each component needs.

Pure numerics: a plan's components, their current windows and their Richardson
estimates in; wider windows out. No PySCF, no store.

The automatic ladder spans h_k = h0 * 2**k, k = 0..L-1 (AUTO_FIELD_AU and
AUTO_LEVELS of :mod:`fieldprop.inputs.job`), wide enough to hold every component's
stable window. Computing all of it for every component doubles a job's cost
over a 3-level ladder, yet each component's best Richardson entry uses only a
few neighbouring levels. So each component starts from a window of
START_LEVELS levels (:func:`initial_windows`) and grows one level at a time,
only while its table has not settled (:func:`grow`):

* its error bar is material: above SETTLED_RELATIVE of the largest component
  of its tensor (below that, a wider table could only shrink a bar nobody
  reads);
* and the table points to where a better entry lies. A truncation-limited
  entry (table spread above the round-off floor) that starts at the window's
  smallest field, or an unstable table (a departure from the zero-field state
  at larger fields, or a single usable level), asks for a smaller field; a
  noise-limited entry (round-off floor at or above the spread) that reaches
  the window's largest field asks for a larger one. An entry inside its
  window has found the balance of truncation and round-off between fields
  already computed: a further level would not change it.

The window can also lower the noise floor. An entry whose error bar stays
above the precision a user expects of it (EXPECTED_PRECISION: relative to its
tensor's largest component, with an absolute floor per order) and that no
other level of the ladder can help (the rules above ask for none) asks for
its points to be computed again with tighter convergence (:data:`TIGHTER`:
one more ScfSpec.tightened step, which divides the orbital-gradient target
and the amplitude solver's targets by 100), when the caller says that would
lower its floor where it matters (engine._tightenable: at the window's
smallest field the convergence part of the noise exceeds the double-precision
part, the noise sets the bar, at the floor or at the smaller fields, and a
step is left). A window is (lowest level,
highest level, tightening steps); a point used by several components is
computed at the largest tightening among them.

Windows only grow and tightening only increases, so the stages end (after at
most L - START_LEVELS + MAX_TIGHTENING per component). Every decision depends on the values of the points in the windows
alone, so any process that holds those points replays the same stages:
``run`` computes stage by stage, ``collect`` and ``plan`` replay them from the
stored points and name what the next stage needs.

Example
-------
>>> from fieldprop.numerics.plan import plan_fields
>>> plan = plan_fields(("alpha",), 0.00025, 2.0, 6, "dipole")
>>> initial_windows(plan)[:2]
((2, 4, 0), (2, 4, 0))
>>> len(needed_points(plan, initial_windows(plan))), len(plan.points)
(19, 37)
"""

from __future__ import annotations

from fieldprop.numerics.extrapolate import ComponentEstimate, ComponentStatus
from fieldprop.numerics.methods import Route

#: Levels of a component's first window.
START_LEVELS = 3
#: First level of that window, by route: measured on water HF/6-31G over the
#: six-level automatic ladder, the best entries used levels 2..5 on the dipole
#: route and 3..5 on the energy route (its noise is amplified by one more power
#: of 1/h); level 0 and 1 were never chosen.
START_LEVEL = {Route.DIPOLE: 2, Route.ALPHA: 2, Route.ENERGY: 3}
#: An error bar at or below this fraction of its tensor's largest component is
#: settled whatever its table says.
SETTLED_RELATIVE = 1e-6
#: The precision a user expects of a component, by derivative order: (relative
#: to its tensor's largest component, absolute in au). An error bar at the
#: noise floor above both has its points' convergence tightened. Six
#: significant digits of mu and alpha, five of beta and gamma; the absolute
#: parts keep a tensor that is zero within its bars (an atom's beta) from
#: asking for ever tighter points, and sit at 1/1000 of the absolute floors of
#: ``fieldprop check`` (tensors.NEGLIGIBLE_ERROR_AU / 10, the floors under
#: which a difference is never judged).
EXPECTED_PRECISION = {1: (1e-6, 1e-8), 2: (1e-6, 1e-8), 3: (1e-5, 1e-6), 4: (1e-5, 1e-4)}
#: :func:`wants` asking for the window's points with tighter convergence.
TIGHTER = 2

Window = tuple[int, int, int]  # (lowest, highest) level, inclusive; tightening steps


def initial_windows(plan) -> tuple[Window, ...]:
    """The first window of every component of ``plan`` (a plain zero-field
    value, and a component without stencils, get (0, 0)), untightened."""
    top = plan.levels - 1
    first = max(0, min(START_LEVEL[plan.route], plan.levels - START_LEVELS))
    last = min(top, first + START_LEVELS - 1)
    return tuple((0, 0, 0) if len(c.stencils) <= 1 else (first, last, 0)
                 for c in plan.components)


def point_tightening(plan, windows) -> dict[int, int]:
    """{index: tightening steps} of the points the windows' stencils use
    (zero field always): the largest tightening of the windows using each."""
    need = {0: 0}
    for comp, window in zip(plan.components, windows):
        lo, hi = window[0], window[1]
        steps = window[2] if len(window) > 2 else 0
        for s in comp.stencils[lo:hi + 1]:
            for p, _ in s.terms:
                need[p] = max(need.get(p, 0), steps)
    return need


def needed_points(plan, windows) -> frozenset[int]:
    """Indices of the points the windows' stencils use (zero field always)."""
    return frozenset(point_tightening(plan, windows))


def expected_precision(order: int, scale: float) -> float:
    """The error bar a user expects of an order-``order`` component whose
    tensor's largest |component| is ``scale`` (EXPECTED_PRECISION)."""
    relative, absolute = EXPECTED_PRECISION[order]
    return max(relative * scale, absolute)


def wants(est: ComponentEstimate, window, levels: int, scale: float, order: int = 0,
          tightenable: bool = False) -> int:
    """-1 for a smaller field, +1 for a larger one, TIGHTER for tighter
    points, 0 when settled (see the module text); ``scale`` is the largest
    |component| of its tensor, ``order`` its tensor's rank (1 for mu .. 4 for
    gamma; 0: never tighter), ``tightenable``: one more tightening step would lower its floor."""
    lo, hi = window[0], window[1]
    status = est.status
    if status in (ComponentStatus.ZERO_FIELD, ComponentStatus.SYMMETRY_ZERO,
                  ComponentStatus.MISSING):
        return 0
    if status is ComponentStatus.UNSTABLE:
        return -1 if lo > 0 else 0
    if est.error_au <= SETTLED_RELATIVE * scale:
        return 0
    k, m = est.chosen_entry  # absolute level of its smallest field
    if status is ComponentStatus.OK and k == lo and lo > 0:
        return -1
    # An entry (k, m) rests on levels k..k+m, and a raw one (m = 0) on k+1 too
    # (its error is the difference from the next field's).
    if status is ComponentStatus.NOISE_LIMITED and k + max(m, 1) == hi and hi < levels - 1:
        return 1
    # No other field of the ladder helps, the bar is above what is expected,
    # and the noise keeps the smaller fields from helping: lower the floor.
    if tightenable and order > 0 and est.error_au > expected_precision(order, scale):
        return TIGHTER
    return 0


def grow(plan, windows, estimates, scales, tightenable=None) -> tuple[Window, ...]:
    """The next windows: one more level, or one more tightening step, where
    :func:`wants` asks for it. ``scales`` is the largest |component| of each
    component's tensor; ``tightenable`` (one bool per component, default
    none) whether one more tightening step would lower its floor."""
    out = []
    tightenable = tightenable or (False,) * len(plan.components)
    for comp, window, est, scale, tighter in zip(plan.components, windows, estimates, scales,
                                                  tightenable):
        lo, hi = window[0], window[1]
        steps = window[2] if len(window) > 2 else 0
        step = (wants(est, window, plan.levels, scale, len(comp.indices), tighter)
                if len(comp.stencils) > 1 else 0)
        out.append((lo, hi, steps + 1) if step == TIGHTER else (lo - 1, hi, steps) if step < 0
                   else (lo, hi + 1, steps) if step > 0 else (lo, hi, steps))
    return tuple(out)
