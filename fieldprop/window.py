"""The adaptive field window: which ladder levels each component needs.

Pure numerics: a plan's components, their current windows and their Richardson
estimates in; wider windows out. No PySCF, no store.

The automatic ladder spans h_k = h0 * 2**k, k = 0..L-1 (AUTO_FIELD_AU and
AUTO_LEVELS of :mod:`fieldprop.job`), wide enough to hold every component's
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

Windows only grow, so the stages end (after at most L - START_LEVELS per
component). Every decision depends on the values of the points in the windows
alone, so any process that holds those points replays the same stages:
``run`` computes stage by stage, ``collect`` and ``plan`` replay them from the
stored points and name what the next stage needs.

Example
-------
>>> from fieldprop.plan import plan_fields
>>> plan = plan_fields(("alpha",), 0.00025, 2.0, 6, "dipole")
>>> initial_windows(plan)[:2]
((2, 4), (2, 4))
>>> len(needed_points(plan, initial_windows(plan))), len(plan.points)
(19, 37)
"""

from __future__ import annotations

from fieldprop.extrapolate import ComponentEstimate, ComponentStatus
from fieldprop.methods import Route

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

Window = tuple[int, int]  # (lowest, highest) level, inclusive


def initial_windows(plan) -> tuple[Window, ...]:
    """The first window of every component of ``plan`` (a plain zero-field
    value, and a component without stencils, get (0, 0))."""
    top = plan.levels - 1
    first = max(0, min(START_LEVEL[plan.route], plan.levels - START_LEVELS))
    last = min(top, first + START_LEVELS - 1)
    return tuple((0, 0) if len(c.stencils) <= 1 else (first, last) for c in plan.components)


def needed_points(plan, windows) -> frozenset[int]:
    """Indices of the points the windows' stencils use (zero field always)."""
    need = {0}
    for comp, (lo, hi) in zip(plan.components, windows):
        for s in comp.stencils[lo:hi + 1]:
            need.update(p for p, _ in s.terms)
    return frozenset(need)


def wants(est: ComponentEstimate, window: Window, levels: int, scale: float) -> int:
    """-1 for a smaller field, +1 for a larger one, 0 when settled (see the
    module text); ``scale`` is the largest |component| of its tensor."""
    lo, hi = window
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
    return 0


def grow(plan, windows, estimates, scales) -> tuple[Window, ...]:
    """The next windows: one more level where :func:`wants` asks for one.
    ``scales`` is the largest |component| of each component's tensor."""
    out = []
    for comp, window, est, scale in zip(plan.components, windows, estimates, scales):
        step = wants(est, window, plan.levels, scale) if len(comp.stencils) > 1 else 0
        lo, hi = window
        out.append((lo - 1, hi) if step < 0 else (lo, hi + 1) if step > 0 else window)
    return tuple(out)
