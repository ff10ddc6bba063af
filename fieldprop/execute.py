"""Executors: compute the field points a store does not hold yet.

Every planned point is first looked up in the store by its key; only the missing
ones are computed. The zero-field reference (the warm start and the state
reference of every other point) comes from the store too, or is computed first,
in this process, and stored. The missing points are independent
:class:`~fieldprop.records.PointTask` units, computed here (in one
:class:`~fieldprop.backend_pyscf.ModelContext`) or in a process pool whose
workers each build one context from the reference, sent once per worker when it
starts; results are taken as they complete and committed at once, by this
process alone (the store's only writer in a run), so a killed run loses only the
points in flight. Nothing is built when every point is stored.

A point that fails is stored as a failure with its reason; the others still
finish and are kept. A stored failure is not computed again unless asked
(``retry_failed``).
"""

from __future__ import annotations

import logging
import os
import signal
import sys
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from dataclasses import dataclass

import numpy as np
from tqdm import tqdm

from fieldprop.backend_pyscf import (ModelContext, backend_versions, compute_point,
                                     compute_reference, compute_relaxed_point, field_key)
from fieldprop.errors import BackendError, FieldpropError, InputError
from fieldprop.keys import backend_version_conflict
from fieldprop.records import PointFailure, PointRecord, PointTask, ZeroFieldReference
from fieldprop.store import PointStore

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class PointsOutcome:
    """What the executor found and did.

    ``records`` and ``failures`` follow the order of the tasks (a task has one
    or the other); ``computed`` counts the points computed now, ``reused`` those
    taken from the store (failures included), ``stored_failures`` the failures
    taken from the store without retrying them.
    """

    records: tuple[PointRecord, ...]
    failures: tuple[PointFailure, ...]
    computed: int
    reused: int
    stored_failures: int = 0


#: The worker process's model context (integrals, grid, zero-field reference),
#: set once by the pool's initializer and used by every point sent to that
#: process: the only state a worker keeps, and the reason it pays to send one
#: job's points to the same processes.
_WORKER_CONTEXT: ModelContext | None = None


def _end_with_parent(parent: int) -> None:
    """Have the kernel end this worker when its parent dies (Linux): a parent
    killed with SIGKILL (a lost batch job, the out-of-memory killer) cannot
    stop its workers, and forked workers keep each other's pipes open, so
    they would otherwise wait for work forever."""
    if not sys.platform.startswith("linux"):
        return
    import ctypes

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGTERM, 0, 0, 0)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        return
    if os.getppid() != parent:  # the parent died before the request took hold
        os._exit(1)


def _init_worker(task: PointTask, reference: ZeroFieldReference, parent: int = 0) -> None:
    # Ctrl-C reaches the whole process group: only the parent acts on it (it
    # stops the workers); SIGTERM from the parent ends a worker at once.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if parent:
        _end_with_parent(parent)
    # One OpenMP thread per worker process: N workers share N cores (the BLAS
    # threads the CLI sets before NumPy is imported, and workers inherit).
    from pyscf import lib

    lib.num_threads(1)
    global _WORKER_CONTEXT
    _WORKER_CONTEXT = ModelContext(task.molecule, task.model, task.scf, reference)


def _worker_task(task: PointTask, solved: dict):
    """One point in a worker: its outcome, and its converged rotation (None
    after a failure) for the points that start from it."""
    outcome = run_task(_WORKER_CONTEXT, task, solved)
    key = field_key(task.point.field_vector_au)
    rotation = (_WORKER_CONTEXT.solved.get(key) if isinstance(outcome, PointRecord) else None)
    return outcome, rotation


def run_task(context: ModelContext, task: PointTask,
             solved: dict | None = None) -> PointRecord | PointFailure:
    """Compute one point (``solved``: converged rotations of other points, for
    its start). Any exception inside it becomes a PointFailure (picklable,
    named): the other points finish and are kept. A FieldpropError keeps its
    message; anything else (an exception inside PySCF) is named with its type
    and message, its traceback logged at debug level."""
    start = time.perf_counter()
    try:
        if task.relax is not None:
            return compute_relaxed_point(context, task)
        return compute_point(context, task, solved)
    except FieldpropError as exc:
        return PointFailure(task.point, str(exc), type(exc).__name__,
                            time.perf_counter() - start)
    except Exception as exc:  # noqa: BLE001 - one point's failure must not end the run
        logger.debug("field point %s", task.point.label, exc_info=True)
        text = " ".join(str(exc).split())[:300] or "no message"
        return PointFailure(task.point, f"field point {task.point.label} failed inside the "
                            f"backend ({type(exc).__name__}: {text}); no number is formed "
                            "from it", BackendError.__name__, time.perf_counter() - start)


def _reference(tasks: list[PointTask], store: PointStore, facts: dict,
               description: dict) -> tuple[ZeroFieldReference, ModelContext | None]:
    """The model's zero-field reference from the store, or computed here and
    stored (with the zero-field point of these tasks, in one transaction).
    Returns it, and the context it was computed in (None when it was stored).

    Under the store's reference lock: of several processes that need the same
    missing reference at once (job-array elements, two runs), one computes it
    and the others wait, then read it."""
    zero = tasks[0]
    with store.reference_lock():
        found = store.get_model(zero.model_key)
        if found is not None:
            refuse_another_backend(store, zero, found[1])
            return found[0], None
        logger.info("computing the zero-field reference (model %s)", zero.model_key[:12])
        context = ModelContext(zero.molecule, zero.model, zero.scf)
        try:
            record, reference = compute_reference(context, zero)
        except FieldpropError:
            raise
        except Exception as exc:  # noqa: BLE001 - named, never a traceback
            logger.debug("zero field", exc_info=True)
            text = " ".join(str(exc).split())[:300] or "no message"
            raise BackendError(f"the zero-field point failed inside the backend "
                               f"({type(exc).__name__}: {text}); no field point can start "
                               "without it") from exc
        if not store.put_model(zero.model_key, description, facts, reference, (zero, record)):
            # Stored meanwhile by a process without the lock.
            reference, stored_facts = store.get_model(zero.model_key)
            refuse_another_backend(store, zero, stored_facts)
            context.attach(reference)
    return reference, context


def refuse_another_backend(store: PointStore, zero: PointTask, stored_facts: dict) -> None:
    """InputError (one line, both versions) when the stored model was computed
    with another backend version than this process has: its new points would
    join the stored ones in one Richardson table (keys.backend_version_conflict)."""
    conflict = backend_version_conflict(stored_facts, backend_versions(zero.model.method))
    if conflict is not None:
        raise InputError(
            f"store {store.label}: model {zero.model_key[:12]} was computed with "
            f"{conflict[0]}, this process has {conflict[1]}: its new points would join the "
            "stored ones in one Richardson table; give --store another path (the model is "
            f"then computed anew), or compute with {conflict[0]}")


class _ProgressLines:
    """Progress as log lines for batch logs (stderr not a terminal): points
    done of all, SCF cycles, elapsed and estimated remaining time, at most one
    line every ``every_s`` seconds and one at the end."""

    def __init__(self, total: int, done: int, every_s: float):
        self.total, self.done, self.every_s = total, done, every_s
        self.new, self.cycles = 0, 0
        self.start = self.last = time.monotonic()

    def update(self, outcome) -> None:
        self.done += 1
        self.new += 1
        self.cycles += getattr(outcome, "scf_cycles", 0)
        now = time.monotonic()
        if now - self.last >= self.every_s or self.done == self.total:
            self.last = now
            elapsed = now - self.start
            left = elapsed / self.new * (self.total - self.done)
            logger.info("%d/%d field points, %d SCF cycles, %s elapsed, ~%s left", self.done,
                        self.total, self.cycles, _clock(elapsed), _clock(left))


def _clock(seconds: float) -> str:
    seconds = int(round(seconds))
    return f"{seconds // 3600}:{seconds % 3600 // 60:02d}:{seconds % 60:02d}"


def compute_points(tasks: list[PointTask], store: PointStore, facts: dict, description: dict,
                   workers: int = 1, progress: bool = True, retry_failed: bool = False,
                   log_every_s: float | None = None) -> PointsOutcome:
    """Find or compute every task; ``tasks[0]`` must be the zero-field point.

    ``facts`` and ``description`` are stored with a newly computed reference
    (backend facts; the model's canonical description). A failure of the
    zero-field point raises at once (nothing else can be computed). With
    ``workers > 1`` the missing points run in a process pool of that size.
    ``progress``: a progress bar (a terminal); ``log_every_s``: instead, a log
    line at most that often (batch logs); neither: silent.
    """
    if not tasks or not tasks[0].is_zero_field:
        raise ValueError("the first task must be the zero-field point")
    stored = store.get_points(t.key for t in tasks)
    outcomes: dict[int, PointRecord | PointFailure] = {}
    missing: list[int] = []
    reused = stored_failures = computed = 0
    for i, task in enumerate(tasks):
        row = stored.get(task.key)
        if row is not None and (row.ok or not retry_failed):
            outcomes[i] = row.record(task.point) if row.ok else row.failure(task.point)
            reused += 1
            stored_failures += not row.ok
        else:
            missing.append(i)
    context = reference = None
    if missing:  # nothing to compute, nothing to build
        reference, context = _reference(tasks, store, facts, description)
        if context is not None:  # zero field was computed (and stored) just now
            computed = 1
            if missing[0] == 0:
                missing.pop(0)
                row = store.get_points([tasks[0].key]).get(tasks[0].key)
                outcomes[0] = row.record(tasks[0].point)
            else:  # a zero-field record was stored, only its reference was not
                computed = 0
    if reused:
        logger.info("%d of %d field points found in %s", reused, len(tasks), store.label)
    bar = tqdm(total=len(tasks), initial=len(tasks) - len(missing), desc="field points",
               unit="pt", disable=not progress, leave=False)
    lines = (_ProgressLines(len(tasks), len(tasks) - len(missing), log_every_s)
             if log_every_s is not None and not progress and missing else None)

    def finish(i: int, outcome) -> None:
        store.put_point(tasks[i], outcome)
        outcomes[i] = outcome
        bar.update()
        if lines is not None:
            lines.update(outcome)

    try:
        if workers <= 1 or len(missing) <= 1:
            if missing and context is None:
                zero = tasks[0]
                context = ModelContext(zero.molecule, zero.model, zero.scf, reference)
            for i in missing:
                finish(i, run_task(context, tasks[i]))
        elif missing:
            _pool(tasks, missing, reference, workers, finish)
    except KeyboardInterrupt:
        bar.close()
        done = sum(1 for i in missing if i in outcomes)
        logger.warning("interrupted: %d new field point(s) stored in %s; %d still to compute. "
                       "Run the same command again to resume.", done, store.label,
                       len(missing) - done)
        raise
    bar.close()
    # The result is what the store holds: where another process stored a point
    # first (two runs sharing a store), its record wins over the one made here.
    final = store.get_points(t.key for t in tasks)
    for i, task in enumerate(tasks):
        row = final.get(task.key)
        if row is not None and row.ok:
            outcomes[i] = row.record(task.point)
    records = tuple(o for _, o in sorted(outcomes.items()) if isinstance(o, PointRecord))
    failures = tuple(o for _, o in sorted(outcomes.items()) if isinstance(o, PointFailure))
    return PointsOutcome(records, failures, computed + len(missing), reused, stored_failures)


def _predecessors(tasks, missing) -> dict[int, tuple[int, ...]]:
    """The points whose converged orbitals start each missing point best
    (backend_pyscf._start_orbitals): the opposite field, when it comes first in
    the plan (mirror start); else the nearest smaller pair on the same line
    through zero field (line start); else none."""
    lines: dict[tuple, dict[float, int]] = {}  # direction -> {signed position: index}
    where: dict[int, tuple[tuple, float]] = {}
    for i in missing:
        f = np.asarray(tasks[i].point.field_vector_au, dtype=float)
        if not f.any():
            continue
        length = float(np.linalg.norm(f))
        sign = 1.0 if f[np.flatnonzero(f)[0]] > 0 else -1.0
        direction = tuple(np.round(sign * f / length, 12) + 0.0)
        lines.setdefault(direction, {})[sign * length] = i
        where[i] = (direction, sign * length)
    out: dict[int, tuple[int, ...]] = {i: () for i in missing}
    for i, (direction, p) in where.items():
        on_line = lines[direction]
        partner = on_line.get(-p)
        if partner is not None and partner < i:
            out[i] = (partner,)
            continue
        inner = [q for q in on_line if q * p > 0 and abs(q) < abs(p) and -q in on_line]
        if inner:
            q = max(inner, key=abs)
            out[i] = (on_line[q], on_line[-q])
    return out


def _pool(tasks, missing, reference, workers, finish) -> None:
    """The missing points in a process pool, each committed as it completes.

    As many points run as there are workers; the next is one whose
    predecessors (_predecessors) are done, handed their converged rotations,
    or, when none is ready and a worker would idle, the first waiting one
    (it then starts from the linear response alone)."""
    before = _predecessors(tasks, missing)
    rotations: dict = {}
    finished: set[int] = set()
    waiting = list(missing)
    pending: dict = {}
    pool = ProcessPoolExecutor(max_workers=min(workers, len(missing)), initializer=_init_worker,
                               initargs=(tasks[0], reference, os.getpid()))

    def submit() -> None:
        ready = next((i for i in waiting if finished.issuperset(before[i])), waiting[0])
        waiting.remove(ready)
        hints = {k: rotations[k] for k in (field_key(tasks[j].point.field_vector_au)
                                           for j in before[ready]) if k in rotations}
        pending[pool.submit(_worker_task, tasks[ready], hints)] = ready

    try:
        while waiting and len(pending) < workers:
            submit()
        while pending:
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for future in done:
                i = pending.pop(future)
                outcome, rotation = future.result()
                finished.add(i)
                if rotation is not None:
                    rotations[field_key(tasks[i].point.field_vector_au)] = rotation
                finish(i, outcome)
            while waiting and len(pending) < workers:
                submit()
    except BaseException:
        # Interrupted (Ctrl-C, SIGTERM) or failed: drop the queued points and end
        # the running ones now rather than after their SCF. The executor has no
        # public way to end running workers before Python 3.14, hence the
        # guarded use of its process table.
        abort_pool(pool)
        raise
    pool.shutdown()


def abort_pool(pool) -> None:
    """End a ProcessPoolExecutor now: queued tasks dropped, running workers
    terminated, and its manager thread given a moment to close its pipes, so
    that the interpreter's exit hook does not write to a pipe being closed
    (a race of Python 3.11's executor that printed an ignored OSError)."""
    pool.shutdown(wait=False, cancel_futures=True)
    for process in list((getattr(pool, "_processes", None) or {}).values()):
        process.terminate()
    manager = getattr(pool, "_executor_manager_thread", None)
    if manager is not None:
        manager.join(timeout=3.0)


# ------------------------------------------------------------ tasks of many models
#
# A screening campaign sends the points of many molecules to one pool (local
# processes or Dask workers). A worker keeps the model contexts of the last
# few models it worked on, built from the reference sent with each task; the
# parent (the store's only writer) stores every outcome.

#: Model contexts a campaign worker keeps (each holds its model's integrals).
CONTEXTS_KEPT = 2
_CONTEXTS: dict = {}


def set_threads(threads: int) -> None:
    """This process's BLAS and OpenMP threads (PySCF's and NumPy's)."""
    from pyscf import lib
    from threadpoolctl import threadpool_limits

    lib.num_threads(threads)
    threadpool_limits(threads)


def init_campaign_worker(parent: int, threads: int) -> None:
    """A local campaign worker: signals as _init_worker's, ``threads`` threads."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if parent:
        _end_with_parent(parent)
    set_threads(threads)


def _context_key(model_key: str):
    """A worker's contexts per model and thread: a Dask worker may run two
    tasks of one model at once, and a context's solved points are its own."""
    import threading

    return model_key, threading.get_ident()


def _keep_context(key, context: ModelContext) -> None:
    _CONTEXTS[key] = context
    while len(_CONTEXTS) > CONTEXTS_KEPT:
        _CONTEXTS.pop(next(iter(_CONTEXTS)))


def campaign_reference(task: PointTask, threads: int = 0):
    """A molecule's zero-field point and reference, in a worker:
    (PointRecord, ZeroFieldReference), or (PointFailure, None)."""
    if threads:
        set_threads(threads)
    start = time.perf_counter()
    try:
        context = ModelContext(task.molecule, task.model, task.scf)
        record, reference = compute_reference(context, task)
    except FieldpropError as exc:
        return PointFailure(task.point, str(exc), type(exc).__name__,
                            time.perf_counter() - start), None
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        logger.debug("zero field", exc_info=True)
        text = " ".join(str(exc).split())[:300] or "no message"
        return PointFailure(task.point, f"the zero-field point failed inside the backend "
                            f"({type(exc).__name__}: {text})", BackendError.__name__,
                            time.perf_counter() - start), None
    _keep_context(_context_key(task.model_key), context)
    return record, reference


def campaign_point(task: PointTask, reference: ZeroFieldReference, solved: dict,
                   threads: int = 0):
    """One field point of any model, in a worker: (outcome, converged
    rotation or None), as _worker_task."""
    if threads:
        set_threads(threads)
    key = _context_key(task.model_key)
    context = _CONTEXTS.get(key)
    if context is None:
        start = time.perf_counter()
        try:
            context = ModelContext(task.molecule, task.model, task.scf, reference)
        except Exception as exc:  # noqa: BLE001 - named, never a traceback
            text = " ".join(str(exc).split())[:300] or "no message"
            return PointFailure(task.point, f"field point {task.point.label}: the model could "
                                f"not be set up ({type(exc).__name__}: {text})",
                                BackendError.__name__, time.perf_counter() - start), None
        _keep_context(key, context)
    # The start comes from ``solved`` alone, not from whatever else this
    # worker solved before: the same task gives the same numbers anywhere.
    context.solved.clear()
    outcome = run_task(context, task, solved)
    key = field_key(task.point.field_vector_au)
    return outcome, (context.solved.get(key) if isinstance(outcome, PointRecord) else None)


def predecessors(tasks) -> dict[int, tuple[int, ...]]:
    """For each of ``tasks`` (by position), the positions of the tasks whose
    converged orbitals start it best (see _predecessors)."""
    return _predecessors(list(tasks), list(range(len(tasks))))


def campaign_optimise(job, threads: int = 0):
    """A molecule's geometry optimisation, in a worker: (document, None) or
    (None, (reason, kind))."""
    from fieldprop.backend_pyscf import optimize_geometry
    from fieldprop.molecule import build_molecule

    if threads:
        set_threads(threads)
    start = time.perf_counter()
    try:
        document = optimize_geometry(job, build_molecule(job.molecule, job.response.origin))
    except FieldpropError as exc:
        return None, (str(exc), type(exc).__name__)
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        text = " ".join(str(exc).split())[:300] or "no message"
        return None, (f"{job.path}: [geometry] optimize failed inside the backend "
                      f"({type(exc).__name__}: {text})", BackendError.__name__)
    document["wall_time_s"] = time.perf_counter() - start
    return document, None
