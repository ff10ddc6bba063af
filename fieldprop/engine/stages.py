"""The one stage and to-do engine: what each job still needs, computed anywhere.

Every entrance asks this module what to compute, under one policy:

- ``run``, ``check`` and ``screen`` hand their prepared jobs, with the records
  the store holds (:meth:`JobWork.at_hand`), to :func:`compute_jobs`, which
  sends the missing points to an executor (:mod:`fieldprop.points.executors`: this
  process, local processes or a Dask cluster), stores every outcome as it
  arrives (the parent process is the store's only writer) and moves each job
  through the adaptive window's stages (:func:`settle`), then
  its relaxed points when the job relaxes the nuclei;
- ``plan`` lists, and ``point`` computes, :meth:`JobWork.todo` (``point``
  through the same :func:`compute_jobs`, restricted to the points asked for);
- ``collect`` settles on the records at hand and analyses, computing nothing.

Reuse and retries: a point whose record is at hand is never computed again; a
stored failure is computed again only with ``retry_failed`` (once per
process), and a failure of the current stage that is not retried ends its job
(the stage's other points still finish and are stored). Starts: a point is
sent once the points it starts from (:func:`fieldprop.points.executors.predecessors`,
which precede it in the plan) are done, with their converged orbitals and
nothing else, so its numbers do not depend on the executor or the schedule:
``run``, ``screen`` and ``run --scheduler`` give the same numbers bit for bit.
A point whose predecessors were computed in another process (a resumed run, a
job-array element) starts from the zero-field orbitals turned by their linear
response instead, and differs in the last digits.

The adaptive window's stages live here too (:func:`settle`: the windows the
records at hand reach, and the points and tightening they ask for next). It
may import the points room, the backend's task functions (PySCF only when a
task runs), and of the engine :mod:`~fieldprop.engine.prepare`,
:mod:`~fieldprop.engine.analyse` and :mod:`~fieldprop.engine.geometry`
(:func:`~fieldprop.engine.geometry.relaxed_tasks`); never
:mod:`~fieldprop.engine.run` or :mod:`~fieldprop.engine.screening`, which
import it.
"""

from __future__ import annotations

import dataclasses
import logging
import time
from dataclasses import dataclass, field

from fieldprop import errors
from fieldprop.backend.points import GEOMETRY_CHECK_FIT_ABOVE
from fieldprop.backend.tasks import (point_task, reference_task, refuse_another_backend,
                                     warm_task)
from fieldprop.engine.analyse import (NoiseModel, _estimates, _tensor_scales, analyse,
                                      failed_points_error, log_counts, point_counts,
                                      with_relaxation)
from fieldprop.engine.geometry import relaxed_tasks
from fieldprop.engine.prepare import Prepared
from fieldprop.numerics.extrapolate import ComponentStatus
from fieldprop.points.executors import predecessors, worker_lost
from fieldprop.points.progress import Progress
from fieldprop.points.records import PointFailure, PointRecord, PointTask, ZeroFieldReference

logger = logging.getLogger(__name__)


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


@dataclass
class JobWork:
    """One job's state in :func:`compute_jobs`.

    ``found`` and ``failed`` ({task key: PointRecord / PointFailure}) hold the
    records at hand and those computed now; ``only`` restricts the work to
    those tasks (``point``: no stages); ``label`` prefixes its messages (a
    molecule's name in a campaign). After :func:`compute_jobs`, ``failure`` is
    the error that ended the job (None: it finished).
    """

    prepared: Prepared
    found: dict = field(default_factory=dict)
    failed: dict = field(default_factory=dict)
    retry_failed: bool = False
    only: tuple[PointTask, ...] | None = None
    label: str = ""
    reference: ZeroFieldReference | None = None
    failure: errors.FieldpropError | None = None
    finished: bool = False
    #: Keys sent in this process (a failure is retried once per process).
    attempted: set = field(default_factory=set)
    #: Keys of the clamped points and of the relaxed points computed now.
    computed_now: set = field(default_factory=set)
    relaxed_now: set = field(default_factory=set)
    scf_cycles: int = 0
    #: Whether the zero-field reference checks that the geometry is a minimum
    #: (not at the zero-point average's displaced geometries, which are not).
    check_geometry: bool = True
    #: An AO density the zero-field SCF starts from (a displaced geometry:
    #: the minimum's); None: PySCF's guess.
    guess: object = None
    #: {task key: converged rotation} of the points computed now.
    rotations: dict = field(default_factory=dict)
    queue: list = field(default_factory=list)
    before: dict = field(default_factory=dict)  # task key -> predecessor task keys
    running: int = 0
    lost: set = field(default_factory=set)  # keys whose worker died once
    shared: object = None  # the reference as the executor hands it to tasks
    counted: set = field(default_factory=set)  # keys in the progress total

    @classmethod
    def at_hand(cls, prepared, rows: dict, retry_failed: bool = False, **kw) -> "JobWork":
        """A job with the records ``rows`` ({key: StoredPoint}, from a store
        and point lines) of every task it may ask for, its stage settled on
        them."""
        tasks = list(prepared.all_tasks())
        if prepared.job.response.nuclear_relaxation and prepared.settled:
            tasks += relaxed_tasks(prepared)[1:]
        work = cls(prepared, retry_failed=retry_failed, **kw)
        for t in tasks:
            row = rows.get(t.key)
            if row is None:
                continue
            if row.ok:
                work.found[t.key] = row.record(t.point)
            else:
                work.failed[t.key] = row.failure(t.point)
        work.settle()
        return work

    # -- the policy

    def settle(self) -> None:
        """The adaptive window's stage the points found reach."""
        self.prepared = settle(self.prepared, self.found)

    def wanted(self, task: PointTask) -> bool:
        """To compute: not found, and not a failure kept (one not retried)."""
        if task.key in self.found:
            return False
        return task.key not in self.failed or (self.retry_failed
                                               and task.key not in self.attempted)

    def stage_tasks(self) -> list[PointTask]:
        """The tasks of the current stage: the clamped points the windows use,
        then (once those are all found) the relaxed ones of a job that relaxes
        the nuclei; ``only`` where given."""
        if self.only is not None:
            return list(self.only)
        clamped = list(self.prepared.computed_tasks)
        if not self.prepared.job.response.nuclear_relaxation or not self.prepared.settled \
                or any(t.key not in self.found for t in clamped):
            return clamped
        return relaxed_tasks(self.prepared)[1:]

    def todo(self) -> list[PointTask]:
        """The tasks of the current stage still to compute."""
        return [t for t in self.stage_tasks() if self.wanted(t)]

    def kept_failures(self) -> list[PointFailure]:
        """Failures of the current stage that are not computed again."""
        return [self.failed[t.key] for t in self.stage_tasks()
                if t.key in self.failed and not self.wanted(t) and t.key not in self.found]

    def counts(self):
        """The clamped points' PointCounts: used by the analysis, computed now,
        reused from the records at hand."""
        used = {t.key for t in self.prepared.computed_tasks}
        computed = len(self.computed_now & used)
        # Taken from the records at hand: points, and failures not retried.
        reused = len((used & (set(self.found) | set(self.failed))) - self.computed_now)
        return point_counts(self.prepared, computed, reused)

    def relaxed_records(self):
        """({plan index: record} of the relaxed points and zero field, their
        PointCounts), or None for a job that does not relax the nuclei."""
        if not self.prepared.job.response.nuclear_relaxation:
            return None
        tasks = relaxed_tasks(self.prepared)
        records = {t.point.index: self.found[t.key] for t in tasks if t.key in self.found}
        keys = {t.key for t in tasks[1:]}
        return records, point_counts(self.prepared, len(self.relaxed_now & keys),
                                     len((keys & set(self.found)) - self.relaxed_now))

    def result(self, store_label: str, wall_time_s: float):
        """The analysis of a finished job (engine.analyse, with relaxation)."""
        result = analyse(self.prepared, self.prepared.records(self.found), self.counts(),
                         store_label, wall_time_s, reference=self.reference)
        relaxed = self.relaxed_records()
        if relaxed is not None:
            result = with_relaxation(result, self.prepared, *relaxed)
        return result

    @property
    def needs_reference(self) -> bool:
        return self.reference is None and bool(self.todo())


def adopt_reference(store, prepared, record: PointRecord, reference: ZeroFieldReference):
    """Store a model's zero-field reference and point computed here; where
    another process stored the model first, its reference and zero-field
    point are the ones every point is checked against. Returns (record,
    reference) as stored."""
    zero = prepared.tasks[0]
    if store.put_model(zero.model_key, prepared.description(), prepared.facts, reference,
                       (zero, record)):
        return record, reference
    reference, facts = store.get_model(zero.model_key)
    refuse_another_backend(store, zero, facts)
    row = store.get_points([zero.key]).get(zero.key)
    if row is not None and row.ok:
        record = row.record(zero.point)
    return record, reference


def _fail(work: JobWork, error: errors.FieldpropError, progress: Progress) -> None:
    work.failure = error
    progress.shrink(len(work.queue))
    work.queue = []


def _references(works: list[JobWork], store, executor, progress: Progress) -> None:
    """Every job's zero-field reference: from the store, or computed (all at
    once on the executor) under the store's reference lock, so that of
    several processes needing one model's reference, one computes it."""
    waiting = [w for w in works if w.failure is None and w.needs_reference]
    if not waiting:
        return
    with store.reference_lock():
        pending, computing = {}, []
        for work in waiting:
            zero = work.prepared.tasks[0]
            if zero.key in work.failed and not work.wanted(zero):
                # A zero field stored as failed is not computed again unasked:
                # no point of the job can start.
                _fail(work, _error_of(work, [work.failed[zero.key]]), progress)
                continue
            model = store.get_model(zero.model_key)
            if model is not None:
                refuse_another_backend(store, zero, model[1])
                work.reference = model[0]
                row = store.get_points([zero.key]).get(zero.key)
                if row is not None and row.ok:
                    work.found[zero.key] = row.record(zero.point)
                continue
            logger.info("%scomputing the zero-field reference (model %s)",
                        f"{work.label}: " if work.label else "", zero.model_key[:12])
            _count(work, [zero], progress)
            computing.append(work)
        # Workers that would wait for the references build their models'
        # integrals meanwhile, and the first of them for each model does its
        # geometry check (backend.tasks.warm_task), which the reference task
        # then leaves out; local processes only (each takes one task; a
        # cluster places tasks its own way).
        idle = executor.slots - len(computing) if getattr(executor, "warms", False) else 0
        models = [w.prepared.tasks[0] for w in computing
                  if any(not t.is_zero_field for t in w.todo())]
        # Small models check inline: an exact gradient there costs less than
        # the waiting worker's own SCF, which the reference would wait for.
        costly = {w.prepared.tasks[0].model_key for w in computing if w.check_geometry
                  and w.prepared.facts.get("n_basis_functions", 0) > GEOMETRY_CHECK_FIT_ABOVE}
        checks = {}
        for i in range(idle if models else 0):
            zero = models[i % len(models)]
            check = zero.model_key not in checks and zero.model_key in costly
            future = executor.submit(warm_task, zero, executor.threads, check)
            if check:
                checks[zero.model_key] = future
        for work in computing:
            zero = work.prepared.tasks[0]
            pending[executor.submit(reference_task, zero, executor.threads,
                                    zero.model_key not in checks and work.check_geometry,
                                    work.guess)] = work
        try:
            while pending:
                for future in executor.first_done(pending):
                    work = pending.pop(future)
                    zero = work.prepared.tasks[0]
                    try:
                        record, reference = future.result()
                    except Exception as exc:  # noqa: BLE001 - a lost worker fails one job
                        record, reference = _lost_failure(zero, exc), None
                    progress.update(record)
                    work.attempted.add(zero.key)
                    if reference is None:
                        store.put_point(zero, record)
                        work.failed[zero.key] = record
                        _fail(work, errors.BackendError(
                            f"{record.reason}; no field point can start without it")
                            if record.kind == errors.BackendError.__name__ else
                            _error_of(work, [record]), progress)
                        continue
                    check = checks.pop(zero.model_key, None)
                    if check is not None:  # done meanwhile by a waiting worker
                        try:
                            reference = dataclasses.replace(reference,
                                                            nuclear_gradient=check.result())
                        except Exception:  # noqa: BLE001 - advice only: not checked
                            logger.debug("geometry check lost", exc_info=True)
                    record, reference = adopt_reference(store, work.prepared, record, reference)
                    work.reference = reference
                    work.found[zero.key] = record
                    work.computed_now.add(zero.key)
                    work.scf_cycles += record.scf_cycles
        except BaseException:
            executor.close(abort=True, pending=list(pending))
            raise


def reference_first(work: JobWork, store, executor, progress: Progress | None = None) -> None:
    """``work``'s zero-field reference now (from the store, or computed), before
    the other jobs of a compute_jobs call that start from it."""
    _references([work], store, executor, progress or Progress(False))


def _lost_failure(task: PointTask, exc: BaseException) -> PointFailure:
    text = " ".join(str(exc).split())[:200] or "no message"
    return PointFailure(task.point, f"field point {task.point.label}: its worker failed "
                        f"({type(exc).__name__}: {text})", errors.BackendError.__name__)


def _error_of(work: JobWork, failures) -> errors.FieldpropError:
    return failed_points_error(work.prepared, failures, work.retry_failed)


def _refresh(work: JobWork, store) -> bool:
    """Records of the stage's tasks that the store holds now (another process,
    an earlier run: relaxed points, points stored meanwhile) join the job's;
    True when any did."""
    absent = [t for t in work.stage_tasks() if t.key not in work.found
              and t.key not in work.failed]
    rows = store.get_points(t.key for t in absent) if absent else {}
    for t in absent:
        row = rows.get(t.key)
        if row is not None:
            if row.ok:
                work.found[t.key] = row.record(t.point)
            else:
                work.failed[t.key] = row.failure(t.point)
    return bool(rows)


def _next_stage(work: JobWork, store, progress: Progress, on_finished) -> None:
    """Queue the points the job's next stage needs, or finish the job."""
    if work.failure is None and work.only is None:
        work.settle()
        while _refresh(work, store):
            work.settle()
        kept = work.kept_failures()
        if kept:
            _fail(work, _error_of(work, kept), progress)
    todo = [] if work.failure is not None else work.todo()
    if not todo:
        work.finished = True
        if on_finished is not None:
            on_finished(work)
        return
    if work.computed_now - {work.prepared.tasks[0].key} and work.only is None:
        tighter = sum(1 for t in todo if t.tightening)
        logger.info("%sadaptive window: %d more field point%s for the components whose "
                    "tables have not settled%s", f"{work.label}: " if work.label else "",
                    len(todo), "" if len(todo) == 1 else "s",
                    f" ({tighter} of them again with tighter convergence, to lower a noise "
                    "floor)" if tighter else "")
    stage = [t for t in work.stage_tasks() if not t.is_zero_field or t.tightening]
    if work.only is None and all(t.relax is None for t in stage):
        # Points already found come first: a point the adaptive window adds
        # inside them (a smaller step) starts from them.
        stage = sorted(stage, key=lambda t: t.key not in work.found)
        order = predecessors(stage)
        work.before = {t.key: tuple(stage[j].key for j in order[i])
                       for i, t in enumerate(stage)}
    else:  # relaxed points start from their clamped points; point: from nothing
        work.before = {}
    # The zero-field point is here unless the model's reference was stored by
    # a job of other quantities (check's alpha route): then it is an ordinary
    # point of this job.
    work.queue = todo
    _count(work, todo, progress)


def _count(work: JobWork, tasks, progress: Progress) -> None:
    """Add the tasks not counted yet to the progress total."""
    new = [t.key for t in tasks if t.key not in work.counted]
    work.counted.update(new)
    progress.grow(len(new))


def _pick(works: list[JobWork]):
    """The next (job, task): the points of the first job that has one ready
    (a worker mostly stays with one model, whose context it builds once),
    a point being ready once its predecessors are done (after a failed one it
    starts from the linear response: its job fails at the stage's end
    anyway, and its points are kept for a retry); None when nothing anywhere
    is ready (wait for a point to finish)."""
    for work in works:
        if not work.queue or work.reference is None:
            continue
        task = next((t for t in work.queue
                     if all(k in work.found or k in work.failed
                            for k in work.before.get(t.key, ()))), None)
        if task is not None:
            work.queue.remove(task)
            return work, task
    return None


def compute_jobs(works: list[JobWork], store, executor, progress: Progress | None = None,
                 on_finished=None) -> None:
    """Compute what every job still needs (see the module text), on
    ``executor``, storing every outcome in ``store`` as it arrives.
    ``on_finished(work)`` is called as each job finishes or fails (its
    ``failure`` set). Interrupted (Ctrl-C, SIGTERM), the executor's tasks of
    this process are dropped and the exception goes on; every finished point
    is stored."""
    from fieldprop.backend import field_key

    progress = progress or Progress()
    for work in works:
        if work.only is None:
            work.settle()
        _count(work, work.todo(), progress)  # the first stage's total, zero field included
    _references(works, store, executor, progress)
    pending: dict = {}

    def send() -> bool:
        chosen = _pick(works)
        if chosen is None:
            return False
        work, task = chosen
        hints = {field_key(pred.point.field_vector_au): work.rotations[pred.key]
                 for pred in _tasks_of(work, work.before.get(task.key, ()))
                 if pred.key in work.rotations}
        work.attempted.add(task.key)
        work.running += 1
        pending[executor.submit(point_task, task, work.shared, hints, executor.threads)] = \
            (work, task)
        return True

    for work in works:
        work.shared = None if work.reference is None else executor.share(work.reference)
        if work.failure is not None:
            work.finished = True
            if on_finished is not None:
                on_finished(work)
        else:
            _next_stage(work, store, progress, on_finished)
    try:
        while True:
            while len(pending) < executor.slots and send():
                pass
            if not pending:
                break
            for future in executor.first_done(pending):
                work, task = pending.pop(future)
                work.running -= 1
                try:
                    outcome, rotation = future.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker costs its point only
                    if worker_lost(exc) and task.key not in work.lost:
                        work.lost.add(task.key)
                        logger.warning("%sfield point %s: its worker process died (%s); "
                                       "computed again in a new one",
                                       f"{work.label}: " if work.label else "",
                                       task.point.label, type(exc).__name__)
                        work.queue.insert(0, task)
                        continue
                    outcome, rotation = _lost_failure(task, exc), None
                progress.update(outcome)
                store.put_point(task, outcome)
                target = work.relaxed_now if task.relax is not None else work.computed_now
                target.add(task.key)
                if isinstance(outcome, PointRecord):
                    work.found[task.key] = outcome
                    work.failed.pop(task.key, None)
                    work.scf_cycles += outcome.scf_cycles
                    if rotation is not None:
                        work.rotations[task.key] = rotation
                else:
                    work.failed[task.key] = outcome
                if not work.queue and work.running == 0 and not work.finished:
                    _next_stage(work, store, progress, on_finished)
    except BaseException as exc:
        executor.close(abort=True, pending=list(pending))
        if isinstance(exc, KeyboardInterrupt):
            done = sum(len(w.computed_now) + len(w.relaxed_now) for w in works)
            left = sum(len(w.queue) for w in works) + len(pending)
            logger.warning("interrupted: %d new field point(s) stored in %s; %d still to "
                           "compute. Run the same command again to resume.", done,
                           store.label, left)
        raise
    for work in works:  # cannot happen: predecessors precede their points in the plan
        if not work.finished:
            _fail(work, errors.FieldpropError(
                f"{work.label or work.prepared.job.path}: {len(work.queue)} field points never "
                "became ready to compute (a scheduling fault)"), progress)
            work.finished = True
            if on_finished is not None:
                on_finished(work)


def _tasks_of(work: JobWork, keys) -> list[PointTask]:
    by_key = {t.key: t for t in work.stage_tasks()}
    return [by_key[k] for k in keys if k in by_key]


def make_executor(workers: int = 1, threads: int = 1, scheduler: str | None = None,
                  scheduler_file: str | None = None):
    """The executor the options ask for: a Dask cluster when given, else local
    processes (``workers`` > 1, each set up by the backend's worker
    initializer), else this process."""
    from fieldprop.backend.tasks import init_worker
    from fieldprop.points.executors import DaskPool, InProcess, LocalPool

    if scheduler or scheduler_file:
        return DaskPool(scheduler, scheduler_file, threads)
    if workers > 1:
        return LocalPool(workers, threads, init_worker)
    return InProcess()


def run_job(work: JobWork, store, executor, progress: Progress | None = None):
    """One job through :func:`compute_jobs` and its analysis: the RunResult,
    or its failure raised (the points computed are stored)."""
    start = time.perf_counter()
    compute_jobs([work], store, executor, progress)
    if progress is not None:
        progress.close()
    log_counts(work.prepared, work.counts(), store.label)
    if work.failure is not None:
        raise work.failure
    return work.result(store.label, time.perf_counter() - start)
