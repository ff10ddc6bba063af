"""The SCF solver of a field point: the start (the zero-field orbitals rotated
by their linear response, or by the rotations of points already solved), the
Newton steps with the orbital Hessian, PySCF's ladder of strategies, and
:func:`_converge`, which chooses among them and accepts or refuses the result.
"""

from __future__ import annotations

import numpy as np

from fieldprop.backend.orbital_hessian import (_has_hessian, _orbital_hessian, _pairs,
                                               _restricted_open, _restricted_open_layout,
                                               _set_blocks)
from fieldprop.backend.orientation import _align, _constraint_values, orientation_constraints
from fieldprop.errors import ScfNotConvergedError
from fieldprop.points.records import (DIIS, LINE_START, MAX_LINE_POINTS, MIRROR_START, NEWTON,
                                      ONE_ELECTRON, ORIENTATION, REFERENCE_START,
                                      RESPONSE_START, line_preference)


#: The Newton step's relative residual (_newton) is kept within these bounds:
#: no looser than 0.1 (each step still removes ~90 % of the gradient), no
#: tighter than 1e-8 (the step's own quadratic error and the next Fock build's
#: rounding dominate long before); and it need not beat NEWTON_TARGET_SHARE of
#: the target (the rest of the target is left to the step's quadratic error).
NEWTON_RTOL_BOUNDS = (1e-8, 0.1)
NEWTON_TARGET_SHARE = 0.3

#: Two solved field vectors lie on one line through zero field (the line start)
#: when they agree to this (au) after scaling: field vectors are exact
#: multiples of their offsets (plan.field_vector), so only rounding separates
#: points on a line, ~1e-19 au at fields ~1e-3.
LINE_START_ATOL_AU = 1e-12
#: Below this t (the tangent of a rotation angle) arctan(t)/t is 1 to double
#: precision (its series is 1 - t^2/3): _rotation_from_reference takes 1 there.
SMALL_ROTATION = 1e-8

#: PySCF's ladder (_ladder), after plain DIIS: a level shift (Eh) of the
#: virtual orbitals, DIIS only from cycle LADDER_DIIS_START_CYCLE (the first,
#: damped and shifted cycles are far from convergence and would crowd its
#: subspace), and damping (the share of the old Fock matrix mixed in; not for
#: ROHF, where PySCF's damping fails): the usual cures of an SCF oscillating
#: among near-degenerate orbitals.
LADDER_LEVEL_SHIFT_AU = 0.2
LADDER_DIIS_START_CYCLE = 4
LADDER_DAMPING = 0.3


def _gradient_norm(mf, fock=None, constraints=(), c=None, occ=None) -> float:
    """|orbital gradient| of orbitals ``c`` (default mf's), without its part
    along the orientation ``constraints``' gradients (their multipliers')."""
    c = mf.mo_coeff if c is None else c
    occ = mf.mo_occ if occ is None else occ
    if fock is None:
        fock = mf.get_fock()
    g = mf.get_grad(c, occ, fock)
    if constraints:
        gradients = _constraint_gradients(c, occ, constraints)
        g = g - gradients @ np.linalg.lstsq(gradients, g, rcond=None)[0]
    return float(np.linalg.norm(g))


def _constraint_gradients(c, occ, constraints) -> np.ndarray:
    """d c_k / d x for the occupied-virtual rotations x of orbitals ``c`` (columns),
    in the layout of PySCF's gradient and of the orbital Hessians."""
    if _restricted_open(occ):
        return np.array([2.0 * _restricted_open_layout(c, occ, w) for w in constraints]).T
    blocks, weight = _set_blocks(c, occ)
    columns = []
    for w in constraints:
        ws = w if np.ndim(w) == 3 else [w]
        columns.append(np.concatenate([(2.0 * weight * cv.T @ m @ co).ravel()
                                       for m, (co, cv) in zip(ws, blocks)]))
    return np.array(columns).T


def _semicanonical(c, occ, fock):
    """Orbitals that diagonalise the Fock matrix within the occupied and within
    the virtual space (for a restricted open shell: within the doubly, singly
    and unoccupied spaces, with Roothaan's Fock matrix; the densities are
    unchanged), and those diagonal values."""
    if np.asarray(occ).ndim == 2:
        pairs = [_semicanonical(c[k], occ[k], fock[k]) for k in range(2)]
        return np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
    c = np.array(c, copy=True)
    energies = np.zeros(c.shape[1])
    for value in np.unique(occ):  # doubly, singly (restricted open shell) and unoccupied
        mask = occ == value
        block = c[:, mask]
        values, vectors = np.linalg.eigh(block.T @ fock @ block)
        c[:, mask] = block @ vectors
        energies[mask] = values
    return c, energies


def _rotate(c, occ, x):
    """c exp(K) with K_vo = x, K_ov = -x^T per orbital set (x: the sets' virtual x
    occupied blocks, concatenated; for a restricted open shell K = x on the
    pairs of _pairs): the rotation whose density change the orbital Hessians'
    matvec assumes."""
    from scipy.linalg import expm

    if _restricted_open(occ):  # one set, the pairs of _pairs
        k = np.zeros((c.shape[1], c.shape[1]))
        k[_pairs(occ)] = x
        return c @ expm(k - k.T)
    sets = [c] if np.asarray(occ).ndim == 1 else list(c)
    occs = [occ] if np.asarray(occ).ndim == 1 else list(occ)
    out, start = [], 0
    for cs, os_ in zip(sets, occs):
        o, v = np.where(os_ > 0)[0], np.where(os_ == 0)[0]
        block = np.asarray(x[start:start + v.size * o.size]).reshape(v.size, o.size)
        start += block.size
        k = np.zeros((cs.shape[1], cs.shape[1]))
        k[np.ix_(v, o)] = block
        k[np.ix_(o, v)] = -block.T
        out.append(cs @ expm(k))
    return out[0] if len(out) == 1 else np.array(out)


#: Newton steps at most per point; a step that does not lower the gradient
#: below STALL_RATIO times the previous one is stalled, and MAX_STALLED_STEPS
#: in a row end the Newton finish.
MAX_NEWTON_STEPS = 12
#: The Newton step's relative residual per unit (Eh) of the gradient it removes.
NEWTON_RTOL_PER_GRADIENT = 1.0
STALL_RATIO = 0.5
MAX_STALLED_STEPS = 3
#: Gradient to which DIIS takes a cold (zero-field) SCF before Newton steps
#: finish it: where DIIS still converges fast; and the DIIS cycles after which
#: the Newton steps take over wherever DIIS got to (a flat mode, such as the
#: orientation of a degenerate open shell, keeps DIIS wandering: OH at UKS
#: took 220 cycles to 1e-6, the Newton steps 10 from 1e-4).
DIIS_HANDOVER = 1e-6
DIIS_HANDOVER_CYCLES = 40


def _newton(mf, context, c, occ, target: float, constraints=(),
            accepted: float = 0.0) -> tuple[int, float, np.ndarray]:
    """Newton steps with the orbital Hessian from orbitals ``c`` towards gradient
    ``target``; leaves the best state reached in ``mf`` (semi-canonical
    orbitals, energies, e_tot). Returns (Fock builds and Hessian products, the
    gradient reached, the Fock matrix of that state).

    Each step builds the Fock matrix (one build), semi-canonicalises, and solves
    (A + B) x = -F_vo by preconditioned conjugate gradients (one
    build-like product per iteration) to a relative residual that the quadratic
    convergence makes sufficient (tighter as the target nears). The response
    function is the context's zero-field one (exact for HF, whose J and K do not
    depend on the density; the DFT kernel changes by O(F), which slows but does
    not stop the convergence). A step may raise the gradient (a soft mode, such
    as the rotation of a degenerate open shell's orbitals about a linear
    molecule's axis, takes several); the best state reached is kept, and
    MAX_STALLED_STEPS steps in a row that do not halve the gradient end the
    finish: the gradient has reached the floor double precision allows; one
    such step ends it once the gradient is within ``accepted`` (what the
    point's derivatives need). At zero field, the gradient (within
    ``accepted``) from which a step first failed to halve it becomes
    ``context.gradient_floor`` (the reference carries it to every point).

    With orientation ``constraints`` (orientation_constraints) each step keeps
    them (projected solve, plus the least step that restores c = 0), and the
    gradient that decides is the one orthogonal to their gradients.
    """
    h1e, s1e = mf.get_hcore(), context.overlap
    work, best, stalled, steps, last = 0, None, 0, 0, np.inf
    floor = np.inf
    while True:
        dm = mf.make_rdm1(c, occ)
        vhf = mf.get_veff(mf.mol, dm)
        work += 1
        fock = mf.get_fock(h1e, s1e, vhf, dm)
        c, energies = _semicanonical(c, occ, fock)
        g = _gradient_norm(mf, fock, constraints, c, occ)
        if not np.isfinite(g):
            break
        if best is None or g < best[0]:
            best = (g, c, energies, float(mf.energy_tot(dm, h1e, vhf)), fock)
        stalled = stalled + 1 if g > STALL_RATIO * last else 0
        if stalled == 1 and last <= accepted:
            # Steps stopped halving the gradient from here: rounding, not a
            # soft mode (those stall far above what the derivatives accept).
            floor = min(floor, last)
        last = g
        # A start is kept as it stands only within the share of the target a
        # step's linear solve aims at (NEWTON_TARGET_SHARE): a step lands there
        # or below, and a point's noise (the gradient reached) should not
        # depend on how close its start was (interpolated starts end within the
        # target at once: taken as they stood, they raised the validation
        # set's median error bar from 29 to 32 times the true error).
        aim = target if steps else NEWTON_TARGET_SHARE * target
        if (g <= aim or stalled >= MAX_STALLED_STEPS or (stalled and g <= accepted)
                or steps >= MAX_NEWTON_STEPS):
            break
        mf.mo_coeff, mf.mo_occ, mf.mo_energy = c, occ, energies
        # Before there is a reference (zero field), the response at these
        # orbitals, with the coarse-grid kernel of the field points' steps.
        response = (context.response if context.reference is not None
                    else context.response_at(c, occ))
        hessian = _orbital_hessian(mf, response, constraints, fock)
        # The step's linear-solve error (rtol g) need not beat the quadratic
        # error of an exact step (~g^2 per Eh, measured 0.5-1 for water), nor
        # a share of the target.
        rtol = float(np.clip(max(NEWTON_TARGET_SHARE * target / g,
                                 NEWTON_RTOL_PER_GRADIENT * g), *NEWTON_RTOL_BOUNDS))
        kept = [] if context.reference is None else None
        try:
            x = hessian.solve(-hessian.vo(fock), rtol, "Newton step",
                              subspace=_deflation(context, hessian, constraints),
                              keep=kept, verify=False)
            if kept and not constraints:
                context.newton_pairs.append((c, occ, kept))
        except ScfNotConvergedError:
            work += hessian.products
            break  # leave it to the ladder
        work += hessian.products
        if constraints:
            drift = _constraint_values(constraints, dm)
            x = x - np.linalg.lstsq(hessian.constraint_gradients.T, drift, rcond=None)[0]
        c = _rotate(c, occ, x)
        steps += 1
    g, c, energies, e_tot, fock = best
    mf.mo_coeff, mf.mo_occ, mf.mo_energy, mf.e_tot = c, occ, energies, e_tot
    if np.isfinite(floor) and context.reference is None:
        context.gradient_floor = max(context.gradient_floor, floor)
    return work, g, fock


def _deflation(context, hessian, constraints):
    """What deflates a Newton step's solve: the zero-field response's
    directions turned into the step's orbitals (ResponseSubspace.mapped);
    None with orientation constraints (the projected solve keeps its diagonal
    preconditioner) or without a subspace. (The point's own earlier steps'
    directions, added, saved nothing: measured on push-pull polyenes.)"""
    if constraints or context.subspace is None:
        return None
    return context.subspace.mapped(hessian, context.overlap)


#: From this many solved points on the line on, a start takes the linear
#: term from them too instead of from the zero-field response: their
#: polynomial extrapolates the response's own error (its solve's residual:
#: 1e-6 relative, for DFT 1e-8 on the job's grid) by up to the sum of its weights' sizes
#: (hundreds with two pairs). Measured on a 14-atom push-pull polyene at
#: HF/6-31G, the start at 0.008 au across the chain and along it, from the
#: pairs at 0.002 and 0.004 au: 1.4e-6 and 7.6e-7 with the response's
#: linear term, 3.2e-9 and 2.9e-6 with the points' own; with the point at
#: -0.008 au added, 2.8e-6 and 1.7e-6 against 2.8e-10 and 8.9e-7. With one
#: pair (and the opposite point) the response's linear term is better.
OWN_LINEAR_TERM = 4


def _line_weights(t, own_linear: bool) -> np.ndarray:
    """Weights w of the polynomial through the m points t_k (distinct, non-zero)
    evaluated at t = 1: with ``own_linear``, kappa(1) = sum_k w_k kappa(t_k)
    for kappa(t) = c_1 t + ... + c_m t^m; else kappa(1) = L +
    sum_k w_k (kappa(t_k) - t_k L) for kappa(t) = t L + c_2 t^2 + ... +
    c_{m+1} t^{m+1}, L the linear response. w solves V^T w = 1 with
    V_kj = t_k^j over the powers j of the c's."""
    t = np.asarray(t, dtype=float)
    first = 1 if own_linear else 2
    powers = np.arange(first, t.size + first)
    return np.linalg.solve((t[:, None] ** powers[None, :]).T, np.ones(t.size))


def _start_orbitals(context, field_vector_au) -> tuple[np.ndarray, str]:
    """The start of a point at field F, and its name: the zero-field orbitals
    rotated by kappa(F) = kappa_1 F + kappa_2 F^2 + kappa_3 F^3 + ... (the
    occupied-virtual rotations of _rotate), from the solved points on the
    line through zero field and F, at t F (t != 0, 1; a solved point's kappa
    from its converged orbitals, _rotation_from_reference): the polynomial in
    t through them (and, with fewer than OWN_LINEAR_TERM of them, the linear
    response), evaluated at t = 1 (_line_weights; the point at -F and
    MAX_LINE_POINTS others in the order of records.line_preference: inside F
    the farthest out, outside it the nearest):

    - ``mirror_start``: the point at -F is among them. With a pair +-a it is
      exact to fourth order (as kappa(-F) + 2 kappa_1 F + 2 kappa_3 F^3, the
      pair's odd part giving kappa_3), with no other to second;
    - ``line_start``: without it; a pair +-a makes it exact to third order
      (kappa_2 from the pair's even part, kappa_3 from its odd part);
    - ``response_start``: no solved point on the line: kappa_1 F, the linear
      response (first order).

    Each further point raises the order by one (the one that takes over the
    linear term leaves it). A point inside solved ones (a smaller step the
    adaptive window adds) is interpolated: on a 22-atom push-pull polyene at
    HF/6-31G, the points at 0.001 au from those at 0.002-0.008 au started at
    gradients 6e-12 to 2e-7 instead of 1e-5 to 2e-4 (response starts), 9 or
    fewer cycles instead of 13-16. Measured on a 14-atom push-pull polyene at
    HF/6-31G: a pair's odd term took the starting gradient of points at
    0.004-0.008 au from ~1e-5 to ~1e-7, a Newton step fewer; two pairs took
    the points at 0.008 au along the chain from 3.5e-5 to 2.9e-6 (plain line
    starts) and 6.3e-6 to 8.9e-7 (mirror starts), across it from 1.4e-7 to
    3.2e-9 and 1.9e-7 to 2.8e-10.
    """
    ref = context.reference
    if ref.field_rotations is None or not np.size(ref.field_rotations):
        return ref.mo_coeff, REFERENCE_START
    f = np.asarray(field_vector_au, dtype=float)
    linear = np.einsum("j,jn->n", f, ref.field_rotations)
    on_line = {}
    for key, x in context.solved.items():
        a = np.asarray(key)
        t = float(a @ f) / float(f @ f)
        if t != 0.0 and t != 1.0 and np.allclose(a, t * f, rtol=0.0, atol=LINE_START_ATOL_AU):
            on_line[t] = x
    if not on_line:
        return _rotate(ref.mo_coeff, ref.mo_occ, linear), RESPONSE_START
    mirror = -1.0 in on_line
    chosen = sorted((t for t in on_line if t != -1.0), key=line_preference)
    chosen = ([-1.0] if mirror else []) + chosen[:MAX_LINE_POINTS]
    own = len(chosen) >= OWN_LINEAR_TERM
    weights = _line_weights(chosen, own)
    kappa = (0.0 if own else linear) + sum(
        w * (on_line[t] - (0.0 if own else t * linear)) for w, t in zip(weights, chosen))
    return _rotate(ref.mo_coeff, ref.mo_occ, kappa), MIRROR_START if mirror else LINE_START


def field_key(field) -> tuple[float, float, float]:
    """A field vector as a dictionary key (exact floats; -0.0 is 0.0)."""
    return tuple(float(v) + 0.0 for v in field)


def _rotation_from_reference(ref_c, ref_occ, c, overlap) -> np.ndarray:
    """The occupied-virtual rotation x (_rotate's layout) that takes the
    reference orbitals to the occupied space of ``c``, exactly: per set
    M = X Y^-1 with X = C0_v^T S C_o, Y = C0_o^T S C_o (independent of rotations
    within the occupied space) is x Sigma^-1 tan(Sigma), Sigma = (x^T x)^(1/2),
    so M^T M = tan(Sigma)^2 and x = M f(M^T M), f(T) = arctan(T^1/2) / T^1/2.
    A restricted open shell: _restricted_open_rotation."""
    if _restricted_open(ref_occ):
        return _restricted_open_rotation(ref_c, ref_occ, c, overlap)
    sets = [ref_c] if np.asarray(ref_occ).ndim == 1 else list(ref_c)
    occs = [ref_occ] if np.asarray(ref_occ).ndim == 1 else list(ref_occ)
    new = [c] if np.asarray(ref_occ).ndim == 1 else list(c)
    parts = []
    for c0, o, c1 in zip(sets, occs, new):
        occupied, virtual = c0[:, o > 0], c0[:, o == 0]
        c1_occ = c1[:, o > 0]
        x = virtual.T @ overlap @ c1_occ
        y = occupied.T @ overlap @ c1_occ
        m = np.linalg.solve(y.T, x.T).T
        w, v = np.linalg.eigh(m.T @ m)
        root = np.sqrt(np.clip(w, 0.0, None))
        f = np.ones_like(root)
        big = root > SMALL_ROTATION
        f[big] = np.arctan(root[big]) / root[big]
        parts.append((m @ (v * f) @ v.T).ravel())
    return np.concatenate(parts)


#: Passes of _restricted_open_rotation at most, and the size of a correction
#: (radians) below which it has converged: the first pass errs by O(K^3), each
#: further one shrinks that by about |K| (random rotations of 1e-2 radians:
#: corrections 7e-10, 8e-12, 7e-14), so four leave a start far closer than the
#: Newton steps need.
ROTATION_PASSES = 4
ROTATION_CONVERGED = 1e-12


def _restricted_open_rotation(ref_c, ref_occ, c, overlap) -> np.ndarray:
    """The rotation x on the pairs of _pairs that takes the reference orbitals
    of a restricted open shell to the doubly and singly occupied spaces of
    ``c``: U = C0^T S C1 is exp(K) times a rotation within each space; turning
    U's diagonal blocks symmetric (their polar factors) leaves exp(K) but for
    O(K^3) (the antisymmetric part of K^3's diagonal blocks), whose logarithm's
    non-redundant part is K to that order; passes on the remainder exp(-x) U
    refine it (ROTATION_PASSES)."""
    from scipy.linalg import logm

    u = ref_c.T @ overlap @ c
    pairs = _pairs(ref_occ)
    spaces = [ref_occ == value for value in np.unique(ref_occ)]
    x = np.zeros(int(pairs.sum()))
    for _ in range(ROTATION_PASSES):
        rest = _rotate(np.eye(len(ref_occ)), ref_occ, -x) @ u
        for space in spaces:
            w, _, vt = np.linalg.svd(rest[np.ix_(space, space)])
            rest[:, space] = rest[:, space] @ (vt.T @ w.T)
        step = np.real(logm(rest))[pairs]
        x = x + step
        if np.abs(step).max(initial=0.0) < ROTATION_CONVERGED:
            break
    return x


def _ladder(mf, dm0, target: float, attempts: list[str]) -> int:
    """PySCF's own SCF along a ladder of strategies, from ``dm0``, until one
    converges to ``target``: DIIS; a level shift (with damping, except for
    restricted open shells, where PySCF's damping fails); second-order SCF.
    Leaves the best state reached in ``mf``; returns the cycles."""
    from pyscf.scf import rohf

    restricted_open = isinstance(mf, rohf.ROHF)
    shift = {"level_shift": LADDER_LEVEL_SHIFT_AU, "diis_start_cycle": LADDER_DIIS_START_CYCLE}
    if not restricted_open:
        shift["damp"] = LADDER_DAMPING
    strategies = [(DIIS, {}), ("diis+level_shift" if restricted_open else
                                 "diis+damping+level_shift", shift), ("second_order", None)]
    cycles, best = 0, None
    mf.conv_tol_grad = target
    for name, settings in strategies:
        attempts.append(name)
        if settings is None:
            solver = mf.newton()
            solver.verbose = 0
            solver.kernel(mf.make_rdm1() if mf.mo_coeff is not None else dm0)
            cycles += int(getattr(solver, "cycles", 0) or 0)
            if solver.mo_coeff is not None:
                for key in ("mo_coeff", "mo_occ", "mo_energy", "e_tot"):
                    setattr(mf, key, getattr(solver, key))
        else:
            for key, value in settings.items():
                setattr(mf, key, value)
            mf.kernel(dm0)
            cycles += int(getattr(mf, "cycles", 1) or 1)
        g = _gradient_norm(mf)
        if best is None or g < best[0]:
            best = (g, mf.mo_coeff, mf.mo_occ, mf.mo_energy, mf.e_tot)
        if g <= target:
            break
        dm0 = mf.make_rdm1()
    for key, value in zip(("mo_coeff", "mo_occ", "mo_energy", "e_tot"), best[1:]):
        setattr(mf, key, value)
    mf.level_shift, mf.damp = 0.0, 0.0
    return cycles


#: A field point's Newton steps aim at no less than this many times the
#: gradient from which the zero-field steps stopped halving it
#: (ZeroFieldReference.gradient_floor): the points' floors scatter about the
#: zero-field one (measured: 1.3-1.6x for a 22-atom polyene at HF/6-31G), a
#: step taken at the floor removes nothing, and a linear solve aimed below it
#: spends products on digits rounding takes away (22 atoms: 12 % of a point).
FLOOR_MARGIN = 2.0


def _point_target(target: float, accepted: float, floor: float) -> float:
    """The gradient a field point's Newton steps aim at and end at: the job's
    target, or FLOOR_MARGIN times the zero-field floor where that is higher,
    never above what its derivatives accept."""
    return min(accepted, max(target, FLOOR_MARGIN * floor))


def _converge(mf, context, point, scf=None) -> tuple[list[str], int, np.ndarray | None]:
    """Converge the SCF of one field point; returns the strategies tried, the
    cycles (Fock builds and Hessian products) and the Fock matrix of the final
    state when the Newton steps built it (None otherwise).

    With ``[scf] solver = "newton"`` (every mean field: RHF, UHF, ROHF, RKS,
    UKS, ROKS): a field point starts from the zero-field orbitals rotated by their
    linear response to the field ("response start", exact to first order) and
    takes Newton steps to the target; zero field itself takes DIIS to
    DIIS_HANDOVER from PySCF's initial guess, then Newton steps. Anything that
    does not reach the target goes down PySCF's ladder (_ladder). A point that
    ends at a gradient at most ScfSpec.gradient_accepted (it stalled at the
    floor double precision allows, where its derivatives need no more) is
    accepted: the noise model uses the gradient reached. Otherwise it fails.
    ``scf``: the point's own settings (a tightened point's targets; default the
    context's), with the targets of its field (ScfSpec.at_field: looser
    farther out, where the stencils divide its noise by larger steps).
    """
    scf = (scf or context.scf).at_field(point.field_vector_au)
    target, accepted = scf.gradient_target, scf.gradient_accepted
    reference = context.reference
    if mf.mol.nelectron == 1:
        # No electron-electron terms (PySCF's HF1e): one diagonalisation of the
        # core Hamiltonian is the exact solution.
        mf.kernel()
        mf.converged = True
        return [ONE_ELECTRON], 1, None
    attempts, cycles, g, fock = [], 0, np.inf, None
    newton_ok = scf.solver == "newton" and _has_hessian(mf)
    constraints = context.constraints
    if newton_ok and reference is None:
        context.newton_pairs = []
        attempts.append(DIIS)
        mf.conv_tol_grad = max(target, DIIS_HANDOVER)
        mf.conv_tol = max(scf.energy_conv_tol_au, DIIS_HANDOVER ** 2)
        mf.max_cycle = min(scf.max_iterations, DIIS_HANDOVER_CYCLES)
        guess = getattr(context, "guess", None)
        if guess is not None and np.shape(guess) == np.shape(mf.get_init_guess()):
            mf.kernel(guess)
        else:
            mf.kernel()
        cycles += int(getattr(mf, "cycles", 1) or 1)
        mf.conv_tol, mf.conv_tol_grad = scf.energy_conv_tol_au, target
        mf.max_cycle = scf.max_iterations
        start = mf.mo_coeff
        occ = mf.mo_occ
        newton_ok = start is not None
        if newton_ok and _align(mf, context):
            attempts.append(ORIENTATION)
            start = mf.mo_coeff
        if newton_ok:
            constraints = context.constraints = orientation_constraints(context, start, occ)
    elif newton_ok:
        occ = reference.mo_occ
        start, how = _start_orbitals(context, point.field_vector_au)
        attempts.append(how)
        target = _point_target(target, accepted, reference.gradient_floor)
    if newton_ok:
        attempts.append(NEWTON)
        work, g, fock = _newton(mf, context, start, occ, target, constraints, accepted)
        cycles += work
        if reference is None and constraints and _align(mf, context):
            # The first turn was judged on DIIS orbitals: turn the converged
            # state by what is left (~1e-6 rad at DFT) and finish again.
            constraints = context.constraints = orientation_constraints(context, mf.mo_coeff, occ)
            work, g, fock = _newton(mf, context, mf.mo_coeff, occ, target, constraints,
                                    accepted)
            cycles += work
    if g > accepted:  # a stall where the derivatives need no more is accepted as is
        dm0 = (mf.make_rdm1() if mf.mo_coeff is not None else
               reference.density if reference is not None else None)
        cycles += _ladder(mf, dm0, target, attempts)
        g, fock = _gradient_norm(mf, constraints=constraints), None
    if g <= accepted:
        mf.converged = True
        return attempts, cycles, fock
    raise ScfNotConvergedError(
        f"SCF did not converge at field point {point.label}: orbital gradient {g:.1e} "
        f"reached after {', '.join(attempts)} ({cycles} cycles); the derivatives need at most "
        f"{accepted:.1e} (target {target:.1e}); no number is formed from it")
