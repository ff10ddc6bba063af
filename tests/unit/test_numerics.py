"""The numerical heart of fieldprop against exact answers, with no PySCF.

Covered: the stencil planner plus Richardson extrapolation (fieldprop.numerics.plan,
fieldprop.numerics.extrapolate, fieldprop.engine.analyse.extrapolate_components) on synthetic
energy and dipole functions whose derivatives are known exactly; the error bars
and round-off floors under energy noise of known size; the Richardson table by
itself; the tensor invariants (fieldprop.numerics.tensors) on hand-computable cases and
against brute-force orientational averages; the unit factors (fieldprop.numerics.units).

Sources. "REFERENCES" is docs/REFERENCES.md: sect. 1 (Taylor
convention), sect. 2 (central stencils, their noise factors C_n, the Richardson
recursion), sect. 3 (invariants; HRS averages after Bersohn, Pao, Frisch,
J. Chem. Phys. 45, 3184 (1966)), sect. 4 (unit check values, CODATA 2022 via
SciPy). Facts of the trade are marked "common practice".

Every tolerance comes from an error argument in the comment beside it. Floating
point facts used throughout: EPS = 2**-52; a correctly rounded float x has an
error <= ulp(x)/2 <= EPS*|x|/2 (IEEE 754).
"""

from __future__ import annotations

import itertools
import math
import subprocess
import sys
from decimal import Decimal, localcontext
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import constants as sc
from scipy.spatial.transform import Rotation

from fieldprop.numerics import tensors as ft
from fieldprop.numerics import units
from fieldprop.engine.analyse import NoiseModel, extrapolate_components
from fieldprop.numerics.extrapolate import ComponentStatus, richardson
from fieldprop.numerics.plan import plan_fields

EPS = float(np.finfo(float).eps)  # 2**-52
PROPS = ("dipole", "alpha", "beta", "gamma")
TENSOR_ORDER = {"dipole": 1, "alpha": 2, "beta": 3, "gamma": 4}
REPO = Path(__file__).resolve().parents[2]


# --------------------------------------------------------------------------
# Synthetic models: exact values in 60-digit decimal arithmetic, rounded once
# --------------------------------------------------------------------------

def _sym(t: np.ndarray) -> np.ndarray:
    """Average over all index permutations (our own; not fieldprop's)."""
    perms = list(itertools.permutations(range(t.ndim)))
    return sum(np.transpose(t, p) for p in perms) / len(perms)


def _random_symmetric(rng, order: int, scale: float) -> np.ndarray:
    return scale * _sym(rng.standard_normal((3,) * order))


def _dec(a) -> np.ndarray:
    return np.vectorize(lambda x: Decimal(float(x)), otypes=[object])(np.asarray(a, dtype=float))


def _contract(t, f, times: int):
    """t[..., f, f, ..., f] with the last ``times`` indices contracted with f."""
    for _ in range(times):
        t = t.dot(f)
    return t


class PolynomialModel:
    """E(F) = E0 - sum_{N=1..6} (1/N!) T_N[F^N] (REFERENCES sect. 1, Taylor convention).

    T_1..T_4 are mu, alpha, beta, gamma; T_5, T_6 are the 5th and 6th order
    responses, present so that the raw finite differences have truncation errors.
    The dipole is mu_i(F) = -dE/dF_i = sum_N (1/(N-1)!) T_N[e_i, F^(N-1)].
    """

    max_order = 6

    def __init__(self, e0: float, t: dict[int, np.ndarray]):
        self.e0, self.t = e0, t
        self._t_dec = {n: _dec(x) for n, x in t.items()}

    def response(self, n: int) -> np.ndarray:
        return self.t[n]

    def energy(self, f) -> float:
        with localcontext() as ctx:
            ctx.prec = 60
            fd = _dec(f)
            e = Decimal(self.e0)
            for n, t in self._t_dec.items():
                e -= _contract(t, fd, n) / math.factorial(n)
            return float(e)

    def dipole(self, f) -> tuple[float, float, float]:
        with localcontext() as ctx:
            ctx.prec = 60
            fd = _dec(f)
            mu = [Decimal(0)] * 3
            for n, t in self._t_dec.items():
                v = _contract(t, fd, n - 1) / math.factorial(n - 1)
                mu = [mu[i] + v[i] for i in range(3)]
            return tuple(float(x) for x in mu)

    def directional(self, source: str, n: int, o: np.ndarray) -> float:
        """d^n/dt^n q(t o) at t = 0, with q = E or mu_i (exact up to float rounding)."""
        if source == "energy":
            return -float(_contract(self.t[n], o, n)) if n <= self.max_order else 0.0
        i = "xyz".index(source[-1])
        if n + 1 > self.max_order:
            return 0.0
        return float(_contract(self.t[n + 1], o, n)[i]) if n else float(self.t[1][i])


class ExponentialModel:
    """E(F) = E0 - sum_s c_s exp(a_s . F), every derivative in closed form:

        T_N = -d^N E = sum_s c_s a_s (x) a_s (x) ... (N factors),
        mu_i(F) = sum_s c_s a_si exp(a_s . F).
    """

    def __init__(self, e0: float, c, a):
        self.e0, self.c, self.a = e0, np.asarray(c, float), np.asarray(a, float)

    def response(self, n: int) -> np.ndarray:
        out = np.zeros((3,) * n)
        for c, a in zip(self.c, self.a):
            t = np.array(c)
            for _ in range(n):
                t = np.multiply.outer(t, a)
            out += t
        return out

    def _terms(self, f):
        fd = _dec(f)
        return [(Decimal(float(c)), _dec(a), (_dec(a).dot(fd)).exp())
                for c, a in zip(self.c, self.a)]

    def energy(self, f) -> float:
        with localcontext() as ctx:
            ctx.prec = 60
            return float(Decimal(self.e0) - sum(c * x for c, _, x in self._terms(f)))

    def dipole(self, f) -> tuple[float, float, float]:
        with localcontext() as ctx:
            ctx.prec = 60
            terms = self._terms(f)
            return tuple(float(sum(c * a[i] * x for c, a, x in terms)) for i in range(3))

    def directional(self, source: str, n: int, o: np.ndarray) -> float:
        proj = self.a @ o
        if source == "energy":
            return -float(np.sum(self.c * proj**n))
        i = "xyz".index(source[-1])
        return float(np.sum(self.c * self.a[:, i] * proj**n))


def _polynomial_model(seed: int) -> PolynomialModel:
    rng = np.random.default_rng(seed)
    # Magnitudes typical of a small molecule (|mu| ~ 1, alpha ~ 10, beta ~ 1e2,
    # gamma ~ 1e3 au, common practice), higher orders growing by ~10 per order.
    t = {n: _random_symmetric(rng, n, 10.0 ** (n - 1)) for n in range(1, 7)}
    return PolynomialModel(-5.0, t)


def _exponential_model(seed: int) -> ExponentialModel:
    rng = np.random.default_rng(seed)
    c = rng.uniform(0.5, 1.5, size=3) * np.array([1.0, -1.0, 1.0])
    a = rng.uniform(-1.5, 1.5, size=(3, 3))
    return ExponentialModel(-5.0, c, a)


# --------------------------------------------------------------------------
# Running the pipeline and the a-priori error bound
# --------------------------------------------------------------------------

def _run(model, route, field_au, ratio, levels, energy_noise=None):
    """Plan, evaluate the model at every plan point, extrapolate.

    ``energy_noise(n)`` returns n perturbations added to the energies. Returns
    (plan, estimates, energies, dipoles, noise model).
    """
    plan = plan_fields(PROPS, field_au, ratio, levels, route)
    energies = np.array([model.energy(p.field_vector_au) for p in plan.points])
    extra = 0.0
    if energy_noise is not None:
        pert, extra = energy_noise(len(energies))
        energies = energies + pert
    dipoles = (np.array([model.dipole(p.field_vector_au) for p in plan.points])
               if route == "dipole" else None)
    records = [SimpleNamespace(energy_au=float(e), dipole_au=None if dipoles is None else
                               tuple(dipoles[i])) for i, e in enumerate(energies)]
    # Per-point error delta of q(p): the exact value is rounded once (<= ulp/2 <=
    # EPS|q|/2), the noisy path rounds E + u once more, so delta <= EPS max|q| + |u|
    # with |u| <= extra. The weights of a derivative sum to zero, so the q(0) that
    # fieldprop subtracts cancels and a raw estimate's error is <= sum|w| delta/h^n
    # (the subtraction's own rounding is in the arithmetic term of _bound).
    noise = NoiseModel(energy_au=EPS * float(np.max(np.abs(energies))) + extra,
                       dipole_au=(EPS * float(np.max(np.abs(dipoles))) if dipoles is not None
                                  else 0.0))
    estimates = extrapolate_components(plan, records, noise)
    return plan, estimates, energies, dipoles, noise


def _entry_coefficients(ratio, levels):
    """D(k, m) = sum_l coef[(k, m)][l] D(l, 0): the REFERENCES sect. 2 recursion
    D(k,m) = [a^2m D(k,m-1) - D(k+1,m-1)] / (a^2m - 1) applied to unit vectors."""
    coef = {(k, 0): np.eye(levels)[k] for k in range(levels)}
    for m in range(1, levels):
        f = ratio ** (2 * m)
        for k in range(levels - m):
            coef[(k, m)] = (f * coef[(k, m - 1)] - coef[(k + 1, m - 1)]) / (f - 1.0)
    return coef


def _richardson_factor(ratio, m, j):
    """What m Richardson steps leave of a term c h^(2j): c h^2j * P_m(j), with
    P_m(j) = prod_{i=1..m} (a^2i - a^2j) / (a^2i - 1) (zero for 1 <= j <= m).

    Derivation: if D(k, m-1) holds c h_k^2j P, D(k+1, m-1) holds c h_k^2j a^2j P,
    so step m gives c h_k^2j P (a^2m - a^2j) / (a^2m - 1)."""
    return math.prod((ratio ** (2 * i) - ratio ** (2 * j)) / (ratio ** (2 * i) - 1.0)
                     for i in range(1, m + 1))


def _effective_offsets(plan, comp, stencil):
    return [np.array(plan.points[p].field_vector_au) / stencil.step_au for p, _ in stencil.terms]


def _bound(plan, comp, est, model, noise, q):
    """A-priori bound on est.error_au, independent of fieldprop's estimates.

    The raw estimate at step h is D(h) = sign sum_p w_p q(h o_p) / h^n. Taylor
    expanding q along each o_p, the matching conditions leave
        D(h) = D + sum_{j>=1} c_j h^2j,  |c_j| <= sum_p |w_p| |q^(n+2j)(o_p)| / (n+2j)!
    with q^(N)(o) = d^N/dt^N q(t o) at 0 (known in closed form for the models).
    Entry (k, m) then carries
        truncation  T(k,m) <= sum_j |c_j| h_k^2j |P_m(j)|,
        round-off   R(k,m)  = sum_l |coef_l| sum|w| delta / h_l^n   (delta: per-point
                              error of q(p), the NoiseModel value; see _run),
        arithmetic  A(k,m) <= 32 EPS sum_l |coef_l| (|D_l| + sum|w| max_l|dq| / h_l^n):
                    the subtraction q(p)-q(0), the products w*dq, the correctly
                    rounded fsum, the division by h^n and <= K-1 table steps (each
                    with |coefficients| <= 5/3) each add <= 1 ulp of the magnitudes
                    involved, ~10 roundings; 32 leaves a factor 3 of headroom
                    (max_l|dq|: the largest |q(p) - q(0)| over level l's points).
    fieldprop reports the entry minimising max(table difference, floor), so
    error_au <= err(0, K-1) = max(|D(0,K-1) - D(0,K-2)|, R(0,K-1))
             <= sum over (0,K-1), (0,K-2) of (T + R + A).
    A single-stencil component (the dipole on the dipole route) has error = delta.
    """
    delta = noise.energy_au if comp.source == "energy" else noise.dipole_au
    levels, n, ratio = len(comp.stencils), comp.order, plan.ratio
    if levels == 1:
        return delta
    st0 = comp.stencils[0]
    offs = _effective_offsets(plan, comp, st0)
    ws = [w for _, w in st0.terms]
    cj = [sum(abs(w) * abs(model.directional(comp.source, n + 2 * j, o)) for w, o in zip(ws, offs))
          / math.factorial(n + 2 * j) for j in range(1, 40)]
    coef = _entry_coefficients(ratio, levels)
    hs = [s.step_au for s in comp.stencils]
    wn = st0.weight_norm
    dq = [max(abs(q[p] - q[0]) for p, _ in s.terms) for s in comp.stencils]
    raw = est.table[0]
    total = 0.0
    for m in (levels - 1, levels - 2):
        c = coef[(0, m)]
        trunc = sum(cj[j - 1] * hs[0] ** (2 * j) * abs(_richardson_factor(ratio, m, j))
                    for j in range(1, 40))
        rnd = sum(abs(c[l]) * wn * delta / hs[l] ** n for l in range(levels))
        arith = 32 * EPS * sum(abs(c[l]) * (abs(raw[l]) + wn * dq[l] / hs[l] ** n)
                               for l in range(levels))
        total += trunc + rnd + arith
    return total


def _exact(model, comp) -> float:
    return float(model.response(TENSOR_ORDER[comp.tensor])[comp.indices])


def _quantity(comp, energies, dipoles):
    return energies if comp.source == "energy" else dipoles[:, "xyz".index(comp.source[-1])]


def _check_recovery(model, route, field_au, ratio, levels, rel_tiny):
    plan, ests, energies, dipoles, noise = _run(model, route, field_au, ratio, levels)
    # The plan's weights do not depend on the level: the same effective offsets
    # (field vector / h_k) and weights at every level, however points are shared.
    for comp in plan.components:
        ref = [(tuple(o), w) for o, (_, w) in zip(_effective_offsets(plan, comp, comp.stencils[0]),
                                                  comp.stencils[0].terms)]
        for st in comp.stencils[1:]:
            got = [(tuple(o), w) for o, (_, w) in zip(_effective_offsets(plan, comp, st), st.terms)]
            assert np.allclose([o for o, _ in got], [o for o, _ in ref], rtol=0, atol=1e-12)
            assert [w for _, w in got] == [w for _, w in ref]
    tol = {}
    for comp, est in zip(plan.components, ests):
        exact = _exact(model, comp)
        bound = _bound(plan, comp, est, model, noise, _quantity(comp, energies, dipoles))
        tol[comp.name] = bound
        assert est.status is not ComponentStatus.UNSTABLE, comp.name
        assert abs(est.value_au - exact) <= est.error_au, (comp.name, est.value_au, exact,
                                                            est.error_au)
        assert est.error_au <= bound, (comp.name, est.error_au, bound)
        assert abs(est.value_au - exact) <= bound  # implied; stated for the reader
    tens = ft.assemble(plan.components, ests)
    for name, tr in tens.items():
        exact = model.response(TENSOR_ORDER[name])
        assert tr.stable.all(), name
        assert np.all(np.abs(tr.value_au - exact) <= tr.error_au), name
        comps = [c for c in plan.components if c.tensor == name]
        worst = max(tol[c.name] for c in comps)
        scale = float(np.max(np.abs(exact)))
        # "Tiny": the derived bound itself is a small fraction of the tensor (a
        # check on the test's parameters, so that the assertions above are sharp).
        assert worst <= rel_tiny * scale, (name, worst, scale)
        if len(comps[0].stencils) > 1:
            # Not vacuous: without extrapolation the largest step is far off, so
            # the table really removed the truncation error the bound allows for.
            raw_err = max(abs(e.table[0][-1] - _exact(model, c))
                          for c, e in zip(plan.components, ests) if c.tensor == name)
            assert raw_err >= 1e3 * worst, (name, raw_err, worst)
    return plan, ests, tens


# --------------------------------------------------------------------------
# 1. Planner + extrapolation recover exact derivatives
# --------------------------------------------------------------------------

@pytest.mark.parametrize("route", ["energy", "dipole"])
def test_polynomial_energy_recovered(route):
    """Degree-6 polynomial E(F): every raw estimate's error series is finite.

    The n-th derivative estimate collects the derivatives of order n+2, n+4, ...
    of q; E has none beyond 6 (mu_i none beyond 5). Energy route: mu and alpha
    carry h^2 and h^4 terms, beta and gamma only h^2; dipole route one order
    lower, no more. Two Richardson steps (column 2) remove them all exactly,
    and with K = 4 levels the top entry (0, 3) has a column-2 neighbour, so the
    bound of _bound is pure round-off (T = 0): E ~ 5 Eh gives delta ~ 1.1e-15,
    and e.g. for gamma 2 R ~ 2 * 16 * 1.1e-15 / (1e-2)^4 * 1.45 (the weight of
    D(0) in the top entries, prod 4^i/(4^i - 1)) ~ 5e-6 au against gamma ~ 2e3,
    i.e. ~3e-9; lower orders have smaller 1/h^n and larger ratios to spare.
    rel_tiny = 1e-7 leaves a factor ~30 for the arithmetic term.
    """
    _check_recovery(_polynomial_model(20240601), route, field_au=0.01, ratio=2.0, levels=4,
                    rel_tiny=1e-7)


@pytest.mark.parametrize("route,ratio,field_au", [("energy", 2.0, 0.01), ("energy", 1.5, 0.02),
                                                  ("dipole", 2.0, 0.01), ("dipole", 1.5, 0.02)])
def test_exponential_energy_recovered(route, ratio, field_au):
    """E = E0 - sum_s c_s exp(a_s.F): an infinite error series, every term known.

    On 5 levels the truncation left in the top two entries is tiny: the first
    term not removed by m = 3 steps is c_4 h0^8 |P_3(4)| with |P_3(4)| = 2^12 for
    a = 2 and |c_4| <= 16 * 6^12 / 12! ~ 80 (|a_s . o| <= 1.5 * 4 = 6), so
    <= 3e-11 at h0 = 0.01 (the bound sums the whole series). The bound is then
    round-off dominated: for gamma 2 R ~ 2 * 16 * 1.5e-15 / h0^4 * (1.45 for a = 2,
    2.6 for a = 1.5 and h0 = 0.02) ~ 7e-6 / 4e-7 au against gamma ~ 6, so rel
    ~1e-6; rel_tiny = 1e-5 leaves a factor >= 10.
    Ratio 1.5 has no shared points across levels (1.5^j is never an integer),
    ratio 2 shares them: both ways of building the ladder are exercised.
    """
    model = _exponential_model(7)
    plan, ests, tens = _check_recovery(model, route, field_au, ratio, levels=5, rel_tiny=1e-5)
    # Mixed components against their closed forms, written out by hand.
    c, a = model.c, model.a
    x, y, z = a[:, 0], a[:, 1], a[:, 2]
    closed = {("alpha", (0, 1)): np.sum(c * x * y),
              ("beta", (0, 1, 2)): np.sum(c * x * y * z),
              ("gamma", (0, 0, 1, 1)): np.sum(c * x * x * y * y),
              ("gamma", (0, 1, 2, 2)): np.sum(c * x * y * z * z)}
    for (name, idx), value in closed.items():
        tr = tens[name]
        for perm in set(itertools.permutations(idx)):
            assert abs(tr.value_au[perm] - value) <= tr.error_au[perm], (name, perm)


def test_reference_stencil_leading_terms():
    """REFERENCES sect. 2 table: the raw diagonal estimates' leading errors.

    E = -exp(F_z) has all Taylor-convention derivatives = 1 along z, so the table
    predicts mu(h) = 1 + h^2/6, alpha(h) = 1 + h^2/12, beta(h) = 1 + h^2/4,
    gamma(h) = 1 + h^2/6 (delta = eps6 = 1). In closed form these estimates are
    sinh(h)/h, (sinh(h/2)/(h/2))^2, (sinh 2h - 2 sinh h)/h^3 and (sinh(h/2)/(h/2))^4,
    whose h^4 terms are h^4/120, h^4/360, h^4/40, h^4/80: at most 0.1 h^2 = 6.4e-4
    of the h^2 correction for h <= 0.08. The round-off (E ~ 1, so <= 16 EPS / h^4 =
    1.4e-9 for gamma at h = 0.04) is < 1e-5 of the correction. Hence rel 1e-3.
    """
    model = ExponentialModel(0.0, [1.0], [[0.0, 0.0, 1.0]])
    plan, ests, energies, _, _ = _run(model, "energy", 0.04, 2.0, 2)
    lead = {"dipole_z": 1 / 6, "alpha_zz": 1 / 12, "beta_zzz": 1 / 4, "gamma_zzzz": 1 / 6}
    got = {c.name: e for c, e in zip(plan.components, ests)}
    for name, k in lead.items():
        comp = next(c for c in plan.components if c.name == name)
        for lvl, st in enumerate(comp.stencils):
            corr = got[name].table[0][lvl] - 1.0
            assert corr == pytest.approx(k * st.step_au**2, rel=1e-3), (name, lvl)


def test_single_level_derivative_error_bar_is_honest():
    """One field strength: the raw estimate D(h) = D + c1 h^2 + ... has no table
    difference to judge its truncation by. For E = -exp(F_z) (all derivatives 1)
    at h = 0.01 the truncation is h^2/6, h^2/12, h^2/4, h^2/6 (REFERENCES sect. 2)
    ~1e-5, while the round-off floor is sum|w| EPS / h^n <= 4e-7. An honest result
    either covers the true error or marks the component UNSTABLE (the job parser
    refuses levels = 1 for derivatives; the engine marks them unstable)."""
    model = ExponentialModel(0.0, [1.0], [[0.0, 0.0, 1.0]])
    plan, ests, _, _, _ = _run(model, "energy", 0.01, 2.0, 1)
    tens = ft.assemble(plan.components, ests)
    for name, tr in tens.items():
        covered = np.abs(tr.value_au - model.response(TENSOR_ORDER[name])) <= tr.error_au
        assert np.all(covered | ~tr.stable), name


# --------------------------------------------------------------------------
# 2. Noise of known size: error bars cover, floors as predicted
# --------------------------------------------------------------------------

# REFERENCES sect. 2: noise factors of the 1-D central stencils (sum |w|).
C_N = {1: 1.0, 2: 4.0, 3: 3.0, 4: 16.0}


@pytest.mark.parametrize("route, index_symmetry, axis_components", [
    ("energy", "assume", 12), ("dipole", "assume", 24), ("dipole", "test", 27)])
def test_diagonal_weight_norms_match_references(route, index_symmetry, axis_components):
    plan = plan_fields(PROPS, 0.001, 2.0, 3, route, index_symmetry=index_symmetry)
    seen = 0
    for comp in plan.components:
        if comp.order and max(comp.derivative) == comp.order:  # pure axis derivative
            for st in comp.stencils:
                assert st.weight_norm == C_N[comp.order], comp.name
            seen += 1
    # With the index symmetry assumed, the dipole route takes every component
    # it can from an axis (alpha 6, beta 9 of 10: not beta_xyz; gamma 9 of 15).
    assert seen == axis_components


def test_noise_error_bars_cover_and_floors_predicted():
    """Energies perturbed by seeded uniform noise u in [-eps, eps].

    Since |u| <= eps, sum|w| eps / h^n bounds the noise of each raw estimate and
    fieldprop's floor sum_l |coef_l| sum|w| eps / h_l^n bounds that of any table
    entry; only the truncation part of an error bar is an estimate from table
    differences, hence coverage is asserted at >= 90%, not 100%.

    Floor size: for the chosen entry (k, m), the coefficient of D(k) is
    prod_i a^2i/(a^2i - 1) >= 1, and sum_l |coef_l| <= prod_{i<=m} (a^2i+1)/(a^2i-1)
    (REFERENCES sect. 2: each step amplifies noise by at most that factor) with
    1/h_l^n <= 1/h_k^n for l >= k, so
        1 <= floor / (sum|w| eps / h_k^n) <= prod_{i<=m} (a^2i + 1)/(a^2i - 1) < 1.95 (a = 2);
    it must also equal the sum over the table coefficients exactly (rel 1e-12:
    a few roundings in a sum of <= 5 positive terms).
    eps = 1e-9 Eh, h0 = 0.002: gamma's floor at h0 is 16e-9/1.6e-11 = 1e3 au
    against gamma ~ 5, while at h = 0.032 it is 0.015 au: the noise decides which
    entry is chosen, which is the regime to test.
    """
    model = _exponential_model(11)
    eps, ratio, levels, h0 = 1e-9, 2.0, 5, 0.002
    coef = _entry_coefficients(ratio, levels)
    covered = total = 0
    statuses = set()
    for seed in (1, 2, 3, 4, 5):
        rng = np.random.default_rng(seed)

        def noise(n, rng=rng):
            # The rounding of E + u adds <= ulp/2 on top of |u| <= eps: counted
            # in the NoiseModel by _run through the EPS max|E| term.
            return rng.uniform(-eps, eps, size=n), eps

        plan, ests, energies, _, nm = _run(model, "energy", h0, ratio, levels, noise)
        for comp, est in zip(plan.components, ests):
            total += 1
            covered += abs(est.value_au - _exact(model, comp)) <= est.error_au
            statuses.add(est.status)
            k, m = est.chosen_entry
            wn, n = comp.stencils[0].weight_norm, comp.order
            hs = [s.step_au for s in comp.stencils]
            predicted = wn * nm.energy_au / hs[k] ** n
            amp = math.prod((ratio ** (2 * i) + 1) / (ratio ** (2 * i) - 1) for i in range(1, m + 1))
            # (1 +- 1e-12): the floor is summed point by point, in another order.
            assert (predicted * (1 - 1e-12) <= est.roundoff_au
                    <= amp * predicted * (1 + 1e-12)), comp.name
            assert amp < 1.95
            exact_floor = sum(abs(coef[(k, m)][l]) * wn * nm.energy_au / hs[l] ** n
                              for l in range(levels))
            assert est.roundoff_au == pytest.approx(exact_floor, rel=1e-12), comp.name
            # The error bar is not inflated beyond the a-priori bound either.
            assert est.error_au <= _bound(plan, comp, est, model, nm, energies), comp.name
    assert covered >= 0.9 * total, (covered, total)
    # Both regimes occurred, so both parts of the error bar were exercised.
    assert {ComponentStatus.OK, ComponentStatus.NOISE_LIMITED} <= statuses


# --------------------------------------------------------------------------
# 3. The Richardson table by itself
# --------------------------------------------------------------------------

H0 = 0.01


def _ladder(levels, h0=H0, ratio=2.0):
    return [h0 * ratio**k for k in range(levels)]


def test_richardson_one_step_exact():
    """D(h) = D + c1 h^2 on 2 levels: D(0,1) = (4 D(h) - D(2h))/3 = D exactly in
    exact arithmetic; in floats, ~4 roundings of numbers <= 4|D(2h)| / 3 leave
    < 8 EPS |D|. The only entry with a difference is (0,1) (with (0,0)),
    so that entry is reported, its error bar the iteration difference c1 h0^2."""
    d, c1 = 2.5, 7.0
    est = richardson([d + c1 * h**2 for h in _ladder(2)], 2.0, [1e-15] * 2)
    assert est.chosen_entry == (0, 1)
    assert abs(est.value_au - d) <= 8 * EPS * abs(d)
    assert est.error_au == pytest.approx(c1 * H0**2, rel=1e-9)
    assert est.status is ComponentStatus.OK


def test_richardson_two_steps_exact():
    """D(h) = D + c1 h^2 + c2 h^4 on 3 levels: column 2 is exact. Its entry
    (0,2) differs from (0,1) by what one step leaves of c2 h^4, c2 h0^4 |P_1(2)|
    = 4 c2 h0^4, far below every other entry's differences (which hold c1 h^2),
    so (0,2) is chosen with that error bar. Rounding: ~10 operations on numbers
    <= 2|D| keep the value within 32 EPS |D|."""
    d, c1, c2 = -1.25, 3.0, 40.0
    values = [d + c1 * h**2 + c2 * h**4 for h in _ladder(3)]
    est = richardson(values, 2.0, [1e-15] * 3)
    assert est.chosen_entry == (0, 2)
    assert abs(est.value_au - d) <= 32 * EPS * abs(d)
    assert est.error_au == pytest.approx(4 * c2 * H0**4, rel=1e-6)
    # And the table itself: column 1 still holds -4 c2 h_k^4 (P_1(2) = -4).
    for k, entry in enumerate(est.table[1]):
        assert entry - d == pytest.approx(-4 * c2 * (H0 * 2**k) ** 4, rel=1e-6)


def test_richardson_noise_limited_when_floor_dominates():
    """A constant with declared noise r_k = 1e-6, 1e-7, 1e-8: every table
    difference is 0, so each entry's error is its floor. Floors: column 0 is r_k,
    but (2,0) has no neighbour and is not a candidate; (k,1) has (4 r_k + r_k+1)/3
    >= 1.37 r_k; column 2 more still. The smallest is (1,0) with 1e-7 exactly,
    reported as NOISE_LIMITED."""
    est = richardson([3.0, 3.0, 3.0], 2.0, [1e-6, 1e-7, 1e-8])
    assert est.status is ComponentStatus.NOISE_LIMITED
    assert est.chosen_entry == (1, 0)
    assert est.error_au == est.roundoff_au == 1e-7
    assert est.value_au == 3.0


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_richardson_non_finite_is_unstable(bad):
    est = richardson([1.0, bad, 1.1], 2.0, [1e-12] * 3)
    assert est.status is ComponentStatus.UNSTABLE
    assert not math.isfinite(est.value_au)


def test_richardson_errors_shrink_with_h():
    """D(h) = (2 sinh(h/2)/h)^2 is the central 2nd difference of exp (REFERENCES
    sect. 2: alpha(h) = alpha + gamma h^2/12 + ...), = 1 + h^2/12 + h^4/360 +
    h^6/20160 + O(h^8), written without cancellation. On 3 levels the chosen (0,2)
    has error bar |D(0,2) - D(0,1)| ~ 4 h0^4/360 and true error
    P_2(3) h0^6/20160 = 64 h0^6/20160. The next terms change these by relative
    ~0.1 h0^2 and ~0.25 h0^2 (<= 3e-3 for h0 <= 0.1), the rounding (~1e-15) is
    < 1e-3 of the smallest true error (7.7e-13 at h0 = 0.025). So halving h0
    divides the error bar by 16 and the true error by 64, each within 1%."""
    def d(h):
        return (2.0 * math.sinh(h / 2.0) / h) ** 2
    bars, errs = [], []
    for h0 in (0.1, 0.05, 0.025):
        est = richardson([d(h) for h in _ladder(3, h0)], 2.0, [1e-16] * 3)
        assert est.chosen_entry == (0, 2)
        assert est.error_au == pytest.approx(4 * h0**4 / 360, rel=1e-2)
        assert est.value_au - 1.0 == pytest.approx(64 * h0**6 / 20160, rel=1e-2)
        assert abs(est.value_au - 1.0) <= est.error_au
        bars.append(est.error_au)
        errs.append(abs(est.value_au - 1.0))
    for i in range(2):
        assert bars[i] / bars[i + 1] == pytest.approx(16.0, rel=1e-2)
        assert errs[i] / errs[i + 1] == pytest.approx(64.0, rel=1e-2)


# --------------------------------------------------------------------------
# 4. Tensor invariants
# --------------------------------------------------------------------------

def _tensor_results(**arrays):
    out = {}
    for name, v in arrays.items():
        v = np.asarray(v, float)
        out[name] = ft.TensorResult(name, v.ndim, v, np.zeros_like(v),
                                    np.ones(v.shape, dtype=bool), ())
    return out


def _invariants(**arrays):
    return {i.name: i.value_au for i in ft.invariants(_tensor_results(**arrays))}


def _hrs_invariant_form(b):
    """REFERENCES sect. 3, invariant form: (<ZZZ^2>, <XZZ^2>) from B2 and V."""
    s = _sym(b)
    b2 = float(np.sum(s * s))
    v = float(np.sum(np.einsum("ijj->i", s) ** 2))
    return 2 / 35 * b2 + 3 / 35 * v, 4 / 105 * b2 - 1 / 105 * v


def _hrs_explicit_form(b):
    """REFERENCES sect. 3, component form (Bersohn, Pao, Frisch 1966)."""
    s = _sym(b)
    si = sum(s[i, i, i] ** 2 for i in range(3))
    pairs = [(i, j) for i in range(3) for j in range(3) if i != j]
    sa = sum(s[i, i, i] * s[i, j, j] for i, j in pairs)
    sb = sum(s[i, j, j] ** 2 for i, j in pairs)
    sp = s[0, 1, 1] * s[0, 2, 2] + s[1, 0, 0] * s[1, 2, 2] + s[2, 0, 0] * s[2, 1, 1]
    xyz2 = s[0, 1, 2] ** 2
    zzz = si / 7 + 6 / 35 * sa + 9 / 35 * sb + 6 / 35 * sp + 12 / 35 * xyz2
    xzz = si / 35 - 2 / 105 * sa + 11 / 105 * sb - 2 / 105 * sp + 8 / 35 * xyz2
    return zzz, xzz


def _beta_from(entries):
    b = np.zeros((3, 3, 3))
    for idx, val in entries.items():
        for p in set(itertools.permutations(idx)):
            b[p] = val
    return b


def test_beta_one_dimensional():
    """Only beta_zzz = b: <ZZZ^2> = b^2/7, <XZZ^2> = b^2/35 (both forms), so
    DR = 5 and beta_HRS = sqrt(6/35) b (REFERENCES sect. 3). With mu along +z,
    beta_parallel = (3/5) b; along -z it flips sign; beta_vector_norm = b. All are a few
    roundings from exact: rel 1e-12."""
    bz = 3.7
    b = _beta_from({(2, 2, 2): bz})
    for form in (_hrs_invariant_form, _hrs_explicit_form):
        zzz, xzz = form(b)
        assert zzz == pytest.approx(bz**2 / 7, rel=1e-12)
        assert zzz / xzz == pytest.approx(5.0, rel=1e-12)
    assert ft.beta_hrs(b) == pytest.approx(math.sqrt(6 / 35) * bz, rel=1e-12)
    inv = _invariants(dipole=[0.0, 0.0, 0.8], beta=b)
    assert inv["beta_parallel"] == pytest.approx(0.6 * bz, rel=1e-12)
    assert inv["beta_vector_norm"] == pytest.approx(bz, rel=1e-12)
    assert inv["beta_hrs"] == pytest.approx(math.sqrt(6 / 35) * bz, rel=1e-12)
    assert _invariants(dipole=[0.0, 0.0, -0.8], beta=b)["beta_parallel"] == pytest.approx(
        -0.6 * bz, rel=1e-12)


def test_beta_octupolar_d3h():
    """beta_xxx = -beta_xyy = -beta_yxy = -beta_yyx = b: B2 = 4 b^2, V = 0, so
    <ZZZ^2> = 8/35 b^2, <XZZ^2> = 16/105 b^2, DR = 3/2 (REFERENCES sect. 3) and
    beta_vector_norm = 0 (no vector part)."""
    bo = 2.0
    b = _beta_from({(0, 0, 0): bo, (0, 1, 1): -bo})
    assert b[1, 0, 1] == b[1, 1, 0] == -bo
    for form in (_hrs_invariant_form, _hrs_explicit_form):
        zzz, xzz = form(b)
        assert zzz == pytest.approx(8 / 35 * bo**2, rel=1e-12)
        assert zzz / xzz == pytest.approx(1.5, rel=1e-12)
    assert ft.beta_hrs(b) == pytest.approx(math.sqrt(8 / 35 + 16 / 105) * bo, rel=1e-12)
    assert np.allclose(ft.beta_vector(b), 0.0, atol=1e-15)


def test_hyper_rayleigh_set_in_the_two_limits():
    """The depolarisation ratio and its parts in the limits of REFERENCES sect. 3
    (Bersohn, Pao and Frisch 1966; Brasselet and Zyss, J. Opt. Soc. Am. B 15,
    257 (1998)): a one-dimensional beta (only b_zzz = b) has DR = 5,
    sqrt(<ZZZ^2>) = b/sqrt(7), sqrt(<XZZ^2>) = b/sqrt(35), J = 1 norm
    sqrt(3/5) b and J = 3 norm sqrt(2/5) b (|b|^2 = b^2 split between them);
    an octupolar D3h beta has no J = 1 part and DR = 3/2."""
    bz = 3.7
    inv = _invariants(beta=_beta_from({(2, 2, 2): bz}))
    assert inv["beta_hrs_depolarisation_ratio"] == pytest.approx(5.0, rel=1e-12)
    assert inv["beta_hrs_zzz"] == pytest.approx(bz / math.sqrt(7), rel=1e-12)
    assert inv["beta_hrs_xzz"] == pytest.approx(bz / math.sqrt(35), rel=1e-12)
    assert inv["beta_dipolar_norm"] == pytest.approx(math.sqrt(3 / 5) * bz, rel=1e-12)
    assert inv["beta_octupolar_norm"] == pytest.approx(math.sqrt(2 / 5) * bz, rel=1e-12)
    bo = 2.0
    inv = _invariants(beta=_beta_from({(0, 0, 0): bo, (0, 1, 1): -bo}))
    assert inv["beta_hrs_depolarisation_ratio"] == pytest.approx(1.5, rel=1e-12)
    assert inv["beta_dipolar_norm"] == pytest.approx(0.0, abs=1e-14)
    assert inv["beta_octupolar_norm"] == pytest.approx(2.0 * bo, rel=1e-12)


def test_spherical_parts_give_the_hyper_rayleigh_averages():
    """beta = beta(J=1) + beta(J=3), orthogonal, the J = 3 part traceless in
    each pair of indices; <ZZZ^2> = 1/5 |b1|^2 + 2/35 |b3|^2 and <XZZ^2> =
    1/45 |b1|^2 + 4/105 |b3|^2 (Zyss, J. Chem. Phys. 98, 6583 (1993);
    Brasselet and Zyss 1998), against REFERENCES sect. 3's invariant form."""
    rng = np.random.default_rng(31)
    for _ in range(5):
        b = _random_symmetric(rng, 3, 10.0)
        one, three = ft.beta_spherical_parts(b)
        assert np.allclose(one + three, _sym(b), atol=1e-12)
        assert abs(float(np.sum(one * three))) < 1e-10 * float(np.sum(b * b))
        for trace in ("iij->j", "iji->j", "jii->j"):
            assert np.allclose(np.einsum(trace, three), 0.0, atol=1e-12)
        n1, n3 = float(np.sum(one * one)), float(np.sum(three * three))
        zzz, xzz = _hrs_invariant_form(b)
        assert zzz == pytest.approx(n1 / 5 + 2 * n3 / 35, rel=1e-12)
        assert xzz == pytest.approx(n1 / 45 + 4 * n3 / 105, rel=1e-12)
        assert ft.beta_hrs_zzz(b) ** 2 == pytest.approx(zzz, rel=1e-12)
        assert ft.beta_hrs_xzz(b) ** 2 == pytest.approx(xzz, rel=1e-12)


def test_the_ratio_is_undefined_for_a_beta_that_is_zero_within_its_bars():
    b = _beta_from({(2, 2, 2): 1e-9})
    sure = ft.TensorResult("beta", 3, b, np.zeros_like(b), np.ones(b.shape, dtype=bool), ())
    noisy = ft.TensorResult("beta", 3, b, np.full(b.shape, 1e-6), np.ones(b.shape, dtype=bool),
                            ())
    ratio = {i.name: i for i in ft.invariants({"beta": sure})}["beta_hrs_depolarisation_ratio"]
    assert ratio.value_au == pytest.approx(5.0, rel=1e-12)
    ratio = {i.name: i for i in ft.invariants({"beta": noisy})}["beta_hrs_depolarisation_ratio"]
    assert ratio.value_au is None and "zero within its error bars" in ratio.reason


def test_hrs_forms_agree_for_random_beta():
    """The two forms of REFERENCES sect. 3 are one polynomial identity: they agree
    to rounding (rel 1e-12) on random tensors, and fieldprop's beta_hrs^2 is their
    sum."""
    rng = np.random.default_rng(5)
    for _ in range(5):
        b = _random_symmetric(rng, 3, 10.0)
        zi, xi = _hrs_invariant_form(b)
        ze, xe = _hrs_explicit_form(b)
        assert ze == pytest.approx(zi, rel=1e-12) and xe == pytest.approx(xi, rel=1e-12)
        assert ft.beta_hrs(b) ** 2 == pytest.approx(zi + xi, rel=1e-12)


def test_invariants_see_only_the_symmetric_part():
    """Dipole-route tensors are symmetric only up to numerical error (REFERENCES
    sect. 1: the static tensors are fully symmetric). The invariants are defined
    on the symmetric part (beta_i as the average of the three contractions,
    REFERENCES sect. 3), so adding a random part with zero symmetric part, t - sym(t),
    must not change them (rel 1e-12, rounding only; the added part is ~ the tensor)."""
    rng = np.random.default_rng(17)
    for order, fns in ((2, [ft.alpha_iso, ft.alpha_aniso]),
                       (3, [ft.beta_hrs, ft.beta_vector]),
                       (4, [ft.gamma_parallel])):
        s = _random_symmetric(rng, order, 10.0)
        u = 10.0 * rng.standard_normal((3,) * order)
        t = s + (u - _sym(u))
        assert np.max(np.abs(t - s)) > 1.0  # really not symmetric
        for fn in fns:
            assert np.allclose(fn(t), fn(s), rtol=1e-12, atol=1e-12 * np.max(np.abs(s))), fn


def test_gamma_parallel_isotropic():
    """An isotropic fully symmetric gamma_ijkl = c (d_ij d_kl + d_ik d_jl + d_il d_jk)
    looks the same in every orientation, so <gamma_ZZZZ> = gamma_zzzz = 3c;
    sum_ij gamma_iijj = c (9 + 3 + 3) = 15c, so gamma_par = 3 * 15c / 15 = 3c."""
    c = 123.0
    dlt = np.eye(3)
    g = c * (np.einsum("ij,kl->ijkl", dlt, dlt) + np.einsum("ik,jl->ijkl", dlt, dlt)
             + np.einsum("il,jk->ijkl", dlt, dlt))
    assert ft.gamma_parallel(g) == pytest.approx(3 * c, rel=1e-12)
    assert _invariants(gamma=g)["gamma_parallel"] == pytest.approx(g[2, 2, 2, 2], rel=1e-12)


def test_alpha_linear_molecule():
    """alpha = diag(perp, perp, par) in any orientation: the anisotropy convention
    of REFERENCES sect. 3 gives |par - perp|, alpha_iso = (2 perp + par)/3.
    Rotation by R preserves both (rounding only: rel 1e-12 on values ~10)."""
    perp, par = 8.0, 12.5
    a0 = np.diag([perp, perp, par])
    r = Rotation.random(rng=np.random.default_rng(3)).as_matrix()
    for a in (a0, r @ a0 @ r.T):
        inv = _invariants(alpha=a)
        assert inv["alpha_aniso"] == pytest.approx(par - perp, rel=1e-12)
        assert inv["alpha_iso"] == pytest.approx((2 * perp + par) / 3, rel=1e-12)
        assert ft.alpha_aniso(a) == pytest.approx(par - perp, rel=1e-12)


N_ROT = 200_000


@pytest.fixture(scope="module")
def rotations():
    return Rotation.random(N_ROT, rng=np.random.default_rng(20250101)).as_matrix()


def _mc(samples):
    """Mean and its standard error."""
    return float(np.mean(samples)), float(np.std(samples, ddof=1) / math.sqrt(len(samples)))


# Monte Carlo tolerance: with a correct formula the deviation of the mean is
# ~N(0, SE^2) (central limit theorem, 2e5 samples of bounded quantities); 5 SE is
# exceeded with probability 6e-7 (and the seed is fixed). Each check also asserts
# SE < 1% of the value, so a wrong rational coefficient (differences of >= 1/105
# of B2 or V, a few % here) would be caught.
Z_MC = 5.0


def test_orientational_averages_brute_force(rotations):
    """Lab-frame components of a rotated tensor: T'_ABC = R_Ai R_Bj R_Ck T_ijk, so
    beta'_ZZZ = beta[n, n, n] and beta'_XZZ = beta[x, n, n], with n, x the Z and X
    rows of R; random R uniform on SO(3) (scipy, seeded). Checked: <ZZZ^2> and
    <XZZ^2> against the REFERENCES sect. 3 formulas, beta_hrs, beta_parallel =
    3 <beta_ZZZ mu_Z>/|mu|, gamma_parallel = <gamma_ZZZZ>, alpha_iso = <alpha_ZZ>."""
    rng = np.random.default_rng(99)
    b = _random_symmetric(rng, 3, 10.0)
    g = _random_symmetric(rng, 4, 100.0)
    a = _random_symmetric(rng, 2, 10.0)
    mu = rng.standard_normal(3)
    x, n = rotations[:, 0, :], rotations[:, 2, :]
    bn = np.einsum("ijk,sk->sij", b, n)
    b_zzz = np.einsum("sij,si,sj->s", bn, n, n)
    b_xzz = np.einsum("sij,si,sj->s", bn, x, n)
    zzz, xzz = _hrs_invariant_form(b)

    def check(samples, value):
        mean, se = _mc(samples)
        assert se < 0.01 * abs(value)
        assert abs(mean - value) <= Z_MC * se, (mean, value, se)

    check(b_zzz**2, zzz)
    check(b_xzz**2, xzz)
    check(b_zzz**2 + b_xzz**2, ft.beta_hrs(b) ** 2)
    inv = _invariants(dipole=mu, alpha=a, beta=b, gamma=g)
    check(3 * b_zzz * (n @ mu) / np.linalg.norm(mu), inv["beta_parallel"])
    g_zzzz = np.einsum("sij,si,sj->s", np.einsum("ijkl,sk,sl->sij", g, n, n), n, n)
    check(g_zzzz, inv["gamma_parallel"])
    check(b_zzz**2, inv["beta_hrs_zzz"] ** 2)
    check(b_xzz**2, inv["beta_hrs_xzz"] ** 2)
    # gamma_perpendicular = <gamma_ZZXX>, on a tensor that is not fully
    # symmetric (the general isotropic average; common practice).
    g_general = 100.0 * rng.standard_normal((3, 3, 3, 3))
    g_zzxx = np.einsum("sijkl,si,sj,sk,sl->s", np.broadcast_to(g_general, (len(n),) + g.shape),
                       n, n, x, x)
    check(g_zzxx, ft.gamma_perpendicular(g_general))
    check(np.einsum("ij,si,sj->s", a, n, n), inv["alpha_iso"])


# --------------------------------------------------------------------------
# 5. Unit factors
# --------------------------------------------------------------------------

# REFERENCES sect. 4 check values, computed from CODATA 2022 (SciPy 1.17.1).
# Tolerance: half a unit in the last digit quoted, relative: <= 1e-7 for the
# 8-9 digit values, <= 1e-5 for the 6-digit ones.
_ESU3, _ESU4 = units.esu_factor(3), units.esu_factor(4)
_FOUR_PI_EPS0 = 4 * math.pi * sc.epsilon_0
CODATA_CHECKS = [
    ("field V/m", units.FIELD_AU_TO_V_PER_M, 5.14220675e11, 1e-7),
    ("mu C m", units.si_factor(1), 8.4783536e-30, 1e-7),
    ("mu D", units.DIPOLE_AU_TO_DEBYE, 2.5417465, 1e-7),
    ("alpha SI", units.si_factor(2), 1.6487773e-41, 1e-7),
    ("alpha A^3", units.ALPHA_AU_TO_ANGSTROM3, 0.14818471, 1e-7),
    ("alpha cm^3", units.si_factor(2) / _FOUR_PI_EPS0 * 1e6, 1.4818471e-25, 1e-7),
    ("beta SI", units.si_factor(3), 3.2063613e-53, 1e-7),
    ("beta esu", _ESU3, 8.6392207e-33, 1e-7),
    ("beta: 1 esu in SI", units.si_factor(3) / _ESU3, 3.71140e-21, 1e-5),
    ("beta/(4 pi eps0)", units.si_factor(3) / _FOUR_PI_EPS0, 2.88173e-43, 1e-5),
    ("gamma SI", units.si_factor(4), 6.2353800e-65, 1e-7),
    ("gamma esu", _ESU4, 5.0366960e-40, 1e-7),
    ("gamma: 1 esu in SI", units.si_factor(4) / _ESU4, 1.23799e-25, 1e-5),
]


@pytest.mark.parametrize("label,got,expected,rel", CODATA_CHECKS, ids=[c[0] for c in CODATA_CHECKS])
def test_unit_factor_codata(label, got, expected, rel):
    assert got == pytest.approx(expected, rel=rel)


# Literature factors from older CODATA sets (REFERENCES sect. 4): they differ in
# the 4th digit, hence rel 1e-3. 0.148184 A^3 per au of alpha from the CRC
# Handbook introduction (REFERENCES [src]); 2.5417 D, 5.0367e-40 esu: the
# commonly quoted values (REFERENCES sect. 4).
LITERATURE = [
    ("alpha A^3, CRC", units.ALPHA_AU_TO_ANGSTROM3, 0.148184),
    ("mu D, common", units.DIPOLE_AU_TO_DEBYE, 2.5417),
    ("gamma esu, common", units.esu_factor(4), 5.0367e-40),
]


@pytest.mark.parametrize("label,got,expected", LITERATURE, ids=[c[0] for c in LITERATURE])
def test_unit_factor_literature(label, got, expected):
    assert got == pytest.approx(expected, rel=1e-3)


@pytest.mark.parametrize("order", [1, 2, 3, 4])
def test_esu_factor_from_the_gaussian_charge_unit_written_out(order):
    """e^n a0^n / Eh^(n-1) in Gaussian units, with the charge unit from the
    pre-2019 exact relation 1 C = 10 c statC (c in m/s), lengths in cm and
    energies in erg, from scipy.constants here: since 2019 mu0 is measured, and
    this relation differs from e sqrt(1e9 / (4 pi eps0)) (fieldprop's) by
    ~1e-10 relative, so rel 1e-9 (REFERENCES sect. 4)."""
    e_statc = 10.0 * sc.c * sc.e
    a0_cm = 100.0 * sc.value("Bohr radius")
    eh_erg = 1e7 * sc.value("Hartree energy")
    assert units.esu_factor(order) == pytest.approx(
        e_statc**order * a0_cm**order / eh_erg ** (order - 1), rel=1e-9)


@pytest.mark.parametrize("order,key", [
    (1, "atomic unit of electric dipole mom."),
    (2, "atomic unit of electric polarizability"),
    (3, "atomic unit of 1st hyperpolarizability"),
    (4, "atomic unit of 2nd hyperpolarizability")])
def test_unit_factor_matches_codata_derived_unit(order, key):
    """CODATA lists these derived atomic units itself (current keys, REFERENCES
    sect. 4 pitfalls: not the obsolete misspelled ones). They are rounded to 11
    digits, so e^n a0^n / Eh^(n-1) from the base constants agrees to rel 1e-9."""
    assert units.si_factor(order) == pytest.approx(sc.value(key), rel=1e-9)


# --------------------------------------------------------------------------
# 6. Purity: the numerics import without PySCF
# --------------------------------------------------------------------------

def _modules(room: str) -> list[str]:
    folder = REPO / "fieldprop" / room
    return [f"fieldprop.{room}.{p.stem}" for p in sorted(folder.glob("*.py"))
            if p.stem != "__init__"]


@pytest.mark.parametrize("room", ["numerics", "inputs", "points", "engine", "outputs", "cli"])
def test_every_room_but_the_backend_imports_without_pyscf(room):
    """PySCF lives behind fieldprop.backend alone: importing any other module
    (the pure numerics, inputs, the point store and executors, the engine
    whose analysis collect runs, the outputs, the command line) loads none of
    it, so collect and report run where PySCF is not even installed."""
    modules = _modules(room)
    assert modules
    code = f"import sys, {', '.join(modules)}; assert 'pyscf' not in sys.modules, 'pyscf'"
    done = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True,
                          text=True)
    assert done.returncode == 0, done.stderr


def test_only_the_backend_imports_pyscf():
    """No module outside fieldprop/backend names PySCF in an import, even a
    deferred one: the arrows point down, and the backend is the bottom room
    the others reach through its functions."""
    import re

    offenders = []
    for path in sorted((REPO / "fieldprop").rglob("*.py")):
        if "backend" in path.relative_to(REPO / "fieldprop").parts:
            continue
        for number, line in enumerate(path.read_text().splitlines(), start=1):
            if re.match(r"\s*(from pyscf\b|import pyscf\b)", line):
                offenders.append(f"{path.relative_to(REPO)}:{number}")
    assert not offenders, offenders


def test_the_console_script_names_a_function_that_exists():
    """pyproject's ``fieldprop`` command (what the README's quick start runs)
    points at a callable: the tests run ``python -m fieldprop``, which would
    not notice a script entry left behind by a move."""
    import importlib
    import tomllib

    target = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["scripts"][
        "fieldprop"]
    module, _, name = target.partition(":")
    assert callable(getattr(importlib.import_module(module), name))
