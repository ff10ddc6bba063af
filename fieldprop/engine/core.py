"""From a validated job to tensors: the data flow in one place, in three steps.

1. :func:`prepare`: job -> molecule, backend facts, field plan, point tasks with
   their store keys (PySCF only to validate the basis and functional, or not at
   all when the facts come from a store).
2. computing points: :func:`fieldprop.stages.compute_jobs` (the one stage
   and to-do engine) on an executor of :mod:`fieldprop.points.executors`, over a
   :class:`~fieldprop.store.PointStore` (stored points are reused).
3. :func:`analyse`: records -> Taylor continuity -> Richardson extrapolation ->
   tensors -> invariants and warnings; pure, no PySCF (:func:`collect` runs it on
   a store's records alone).
"""

from __future__ import annotations

import dataclasses
import logging
import math
import sys
import time
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from fieldprop import errors
from fieldprop.numerics.continuity import ContinuityReport, check_continuity
from fieldprop.errors import IncompleteError, InputError, UnstableResultError
from fieldprop.numerics.extrapolate import ComponentEstimate, ComponentStatus, mark_unstable, richardson
from fieldprop.inputs.job import MAX_TIGHTENING, SYMMETRISE, Job
from fieldprop.points.keys import (Quantities, backend_version_conflict, model_document, model_key,
                            point_key, short_id)
from fieldprop.numerics.methods import METHODS, Route
from fieldprop.inputs.molecule import MoleculeSpec, build_molecule
from fieldprop.numerics.plan import FieldPlan, plan_fields, stencil_estimate
from fieldprop.points.records import CPHF_RTOL, Orientation, PointRecord, PointTask
from fieldprop.numerics.symmetry import FRAME_ERROR
from fieldprop.numerics.tensors import (Invariant, RotationalAverage, TensorResult, assemble, invariants,
                               rotational_average, turn_tensors)

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
class Prepared:
    """A job ready to compute or analyse: molecule, backend facts, plan, tasks.

    ``tasks`` follow ``plan.points`` (zero field first); ``model_key`` is the key
    of the zero-field reference the tasks share. ``symmetry`` is the point
    group used (None: none), ``images`` per planned point (index of the point
    it is the image of, operation R) or (its own index, None) when computed.
    """

    job: Job
    molecule: MoleculeSpec
    facts: dict
    plan: FieldPlan
    tasks: tuple[PointTask, ...]
    model_key: str
    symmetry: "Symmetry | None" = None
    images: tuple = ()
    #: The adaptive window reached (see :func:`settle`): (lowest, highest)
    #: level and tightening steps per component, and the planned points those
    #: levels use; () and None: every level, every point.
    windows: tuple = ()
    active: frozenset | None = None
    #: False while the windows' points are not all computed (the adaptive
    #: window may grow again once they are).
    settled: bool = True
    #: The group the given framework is near but not symmetric under to
    #: round-off (not used; None: none).
    near_symmetry: "NearSymmetry | None" = None
    #: {plan index: tightening steps} of the computed points the windows
    #: tighten (absent: the model's own convergence).
    tightening: dict | None = None

    @property
    def adaptive(self) -> bool:
        return self.job.response.window == "adaptive"

    @property
    def used(self) -> tuple[int, ...]:
        """Indices of the planned points the analysis uses (the window's)."""
        if self.active is None:
            return tuple(range(len(self.tasks)))
        return tuple(sorted(self.active))

    @property
    def computed_tasks(self) -> tuple[PointTask, ...]:
        """The tasks to compute: the points used that are not symmetry images
        of others, and the representatives of those that are, each with the
        tightening the windows ask of it."""
        sources = {self.images[i][0] if self.images else i for i in self.used}
        return tuple(self.task_at(i) for i in range(len(self.tasks)) if i in sources)

    def task_at(self, index: int) -> PointTask:
        """The task of planned point ``index`` at this stage's tightening."""
        return tightened_task(self.tasks[index], (self.tightening or {}).get(index, 0))

    def stage_tasks(self) -> tuple[PointTask, ...]:
        """Every planned point's task at this stage's tightening (plan order)."""
        return tuple(self.task_at(i) for i in range(len(self.tasks)))

    def all_tasks(self) -> tuple[PointTask, ...]:
        """Every planned point at every tightening the window may ask for
        (untightened first): what a store or point lines may hold of this job."""
        steps = [k for k in range(1, MAX_TIGHTENING + 1) if self.job.scf.can_tighten(k)]
        return self.tasks + tuple(tightened_task(t, k) for k in steps for t in self.tasks)

    def records(self, found: dict) -> list:
        """Records of every planned point (:meth:`expand`) from ``found``
        ({task key: PointRecord}): each computed point's at its tightening."""
        return self.expand({t.point.index: found[t.key] for t in self.computed_tasks
                            if t.key in found})

    def expand(self, by_index: dict) -> list:
        """Records of every planned point from those of the computed ones
        ({plan index: PointRecord}); None where a computed point is absent."""
        from fieldprop.numerics.symmetry import image_record

        if not self.images:
            return [by_index.get(i) for i in range(len(self.tasks))]
        out = []
        for i, (j, op) in enumerate(self.images):
            if op is None:
                out.append(by_index.get(i))
            else:
                rep = by_index.get(j)
                out.append(None if rep is None else image_record(rep, op, self.plan.points[i]))
        return out

    def description(self) -> dict:
        """The model's canonical description (stored beside its reference)."""
        return {**model_document(self.molecule, self.job.model, self.job.scf),
                "formula": self.molecule.formula}


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
    (backend_pyscf.relaxation_frame), ``counts`` the relaxed points'."""

    total: RunResult
    nuclear: dict[str, TensorResult]
    frame: dict
    counts: PointCounts


def settle(prepared: Prepared, found: dict) -> Prepared:
    """``prepared`` with the adaptive window replayed on the computed records
    ``found`` ({task key: PointRecord}, images not needed): from the first
    windows, grow them (fieldprop.numerics.window: one more level, or tighter points)
    while the points they use are all there; the result holds the windows
    reached, the points they use and their tightening, some of which may
    still be missing (the next stage to compute). The same records give the
    same stages in every process. Without the adaptive window, ``prepared``
    itself."""
    from fieldprop.numerics import window as adaptive

    if not prepared.adaptive:
        return prepared
    plan = prepared.plan
    windows = adaptive.initial_windows(plan)
    while True:
        stage = _stage(prepared, windows)
        records = stage.records(found)
        need = stage.active
        if any(records[i] is None for i in need):
            return dataclasses.replace(stage, settled=False)
        framed, noise, _, estimates = _estimates(stage, records, windows, need, {})
        grown = adaptive.grow(plan, windows, estimates, _tensor_scales(plan, estimates),
                              _tightenable(stage, noise, windows, estimates))
        if grown == windows:
            break
        windows = grown
    return dataclasses.replace(stage, settled=True)


def _stage(prepared: Prepared, windows) -> Prepared:
    """``prepared`` at the adaptive window's ``windows``: the points they use,
    and the tightening of each computed point (the largest any window using
    it, or an image of it, asks for)."""
    from fieldprop.numerics import window as adaptive

    steps = adaptive.point_tightening(prepared.plan, windows)
    tightening: dict[int, int] = {}
    for i, k in steps.items():
        j = prepared.images[i][0] if prepared.images else i
        if k:
            tightening[j] = max(tightening.get(j, 0), k)
    return dataclasses.replace(prepared, windows=windows, active=frozenset(steps),
                               tightening=tightening)


def tightened_task(task: PointTask, steps: int) -> PointTask:
    """``task`` with its convergence tightened by ``steps`` (ScfSpec.tightened),
    keyed by its targets: another point than ``task``, reused by any job that
    tightens the same point alike. ``steps`` = 0: ``task`` itself."""
    if not steps:
        return task
    tight = dataclasses.replace(task, scf=task.scf.tightened(steps), tightening=steps)
    return dataclasses.replace(tight, key=point_key(
        task.model_key, task.molecule.origin_bohr, task.quantities,
        task.point.field_vector_au, tight.tolerances))


#: A window's points are worth tightening when, at its smallest field, the
#: convergence part of a raw estimate's floor exceeds this many times its
#: double-precision part (below, a tighter convergence would shrink that
#: floor by less than half), and the noise sets the error bar: the entry is
#: at its noise floor, or that convergence part exceeds the bar (the noise,
#: not the truncation, keeps the smaller fields from helping).
TIGHTENING_GAIN = 1.0


def _tightenable(prepared: Prepared, noise: "NoiseModel", windows,
                 estimates) -> tuple[bool, ...]:
    """Per component: one more tightening step is allowed and would lower its
    floor where it matters (see TIGHTENING_GAIN); the records' noise is in the
    plan's frame."""
    plan, scf = prepared.plan, prepared.job.scf
    n = len(plan.points)
    out = []
    for comp, window, est in zip(plan.components, windows, estimates):
        lo, hi, steps = window
        if len(comp.stencils) <= 1 or not scf.can_tighten(steps + 1):
            out.append(False)
            continue
        s = comp.stencils[lo]
        rounding = noise.rounding(comp.quantity, n)
        floor = sum(abs(w) * rounding[p] for p, w in s.terms) / s.step_au ** comp.order
        converged = noise.stencil_floor(comp.quantity, s.terms, s.step_au, comp.order) - floor
        noise_sets_bar = (est.status is ComponentStatus.NOISE_LIMITED
                          or converged > est.error_au)
        out.append(bool(converged > TIGHTENING_GAIN * floor and noise_sets_bar))
    return tuple(out)


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


def geometry_key(job: Job) -> str:
    """The store key of a job's optimised geometry: the starting nuclei (as
    :func:`fieldprop.keys.model_document` fixes them), charge, multiplicity,
    the optimisation's model (method, functional, basis, reference, density
    fitting, DFT grid), the numerics version, the criteria and step limit."""
    from fieldprop.backend import optimisation_model
    from fieldprop.points.keys import digest

    model = optimisation_model(job)
    molecule = build_molecule(job.molecule, job.response.origin)
    document = model_document(molecule, model, job.scf)
    document["scf"] = {"grid_level": job.scf.grid_level}  # the optimiser's SCF is its own
    return digest({"kind": "fieldprop-geometry", "model": document,
                   "criteria": job.geometry.thresholds(), "max_steps": job.geometry.max_steps})


def with_geometry(job: Job, document: dict) -> Job:
    """``job`` with the optimised coordinates of ``document`` (the stored
    optimisation), moved onto their point group (:func:`symmetrised_optimum`),
    and the document itself as ``job.optimisation``."""
    from fieldprop.inputs.job import Atom

    document = symmetrised_optimum(job, document)
    coords = document["coords_bohr"]
    if len(coords) != len(job.molecule.atoms):
        raise ValueError(f"{job.path}: a stored optimised geometry has {len(coords)} atoms, "
                         f"the molecule {len(job.molecule.atoms)}")
    atoms = tuple(Atom(a.symbol, tuple(float(v) for v in xyz))
                  for a, xyz in zip(job.molecule.atoms, coords))
    molecule = dataclasses.replace(job.molecule, atoms=atoms,
                                   source=f"{job.molecule.source}, optimised")
    return dataclasses.replace(job, molecule=molecule, optimisation=document)


def optimised(job: Job, store=None, compute: bool = True) -> Job:
    """The job at its optimised geometry when [geometry] optimize is set:
    from the store, or optimised now (``compute``) and stored; else ``job``.
    Without ``compute`` a geometry not stored is IncompleteError (exit 3)."""
    if not job.geometry.optimize or job.optimisation is not None:
        return job
    key = geometry_key(job)
    document = store.get_geometry(key) if store is not None else None
    if document is None:
        if not compute:
            raise IncompleteError(f"{job.path}: [geometry] optimize: the optimised geometry "
                                  f"(key {short_id(key)}) is not in "
                                  f"{store.label if store is not None else 'any store'}; "
                                  "fieldprop run, or fieldprop point --zero-field, optimises "
                                  "it first")
        from fieldprop.backend import optimize_geometry

        start = time.perf_counter()
        logger.info("%s: optimising the geometry (%s criteria, at most %d steps)", job.path,
                    job.geometry.criteria, job.geometry.max_steps)
        molecule = build_molecule(job.molecule, job.response.origin)
        document = optimize_geometry(job, molecule)
        document["wall_time_s"] = time.perf_counter() - start
        if store is not None:
            store.put_geometry(key, document)
        logger.info("%s: geometry optimised in %d steps, %.1f s (largest gradient %.1e Eh/bohr)",
                    job.path, document["steps"], document["wall_time_s"],
                    document["largest_gradient_au"])
    else:
        logger.info("%s: the optimised geometry from %s", job.path, store.label)
    return with_geometry(job, document)


def symmetrised_optimum(job: Job, document: dict) -> dict:
    """An optimised geometry made exactly symmetric at its source.

    An optimiser leaves its structure a little off the point group it
    converged to (formaldehyde came out tilted by ~1e-7 angstrom): computed as
    it stands, forbidden components are small numbers with tiny bars instead
    of zeros. The geometry is moved onto the group of the starting geometry
    (whose operations, for a molecule placed in its symmetry axes, keep the
    elements on those axes) where that group fits the optimum within
    symmetry.SYMMETRY_TOLERANCE_BOHR, else onto the group the optimum itself
    is near; the move (within the optimiser's own tolerance) is recorded as
    ``document["symmetrised"]``. So the geometry reported and written is the
    one computed, and symmetry applies to it exactly."""
    from fieldprop.numerics import symmetry

    start = build_molecule(job.molecule, job.response.origin)
    charges = start.nuclear_charges
    optimum = np.asarray(document["coords_bohr"], dtype=float)
    group = symmetry.detect(charges, start.coords_bohr)
    coords = None if group is None else symmetry.symmetrise_like(group, charges, optimum)
    if coords is None:
        group = symmetry.detect(charges, optimum)
        coords = None if group is None else np.asarray(group.coords_bohr, dtype=float)
    if coords is None:
        return document
    moved = float(np.max(np.linalg.norm(coords - optimum, axis=1)))
    return {**document, "coords_bohr": [[float(v) for v in row] for row in coords],
            "symmetrised": {"group": group.name, "moved_bohr": moved}}


def relaxation_key(job: Job, molecule: MoleculeSpec) -> str:
    """The store key of a job's zero-field relaxation frame: the model's
    reference key (nuclei, model, SCF), the route (the dipole's tolerance
    applies on the dipole route) and the relaxation's tolerances."""
    from fieldprop.numerics import relaxation as nr
    from fieldprop.points.keys import digest

    return digest({"kind": "fieldprop-relaxation-frame",
                   "model": model_key(molecule, job.model, job.scf),
                   "route": str(job.response.route),
                   "tolerances": [nr.MINIMUM_GRADIENT_AU, nr.ENERGY_TOLERANCE_AU,
                                  nr.DIPOLE_TOLERANCE_AU, nr.MAX_STEPS, nr.STALL_FACTOR]})


def relaxed_reference(job: Job, store=None, compute: bool = True) -> Job:
    """With [response] nuclear_relaxation: ``job`` at the zero-field minimum
    of its model (the frame every relaxation is held to: from the store, or
    computed now and stored; ``job.relaxation`` its document). Refuses
    (InputError) a geometry that is not a minimum. Without ``compute`` a frame
    not stored is IncompleteError (exit 3). Otherwise ``job`` itself."""
    if not job.response.nuclear_relaxation or job.relaxation is not None:
        return job
    molecule, _ = symmetric_molecule(job)
    key = relaxation_key(job, molecule)
    document = store.get_geometry(key) if store is not None else None
    if document is None:
        if not compute:
            raise IncompleteError(f"{job.path}: [response] nuclear_relaxation: the zero-field "
                                  f"frame (key {short_id(key)}) is not in "
                                  f"{store.label if store is not None else 'any store'}; "
                                  "fieldprop run computes it first")
        from fieldprop.backend import relaxation_frame

        logger.info("%s: the zero-field minimum for nuclear relaxation: gradient, Hessian, "
                    "dipole derivatives", job.path)
        document = relaxation_frame(job, molecule, job.response.route is Route.DIPOLE)
        if store is not None:
            store.put_geometry(key, document)
        logger.info("%s: zero-field minimum polished in %d step%s (moved %.1e bohr), lowest "
                    "harmonic frequency %.0f cm^-1, %.1f s", job.path, document["polish_steps"],
                    "" if document["polish_steps"] == 1 else "s", document["moved_bohr"],
                    document["frequencies_cm"][0] if document["frequencies_cm"] else 0.0,
                    document["wall_time_s"])
    from fieldprop.inputs.job import Atom

    # The polish moves the minimum by the gradient's noise: back onto its group.
    document = symmetrised_optimum(job, document)
    atoms = tuple(Atom(a.symbol, tuple(float(v) for v in xyz))
                  for a, xyz in zip(job.molecule.atoms, document["coords_bohr"]))
    molecule_input = dataclasses.replace(job.molecule, atoms=atoms)
    return dataclasses.replace(job, molecule=molecule_input, relaxation=document)


def relax_target(prepared: Prepared):
    """The RelaxTarget of a prepared job with a relaxation frame."""
    from fieldprop.points.records import RelaxTarget
    from fieldprop.numerics.relaxation import Frame

    job = prepared.job
    doc = job.relaxation
    frame = Frame.build(doc["coords_bohr"], doc["masses_u"], doc["hessian_cartesian"],
                        doc["dipole_derivatives_cartesian"])
    return RelaxTarget(frame, job.response.route is Route.DIPOLE,
                       relaxation_key(job, prepared.molecule))


def relaxed_tasks(prepared: Prepared) -> list[PointTask]:
    """The relaxed points of the computed tasks (zero field: the clamped
    point itself, the frame being its minimum), keyed by the clamped point's
    key and the frame's."""
    from fieldprop.points.keys import digest

    target = relax_target(prepared)
    out = []
    for task in prepared.computed_tasks:
        if task.is_zero_field:
            out.append(task)
            continue
        key = digest({"kind": "fieldprop-relaxed-point", "point": task.key,
                      "frame": target.key})
        out.append(dataclasses.replace(task, key=key, relax=target))
    return out


def relax_at_field(prepared: Prepared, field_au) -> dict:
    """The nuclei of a prepared job (at its zero-field minimum: relaxed_reference)
    relaxed in one static field, under the Eckart conditions: the forces the
    field puts on the zero-field minimum, the relaxed structure, each atom's
    displacement, the relaxation energy and the dipole before and after. A
    document (bohr, Eh, au). Raises ScfNotConvergedError when an SCF or the
    relaxation does not converge."""
    from fieldprop.numerics import relaxation
    from fieldprop.backend import StructureEvaluator

    start = time.perf_counter()
    job, molecule = prepared.job, prepared.molecule
    field = np.asarray(field_au, dtype=float)
    target = relax_target(prepared)
    frame = target.frame
    evaluate = StructureEvaluator(molecule, job.model, job.scf, field,
                                  label="(" + ", ".join(f"{v:g}" for v in field) + ") au")
    clamped = evaluate(frame.coords_bohr)
    try:
        relaxed = relaxation.relax(frame, field, evaluate, dipole_matters=True)
    except relaxation.NotRelaxed as exc:
        raise errors.ScfNotConvergedError(f"{job.path}: field {evaluate.label}: the structure "
                                          f"was {exc}") from exc
    shift, turn = relaxation.eckart_residuals(frame.coords_bohr, relaxed.coords_bohr,
                                              frame.masses)
    moved = relaxed.coords_bohr - frame.coords_bohr
    return {
        "field_au": [float(v) for v in field],
        "symbols": list(molecule.symbols),
        "origin_bohr": [float(v) for v in molecule.origin_bohr],
        "masses_u": [float(m) for m in frame.masses],
        "zero_field_minimum_bohr": [[float(v) for v in row] for row in frame.coords_bohr],
        "forces_at_minimum_au": [[float(-v) for v in row] for row in clamped.gradient],
        "relaxed_bohr": [[float(v) for v in row] for row in relaxed.coords_bohr],
        "displacement_bohr": [[float(v) for v in row] for row in moved],
        "energy_clamped_au": clamped.energy_au,
        "energy_relaxed_au": relaxed.evaluation.energy_au,
        "relaxation_energy_au": clamped.energy_au - relaxed.evaluation.energy_au,
        "dipole_clamped_au": [float(v) for v in clamped.dipole_au],
        "dipole_relaxed_au": [float(v) for v in relaxed.evaluation.dipole_au],
        "eckart_residuals": {"translation_bohr": shift, "rotation_bohr2": turn},
        **{k: v for k, v in relaxed.document().items() if k != "coords_bohr"},
        "gradients": evaluate.gradients,
        "wall_time_s": time.perf_counter() - start,
    }


def make_plan(job: Job, route: Route | str | None = None, symmetry=None) -> FieldPlan:
    """The job's field plan, on its own route or on ``route``; with the
    molecule's ``symmetry``, in its symmetry frame (see Symmetry.frame), and
    components it forbids are planned without points."""
    r = job.response
    frame, forced_zero = None, None
    if symmetry is not None:
        frame = symmetry.frame()
        forced_zero = (symmetry if frame is None else symmetry.in_frame(frame)).forced_zero
    return plan_fields(r.properties, r.field_au, r.ratio, r.levels, route or r.route,
                       forced_zero, frame)


def quantities(job: Job, route: Route) -> Quantities:
    """What each point of ``job`` computes on ``route`` beside the energy."""
    dipole = METHODS[job.model.method].has(Route.DIPOLE)
    return Quantities(dipole=dipole, alpha=route is Route.ALPHA,
                      newton_dipole_error=dipole and route is Route.DIPOLE
                      and job.molecule.multiplicity > 1)


def make_tasks(job: Job, molecule: MoleculeSpec, plan: FieldPlan) -> list[PointTask]:
    """One task per planned point, with its store key."""
    want = quantities(job, plan.route)
    mkey = model_key(molecule, job.model, job.scf)
    return [PointTask(molecule, job.model, job.scf, p, want,
                      point_key(mkey, molecule.origin_bohr, want, p.field_vector_au), mkey)
            for p in plan.points]


def prepare(job: Job, route: Route | str | None = None, facts: dict | None = None) -> Prepared:
    """Molecule, backend facts, plan and tasks of ``job`` (on ``route``).

    Without ``facts``, the backend validates what only PySCF can judge (basis,
    functional) and reports them; with ``facts`` (from a store) PySCF is not
    imported.
    """
    molecule, sym, near = symmetry_decision(job)
    if facts is None:
        from fieldprop.backend import validate

        facts = validate(job, molecule)
    if any(facts.get("core_electrons", ())):
        molecule = dataclasses.replace(molecule, core_electrons=tuple(facts["core_electrons"]))
    plan = make_plan(job, route, sym)
    tasks = make_tasks(job, molecule, plan)
    images = ()
    if sym is not None:
        from fieldprop.numerics.symmetry import images as find_images

        images = tuple(find_images([p.field_vector_au for p in plan.points], sym))
    return settle(Prepared(job, molecule, facts, plan, tuple(tasks), tasks[0].model_key, sym,
                           images, near_symmetry=_near_symmetry(job, route, near)), {})


#: Why a molecule's symmetry is not used, when it has one (None: it is used).
def symmetry_refusal(job: Job, molecule: MoleculeSpec) -> str | None:
    if not job.response.symmetry:
        return "[response] symmetry = false"
    if molecule.multiplicity != 1:
        return ("an open shell: its state may break the molecule's symmetry (a degenerate "
                "shell), so no point is mapped")
    return None


@dataclass(frozen=True)
class NearSymmetry:
    """A point group the given framework is near, but not symmetric to round-off
    under, so it is not used (``[response] symmetry = true``): its name, how far
    the nuclei would move to fit it (bohr), and how many of the planned points
    ``symmetry = "symmetrise"`` would leave uncomputed."""

    group: str
    distance_bohr: float
    points_saved: int = 0


def symmetric_molecule(job: Job):
    """The molecule, and the point group its field points may use (None: none).

    See :func:`symmetry_decision`; this drops the near group."""
    molecule, sym, _ = symmetry_decision(job)
    return molecule, sym


def symmetry_decision(job: Job):
    """The molecule, the point group its field points use (None: none), and the
    group it is only near (a Symmetry not used, or None).

    The group is that of the nuclear framework about the centre of nuclear
    charge, for closed shells (a non-degenerate, totally symmetric state); an
    ion's origin must be fixed by it (its dipole depends on the origin). With
    an integration grid (DFT) only the operations that map the grid onto
    itself count (Symmetry.lattice_subgroup), and no frame is turned.

    The given nuclei are the computed nuclei: a group is used as it stands
    only where the framework is symmetric to round-off (Symmetry.exact). A
    framework within symmetry.SYMMETRY_TOLERANCE_BOHR of a group, but not to
    round-off, is computed as given (the group is returned as near), unless
    ``[response] symmetry = "symmetrise"``: the framework is then moved onto
    the group, and the moved nuclei are the molecule."""
    from fieldprop.numerics import symmetry

    molecule = build_molecule(job.molecule, job.response.origin)
    if symmetry_refusal(job, molecule):
        return molecule, None, None
    sym = symmetry.detect(molecule.nuclear_charges, molecule.coords_bohr)
    if sym is not None and METHODS[job.model.method].integration_grid:
        sym = sym.lattice_subgroup()  # the operations that map the grid onto itself
    if sym is None:
        return molecule, None, None
    origin = np.asarray(molecule.origin_bohr)
    if molecule.charge != 0 and np.linalg.norm(origin - sym.centre) > 1e-8:
        return molecule, None, None
    if job.response.symmetry != SYMMETRISE:
        return (molecule, sym, None) if sym.exact else (molecule, None, sym)
    if sym.moved_bohr > 0.0:
        molecule = dataclasses.replace(molecule, coords_bohr=tuple(
            tuple(float(v) for v in xyz) for xyz in sym.coords_bohr))
    return molecule, sym, None


def _near_symmetry(job: Job, route, near) -> NearSymmetry | None:
    """What the near group would save: the points its images would replace on
    the planned ladder."""
    if near is None:
        return None
    from fieldprop.numerics.symmetry import images as find_images

    plain = make_plan(job, route, None)
    grouped = make_plan(job, route, near)
    computed = sum(op is None for _, op in
                   find_images([p.field_vector_au for p in grouped.points], near))
    return NearSymmetry(near.name, near.moved_bohr, max(0, len(plain.points) - computed))


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


def compute(job: Job, workers: int = 1, progress: bool | None = None,
            route: Route | str | None = None, store=None,
            retry_failed: bool = False) -> RunResult:
    """Run the whole job (on its route, or on ``route``): prepare, compute the
    points ``store`` does not hold (default: a store in memory), analyse.

    Raises a FieldpropError subclass naming the failed points, if any (after
    every other point has finished and been stored). Unstable components do not
    raise here: the result carries them (no number is reported for them) and
    the CLI turns them into exit code 1.
    """
    return run_prepared(prepare(job, route), store, workers, progress, retry_failed)


def run_prepared(prepared: Prepared, store=None, workers: int = 1,
                 progress: bool | None = None, retry_failed: bool = False,
                 log_every_s: float | None = None, executor=None) -> RunResult:
    """:func:`compute` for a job already prepared (the CLI opens its store only
    once the job has passed every check): the points through the stage engine
    (:func:`fieldprop.stages.run_job`) on ``executor`` (default: ``workers``
    local processes, or this process for one), then the analysis.
    ``progress``: a bar; ``log_every_s``: progress log lines at most that
    often instead (batch logs)."""
    from fieldprop.engine.stages import make_executor
    from fieldprop.points.progress import Progress
    from fieldprop.engine.stages import JobWork, run_job
    from fieldprop.points.store import PointStore

    job, plan = prepared.job, prepared.plan
    own_store, own_executor = store is None, executor is None
    store = PointStore.in_memory() if own_store else store
    executor = make_executor(workers) if own_executor else executor
    ladder = ("1 point, zero field only (no derivative)" if len(plan.points) == 1 else
              f"{len(plan.points)} field points on {plan.levels} levels (h0 = {plan.field_au:g} "
              f"au, ratio {plan.ratio:g}), differentiating "
              f"{'E(F)' if plan.route == 'energy' else 'the SCF dipole'}")
    logger.info("%s: %s/%s%s, %s, SCF energy tolerance %g Eh, orbital "
                "gradient %g (accepted up to %g), solver %s; store %s; %s", job.path,
                job.model.method, job.model.basis,
                f"/{job.model.functional}" if job.model.functional else "", ladder,
                job.scf.energy_conv_tol_au, job.scf.gradient_conv_tol,
                job.scf.gradient_accepted, job.scf.solver, store.label, executor.label)
    if progress is None:
        progress = sys.stderr.isatty()
    rows = store.get_points(t.key for t in prepared.all_tasks())
    work = JobWork.at_hand(prepared, rows, retry_failed)
    if rows:
        logger.info("%d of the job's field points found in %s", len(work.found), store.label)
    try:
        return run_job(work, store, executor, Progress(progress, log_every_s))
    finally:
        if own_executor:
            executor.close()
        if own_store:
            store.close()


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
    return PointRecord(task.point, nan, nan, (nan,) * 3 if task.quantities.dipole else None, 0,
                       ("missing",), nan, nan, nan,
                       ((nan,) * 3,) * 3 if task.quantities.alpha else None)


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


def analyse(prepared: Prepared, records, counts: PointCounts | None = None,
            store_label: str = "", wall_time_s: float = 0.0, label: str = "") -> RunResult:
    """Tensors, invariants and warnings from the records of every planned point
    (in plan order; None for a point not computed, whose components are then
    MISSING: ``collect --allow-partial``). Pure: no PySCF."""
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


def gather(job: Job, store=None, lines=None, route: Route | str | None = None,
           facts_needed: bool = True) -> tuple[Prepared, dict]:
    """The job prepared (with the adaptive window's stage those points reach:
    :func:`settle`), and its planned points found in ``store`` and in point
    ``lines`` (a list of (iterable of text, source label), one per file or
    stream): {point key: StoredPoint}, a computed point winning over a failure. No PySCF when the backend facts are
    in the store or the lines (else PySCF validates the job, computing nothing).
    ``facts_needed=False``: never PySCF, the facts may stay empty (planning).
    Bad lines raise InputError (:mod:`fieldprop.points.pointlines`)."""
    from fieldprop.points import pointlines

    job = relaxed_reference(optimised(job, store, compute=False), store, compute=False)
    molecule, sym = symmetric_molecule(job)
    mkey = model_key(molecule, job.model, job.scf)
    facts = store.get_facts(mkey) if store is not None else None
    # The tasks' keys do not depend on the facts: the lines can be checked first.
    tasks = make_tasks(job, molecule, make_plan(job, route, sym))
    tasks += [tightened_task(t, k) for k in range(1, MAX_TIGHTENING + 1)
              if job.scf.can_tighten(k) for t in tasks]
    found: dict = {}
    facts_from = store.label if facts is not None else ""
    for text, label in lines or ():
        more, line_facts = pointlines.read_lines(text, label, tasks, mkey)
        for key, row in more.items():
            if key not in found or (row.ok and not found[key].ok):
                found[key] = row
        conflict = (backend_version_conflict(facts, line_facts)
                    if facts is not None and line_facts is not None else None)
        if conflict is not None:
            raise InputError(f"{label}: points computed with {conflict[1]}, {facts_from} with "
                             f"{conflict[0]}: one Richardson table would mix points of two "
                             "backend versions")
        if facts is None and line_facts is not None:
            facts, facts_from = line_facts, label
    if facts is None and not facts_needed:
        facts = {}
    prepared = prepare(job, route, facts=facts)
    every = prepared.all_tasks()
    rows = store.get_points(t.key for t in every) if store is not None else {}
    for key, row in found.items():
        if key not in rows or (row.ok and not rows[key].ok):
            rows[key] = row
    if prepared.adaptive:  # the stage the points found have reached
        sources = {j for j, _ in prepared.images} if prepared.images else None
        prepared = settle(prepared, {
            t.key: rows[t.key].record(t.point) for t in every
            if (sources is None or t.point.index in sources)
            and t.key in rows and rows[t.key].ok})
    return prepared, rows


def collect(job: Job, store=None, route: Route | str | None = None, lines=None,
            allow_partial: bool = False) -> RunResult:
    """The result of ``job`` from the points ``store`` holds and point ``lines``
    give (see :func:`gather`), with no PySCF work.

    Raises IncompleteError (exit 3) naming the missing points' ids when any
    planned point is not found, and the points' own error when a stored point
    failed: never an extrapolation from a partial set. With ``allow_partial``,
    missing and failed points (not zero field) are left out instead: the
    components that need them are MISSING, the others are reported.
    """
    start = time.perf_counter()
    sources = [label for _, label in lines or ()]
    if len(sources) > 3:
        sources = [f"{sources[0]} and {len(sources) - 1} more point-line sources"]
    where = " and ".join(x for x in (store.label if store is not None else None, *sources)
                         if x)
    prepared, rows = gather(job, store, lines, route)
    zero = prepared.tasks[0]
    if zero.key not in rows:
        raise IncompleteError(f"{job.path}: {where or 'nothing'} holds no zero-field point "
                              f"of this molecule and model (id {short_id(zero.key)}); every "
                              "result needs it: compute it with fieldprop point --zero-field "
                              "or fieldprop run")
    missing = [t for t in prepared.computed_tasks if t.key not in rows]
    if missing and not allow_partial:
        ids = " ".join(short_id(t.key) for t in missing[:8])
        raise IncompleteError(f"{job.path}: {len(missing)} of the {to_compute(prepared)} are "
                              f"not in {where}: {ids}{' ...' if len(missing) > 8 else ''}")
    failures = [rows[t.key].failure(t.point) for t in prepared.computed_tasks
                if t.key in rows and not rows[t.key].ok]
    if failures and (not allow_partial or not rows[zero.key].ok):
        raise failed_points_error(prepared, failures)
    found = {t.point.index: rows[t.key].record(t.point) for t in prepared.computed_tasks
             if t.key in rows and rows[t.key].ok}
    counts = point_counts(prepared, 0, len(found))
    result = analyse(prepared, prepared.expand(found), counts, where,
                     time.perf_counter() - start)
    if job.response.nuclear_relaxation:
        tasks = relaxed_tasks(prepared)
        rows = store.get_points(t.key for t in tasks[1:]) if store is not None else {}
        absent = [t for t in tasks[1:] if t.key not in rows]
        if absent:
            raise IncompleteError(f"{job.path}: {len(absent)} of the {len(tasks) - 1} relaxed "
                                  f"field points are not in {where}; fieldprop run computes "
                                  "them (and reuses every point stored)")
        failures = [rows[t.key].failure(t.point) for t in tasks[1:] if not rows[t.key].ok]
        if failures:
            raise failed_points_error(prepared, failures)
        relaxed = {0: found[0]} | {t.point.index: rows[t.key].record(t.point) for t in tasks[1:]}
        result = with_relaxation(result, prepared, relaxed,
                                 point_counts(prepared, 0, len(relaxed)))
    return result


def to_compute(prepared: Prepared) -> str:
    """For example "32 field points to compute (61 planned, 29 of them symmetry
    images)"."""
    n, planned = len(prepared.computed_tasks), len(prepared.tasks)
    used = len(prepared.used)
    notes = [f"{used} planned, {used - n} of them symmetry images"] if used > n else []
    if prepared.adaptive:
        notes.append(f"the adaptive window's {'last' if prepared.settled else 'current'} stage "
                     f"on a ladder of {planned} points" + (
                         "" if prepared.settled else ", more may follow once they are computed"))
    return f"{n} field point{'s' if n != 1 else ''} to compute" + (
        f" ({'; '.join(notes)})" if notes else "")


def todo_list_key(prepared: Prepared) -> str:
    """The key of a plan's to-do list in a store: the keys of the points it
    may compute, in order (the whole ladder's, not the adaptive window's
    stage: ``point --index`` finds the list without knowing the stage)."""
    from fieldprop.points.keys import digest

    tasks = [t for i, t in enumerate(prepared.tasks)
             if not prepared.images or prepared.images[i][1] is None]
    return digest({"kind": "fieldprop-todo", "points": [t.key for t in tasks]})


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


def reference_tensors(job: Job, result: RunResult, workers: int = 1, progress: bool = False,
                      store=None, retry_failed: bool = False, log_every_s: float | None = None,
                      executor=None):
    """fieldprop's analytic references for ``fieldprop check`` (SCF methods only).

    The dipole is the analytic SCF dipole and alpha the CPHF/CPKS polarizability,
    both at zero field; beta and gamma are the first and second field
    derivatives of the analytic alpha on the same ladder (the "alpha" route),
    two orders below the energy route, with their own error bars. The dipole is
    left out when the finite-field run itself used the analytic dipole (the
    dipole route), which would compare a number with itself.
    """
    from fieldprop.outputs.compare import ReferenceTensors

    logger.info("%s: the analytic reference route (CPHF/CPKS alpha at each field point)",
                job.path)
    analytic = run_prepared(prepare(job, Route.ALPHA), store, workers, progress, retry_failed,
                            log_every_s, executor)
    values = {n: t.value_au for n, t in analytic.tensors.items()}
    errors = {n: t.error_au for n, t in analytic.tensors.items()}
    note = "analytic SCF dipole, CPHF/CPKS alpha, beta and gamma from field derivatives of it"
    if result.plan.route is Route.DIPOLE and "dipole" in values:
        del values["dipole"], errors["dipole"]
        note += "; dipole not compared: the dipole route uses the analytic dipole itself " \
                "(set differentiate = \"energy\" to check it)"
    bad = analytic.unstable_components
    if bad:
        raise UnstableResultError(f"{job.path}: analytic reference unstable for "
                                  f"{'; '.join(bad[:3])}")
    return ReferenceTensors("fieldprop analytic (PySCF " +
                            str(analytic.backend_facts.get("pyscf_version")) + ")",
                            values, errors, note)
