"""Executors: compute the planned field points, zero field first.

The zero-field point is computed first, in this process: it is the warm start
(its density) and the state reference (its occupied orbitals and <S^2>) of every
other point. The others are independent :class:`~fieldprop.records.PointTask`
units, computed in order here or in a process pool; a worker rebuilds the PySCF
objects from the task's plain data.
"""

from __future__ import annotations

import dataclasses
import logging
import os
from concurrent.futures import ProcessPoolExecutor

from tqdm import tqdm

from fieldprop.backend_pyscf import evaluate_point
from fieldprop.errors import FieldpropError
from fieldprop.records import PointRecord, PointTask

logger = logging.getLogger(__name__)


def _init_worker() -> None:
    # One BLAS/OpenMP thread per worker process: N workers share N cores.
    os.environ["OMP_NUM_THREADS"] = "1"
    from pyscf import lib

    lib.num_threads(1)


def compute_points(tasks: list[PointTask], workers: int = 1,
                   progress: bool = True) -> list[PointRecord]:
    """Compute every task; ``tasks[0]`` must be the zero-field point.

    Returns records in the order of ``tasks``. A failing point (no convergence,
    state switch) raises after the points in flight have finished; nothing is
    formed from a failed point. With ``workers > 1`` the points after the first
    run in a process pool of that size.
    """
    if not tasks or tasks[0].point.offsets != (0, 0, 0):
        raise ValueError("the first task must be the zero-field point")
    bar = tqdm(total=len(tasks), desc="field points", unit="pt", disable=not progress,
               leave=False)
    first = evaluate_point(tasks[0])
    bar.update()
    reference = first.reference
    rest = [dataclasses.replace(t, reference=reference) for t in tasks[1:]]
    records: list[PointRecord] = [first]
    failures: list[FieldpropError] = []
    if workers <= 1:
        for task in rest:
            try:
                records.append(evaluate_point(task))
            except FieldpropError as exc:
                failures.append(exc)
            bar.update()
    else:
        with ProcessPoolExecutor(max_workers=workers, initializer=_init_worker) as pool:
            futures = [pool.submit(evaluate_point, task) for task in rest]
            for future in futures:
                try:
                    records.append(future.result())
                except FieldpropError as exc:
                    failures.append(exc)
                bar.update()
    bar.close()
    if failures:
        for exc in failures[1:]:
            logger.error("%s", exc)
        more = f" (and {len(failures) - 1} more points, listed above)" if len(failures) > 1 else ""
        raise type(failures[0])(f"{failures[0]}{more}")
    return records
