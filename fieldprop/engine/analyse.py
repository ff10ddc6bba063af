"""Records to tensors: pure, no PySCF.

The noise of the computed points (:class:`NoiseModel`), Taylor continuity
along the field lines, Richardson extrapolation of every component, the
tensors with their invariants and rotational averages, and the warnings on
departures and on the field window (:func:`analyse`; :func:`with_relaxation`
for relaxed nuclei), with the point counts and the failed points' error a run
reports. Nothing is computed or stored here (:func:`fieldprop.engine.run.collect`
runs it on a store's records alone). It may import the pure rooms (numerics,
inputs, points) and, of the engine, :mod:`fieldprop.engine.prepare` alone.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from fieldprop import errors
from fieldprop.engine.prepare import NearSymmetry, Prepared
from fieldprop.errors import UnstableResultError
from fieldprop.inputs.job import SYMMETRISE, Job
from fieldprop.inputs.molecule import MoleculeSpec, build_molecule
from fieldprop.numerics.continuity import ContinuityReport, check_continuity
from fieldprop.numerics.extrapolate import (ComponentEstimate, ComponentStatus, mark_unstable,
                                            richardson)
from fieldprop.numerics.methods import METHODS, Route
from fieldprop.numerics.plan import FieldPlan, stencil_estimate
from fieldprop.numerics.symmetry import FRAME_ERROR
from fieldprop.numerics.tensors import (Invariant, RotationalAverage, TensorResult, assemble,
                                        invariants, rotational_average, turn_tensors)
from fieldprop.points.keys import short_id
from fieldprop.points.records import CPHF_RTOL, Orientation, PointRecord, PointTask

if TYPE_CHECKING:
    from fieldprop.numerics.symmetry import Symmetry

logger = logging.getLogger(__name__)


#: Double-precision floor of a total energy, in units in the last place of the
#: terms it is the difference of (|E_1| + |E_2| + |E_nuc|, PointRecord.
#: energy_scale_au; |E| where that is unknown). Measured: the range of three SCF
#: energies at one field (orbital gradients 1e-8 to 1e-12, HF/6-31G) was
#: 1.2e-13 Eh for water (terms 170 Eh), 0.6-1.3e-12 for 3-aminopropenal (1035 Eh),
#: 1.3-3.2e-12 for 4-nitroaniline (2812 Eh): 3.2-3.9 ulp of the terms, while
#: against |E| it grew from 7 to 20 ulp with the molecule.
ENERGY_ULPS = 4.0
#: Coupled-cluster energy noise in units of the amplitude solver's energy
#: tolerance, for a record without the convergence it reached (stored before
#: it was recorded; see noise_model).
CC_TOLERANCES = 10.0
#: Coupled-cluster energy error in units of what one more amplitude iteration
#: changes (PointRecord.correlation_energy_change_au, signed): the true error
#: was -1.2 to -2.1 times that change (HF molecule, aug-cc-pVDZ, and water,
#: 6-31G*, CCSD at a field off the axes, stopping at energy changes of
#: 1e-8..1e-13 Eh), hence twice the largest.
CC_STEP_FACTOR = 4.0
#: The part of that error that does not follow the signed change from point
#: to point, as a fraction of it. The error is a smooth function of the field
#: times the change (the solver's convergence rate is), so a stencil sees
#: CC_STEP_FACTOR |sum_p w_p change_p| (signed, mostly cancelling) plus this
#: fraction unsigned. Measured on He (CCSD/aug-cc-pVDZ against FCI, solver
#: stopped at 1e-12 Eh): alpha and gamma corrected by -1.5 times each point's
#: change agreed with FCI to 0.02 % and 0.2 % of the unsigned floor (the FCI
#: finite differences' own precision), hence 1 %.
CC_STEP_SPREAD = 0.01
#: CCSD(T): the triples, a function of the same amplitudes, err along with
#: them; their share of the energy error, relative to CCSD's (measured 0.07
#: for water/6-31G* at a tolerance of 1e-12 Eh: 3e-13 against 4.1e-12 Eh),
#: with a margin.
TRIPLES_SHARE = 0.5
#: Coupled-cluster energy error per unit of orbital gradient g: the singles
#: absorb most of an orbital error, leaving 3e-5 to 2.1e-3 g (measured on the
#: same two molecules, CCSD converged to 1e-15 Eh on SCF orbitals with g from
#: 2.6e-7 to 6.3e-5; an MP2 energy keeps the full ~g), hence five times the
#: largest.
CC_ORBITAL_SENSITIVITY = 1e-2


@dataclass(frozen=True)
class NoiseModel:
    """Noise of the differentiated quantities, used for round-off floors.

    Built point by point from the convergence actually reached there, g = the
    orbital-gradient norm of that point (PySCF usually converges well past its
    thresholds, so the thresholds themselves would overstate the noise by orders
    of magnitude). A stencil's floor is sum_p |w_p| noise_p / h^n.
    An SCF energy is variational, its error quadratic in the orbital error: ~g^2.
    The SCF dipole and post-HF energies are not: their errors are linear, ~g
    (orbital rotations ~g/gap times matrix elements ~1 au). Each also has the
    double-precision floor of its size (ENERGY_ULPS units in the last place; for
    the dipole, of its nuclear and electronic terms, sum_A Z_A |R_A - O|).
    Coupled-cluster energies depend on g far less (CC_ORBITAL_SENSITIVITY g)
    and add CC_STEP_FACTOR times what one more amplitude iteration changes at
    that point (measured; CC_TOLERANCES times the solver's energy tolerance
    for records without it). The analytic alpha (alpha route) is linear in the
    orbital error too, with the CPHF residual tolerance on top: ~g * |alpha|
    plus CPHF_RTOL * |alpha|.
    """

    energy_au: float | tuple[float, ...]  # Eh, one per point (or one for all)
    dipole_au: float | tuple[float, ...]  # e bohr
    alpha_au: float | tuple[float, ...] = 0.0  # au
    #: The part of each noise that no tighter convergence removes: the
    #: double-precision floor (for alpha also the CPHF residual's); what is
    #: left is the convergence's, which ScfSpec.tightened shrinks.
    energy_rounding_au: float | tuple[float, ...] = 0.0
    dipole_rounding_au: float | tuple[float, ...] = 0.0
    alpha_rounding_au: float | tuple[float, ...] = 0.0
    #: The energy's error that follows a signed estimate from point to point
    #: (coupled cluster: CC_STEP_FACTOR times the last amplitude step's
    #: change), Eh, signed: a stencil carries it as |sum_p w_p drift_p|. Its
    #: magnitude is part of energy_au, less the share that does not follow
    #: (CC_STEP_SPREAD), which stencils carry unsigned. 0: none.
    energy_drift_au: float | tuple[float, ...] = 0.0

    def per_point(self, kind: Route | str, n: int) -> np.ndarray:
        """The (n,) noise of the energy, dipole or alpha at each point."""
        return np.broadcast_to(np.asarray(getattr(self, Route(kind).value + "_au"),
                                          dtype=float), (n,))

    def rounding(self, kind: Route | str, n: int) -> np.ndarray:
        """The (n,) part of :meth:`per_point` that tightening does not remove."""
        return np.broadcast_to(np.asarray(getattr(self, Route(kind).value + "_rounding_au"),
                                          dtype=float), (n,))

    def drift(self, kind: Route | str, n: int) -> np.ndarray:
        """The (n,) signed error that follows an estimate (energy only)."""
        value = self.energy_drift_au if Route(kind) is Route.ENERGY else 0.0
        return np.broadcast_to(np.asarray(value, dtype=float), (n,))

    def stencil_floor(self, kind: Route | str, terms, step_au: float, order: int) -> float:
        """The round-off floor of one stencil (``terms``: (point, weight)):
        sum_p |w_p| independent_p / h^n + |sum_p w_p drift_p| / h^n, the
        independent part being :meth:`per_point` less the drift that
        follows the signed estimate."""
        total = np.atleast_1d(np.asarray(getattr(self, Route(kind).value + "_au"),
                                         dtype=float))
        drift = np.atleast_1d(np.asarray(self.energy_drift_au if Route(kind) is Route.ENERGY
                                         else 0.0, dtype=float))

        def at(values, p):  # one value per point, or one for all
            return values[p] if values.size > 1 else values[0]

        alone = sum(abs(w) * (at(total, p) - (1.0 - CC_STEP_SPREAD) * abs(at(drift, p)))
                    for p, w in terms)
        return float((alone + abs(sum(w * at(drift, p) for p, w in terms))) / step_au ** order)

    def largest(self) -> dict[str, float]:
        """The largest noise of each quantity over the points (for reports)."""
        return {k: float(np.nanmax(getattr(self, k))) for k in ("energy_au", "dipole_au",
                                                                  "alpha_au")}


@dataclass(frozen=True)
class PointCounts:
    """Points planned (used by the analysis), computed in this run, reused
    from the store, and obtained as symmetry images of other points (never
    computed)."""

    planned: int
    computed: int
    reused: int
    images: int = 0
    #: Points of the whole ladder (more than ``planned`` when the adaptive
    #: window left levels out; 0: the same).
    ladder: int = 0


@dataclass(frozen=True)
class RunResult:
    """Everything a report needs."""

    job: Job
    molecule: MoleculeSpec
    plan: FieldPlan
    records: tuple[PointRecord, ...]
    noise: NoiseModel
    tensors: dict[str, TensorResult]
    invariants: tuple[Invariant, ...]
    backend_facts: dict
    wall_time_s: float
    warnings: tuple[str, ...] = ()
    continuity: ContinuityReport | None = None
    counts: PointCounts | None = None
    store: str = ""
    #: (plan index, id) of the points to compute that are absent (``collect
    #: --allow-partial``; their images are absent too): their records are
    #: placeholders (NaN, attempts ("missing",)), never differentiated.
    missing: tuple[tuple[int, str], ...] = ()
    #: The point group whose images replaced computed points (None: none).
    symmetry: "Symmetry | None" = None
    #: Per planned point, as ``Prepared.images`` (empty: every point computed).
    images: tuple = ()
    #: As ``Prepared.windows`` and ``Prepared.active`` (the adaptive window).
    windows: tuple = ()
    active: frozenset | None = None
    #: With [response] nuclear_relaxation: the relaxed points' analysis (None: none).
    relaxation: "NuclearRelaxation | None" = None
    #: As ``Prepared.near_symmetry``.
    near_symmetry: "NearSymmetry | None" = None
    #: As ``Prepared.tightening``: the computed points with tighter convergence.
    tightening: dict | None = None
    #: A degenerate open shell: the orientation of its determinant (the zero-field
    #: record's) and each tensor's rotational average beside it ({} otherwise).
    orientation: Orientation | None = None
    averages: dict[str, RotationalAverage] = dataclasses.field(default_factory=dict)
    #: With [response] zero_point: the zero-point part (engine.zero_point.ZeroPoint).
    zero_point: object = None
    #: With [response] optical_wavelengths_nm: engine.optical.OpticalEstimates.
    optical: object = None

    @property
    def energy_au(self) -> float:
        return self.records[0].energy_au

    @property
    def computed_records(self) -> tuple[PointRecord, ...]:
        """The records of the points computed and present: neither missing
        (``collect --allow-partial``) nor symmetry images of other points."""
        gone = {i for i, _ in self.missing}
        gone |= {i for i, (_, op) in enumerate(self.images) if op is not None}
        if self.active is not None:
            gone |= set(range(len(self.records))) - self.active
        return tuple(r for i, r in enumerate(self.records) if i not in gone)

    @property
    def unstable_components(self) -> list[str]:
        own = [c.plan.name + (f" ({c.estimate.reason})" if c.estimate.reason else "")
               for t in self.tensors.values() for c in t.components
               if c.estimate.status is ComponentStatus.UNSTABLE]
        if self.relaxation is not None:
            own += [f"{name} with relaxed nuclei"
                    for name in self.relaxation.total.unstable_components]
        return own

    @property
    def missing_components(self) -> list[str]:
        return [c.plan.name for t in self.tensors.values() for c in t.components
                if c.estimate.status is ComponentStatus.MISSING]


@dataclass(frozen=True)
class NuclearRelaxation:
    """The nuclear-relaxation part of a result: ``total`` is the analysis of
    the relaxed points (electronic plus nuclear relaxation), ``nuclear`` the
    tensors total less electronic, ``frame`` the zero-field frame's document
    (backend.gradients.relaxation_frame), ``counts`` the relaxed points'."""

    total: RunResult
    nuclear: dict[str, TensorResult]
    frame: dict
    counts: PointCounts


def _tensor_scales(plan: FieldPlan, estimates) -> list[float]:
    """Per component, the largest finite |value| among its tensor's components."""
    largest: dict[str, float] = {}
    for comp, est in zip(plan.components, estimates):
        if math.isfinite(est.value_au) and est.status is not ComponentStatus.UNSTABLE:
            largest[comp.tensor] = max(largest.get(comp.tensor, 0.0), abs(est.value_au))
    return [largest.get(comp.tensor, 0.0) for comp in plan.components]


def _estimates(prepared: Prepared, records, windows, active, missing):
    """(records in the plan's frame, noise, continuity, estimates) from the
    records of every planned point (None: a placeholder, never used)."""
    plan = prepared.plan
    records = tuple(_placeholder(t) if r is None else r for t, r in zip(prepared.tasks, records))
    # In the plan's frame (the molecule's symmetry frame, if it has one) the
    # dipoles and alphas are differentiated along its axes.
    framed = records if plan.frame is None else _in_frame(records, plan.frame)
    noise = noise_model(prepared.job, framed, prepared.molecule)
    smooth = continuity(plan, framed, noise, active)
    estimates = extrapolate_components(plan, framed, noise, smooth.cause, missing,
                                       windows or None)
    return framed, noise, smooth, estimates


def _route_values(plan: FieldPlan, records, noise: NoiseModel):
    """The differentiated quantity per point, (n, m), and its noise, (n,)."""
    if plan.route is Route.DIPOLE:
        values = [r.dipole_au for r in records]
    elif plan.route is Route.ALPHA:
        values = [np.ravel(r.alpha_au) for r in records]
    else:
        values = [[r.energy_au] for r in records]
    return np.array(values, dtype=float), noise.per_point(plan.route, len(records))


def continuity(plan: FieldPlan, records, noise: NoiseModel, active=None) -> ContinuityReport:
    """Taylor continuity of the route's quantity along every line of the
    field points (those in ``active``, if given)."""
    values, eps = _route_values(plan, records, noise)
    flagged = {i: r.state_issue for i, r in enumerate(records) if r.state_issue
               and (active is None or i in active)}
    return check_continuity(plan.points, values, eps, flagged, present=active)


def extrapolate_components(plan: FieldPlan, records, noise: NoiseModel,
                           excluded=None, missing=None, windows=None) -> list[ComponentEstimate]:
    """Richardson estimates of every component.

    ``windows`` (one (lowest, highest) level per component, the adaptive
    window's; None: every level) restricts each component's ladder; its
    estimate's chosen entry and table count levels from the ladder's first
    (the table's columns hold NaN below the window).
    A component's ladder stops below the first level whose stencil uses an
    ``excluded`` point ({point index: label of the departure that excluded it},
    ContinuityReport.cause): nothing is extrapolated through another state.
    It stops alike below the first level that uses a ``missing`` point ({point
    index: its id}); a component left with no level is MISSING.
    """
    excluded = excluded or {}
    missing = missing or {}
    energies = np.array([r.energy_au for r in records])
    dipoles = (np.array([r.dipole_au for r in records])
               if all(r.dipole_au is not None for r in records) else None)
    alphas = (np.array([r.alpha_au for r in records]) if plan.route is Route.ALPHA else None)
    estimates = []
    for n, comp in enumerate(plan.components):
        lo, hi = windows[n][:2] if windows else (0, len(comp.stencils) - 1)
        est = _component_estimate(plan, comp, comp.stencils[lo:hi + 1], energies, dipoles,
                                  alphas, noise, excluded, missing, lo)
        estimates.append(_shifted(est, lo) if lo and est.table[0] else est)
    return estimates


def _shifted(est: ComponentEstimate, lo: int) -> ComponentEstimate:
    """An estimate over levels lo.. with its entry and table counted from level 0."""
    k, m = est.chosen_entry
    table = tuple((math.nan,) * lo + tuple(col) for col in est.table)
    return dataclasses.replace(est, chosen_entry=(k + lo, m), table=table)


def _component_estimate(plan, comp, stencils, energies, dipoles, alphas, eps: "NoiseModel",
                        excluded, missing, lo) -> ComponentEstimate:
    """One component's estimate from ``stencils`` (its levels lo.., consecutive);
    ``eps`` the points' noise."""
    window = list(stencils)
    gone = next((k for k, s in enumerate(window) if any(p in missing for p, _ in s.terms)),
                None)
    stencils = window if gone is None else window[:gone]
    cut = next((k for k, s in enumerate(stencils) if any(p in excluded for p, _ in s.terms)),
               None)
    if cut is not None:
        stencils = stencils[:cut]
    why = ""
    if cut is not None:
        named = sorted({excluded[p] for p, _ in window[cut].terms if p in excluded})
        why = (f"level {cut + lo} and above use field points at or beyond a departure from "
               f"the zero-field state ({', '.join(named[:2])})")
    elif gone is not None:
        named = sorted({missing[p] for p, _ in window[gone].terms if p in missing})
        why = (f"level {gone + lo} and above use field points not computed "
               f"({', '.join(named[:3])}{' ...' if len(named) > 3 else ''})")
        if len(stencils) < (2 if comp.order > 0 else 1):  # no Richardson table left
            return ComponentEstimate(math.nan, math.nan, (0, 0), ComponentStatus.MISSING,
                                     math.nan, ((),), f"not determined: {why}")
    if not stencils:
        return ComponentEstimate(math.nan, math.nan, (0, 0), ComponentStatus.UNSTABLE,
                                 math.nan, ((),), f"every field strength is excluded: {why}")
    values = [stencil_estimate(comp, s, energies, dipoles, alphas) for s in stencils]
    floors = [eps.stencil_floor(comp.quantity, s.terms, s.step_au, comp.order)
              for s in stencils]
    est = richardson(values, plan.ratio, floors)
    if comp.order > 0 and len(values) == 1:
        est = mark_unstable(est, f"one field strength: {why}" if why else
                            "one field strength: the truncation error cannot be "
                            "estimated; use levels >= 2")
    return est


def noise_model(job: Job, records, molecule: MoleculeSpec | None = None) -> NoiseModel:
    """The NoiseModel of a finished set of points (see NoiseModel); ``molecule``
    (default: built from the job) sets the scale of the dipole's rounding."""
    traits = METHODS[job.model.method]
    ulp = np.finfo(float).eps
    if molecule is None:
        molecule = build_molecule(job.molecule, job.response.origin)
    # The dipole is a difference of nuclear and electronic terms each as large
    # as sum_A Z_A |R_A - O|; its rounding follows them, not |mu| (zero for a
    # symmetric molecule, whose terms may be large).
    moments = float(molecule.nuclear_moment_sum_au())
    energy, dipole, alpha, drift = [], [], [], []
    rounding = {"energy": [], "dipole": [], "alpha": []}
    triples = 1.0 + (TRIPLES_SHARE if job.model.method == "ccsd(t)" else 0.0)
    for r in records:
        g = r.gradient_norm
        e_round = ENERGY_ULPS * ulp * max(r.energy_scale_au, abs(r.energy_au))
        e, follows = e_round, 0.0
        if traits.mean_field:
            e += g * g
        elif traits.amplitude_solver:
            e += CC_ORBITAL_SENSITIVITY * g
            if r.correlation_energy_change_au is not None:
                # The error is about -1.5 times the step's change: the drift
                # is signed like the error.
                follows = -CC_STEP_FACTOR * triples * r.correlation_energy_change_au
                e += abs(follows)
            else:
                # A record from before the convergence was recorded: CC
                # energies stop when one iteration changes them by less than
                # the tolerance, and end up to ~4x that from converged
                # (measured: water/6-31G*, tolerance 1e-12: 4.1e-12 Eh); hence
                # ten tolerances.
                tolerance = (job.scf.correlation.energy_change_au
                             if getattr(job.scf, "correlation", None) is not None
                             else job.scf.energy_conv_tol_au)
                e += g + CC_TOLERANCES * max(tolerance, 1e-12)
        else:
            e += g
        relaxed = r.relaxation or {}
        # A relaxed structure's optimiser error: what one more Newton step would
        # still change (fieldprop.numerics.relaxation), twice for safety.
        e += 2.0 * relaxed.get("energy_change_au", 0.0)
        energy.append(float(e))
        drift.append(float(follows))
        rounding["energy"].append(float(e_round))
        # The dipole's convergence error: ~g for a closed shell (measured 0.9 g for
        # water), more across small gaps. The closed-shell one-step estimate came
        # out at 0.5-0.65 of the true error for water, hence twice it; the open-shell
        # full-Hessian one (dipole route) at 0.98-1.01 of it, doubled alike. Plus
        # the dipole's rounding, a sum of ~nao^2 products of the terms' size.
        d_round = 10.0 * ENERGY_ULPS * ulp * moments
        dipole.append(float(max(g, 2.0 * r.dipole_error_au) + d_round
                            + 2.0 * relaxed.get("dipole_change_au", 0.0)))
        rounding["dipole"].append(float(d_round))
        a = 0.0 if r.alpha_au is None else float(np.abs(r.alpha_au).max())
        # Ten CPHF residual tolerances: the solver stops at or below it, and the
        # residual maps into alpha through an operator of norm ~|alpha|.
        alpha.append(float((g + 10.0 * CPHF_RTOL) * max(a, 1.0)))
        rounding["alpha"].append(float(10.0 * CPHF_RTOL * max(a, 1.0)))
    return NoiseModel(tuple(energy), tuple(dipole), tuple(alpha),
                      *(tuple(rounding[k]) for k in ("energy", "dipole", "alpha")),
                      tuple(drift))


def with_relaxation(result: RunResult, prepared: Prepared, relaxed: dict,
                    counts: PointCounts) -> RunResult:
    """``result`` (clamped nuclei) with the analysis of the relaxed points
    ``relaxed`` ({plan index: record} of the computed tasks): total tensors,
    and the nuclear-relaxation ones as total less electronic."""
    from fieldprop.numerics.tensors import difference

    total = analyse(prepared, prepared.expand(relaxed), counts, result.store, 0.0,
                    label="with relaxed nuclei")
    part = NuclearRelaxation(total, difference(total.tensors, result.tensors),
                             prepared.job.relaxation, counts)
    return dataclasses.replace(result, relaxation=part,
                               warnings=result.warnings + total.warnings)


def log_counts(prepared: Prepared, counts: PointCounts, label: str) -> None:
    """The closing line of the points' work."""
    tightened = len(prepared.tightening or {})
    logger.info("%d field point%s: %d computed, %d reused from %s%s%s%s", counts.planned,
                "" if counts.planned == 1 else "s", counts.computed, counts.reused, label,
                f", {counts.images} images by symmetry ({prepared.symmetry.name})"
                if counts.images else "",
                f"; the adaptive window used {counts.planned} of the ladder's {counts.ladder}"
                if prepared.adaptive else "",
                f"; {tightened} of them computed again with tighter convergence, to lower a "
                "noise floor" if tightened else "")


def point_counts(prepared: Prepared, computed: int, reused: int) -> PointCounts:
    """The counts of a finished run or collection (see PointCounts)."""
    used = len(prepared.used)
    return PointCounts(used, computed, reused, used - len(prepared.computed_tasks),
                       len(prepared.tasks))


def failed_points_error(prepared: Prepared, failures, retried: bool = False):
    """One error naming every failed point (the first in full, the others after it)."""
    first = failures[0]
    kind = getattr(errors, first.kind, errors.FieldpropError)
    if not (isinstance(kind, type) and issubclass(kind, errors.FieldpropError)):
        kind = errors.FieldpropError
    for f in failures[1:]:
        logger.error("%s", f.reason)
    more = f" (and {len(failures) - 1} more points, listed above)" if len(failures) > 1 else ""
    hint = "" if retried else ("; a failure stays stored: rerun with --retry-failed to "
                               "compute failed points again")
    return kind(f"{first.reason}{more}{hint}")


def _placeholder(task: PointTask) -> PointRecord:
    """The record of a point not computed: NaN everywhere, never differentiated."""
    nan = math.nan
    return PointRecord(point=task.point, energy_au=nan, scf_energy_au=nan,
                       dipole_au=(nan,) * 3 if task.quantities.dipole else None, scf_cycles=0,
                       attempts=("missing",), s2=nan, occupied_overlap=nan, gradient_norm=nan,
                       alpha_au=((nan,) * 3,) * 3 if task.quantities.alpha else None)


def _in_frame(records, frame) -> tuple[PointRecord, ...]:
    """The records with dipole and alpha in ``frame`` (rows: its axes):
    mu -> q mu, alpha -> q alpha q^T."""
    q = np.asarray(frame, dtype=float)
    out = []
    for r in records:
        dipole = None if r.dipole_au is None else tuple(
            float(v) for v in q @ np.asarray(r.dipole_au))
        alpha = None if r.alpha_au is None else tuple(
            tuple(float(v) for v in row) for row in q @ np.asarray(r.alpha_au) @ q.T)
        out.append(dataclasses.replace(r, dipole_au=dipole, alpha_au=alpha))
    return tuple(out)


def geometry_warning(job: Job, molecule: MoleculeSpec, reference) -> str | None:
    """The warning of a zero-field geometry that is not a minimum of the
    model: the reference's nuclear gradient (the backend's geometry check, HF
    and DFT) above relaxation.MINIMUM_GRADIENT_AU; None where it is below or
    was not checked."""
    from fieldprop.numerics.relaxation import MINIMUM_GRADIENT_AU

    checked = getattr(reference, "nuclear_gradient", None)
    if checked is None or checked[0] <= MINIMUM_GRADIENT_AU:
        return None
    value, atom = checked
    return (f"{job.path}: the geometry is not a minimum of this model: its largest nuclear "
            f"gradient at zero field is {value:.1e} Eh/bohr (atom {atom + 1}, "
            f"{molecule.symbols[atom]}; a minimum has less than {MINIMUM_GRADIENT_AU:g}); the "
            "tensors belong to this structure, not to the model's equilibrium one: optimise "
            "it ([geometry] optimise = true) for the model's own")


def analyse(prepared: Prepared, records, counts: PointCounts | None = None,
            store_label: str = "", wall_time_s: float = 0.0, label: str = "",
            reference=None) -> RunResult:
    """Tensors, invariants and warnings from the records of every planned point
    (in plan order; None for a point not computed, whose components are then
    MISSING: ``collect --allow-partial``), with the zero-field ``reference``'s
    geometry check when given (geometry_warning). Pure: no PySCF."""
    job, plan = prepared.job, prepared.plan
    records = tuple(records)
    if len(records) != len(plan.points):
        raise ValueError(f"{len(records)} records for {len(plan.points)} planned points")
    source = [j for j, _ in prepared.images] or range(len(records))
    used = set(prepared.used)
    missing = {i: short_id(prepared.tasks[source[i]].key) for i, r in enumerate(records)
               if r is None and i in used}
    if 0 in missing:
        raise ValueError("the zero-field point is needed by every analysis")
    records = tuple(r if i in used else None for i, r in enumerate(records))
    framed, noise, smooth, estimates = _estimates(prepared, records, prepared.windows,
                                                  prepared.active, missing)
    records = tuple(_placeholder(t) if r is None else r
                    for t, r in zip(prepared.tasks, records))
    sym = prepared.symmetry
    if sym is not None:
        group = sym if plan.frame is None else sym.in_frame(plan.frame)
        estimates = [ComponentEstimate(0.0, 0.0, (0, 0), ComponentStatus.SYMMETRY_ZERO, 0.0,
                                       ((0.0,),), "forbidden by the molecule's point group ("
                                       f"{sym.name})")
                     if group.forced_zero(comp.indices) else est
                     for comp, est in zip(plan.components, estimates)]
    tensors = assemble(plan.components, estimates)
    if plan.frame is not None:  # back into the input frame, where every name points
        tensors = turn_tensors(tensors, plan.frame, sym.forced_zero, FRAME_ERROR)
    orientation = records[0].orientation
    averages = {} if orientation is None else {
        name: rotational_average(t, orientation.average, orientation.axes, orientation.labels)
        for name, t in tensors.items()}
    warnings = departure_warnings(job, plan, smooth) + window_warnings(job, plan, tensors)
    not_minimum = geometry_warning(job, prepared.molecule, reference)
    if not_minimum is not None:
        warnings = (not_minimum,) + warnings
    if sym is not None and job.response.symmetry == SYMMETRISE and not sym.exact:
        warnings = (f"{job.path}: [response] symmetry = \"{SYMMETRISE}\": the nuclei were "
                    f"moved by up to {sym.moved_bohr:.1e} bohr onto the point group "
                    f"{sym.name}; the tensors belong to the moved nuclei "
                    "(geometry_computed_bohr), not to the geometry as given",) + warnings
    if missing:
        ids = list(dict.fromkeys(missing.values()))
        warnings = (f"{job.path}: {len(ids)} of {len(prepared.computed_tasks)} field points "
                    f"to compute are missing ({' '.join(ids[:8])}"
                    f"{' ...' if len(ids) > 8 else ''}); the components that need them are "
                    "reported as missing, without a number",) + warnings
    if label:
        warnings = tuple(f"{label}: {text}" for text in warnings)
    for text in warnings:
        logger.warning("%s", text)
    return RunResult(job, prepared.molecule, plan, records, noise, tensors,
                     tuple(invariants(tensors)), prepared.facts, wall_time_s, warnings, smooth,
                     counts, store_label,
                     tuple(sorted({(source[i], k) for i, k in missing.items()})),
                     prepared.symmetry, prepared.images, prepared.windows, prepared.active,
                     near_symmetry=prepared.near_symmetry, tightening=prepared.tightening,
                     orientation=orientation, averages=averages)


QUANTITY = {"energy": ("energy", "Eh"), "dipole": ("dipole", "au"),
            "alpha": ("analytic alpha", "au")}


def departure_warnings(job: Job, plan: FieldPlan, report: ContinuityReport) -> tuple[str, ...]:
    """One line per Taylor departure: where, by how much, and what it costs."""
    what, unit = QUANTITY[plan.route]
    out = []
    for d in report.departures:
        where = (f"{job.path}: field point {d.label}, field_vector_au="
                 f"{[float(v) for v in d.field_vector_au]}: ")
        if d.kind == "state":
            what_happened = f"the state checks put it on another state than zero field ({d.reason})"
        else:
            what_happened = (f"its {what} departs from the Taylor prediction of the {d.nodes} "
                             f"smaller-field points on its line by {d.residual:.2e} {unit} "
                             f"({d.relative:.0%} of the field-induced change; noise "
                             f"{d.noise:.1e}): another electronic state, or beyond the "
                             "Taylor series' convergence")
        out.append(where + what_happened + ". It and the larger fields on its line are left "
                   "out of every derivative")
    return tuple(out)


def entry_window_au(plan: FieldPlan, entry: tuple[int, int]) -> tuple[float, float]:
    """Smallest and largest field strength entering Richardson entry (k, m)."""
    steps = plan.steps_au()
    k, m = entry
    return steps[k], steps[min(k + m, len(steps) - 1)]


#: A chosen entry at the smallest field whose table spread exceeds this many
#: round-off floors is truncation-limited: a smaller field would do better.
TRUNCATION_DOMINANCE = 10.0
#: ... warned only when that error bar matters: above this fraction of the
#: tensor's largest component.
MATERIAL_ERROR = 1e-4


def _balanced_field(plan: FieldPlan, est, order: int) -> float:
    """The h0 at which the chosen entry's truncation error (~h^(2m+2)) and
    round-off floor (~h^-n) would be equal, from their values at this h0."""
    k, m = est.chosen_entry
    spread = max(est.error_au - est.roundoff_au, 0.0)
    floor = max(est.roundoff_au, 1e-300)
    return plan.field_au * (floor / spread) ** (1.0 / (2 * m + 2 + order))


def window_warnings(job: Job, plan: FieldPlan, tensors) -> tuple[str, ...]:
    """Warn when the field ladder lies outside a component's stable window.

    Below: a significant component (|value| > 10 error) whose best entry does not
    use the smallest field was at its noise floor there (job's field_au only).
    Above: a component whose best entry starts at the smallest field and whose
    error bar is set by the truncation error (table spread > TRUNCATION_DOMINANCE
    round-off floors) and matters (> MATERIAL_ERROR of its tensor's largest
    component) would be better from a smaller field; the warning names the h0
    that would balance truncation and round-off (for the automatic window too).
    A component chosen at the largest field alone had no smaller field to
    confirm it (job's field_au only).
    """
    if plan.levels < 2:
        return ()
    from_job = job.response.field_au_source == "job"
    below, above, too_big = [], [], []
    for tensor in tensors.values():
        largest = float(np.max(np.abs(tensor.value_au), initial=0.0))
        for c in tensor.components:
            est = c.estimate
            if not c.stable or c.plan.order == 0 or abs(est.value_au) <= 10 * est.error_au:
                continue
            k, m = est.chosen_entry
            if k == 0 and est.error_au - est.roundoff_au > TRUNCATION_DOMINANCE * \
                    est.roundoff_au and est.error_au > MATERIAL_ERROR * largest:
                too_big.append((c.plan.name, _balanced_field(plan, est, c.plan.order)))
            if not from_job:
                continue
            if k == plan.levels - 1:
                above.append(c.plan.name)
            elif k > 0:
                below.append(f"{c.plan.name} (from {plan.steps_au()[k]:g} au)")
    out = []
    source = "[response] field_au" if from_job else "the automatic window's smallest field"
    if below:
        out.append(f"{job.path}: [response] field_au = {plan.field_au:g} au lies below the "
                   f"stable window of {len(below)} component(s), whose best Richardson entries "
                   f"start at a larger field: {', '.join(below[:4])}{' ...' if len(below) > 4 else ''}"
                   "; omit field_au for the automatic window")
    if too_big:
        names = [n for n, _ in too_big]
        suggestion = max(h for _, h in too_big)
        out.append(f"{job.path}: {source} = {plan.field_au:g} au lies above the stable window "
                   f"of {len(names)} component(s), whose error bars are set by the truncation "
                   f"error, > {TRUNCATION_DOMINANCE:g}x the round-off floor: "
                   f"{', '.join(names[:4])}{' ...' if len(names) > 4 else ''}; field_au = "
                   f"{suggestion:.2g} au would balance the two")
    if above:
        out.append(f"{job.path}: [response] only the largest field gave a usable estimate for "
                   f"{', '.join(above[:4])}{' ...' if len(above) > 4 else ''}: no smaller field "
                   "confirms it; omit field_au for the automatic window")
    return tuple(out)


def require_stable(result: RunResult) -> None:
    """Raise UnstableResultError naming the unstable components, if any."""
    bad = result.unstable_components
    if bad:
        raise UnstableResultError(
            f"{result.job.path}: {len(bad)} component(s) unstable, reported without a "
            f"number: {'; '.join(bad[:4])}{' ...' if len(bad) > 4 else ''}; try another "
            "field_au or more levels")
