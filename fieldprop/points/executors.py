"""Executors: where tasks run, behind one interface.

Three executors run the same picklable tasks: :class:`InProcess` (this
process, one point at a time: ``point``, ``--workers 1``), :class:`LocalPool`
(local worker processes) and :class:`DaskPool` (the workers of an existing
Dask cluster). Each has ``submit(fn, *args)`` returning a future,
``first_done(futures)``, ``share(value)`` (a value sent to many tasks: a Dask
cluster holds it once), ``close(abort, pending)``, and ``slots`` (how many
tasks run at once) and ``threads`` (BLAS threads per task).

The tasks are the module's worker functions: :func:`reference_task` (a
model's zero-field point and reference), :func:`point_task` (one field point,
clamped or with relaxed nuclei) and :func:`optimise_task` (a geometry). A
worker keeps the model contexts (integrals, grid, zero-field response) of the
last few models it worked on, per thread, and a point starts from the
converged orbitals of the points handed to it alone, never from whatever its
worker solved before: the same task gives the same numbers on any executor.
What is computed when, and what is stored, is decided by
:mod:`fieldprop.engine.stages`; the parent process is the store's only writer.
"""

from __future__ import annotations

import logging
import os
import signal
import sys
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool

import numpy as np

from fieldprop.errors import InputError
from fieldprop.points.records import MAX_LINE_POINTS, line_preference

logger = logging.getLogger(__name__)


# ------------------------------------------------------------------ executors

class InProcess:
    """This process, one task at a time: ``submit`` runs the task at once and
    returns its finished future (BLAS threads as the process has them)."""

    slots = 1
    threads = 0
    label = "this process"

    def submit(self, fn, *args) -> Future:
        future: Future = Future()
        future.set_result(fn(*args))
        return future

    def share(self, value):
        return value

    def first_done(self, futures) -> set:
        return {f for f in futures if f.done()}

    def close(self, abort: bool = False, pending=()) -> None:
        pass


class LocalPool:
    """``workers`` local processes with ``threads`` BLAS threads each.

    A worker that dies (the out-of-memory killer, a signal) breaks a
    ProcessPoolExecutor for every task in it: the pool is then built anew and
    :meth:`lost` tells the caller which tasks to send again."""

    #: Idle workers may build a model's integrals ahead (stages._references).
    warms = True

    def __init__(self, workers: int, threads: int = 1, initializer=None):
        self.slots, self.threads = workers, threads
        #: Run in each new worker process with (parent pid, threads): the
        #: backend's (signals, BLAS threads; backend.tasks.init_worker).
        self.initializer = initializer
        self.label = f"{workers} local worker process{'es' if workers != 1 else ''} x " \
                     f"{threads} thread{'s' if threads != 1 else ''}"
        self._pool = self._new()

    def _new(self) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(max_workers=self.slots, initializer=self.initializer,
                                   initargs=(os.getpid(), self.threads)
                                   if self.initializer is not None else ())

    def submit(self, fn, *args):
        try:
            return self._pool.submit(fn, *args)
        except BrokenProcessPool:
            abort_pool(self._pool)
            self._pool = self._new()
            return self._pool.submit(fn, *args)

    def share(self, value):
        return value

    def first_done(self, futures) -> set:
        return wait(futures, return_when=FIRST_COMPLETED).done

    def close(self, abort: bool = False, pending=()) -> None:
        if abort:
            abort_pool(self._pool)
        else:
            self._pool.shutdown()


class DaskPool:
    """The workers of an existing Dask cluster (``address`` of its scheduler,
    or its ``scheduler_file``); ``threads`` BLAS threads per task. The cluster
    is the user's: closing cancels only this process's tasks."""

    def __init__(self, address: str | None = None, scheduler_file: str | None = None,
                 threads: int = 1, client=None):
        from distributed import Client

        if scheduler_file and client is None and not os.path.isfile(scheduler_file):
            # Dask waits for a scheduler file to appear, for ever: a typo would
            # spend a batch job's whole wall time.
            raise InputError(f"--scheduler-file {scheduler_file}: no such file (the file a "
                             "Dask scheduler writes when started with --scheduler-file)")
        try:
            self.client = client or (Client(scheduler_file=scheduler_file, timeout="20s")
                                     if scheduler_file else Client(address, timeout="20s"))
        except (OSError, TimeoutError, ValueError, KeyError, TypeError,
                AssertionError) as exc:  # a scheduler file of other content: Dask asserts
            where = scheduler_file or address
            option = "--scheduler-file" if scheduler_file else "--scheduler"
            raise InputError(f"{option} {where}: no Dask scheduler answered "
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
        from distributed import wait as dask_wait

        return dask_wait(list(futures), return_when="FIRST_COMPLETED").done

    def close(self, abort: bool = False, pending=()) -> None:
        if abort and pending:  # the cluster is not ours: stop only our tasks
            self.client.cancel(list(pending))
        if self._own:
            self.client.close()


def worker_lost(exc: BaseException) -> bool:
    """True when a task's exception says its worker died (the task itself may
    be sound: it is sent once more)."""
    if isinstance(exc, BrokenProcessPool):
        return True
    return type(exc).__name__ == "KilledWorker"  # distributed's, after its own retries


def abort_pool(pool) -> None:
    """End a ProcessPoolExecutor now: queued tasks dropped, running workers
    terminated (a point of a large molecule is not waited for), and its
    manager thread given a moment to close its pipes, so
    that the interpreter's exit hook does not write to a pipe being closed
    (a race of Python 3.11's executor that printed an ignored OSError)."""
    # shutdown() forgets the processes and the manager thread: take them first.
    processes = list((getattr(pool, "_processes", None) or {}).values())
    manager = getattr(pool, "_executor_manager_thread", None)
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        process.terminate()
    for process in processes:
        process.join(timeout=3.0)
    if manager is not None:
        manager.join(timeout=3.0)


def end_with_parent(parent: int) -> None:
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



# ------------------------------------------------------------- predecessors

def predecessors(tasks) -> dict[int, tuple[int, ...]]:
    """For each of ``tasks`` (by position), the positions of the tasks whose
    converged orbitals start it best (backend.solver._start_orbitals): those
    on the same line through zero field that come before it in the plan, the
    opposite field and, of the others (either side, nearer zero field or
    farther out), MAX_LINE_POINTS in the order of records.line_preference;
    none for a point that starts from the zero-field orbitals turned by their
    linear response. A point's predecessors precede it in the plan, so the
    order is acyclic."""
    tasks = list(tasks)
    lines: dict[tuple, dict[float, int]] = {}  # direction -> {signed position: index}
    where: dict[int, tuple[tuple, float]] = {}
    for i, task in enumerate(tasks):
        f = np.asarray(task.point.field_vector_au, dtype=float)
        if not f.any():
            continue
        length = float(np.linalg.norm(f))
        sign = 1.0 if f[np.flatnonzero(f)[0]] > 0 else -1.0
        direction = tuple(np.round(sign * f / length, 12) + 0.0)
        lines.setdefault(direction, {})[sign * length] = i
        where[i] = (direction, sign * length)
    out: dict[int, tuple[int, ...]] = {i: () for i in range(len(tasks))}
    for i, (direction, p) in where.items():
        on_line = lines[direction]
        partner = on_line.get(-p)
        others = sorted((q for q in on_line if abs(q) != abs(p) and on_line[q] < i),
                        key=lambda q: line_preference(q / p))[:MAX_LINE_POINTS]
        mirror = (partner,) if partner is not None and partner < i else ()
        out[i] = mirror + tuple(on_line[q] for q in others)
    return out
