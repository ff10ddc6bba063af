"""The job made ready: molecule, backend facts, field plan, point tasks.

:func:`prepare` turns a validated job into a :class:`Prepared`: the molecule
and the point group its field points may use (:func:`symmetry_decision`), the
backend's facts (PySCF validates the basis and functional, or is not imported
when the facts come from a store), the field plan (:func:`make_plan`) and one
task per planned point with its store key (:func:`make_tasks`, tightened by
:func:`tightened_task`). It may import the pure rooms (numerics, inputs,
points) and, lazily, the backend's validation; of the engine only
:func:`fieldprop.engine.stages.settle`, inside :func:`prepare` (the stage
engine imports this module).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from fieldprop.inputs.job import MAX_TIGHTENING, SYMMETRISE, Job
from fieldprop.inputs.molecule import MoleculeSpec, build_molecule
from fieldprop.numerics.methods import METHODS, Route
from fieldprop.numerics.plan import FieldPlan, plan_fields
from fieldprop.points.keys import Quantities, model_document, model_key, point_key
from fieldprop.points.records import PointTask

if TYPE_CHECKING:
    from fieldprop.numerics.symmetry import Symmetry


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
                       forced_zero, frame, r.index_symmetry)


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
    # The stage engine imports this module: settle is imported here, not above.
    from fieldprop.engine.stages import settle

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
    if sym is not None and (METHODS[job.model.method].integration_grid
                            or job.model.solvent_epsilon is not None):
        # The operations that map the grid (and a continuum's cavity surface,
        # the same atom-centred spheres) onto itself.
        sym = sym.lattice_subgroup()
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
