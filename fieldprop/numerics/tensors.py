"""Response tensors from extrapolated derivatives, and their invariants.

Pure numerics, no PySCF.

Sign convention (Taylor, the contract's)::

    E(F) = E0 - mu_i F_i - 1/2 alpha_ij F_i F_j - 1/6 beta_ijk F_i F_j F_k
              - 1/24 gamma_ijkl F_i F_j F_k F_l
    mu_i(F) = -dE/dF_i = mu_i + alpha_ij F_j + 1/2 beta_ijk F_j F_k + 1/6 gamma_ijkl F_j F_k F_l

so alpha_ij = -d2E/dF_i dF_j = d mu_i / dF_j and so on. On the energy route each
unique component fills every permutation of its indices; on the dipole route
component (i, j, k, ...) is the derivative of mu_i along j, k, ...: with
index_symmetry "assume" (fieldprop.numerics.plan) one per unique component,
filling every permutation of its indices; with "test" one per mu_i and
derivative, filling only permutations of the differentiated indices, so the
tensor's deviation from full index symmetry is a measure of numerical quality.

Invariants (REFERENCES sect. 3; the contract's names): ``dipole_norm`` = |mu|;
``alpha_iso`` = tr(alpha)/3; ``alpha_aniso`` = sqrt{1/2[(axx-ayy)^2 + (ayy-azz)^2 +
(azz-axx)^2 + 6(axy^2+axz^2+ayz^2)]} (symmetrised alpha); beta_i = 1/3 sum_j
(beta_ijj + beta_jij + beta_jji), ``beta_vector_norm`` = |beta_i| (``beta_vec`` in
the JSON until it goes), ``beta_parallel`` =
3/5 sum_i mu_i beta_i / |mu|; ``beta_hrs`` = sqrt(<beta_ZZZ^2> + <beta_XZZ^2>) with
<beta_ZZZ^2> = 2/35 B2 + 3/35 V, <beta_XZZ^2> = 4/105 B2 - 1/105 V, B2 = sum beta_ijk^2,
V = sum_i (sum_j beta_ijj)^2 of the symmetrised beta (Bersohn, Pao, Frisch, J. Chem.
Phys. 45, 3184 (1966)); ``gamma_parallel`` = 1/15 sum_ij (gamma_iijj + gamma_ijij +
gamma_ijji).

Error bars of invariants propagate the component error bars linearly,
sum_c |d inv / d c| err_c (components share field points, so their errors are
not independent; the linear sum does not assume they are). The invariants that
are seminorms of their tensor (|mu|, alpha_aniso, beta_vector_norm, beta_hrs: a norm,
or the square root of a positive semidefinite quadratic form) lose that
estimate near zero, where their slope says nothing of their spread (beta
components of 1e-4 +- 1e-2 gave beta_hrs 1e-4 +- 2.6e-4). For them
f(v + d)^2 = f(v)^2 + 2 <v, d> + f(d)^2 in the form's inner product, with
|<v, d>| <= f(v) L (L the linear estimate) and f(d) <= T = sum_c err_c
f(unit_c) (triangle inequality; unit_c has 1 in the entries of component c),
for every d within the component bars, whatever their correlation (as the
linear sum). So f(v + d) - f(v) lies between sqrt(max(f^2 - 2 f L, 0)) - f
and sqrt(f^2 + 2 f L + T^2) - f, and the error bar is the larger magnitude:
T at f = 0, L + O(T^2 / f) far from zero.

Example
-------
>>> import numpy as np
>>> b = np.zeros((3, 3, 3)); b[2, 2, 2] = 1.0
>>> round(float(beta_hrs(b) / np.sqrt(6 / 35)), 12)
1.0
"""

from __future__ import annotations

import dataclasses
import itertools
import math
from dataclasses import dataclass

import numpy as np

from fieldprop.numerics.extrapolate import ComponentEstimate, ComponentStatus, mark_unstable
from fieldprop.numerics.plan import ComponentPlan
from fieldprop.numerics.units import PROPERTY_ORDER

#: A component is unstable when its error bar exceeds this fraction of the
#: largest magnitude in its tensor (and the negligible level below).
UNSTABLE_FRACTION = 0.1
#: Error bars below these (au) are negligible for any use of the numbers, whatever
#: the tensor's size, so symmetry-zero tensors (beta of a centrosymmetric molecule)
#: are not flagged for their noise: small next to typical molecular values of
#: |mu| ~ 1, alpha ~ 10, beta ~ 10-1000, gamma ~ 1e3-1e5 au (common practice).
NEGLIGIBLE_ERROR_AU = {1: 1e-5, 2: 1e-4, 3: 1e-2, 4: 1.0}
#: No error bar is below the rounding of the value it qualifies: this many
#: units in the last place of |value| (a Richardson entry is a few weighted
#: sums of numbers of its size, each rounded; turned entries add their own,
#: see turn_tensors).
VALUE_ULPS = 8.0
_EPS = float(np.finfo(float).eps)


@dataclass(frozen=True)
class ComponentResult:
    """One computed component, the tensor entries it fills, and its estimate."""

    plan: ComponentPlan
    estimate: ComponentEstimate
    entries: tuple[tuple[int, ...], ...]

    @property
    def stable(self) -> bool:
        return self.estimate.status not in (ComponentStatus.UNSTABLE, ComponentStatus.MISSING)


@dataclass(frozen=True)
class TensorResult:
    """A full response tensor: value and error arrays of shape (3,)*order, au.

    ``stable`` has the same shape; an unstable entry has no trustworthy number.
    """

    name: str
    order: int
    value_au: np.ndarray
    error_au: np.ndarray
    stable: np.ndarray
    components: tuple[ComponentResult, ...]


@dataclass(frozen=True)
class Invariant:
    """A scalar invariant (au) with its propagated error; ``value_au`` is None if
    unavailable, with the reason."""

    name: str
    value_au: float | None
    error_au: float | None
    reason: str = ""


def _entries(plan: ComponentPlan) -> tuple[tuple[int, ...], ...]:
    if plan.source == "energy" or plan.symmetric:
        perms = set(itertools.permutations(plan.indices))
    elif plan.source.startswith("alpha_"):
        (i, j), rest = plan.indices[:2], plan.indices[2:]
        perms = {(a, b, *p) for p in itertools.permutations(rest) for a, b in ((i, j), (j, i))}
    else:
        first, rest = plan.indices[0], plan.indices[1:]
        perms = {(first, *p) for p in itertools.permutations(rest)}
    return tuple(sorted(perms))


def assemble(plans, estimates) -> dict[str, TensorResult]:
    """Full tensors from component plans and their Richardson estimates.

    Components whose error exceeds UNSTABLE_FRACTION of the tensor's largest
    magnitude known (max over components of |value| - error) and
    NEGLIGIBLE_ERROR_AU are flagged unstable here.
    """
    by_tensor: dict[str, list[ComponentResult]] = {}
    for plan, est in zip(plans, estimates, strict=True):
        by_tensor.setdefault(plan.tensor, []).append(ComponentResult(plan, est, _entries(plan)))
    out = {}
    for name in PROPERTY_ORDER:
        if name not in by_tensor:
            continue
        order = PROPERTY_ORDER[name]
        comps = by_tensor[name]
        # The tensor's size is what its components are known to have at least
        # (|value| - error): a noisy component must not raise the limit that
        # decides whether the others (or itself) settled.
        known = [abs(c.estimate.value_au) - c.estimate.error_au for c in comps
                 if math.isfinite(c.estimate.value_au) and math.isfinite(c.estimate.error_au)]
        scale = max(max(known, default=0.0), 0.0)
        limit = max(UNSTABLE_FRACTION * scale, NEGLIGIBLE_ERROR_AU[order])
        checked = []
        for c in comps:
            est = _at_least_rounding(c.estimate)
            if c.stable and not est.error_au <= limit:
                est = mark_unstable(est, f"error bar {est.error_au:.2g} au exceeds "
                                         f"{UNSTABLE_FRACTION:.0%} of the tensor's size "
                                         f"({scale:.3g} au, its largest |component| less "
                                         "that component's error bar): the Richardson "
                                         "table did not settle")
            checked.append(ComponentResult(c.plan, est, c.entries))
        value = np.zeros((3,) * order)
        error = np.zeros((3,) * order)
        stable = np.ones((3,) * order, dtype=bool)
        for c in checked:
            for e in c.entries:
                value[e], error[e], stable[e] = c.estimate.value_au, c.estimate.error_au, c.stable
        out[name] = TensorResult(name, order, value, error, stable, tuple(checked))
    return out


def _at_least_rounding(est: ComponentEstimate) -> ComponentEstimate:
    """``est`` with its error bar raised to VALUE_ULPS ulp of its value."""
    floor = VALUE_ULPS * _EPS * abs(est.value_au)
    if not math.isfinite(floor) or est.error_au >= floor:
        return est
    return dataclasses.replace(est, error_au=floor)


#: The status of an entry drawn from several frame components: the worst of
#: theirs, in this order (worst first).
_WORST_FIRST = (ComponentStatus.MISSING, ComponentStatus.UNSTABLE,
                ComponentStatus.NOISE_LIMITED, ComponentStatus.OK, ComponentStatus.ZERO_FIELD,
                ComponentStatus.SYMMETRY_ZERO)


def _turn(t: np.ndarray, m: np.ndarray) -> np.ndarray:
    """sum_ij.. m[a, i] m[b, j] .. t[i, j, ..]: every index of ``t`` turned by ``m``."""
    for axis in range(t.ndim):
        t = np.moveaxis(np.tensordot(m, t, axes=([1], [axis])), 0, axis)
    return t


def turn_tensors(tensors: dict[str, TensorResult], frame, forced_zero=None,
                 frame_error: float = 0.0) -> dict[str, TensorResult]:
    """Tensors computed in ``frame`` (rows: its axes in the input frame)
    turned into the input frame, component by component.

    An input-frame entry is sum_i.. q[i, a] .. T[i, ..] over the frame entries;
    its error bar sums |q[i, a] ..| err[i, ..] (linear, as for invariants:
    components share points); its status is the worst of the frame
    components it draws on (a coefficient above 1e-12), with no number when
    one of them has none. ``forced_zero(indices)`` (the group in the input
    frame) makes an entry exactly zero by symmetry. The components keep
    their names and recipes; their Richardson tables are the frame's, so
    none is kept (``table`` empty), and ``chosen_entry`` is that of the
    contributor with the largest error bar.

    Two more terms keep a turned bar from falling below what the turn itself
    leaves: the frame is known to ``frame_error`` per entry (its rows are
    rounded), so every frame entry, the ones symmetry made exactly zero
    included (zero only in the exact frame), is uncertain by order *
    frame_error * max |T|, turned like the bars; and the turn's own rounding,
    (3^order + order) ulp of sum |q..| |T|.
    """
    q = np.asarray(frame, dtype=float)
    out = {}
    for name, t in tensors.items():
        owner = np.empty(t.value_au.shape, dtype=object)
        for c in t.components:
            for e in c.entries:
                owner[e] = c
        # Entries without a number are left out here (0) and make every entry
        # that draws on them numberless below.
        value = _turn(np.where(t.stable, t.value_au, 0.0), q.T)
        error = _turn(np.where(t.stable, t.error_au, 0.0), np.abs(q.T))
        size = _turn(np.where(t.stable, np.abs(t.value_au), 0.0), np.abs(q.T))
        largest = float(np.max(np.where(t.stable, np.abs(t.value_au), 0.0)))
        error = (error + (3 ** t.order + t.order) * _EPS * size
                 + t.order * frame_error * largest * _turn(np.ones_like(size), np.abs(q.T)))
        roundoff = np.zeros_like(t.value_au)
        for c in t.components:
            for e in c.entries:
                roundoff[e] = c.estimate.roundoff_au if c.stable else 0.0
        roundoff = _turn(roundoff, np.abs(q.T))
        comps = []
        for c in t.components:
            idx = c.plan.indices
            if forced_zero is not None and forced_zero(idx):
                est = ComponentEstimate(0.0, 0.0, (0, 0), ComponentStatus.SYMMETRY_ZERO, 0.0,
                                        (), c.estimate.reason or "forbidden by the molecule's "
                                        "point group")
                comps.append(ComponentResult(c.plan, est, c.entries))
                continue
            weight = np.ones((3,) * t.order)
            for axis, a in enumerate(idx):
                shape = [1] * t.order
                shape[axis] = 3
                weight = weight * np.abs(q[:, a]).reshape(shape)
            drawn = {id(owner[e]): owner[e] for e in zip(*np.nonzero(weight > 1e-12))
                     if owner[e] is not None}.values()
            drawn = [d for d in drawn if d.estimate.status is not ComponentStatus.SYMMETRY_ZERO] \
                or list(drawn)
            status = min((d.estimate.status for d in drawn), key=_WORST_FIRST.index)
            if status is ComponentStatus.SYMMETRY_ZERO:
                status = ComponentStatus.OK  # zero in the frame, not by the input frame's group
            worst = max(drawn, key=lambda d: (d.estimate.error_au
                                              if math.isfinite(d.estimate.error_au) else math.inf))
            reasons = sorted({f"{d.plan.name}: {d.estimate.reason}" for d in drawn
                              if d.estimate.status is status and d.estimate.reason})
            if status in (ComponentStatus.UNSTABLE, ComponentStatus.MISSING):
                v, e, r = math.nan, math.nan, math.nan
            else:
                v, e, r = float(value[idx]), float(error[idx]), float(roundoff[idx])
            reason = ("from the symmetry frame's " + "; ".join(reasons[:3])) if reasons else ""
            est = ComponentEstimate(v, e, worst.estimate.chosen_entry, status, r, (), reason)
            comps.append(ComponentResult(c.plan, est, c.entries))
        v_arr = np.zeros_like(t.value_au)
        e_arr = np.zeros_like(t.value_au)
        stable = np.ones(t.value_au.shape, dtype=bool)
        for c in comps:
            for e in c.entries:
                v_arr[e], e_arr[e], stable[e] = c.estimate.value_au, c.estimate.error_au, c.stable
        out[name] = TensorResult(name, t.order, v_arr, e_arr, stable, tuple(comps))
    return out


def symmetrize(t: np.ndarray) -> np.ndarray:
    """Average over all index permutations."""
    perms = list(itertools.permutations(range(t.ndim)))
    return sum(np.transpose(t, p) for p in perms) / len(perms)


def alpha_iso(a: np.ndarray) -> float:
    return float(np.trace(a) / 3.0)


def alpha_aniso(a: np.ndarray) -> float:
    s = symmetrize(a)
    d = (s[0, 0] - s[1, 1]) ** 2 + (s[1, 1] - s[2, 2]) ** 2 + (s[2, 2] - s[0, 0]) ** 2
    off = s[0, 1] ** 2 + s[0, 2] ** 2 + s[1, 2] ** 2
    return float(math.sqrt(max(0.5 * (d + 6.0 * off), 0.0)))


def beta_vector(b: np.ndarray) -> np.ndarray:
    """beta_i = 1/3 sum_j (beta_ijj + beta_jij + beta_jji), shape (3,)."""
    return (np.einsum("ijj->i", b) + np.einsum("jij->i", b) + np.einsum("jji->i", b)) / 3.0


def hrs_averages(b: np.ndarray) -> tuple[float, float]:
    """(<beta_ZZZ^2>, <beta_XZZ^2>): the orientational averages of
    hyper-Rayleigh scattering with the incident and scattered light polarised
    along Z (ZZZ) and the scattered along X (XZZ), of the symmetrised beta
    (static, Kleinman symmetric): 2/35 B2 + 3/35 V and 4/105 B2 - 1/105 V
    (Bersohn, Pao and Frisch, J. Chem. Phys. 45, 3184 (1966); Cyvin, Rauch
    and Decius, J. Chem. Phys. 43, 4083 (1965))."""
    s = symmetrize(b)
    b2 = float(np.sum(s * s))
    v = float(np.sum(np.einsum("ijj->i", s) ** 2))
    return 2.0 / 35.0 * b2 + 3.0 / 35.0 * v, 4.0 / 105.0 * b2 - 1.0 / 105.0 * v


def beta_hrs(b: np.ndarray) -> float:
    zzz, xzz = hrs_averages(b)
    return float(math.sqrt(max(zzz + xzz, 0.0)))


def beta_hrs_zzz(b: np.ndarray) -> float:
    """sqrt(<beta_ZZZ^2>)."""
    return float(math.sqrt(max(hrs_averages(b)[0], 0.0)))


def beta_hrs_xzz(b: np.ndarray) -> float:
    """sqrt(<beta_XZZ^2>)."""
    return float(math.sqrt(max(hrs_averages(b)[1], 0.0)))


def beta_hrs_depolarisation_ratio(b: np.ndarray) -> float:
    """<beta_ZZZ^2> / <beta_XZZ^2>: 5 for a one-dimensional beta (one large
    component along the charge-transfer axis), 3/2 for a purely octupolar one
    (Brasselet and Zyss, J. Opt. Soc. Am. B 15, 257 (1998)); NaN for beta = 0."""
    zzz, xzz = hrs_averages(b)
    return float(zzz / xzz) if xzz > 0.0 else float("nan")


def beta_spherical_parts(b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The dipolar (J = 1) and octupolar (J = 3) parts of the symmetrised beta:
    beta^(1)_ijk = 1/5 (d_ij v_k + d_ik v_j + d_jk v_i), v_i = sum_j beta_ijj,
    and beta^(3) = beta - beta^(1), traceless in every pair of indices
    (Zyss, J. Chem. Phys. 98, 6583 (1993)). Orthogonal, so |beta|^2 =
    |beta^(1)|^2 + |beta^(3)|^2, and <beta_ZZZ^2> = 1/5 |beta^(1)|^2 + 2/35
    |beta^(3)|^2, <beta_XZZ^2> = 1/45 |beta^(1)|^2 + 4/105 |beta^(3)|^2."""
    s = symmetrize(b)
    v = np.einsum("ijj->i", s)
    d = np.eye(3)
    dipolar = (np.einsum("ij,k->ijk", d, v) + np.einsum("ik,j->ijk", d, v)
               + np.einsum("jk,i->ijk", d, v)) / 5.0
    return dipolar, s - dipolar


def beta_dipolar_norm(b: np.ndarray) -> float:
    """|beta^(1)| = sqrt(sum_ijk beta^(1)_ijk^2) (beta_spherical_parts)."""
    return float(np.linalg.norm(beta_spherical_parts(b)[0]))


def beta_octupolar_norm(b: np.ndarray) -> float:
    """|beta^(3)| (beta_spherical_parts)."""
    return float(np.linalg.norm(beta_spherical_parts(b)[1]))


def gamma_parallel(g: np.ndarray) -> float:
    return float((np.einsum("iijj->", g) + np.einsum("ijij->", g) + np.einsum("ijji->", g)) / 15.0)


def gamma_perpendicular(g: np.ndarray) -> float:
    """<gamma_ZZXX> = 1/30 sum_ij (4 g_iijj - g_ijij - g_ijji): the isotropic
    average with the field along Z and the probe along X (common practice;
    static, Kleinman-symmetric gamma gives gamma_parallel / 3)."""
    return float((4.0 * np.einsum("iijj->", g) - np.einsum("ijij->", g)
                  - np.einsum("ijji->", g)) / 30.0)


def dipole_is_zero(mu, error) -> bool:
    """A dipole moment zero within its error bars (|mu| at most three times
    the norm of its bars, or below 1e-6 au): no direction to project on or
    to turn a frame to."""
    norm = float(np.linalg.norm(mu))
    return norm <= 3.0 * float(np.linalg.norm(error)) or norm < 1e-6


def dipole_frame(mu, alpha=None, positions=None) -> np.ndarray:
    """The dipole frame, rows x, y, z: z along mu (the customary orientation
    of a push-pull molecule, its charge-transfer axis); x the direction
    perpendicular to z along which the symmetrised alpha (without alpha, the
    nuclei's second moment about their centre, ``positions`` (n, 3)) is
    largest: the molecule's long in-plane axis; its largest component
    positive; y = z x x. Raises ValueError for mu = 0."""
    mu = np.asarray(mu, dtype=float)
    size = float(np.linalg.norm(mu))
    if size == 0.0:
        raise ValueError("the dipole frame needs a dipole moment")
    z = mu / size
    project = np.eye(3) - np.outer(z, z)
    if alpha is not None:
        shape = symmetrize(np.asarray(alpha, dtype=float))
    else:
        r = np.asarray(positions, dtype=float)
        r = r - r.mean(axis=0)
        shape = r.T @ r
    values, vectors = np.linalg.eigh(project @ shape @ project)
    x = project @ vectors[:, int(np.argmax(values))]
    x /= np.linalg.norm(x)
    if x[int(np.argmax(np.abs(x)))] < 0:
        x = -x
    return np.array([x, np.cross(z, x), z])


def turned(t, frame, magnitudes: bool = False) -> np.ndarray:
    """Tensor ``t`` in the frame whose rows are ``frame``'s axes:
    t'_abc = R_ai R_bj R_ck t_ijk. With ``magnitudes``, |R| in place of R:
    error bars carried linearly (sum_ijk |R_ai R_bj R_ck| err_ijk, which
    assumes no independence of the components' errors, as the invariants)."""
    r = np.abs(frame) if magnitudes else np.asarray(frame)
    out = np.asarray(t, dtype=float)
    for axis in range(out.ndim):
        out = np.moveaxis(np.tensordot(r, out, axes=([1], [axis])), 0, axis)
    return out


def _propagate(fn, tensors: dict[str, TensorResult], names) -> tuple[float, float]:
    """Value and linear error of fn(*values) over the components of ``names``."""
    values = [tensors[n].value_au for n in names]
    base = fn(*values)
    err = 0.0
    for slot, n in enumerate(names):
        for c in tensors[n].components:
            e = c.estimate.error_au
            if e == 0.0:
                continue
            # Central difference at a step of one error bar: exact for a linear
            # invariant, and for a smooth one while the bar is small next to
            # the value (a seminorm near zero is not: _seminorm_spread).
            shifted = []
            for sign in (1.0, -1.0):
                vals = [v.copy() for v in values]
                for idx in c.entries:
                    vals[slot][idx] += sign * e
                shifted.append(fn(*vals))
            err += abs(shifted[0] - shifted[1]) / 2.0
    return float(base), float(err)


def _seminorm_bound(fn, tensors: dict[str, TensorResult], names) -> float:
    """T = sum_c err_c f(unit_c) >= f(d) for every d within the bars (seminorm f)."""
    zeros = [np.zeros_like(tensors[n].value_au) for n in names]
    total = 0.0
    for slot, n in enumerate(names):
        for c in tensors[n].components:
            one = [z.copy() for z in zeros]
            for idx in c.entries:
                one[slot][idx] = c.estimate.error_au
            total += float(fn(*one))
    return total


def _seminorm_error(value: float, linear: float, bound: float) -> float:
    """The largest |f(v + d) - f(v)| the module docstring's inequalities allow."""
    up = math.sqrt(value * value + 2.0 * value * linear + bound * bound) - value
    down = value - math.sqrt(max(value * value - 2.0 * value * linear, 0.0))
    return max(up, down)


#: Invariants that are ratios (dimensionless; undefined where beta is zero).
RATIOS = {"beta_hrs_depolarisation_ratio"}


def invariants(tensors: dict[str, TensorResult]) -> list[Invariant]:
    """The contract's invariants that the computed tensors allow."""
    specs = []
    if "dipole" in tensors:
        specs.append(("dipole_norm", ("dipole",), lambda m: float(np.linalg.norm(m))))
    if "alpha" in tensors:
        specs += [("alpha_iso", ("alpha",), alpha_iso), ("alpha_aniso", ("alpha",), alpha_aniso)]
    if "beta" in tensors:
        if "dipole" in tensors:
            specs.append(("beta_parallel", ("dipole", "beta"), None))
        specs += [("beta_vector_norm", ("beta",), lambda b: float(np.linalg.norm(beta_vector(b)))),
                  ("beta_hrs", ("beta",), beta_hrs),
                  ("beta_hrs_zzz", ("beta",), beta_hrs_zzz),
                  ("beta_hrs_xzz", ("beta",), beta_hrs_xzz),
                  ("beta_hrs_depolarisation_ratio", ("beta",), beta_hrs_depolarisation_ratio),
                  ("beta_dipolar_norm", ("beta",), beta_dipolar_norm),
                  ("beta_octupolar_norm", ("beta",), beta_octupolar_norm)]
    if "gamma" in tensors:
        specs += [("gamma_parallel", ("gamma",), gamma_parallel),
                  ("gamma_perpendicular", ("gamma",), gamma_perpendicular)]
    seminorms = {"dipole_norm", "alpha_aniso", "beta_vector_norm", "beta_hrs", "beta_hrs_zzz",
                 "beta_hrs_xzz", "beta_dipolar_norm", "beta_octupolar_norm"}
    out = []
    for name, needs, fn in specs:
        bad = [c for n in needs for c in tensors[n].components if not c.stable]
        if bad:
            missing = [c.plan.name for c in bad if c.estimate.status is ComponentStatus.MISSING]
            unstable = [c.plan.name for c in bad if c.plan.name not in missing]
            out.append(Invariant(name, None, None, "; ".join(
                f"{what} components: {', '.join(names)}" for what, names in
                (("unstable", unstable), ("missing", missing)) if names)))
            continue
        if name == "beta_parallel":
            if dipole_is_zero(tensors["dipole"].value_au, tensors["dipole"].error_au):
                out.append(Invariant(name, None, None, "dipole moment is zero within its error "
                                     "bar: the projection on it is undefined"))
                continue
            fn = lambda m, b: 0.6 * float(m @ beta_vector(b)) / float(np.linalg.norm(m))  # noqa: E731
        if name in RATIOS:
            b, b_err = tensors["beta"].value_au, tensors["beta"].error_au
            size = beta_hrs(b)
            if size <= 3.0 * beta_hrs(np.abs(b_err)) or size == 0.0:
                out.append(Invariant(name, None, None, "beta is zero within its error bars: "
                                     "the ratio is undefined"))
                continue
        value, err = _propagate(fn, tensors, needs)
        if name in seminorms:
            err = max(err, _seminorm_error(value, err, _seminorm_bound(fn, tensors, needs)))
        # An invariant is a sum of up to 3^4 products: at least its own rounding.
        err = max(err, VALUE_ULPS * _EPS * abs(value))
        out.append(Invariant(name, value, err))
    return out


#: Turns about the axis in the cylindrical average: an entry of a rank-r tensor
#: turned by phi is a trigonometric polynomial of degree <= r in phi, whose mean
#: over N equally spaced angles is its exact mean for N > r (ranks up to 7 here).
CYLINDER_TURNS = 8


def _turns(kind: str, axis=None) -> np.ndarray:
    """The rotations (k, 3, 3) whose mean is the average of ``kind``:
    "cylindrical" about ``axis`` (CYLINDER_TURNS equal turns), or "spherical":
    the 60 rotations of the icosahedron, a group with no invariant tensors of
    rank 1 to 5 beside those of all rotations, so their mean is the exact
    spherical average of any tensor here (rank <= 4)."""
    from scipy.spatial.transform import Rotation

    if kind == "spherical":
        return Rotation.create_group("I").as_matrix()
    if kind != "cylindrical":
        raise ValueError(f"no rotational average {kind!r}")
    angles = 2.0 * np.pi * np.arange(CYLINDER_TURNS) / CYLINDER_TURNS
    return Rotation.from_rotvec(np.outer(angles, np.asarray(axis, dtype=float))).as_matrix()


@dataclass(frozen=True)
class FrameComponent:
    """One component in the orientation frame of a degenerate open shell:
    ``value_au``/``error_au`` of the tensor turned into that frame, and
    ``average_au``/``average_error_au`` of its rotational average there.
    ``indices`` count the frame's axes (as a component plan counts x, y, z).
    None: a component it draws on has no number."""

    name: str
    indices: tuple[int, ...]
    value_au: float | None
    error_au: float | None
    average_au: float | None
    average_error_au: float | None


@dataclass(frozen=True)
class RotationalAverage:
    """A tensor averaged over the orientations its molecule takes when it turns
    freely (``kind``: "cylindrical", about a linear molecule's axis, or
    "spherical", an atom): arrays of shape (3,)*order in the input frame, with
    ``stable`` False where a component it draws on has no number; and the
    components in the orientation frame (``in_frame``)."""

    name: str
    kind: str
    value_au: np.ndarray
    error_au: np.ndarray
    stable: np.ndarray
    in_frame: tuple[FrameComponent, ...]


def _linear_image(t: TensorResult, fn) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """fn(T) for a linear map ``fn`` of full tensors, as (value, error, stable):
    T = sum_c v_c U_c over the components (U_c: 1 in the entries c fills), so
    fn(T) = sum_c v_c fn(U_c) and its error bar sum_c err_c |fn(U_c)| (linear,
    as for invariants: components share points). Coefficients below 1e-12 are
    rounding of an exact zero (direction cosines of unit axes, exact averages),
    and are made zero."""
    value = np.zeros((3,) * t.order)
    error = np.zeros_like(value)
    unknown = np.zeros(value.shape, dtype=bool)
    for c in t.components:
        unit = np.zeros_like(value)
        for e in c.entries:
            unit[e] = 1.0
        image = fn(unit)
        image[np.abs(image) < 1e-12] = 0.0
        if c.stable:
            value += c.estimate.value_au * image
            error += c.estimate.error_au * np.abs(image)
        else:
            unknown |= image != 0.0
    value[unknown] = np.nan
    error[unknown] = np.nan
    return value, error, ~unknown


def rotational_average(t: TensorResult, kind: str, frame, labels) -> RotationalAverage:
    """``t`` averaged over turns about the last axis of ``frame`` ("cylindrical")
    or over all turns ("spherical"), and both in ``frame``.

    ``frame`` (rows: unit vectors in the input frame) is the orientation frame
    of a degenerate open shell, ``labels`` its axes' names (component names:
    the plan's indices relabelled). The averages are exact (_turns) and linear
    in the components, whose error bars they carry linearly.

    >>> from fieldprop.numerics.extrapolate import ComponentEstimate, ComponentStatus
    >>> from fieldprop.numerics.methods import Route
    >>> from fieldprop.numerics.plan import ComponentPlan
    >>> plans = [ComponentPlan("alpha", (i, i), Route.ENERGY, (), d, -1.0, ())
    ...          for i, d in enumerate(((2, 0, 0), (0, 2, 0), (0, 0, 2)))]
    >>> ests = [ComponentEstimate(v, 0.01, (0, 1), ComponentStatus.OK, 0.0, ())
    ...         for v in (2.0, 1.0, 4.0)]
    >>> avg = rotational_average(assemble(plans, ests)["alpha"], "cylindrical", np.eye(3),
    ...                          ("u", "v", "n"))
    >>> [(c.name, round(c.average_au, 12), round(c.average_error_au, 12)) for c in avg.in_frame]
    [('alpha_uu', 1.5, 0.01), ('alpha_vv', 1.5, 0.01), ('alpha_nn', 4.0, 0.01)]
    """
    q = np.asarray(frame, dtype=float)
    turns = _turns(kind, q[2])

    def average(x):
        return sum(_turn(x, r) for r in turns) / len(turns)

    value, error, stable = _linear_image(t, average)
    in_frame = _linear_image(t, lambda x: _turn(x, q))
    averaged = _linear_image(t, lambda x: _turn(average(x), q))
    rows = []
    for c in t.components:
        idx = c.plan.indices
        pair = [(None, None) if not part[2][idx] else (float(part[0][idx]), float(part[1][idx]))
                for part in (in_frame, averaged)]
        rows.append(FrameComponent(f"{t.name}_{''.join(labels[i] for i in idx)}", idx,
                                   *pair[0], *pair[1]))
    return RotationalAverage(t.name, kind, value, error, stable, tuple(rows))


def difference(total: dict[str, TensorResult],
               part: dict[str, TensorResult]) -> dict[str, TensorResult]:
    """``total`` minus ``part``, tensor by tensor and component by component
    (both from the same plan): the nuclear-relaxation tensors as total
    (relaxed nuclei) less electronic (clamped nuclei). Error bars add (the two
    share points, so their errors are not independent; the sum does not
    assume they are); a status is the worse of the two; the Richardson entry
    and table are the total's (the difference has no table of its own)."""
    out = {}
    for name, t in total.items():
        p = part[name]
        comps = []
        for ct, cp in zip(t.components, p.components, strict=True):
            a, b = ct.estimate, cp.estimate
            status = next(s for s in _WORST_FIRST if s in (a.status, b.status))
            reason = a.reason if status is a.status else b.reason
            est = ComponentEstimate(a.value_au - b.value_au, a.error_au + b.error_au,
                                    a.chosen_entry, status, a.roundoff_au + b.roundoff_au,
                                    a.table, reason)
            comps.append(ComponentResult(ct.plan, est, ct.entries))
        out[name] = TensorResult(name, t.order, t.value_au - p.value_au, t.error_au + p.error_au,
                                 t.stable & p.stable, tuple(comps))
    return out


def from_arrays(template: TensorResult, value, error,
                status: ComponentStatus | None = None) -> TensorResult:
    """A tensor of ``template``'s components and statuses with the full arrays
    ``value`` and ``error`` (au): a correction or a total formed from tensors
    (the zero-point average). Components zero by symmetry in ``template`` stay
    exactly zero (a property averaged over the totally symmetric vibrational
    ground state keeps the molecule's symmetry); the Richardson table of the
    template is not carried (the new numbers have none of their own).
    ``status``, where given, replaces the template's for its trusted
    components (what the new bars rest on is not the template's table)."""
    value = np.array(value, dtype=float)
    error = np.array(error, dtype=float)
    comps = []
    for c in template.components:
        est = c.estimate
        if est.status is ComponentStatus.SYMMETRY_ZERO:
            for idx in c.entries:
                value[idx] = error[idx] = 0.0
            comps.append(c)
            continue
        idx = c.entries[0]
        own = est.status if status is None or not c.stable else status
        comps.append(ComponentResult(c.plan, ComponentEstimate(
            float(value[idx]), float(error[idx]), est.chosen_entry, own, 0.0, (),
            est.reason), c.entries))
    return TensorResult(template.name, template.order, value, error, template.stable.copy(),
                        tuple(comps))
