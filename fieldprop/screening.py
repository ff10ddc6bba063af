"""Screening campaigns: the field points of many molecules in one pool.

Preparing (each molecule's job, plan and the points the store holds) is
:func:`fieldprop.engine.gather`; analysing each molecule's records is
:func:`fieldprop.engine.analyse`; this module computes what is missing, for
all molecules at once, on a :class:`LocalPool` of processes or a
:class:`DaskPool` (an existing Dask cluster), and keeps every worker busy to
the end:

1. the zero-field point of every molecule whose reference is not stored
   (it is the warm start and the state reference of that molecule's points),
   before any field point;
2. then the field points, a molecule's before the next one's, but any
   molecule's points fill a worker that would otherwise wait (at the end of
   a stage, or of the campaign); each point preferably once the points it
   starts from are done (their converged orbitals go with it, as in a single
   run);
3. when a molecule's points are all done, its adaptive window is settled
   again (:func:`fieldprop.engine.settle`): a new stage joins the pool, or the
   molecule is analysed.

This process alone writes the store: every outcome is committed as it
arrives, so a killed campaign resumes where it stopped. A molecule that fails
(a model PySCF refuses for it, an SCF that does not converge) is reported with
its reason, its remaining points are dropped, and the others go on.
"""

from __future__ import annotations

import logging
import os
import time
from dataclasses import dataclass, field

from tqdm import tqdm

from fieldprop import errors
from fieldprop.campaign import Campaign, Candidate
from fieldprop.engine import (Prepared, RunResult, analyse, failed_points_error, gather,
                              point_counts, settle)
from fieldprop.execute import abort_pool, campaign_optimise, campaign_point, \
    campaign_reference, init_campaign_worker, predecessors, refuse_another_backend
from fieldprop.records import PointFailure, PointTask

logger = logging.getLogger(__name__)


class LocalPool:
    """``workers`` local processes with ``threads`` BLAS threads each."""

    def __init__(self, workers: int, threads: int):
        from concurrent.futures import ProcessPoolExecutor

        self.slots, self.threads = workers, threads
        self.label = f"{workers} local worker process{'es' if workers != 1 else ''} x " \
                     f"{threads} thread{'s' if threads != 1 else ''}"
        self._pool = ProcessPoolExecutor(max_workers=workers, initializer=init_campaign_worker,
                                         initargs=(os.getpid(), threads))

    def submit(self, fn, *args):
        return self._pool.submit(fn, *args)

    def share(self, value):
        return value

    def first_done(self, futures) -> set:
        from concurrent.futures import FIRST_COMPLETED, wait

        return wait(futures, return_when=FIRST_COMPLETED).done

    def close(self, abort: bool = False, pending=()) -> None:
        if abort:
            abort_pool(self._pool)
        else:
            self._pool.shutdown()


class DaskPool:
    """The workers of an existing Dask cluster (``address`` of its scheduler,
    or its ``scheduler_file``); ``threads`` BLAS threads per task."""

    def __init__(self, address: str | None = None, scheduler_file: str | None = None,
                 threads: int = 1, client=None):
        from distributed import Client

        try:
            self.client = client or (Client(scheduler_file=scheduler_file, timeout="20s")
                                     if scheduler_file else Client(address, timeout="20s"))
        except (OSError, TimeoutError, ValueError) as exc:
            where = scheduler_file or address
            option = "--scheduler-file" if scheduler_file else "--scheduler"
            raise errors.InputError(f"{option} {where}: no Dask scheduler answered "
                                    f"({type(exc).__name__}: {exc})") from None
        self._own = client is None
        self.threads = threads
        # A task runs ``threads`` BLAS threads: as many tasks at once as the
        # workers' threads allow.
        self.slots = max(1, sum(self.client.nthreads().values()) // max(1, threads))
        self.label = f"Dask scheduler {self.client.scheduler.address} ({self.slots} worker " \
                     f"thread{'s' if self.slots != 1 else ''}, {threads} BLAS thread" \
                     f"{'s' if threads != 1 else ''} per task)"

    def submit(self, fn, *args):
        return self.client.submit(fn, *args, pure=False)

    def share(self, value):
        return self.client.scatter(value, broadcast=True, hash=False)

    def first_done(self, futures) -> set:
        from distributed import wait

        return wait(list(futures), return_when="FIRST_COMPLETED").done

    def close(self, abort: bool = False, pending=()) -> None:
        if abort and pending:  # the cluster is not ours: stop only our tasks
            self.client.cancel(list(pending))
        if self._own:
            self.client.close()


@dataclass
class MoleculeOutcome:
    """One molecule's end: its result (None when it failed) or its failure."""

    candidate: Candidate
    result: RunResult | None = None
    failure: str = ""
    kind: str = ""
    computed: int = 0
    reused: int = 0
    scf_cycles: int = 0


@dataclass
class _State:
    candidate: Candidate
    job: object = None  # the candidate's job at its optimised geometry, if optimised
    prepared: Prepared | None = None
    found: dict = field(default_factory=dict)  # task key -> PointRecord
    reference: object = None  # ZeroFieldReference, or its Dask future
    queue: list = field(default_factory=list)  # PointTasks of this stage still to send
    before: dict = field(default_factory=dict)  # task key -> predecessor tasks
    rotations: dict = field(default_factory=dict)
    computed_now: set = field(default_factory=set)  # task keys computed in this run
    running: int = 0
    outcome: MoleculeOutcome | None = None

    @property
    def done(self) -> bool:
        return self.outcome is not None and (self.outcome.result is not None or
                                             self.outcome.failure != "")


@dataclass(frozen=True)
class CampaignCounts:
    molecules: int
    failed: int
    computed: int
    reused: int
    scf_cycles: int
    wall_time_s: float


def run_campaign(campaign: Campaign, store, pool, progress: bool = False,
                 log_every_s: float | None = None, retry_failed: bool = False,
                 on_result=None) -> tuple[list[MoleculeOutcome], CampaignCounts]:
    """Compute and analyse every molecule of ``campaign`` (see the module
    text); ``on_result(outcome)`` is called as each molecule finishes."""
    start = time.perf_counter()
    states = [_State(c, outcome=MoleculeOutcome(c)) for c in campaign.candidates]
    _optimise(states, store, pool, progress)
    for state in states:
        if not state.outcome.failure:
            _prepare(state, store, retry_failed)
    bar = tqdm(total=0, desc="field points", unit="pt", disable=not progress, leave=False)
    lines = _Lines(log_every_s) if log_every_s is not None and not progress else None
    pending: dict = {}  # future -> (state, task)

    def finish_molecule(state: _State) -> None:
        out = state.outcome
        if out.failure:
            logger.error("%s: failed: %s", state.candidate.name, out.failure)
        else:
            used = {t.key for t in state.prepared.computed_tasks}
            out.reused = len(used & set(state.found)) - len(used & state.computed_now)
            counts = point_counts(state.prepared, out.computed, out.reused)
            out.result = analyse(state.prepared, state.prepared.records(state.found), counts,
                                 store.label, time.perf_counter() - start)
        if on_result is not None:
            on_result(out)

    def fail(state: _State, reason: str, kind: str) -> None:
        state.outcome.failure, state.outcome.kind = reason, kind
        bar.total -= len(state.queue)
        bar.refresh()
        state.queue = []
        if state.running == 0:
            finish_molecule(state)

    def next_stage(state: _State) -> None:
        """Queue the points the molecule's window needs, or finish it."""
        state.prepared = settle(state.prepared, state.found)
        todo = [t for t in state.prepared.computed_tasks
                if t.key not in state.found and not _is_reference(t)]
        if not todo:
            finish_molecule(state)
            return
        # Predecessors among the points this stage uses (computed, or found
        # computed): a point is sent once they are done, with their converged
        # orbitals and nothing else, so its start, and with it every number,
        # does not depend on the schedule (a Dask cluster gives a serial run's
        # numbers bit for bit; a resumed campaign has no orbitals of the points
        # stored before, so its points differ in the last digits).
        tasks = [t for t in state.prepared.computed_tasks if not _is_reference(t)]
        order = predecessors(tasks)
        state.before = {t.key: tuple(tasks[j] for j in order[i]) for i, t in enumerate(tasks)}
        state.queue = todo
        bar.total += len(todo)
        bar.refresh()

    def pick():
        """The next (state, task): a zero field first; then the points of the
        first molecule in the set that has any to send, so that a worker
        mostly stays with one molecule (its model context, the integrals and
        the zero-field response, is built once per worker and molecule, not
        once per point), while any molecule's points fill a worker that would
        idle; of a molecule's points, one whose predecessors are done (None
        when no point anywhere is ready: wait for one to finish)."""
        for state in states:
            if state.queue and _is_reference(state.queue[0]):
                return state, state.queue.pop(0)
        for state in states:
            if not state.queue or state.reference is None:
                continue
            done = set(state.found)
            task = next((t for t in state.queue if done.issuperset(
                p.key for p in state.before.get(t.key, ()))), None)
            if task is not None:
                state.queue.remove(task)
                return state, task
        return None

    def send() -> bool:
        chosen = pick()
        if chosen is None:
            return False
        state, task = chosen
        if _is_reference(task):
            future = pool.submit(campaign_reference, task, pool.threads)
        else:
            from fieldprop.backend_pyscf import field_key

            keys = [field_key(p.point.field_vector_au) for p in state.before.get(task.key, ())]
            hints = {k: state.rotations[k] for k in keys if k in state.rotations}
            future = pool.submit(campaign_point, task, state.reference, hints, pool.threads)
        pending[future] = (state, task)
        state.running += 1
        return True

    def received(state: _State, task: PointTask, result) -> None:
        state.running -= 1
        outcome, extra = result
        out = state.outcome
        bar.update()
        if lines is not None:
            lines.update(outcome)
        if _is_reference(task):
            if isinstance(outcome, PointFailure):
                store.put_point(task, outcome)
                fail(state, outcome.reason, outcome.kind)
                return
            prepared = state.prepared
            if not store.put_model(task.model_key, prepared.description(), prepared.facts,
                                   extra, (task, outcome)):
                # Another process stored this model first: its reference and
                # its zero-field point are the ones every point is checked against.
                extra = store.get_model(task.model_key)[0]
                row = store.get_points([task.key]).get(task.key)
                if row is not None and row.ok:
                    outcome = row.record(task.point)
            state.reference = pool.share(extra)
            state.found[task.key] = outcome
            state.computed_now.add(task.key)
            out.computed += 1
            out.scf_cycles += outcome.scf_cycles
            next_stage(state)
            return
        store.put_point(task, outcome)
        if isinstance(outcome, PointFailure):
            if not out.failure:
                err = failed_points_error(state.prepared, [outcome], retry_failed)
                fail(state, str(err), outcome.kind)
            elif state.running == 0:
                finish_molecule(state)
            return
        out.computed += 1
        out.scf_cycles += outcome.scf_cycles
        if out.failure:
            if state.running == 0:
                finish_molecule(state)
            return
        state.found[task.key] = outcome
        state.computed_now.add(task.key)
        from fieldprop.backend_pyscf import field_key

        if extra is not None:
            state.rotations[field_key(task.point.field_vector_au)] = extra
        if not state.queue and state.running == 0:
            next_stage(state)

    for state in states:
        if state.outcome.failure:
            finish_molecule(state)
        elif state.reference is None:
            state.queue = [state.prepared.tasks[0]]
            bar.total += 1
        else:
            next_stage(state)
    try:
        while True:
            while len(pending) < pool.slots and send():
                pass
            if not pending:
                break
            for future in pool.first_done(pending):
                state, task = pending.pop(future)
                try:
                    result = future.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails one molecule
                    text = " ".join(str(exc).split())[:200] or "no message"
                    result = (PointFailure(task.point, f"field point {task.point.label}: its "
                                           f"worker failed ({type(exc).__name__}: {text})",
                                           errors.BackendError.__name__), None)
                received(state, task, result)
    except BaseException:
        bar.close()
        pool.close(abort=True, pending=list(pending))
        raise
    bar.close()
    pool.close()
    for state in states:  # cannot happen: predecessors lie within a stage and are acyclic
        if not state.done:
            stuck = len(state.queue)
            fail(state, f"{state.candidate.name}: {stuck} field points never became ready to "
                 "compute (a scheduling fault)", "FieldpropError")
    outcomes = [s.outcome for s in states]
    counts = CampaignCounts(len(outcomes), sum(1 for o in outcomes if o.result is None),
                            sum(o.computed for o in outcomes), sum(o.reused for o in outcomes),
                            sum(o.scf_cycles for o in outcomes), time.perf_counter() - start)
    return outcomes, counts


def _optimise(states, store, pool, progress: bool) -> None:
    """Geometry optimisations first ([geometry] optimize), in the pool, one
    task per molecule whose optimised geometry is not stored; each result is
    stored at once. A failed optimisation fails its molecule."""
    from fieldprop.engine import geometry_key, with_geometry

    pending = {}
    for state in states:
        job = state.candidate.job
        if not job.geometry.optimize:
            continue
        key = geometry_key(job)
        document = store.get_geometry(key)
        if document is not None:
            state.job = with_geometry(job, document)
        else:
            pending[pool.submit(campaign_optimise, job, pool.threads)] = (state, key)
    if not pending:
        return
    logger.info("optimising %d geometr%s", len(pending), "y" if len(pending) == 1 else "ies")
    bar = tqdm(total=len(pending), desc="geometries", unit="mol", disable=not progress,
               leave=False)
    try:
        while pending:
            for future in pool.first_done(pending):
                state, key = pending.pop(future)
                try:
                    document, failure = future.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails one molecule
                    document, failure = None, (f"{state.candidate.job.path}: [geometry] "
                                               f"optimize: its worker failed ({type(exc).__name__}"
                                               f": {' '.join(str(exc).split())[:200]})",
                                               errors.BackendError.__name__)
                bar.update()
                if failure is not None:
                    state.outcome.failure, state.outcome.kind = failure
                    continue
                store.put_geometry(key, document)
                state.job = with_geometry(state.candidate.job, document)
    except BaseException:
        bar.close()
        pool.close(abort=True, pending=list(pending))
        raise
    bar.close()


def _is_reference(task: PointTask) -> bool:
    """The model's zero-field point, whose computation gives the reference
    (a tightened zero field is an ordinary point)."""
    return task.is_zero_field and not task.tightening


def _prepare(state: _State, store, retry_failed: bool) -> None:
    """The molecule's plan, its points found in the store, its stored
    reference; a model PySCF refuses for it fails the molecule, not the set."""
    out = state.outcome
    try:
        prepared, rows = gather(state.job or state.candidate.job, store)
    except errors.FieldpropError as exc:
        out.failure, out.kind = str(exc), type(exc).__name__
        return
    found = {}
    stage = {t.key for t in prepared.computed_tasks}
    for t in prepared.all_tasks():
        row = rows.get(t.key)
        if row is None or (prepared.images and prepared.images[t.point.index][1] is not None):
            continue
        if row.ok:
            found[t.key] = row.record(t.point)
        elif not retry_failed and t.key in stage:
            err = failed_points_error(prepared, [row.failure(t.point)])
            out.failure, out.kind = str(err), row.fields.get("kind", "")
            return
    model = store.get_model(prepared.model_key)
    to_compute = not prepared.settled or any(t.key not in found
                                             for t in prepared.computed_tasks)
    if model is not None and to_compute:
        try:
            refuse_another_backend(store, prepared.tasks[0], model[1])
        except errors.InputError as exc:
            out.failure, out.kind = str(exc), type(exc).__name__
            return
    state.prepared, state.found = prepared, found
    if model is not None and prepared.tasks[0].key in found:
        state.reference = model[0]


class _Lines:
    """Progress log lines for batch logs: at most one every ``every_s`` s."""

    def __init__(self, every_s: float):
        self.every_s, self.done, self.cycles = every_s, 0, 0
        self.start = self.last = time.monotonic()

    def update(self, outcome) -> None:
        self.done += 1
        self.cycles += getattr(outcome, "scf_cycles", 0)
        now = time.monotonic()
        if now - self.last >= self.every_s:
            self.last = now
            logger.info("%d field points computed, %d SCF cycles, %.0f s elapsed", self.done,
                        self.cycles, now - self.start)

