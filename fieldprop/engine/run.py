"""The entrances' engine: from a validated job to its result.

:func:`compute` and :func:`run_prepared` prepare a job
(:mod:`fieldprop.engine.prepare`), send the points the store does not hold
through the stage engine (:mod:`fieldprop.engine.stages`) on an executor and
analyse the records (:mod:`fieldprop.engine.analyse`); :func:`gather` and
:func:`collect` find a job's points in a store and in point lines and analyse
them with no PySCF work; :func:`reference_tensors` is ``fieldprop check``'s
analytic route. It may import every other engine module but
:mod:`fieldprop.engine.screening` (which imports it), the points room, and
the outputs' reference type lazily.
"""

from __future__ import annotations

import logging
import sys
import time

from fieldprop.engine.analyse import (RunResult, analyse, failed_points_error, point_counts,
                                      with_relaxation)
from fieldprop.engine.geometry import optimised, relaxed_reference, relaxed_tasks
from fieldprop.engine.prepare import (Prepared, make_plan, make_tasks, prepare,
                                      symmetric_molecule, tightened_task, to_compute)
from fieldprop.engine.stages import JobWork, settle
from fieldprop.errors import IncompleteError, InputError, UnstableResultError
from fieldprop.inputs.job import MAX_TIGHTENING, Job, model_name
from fieldprop.numerics.methods import Route
from fieldprop.points.keys import backend_version_conflict, model_key, short_id

logger = logging.getLogger(__name__)


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
                 log_every_s: float | None = None, executor=None,
                 started: float | None = None) -> RunResult:
    """:func:`compute` for a job already prepared (the CLI opens its store only
    once the job has passed every check): the points through the stage engine
    (:func:`fieldprop.engine.stages.run_job`) on ``executor`` (default: ``workers``
    local processes, or this process for one), then the analysis.
    ``progress``: a bar; ``log_every_s``: progress log lines at most that
    often instead (batch logs), their elapsed time counted from ``started``
    (time.monotonic() at the command's start: a geometry optimisation before
    the points included; default now)."""
    from fieldprop.engine.stages import make_executor
    from fieldprop.points.progress import Progress
    from fieldprop.engine.stages import JobWork, run_job
    from fieldprop.points.store import PointStore

    job, plan = prepared.job, prepared.plan
    own_store, own_executor = store is None, executor is None
    store = PointStore.in_memory() if own_store else store
    executor = make_executor(workers) if own_executor else executor
    ladder = ("1 point, zero field only (no derivative)" if len(plan.points) == 1 else
              f"{'a ladder of ' if prepared.adaptive else ''}{len(plan.points)} field points "
              f"on {plan.levels} levels (h0 = {plan.field_au:g} au, ratio {plan.ratio:g}"
              + ("; the adaptive window computes those its components need, stage by stage"
                 if prepared.adaptive else "") + "), differentiating "
              f"{'E(F)' if plan.route == 'energy' else 'the SCF dipole'}")
    logger.info("%s: %s, %s, SCF energy tolerance %g Eh, orbital "
                "gradient %g (accepted up to %g), solver %s; store %s; %s", job.path,
                model_name(job.model, job.molecule.multiplicity), ladder,
                job.scf.energy_conv_tol_au, job.scf.gradient_target,
                job.scf.gradient_accepted, job.scf.solver, store.label, executor.label)
    if progress is None:
        progress = sys.stderr.isatty()
    rows = store.get_points(t.key for t in prepared.all_tasks())
    work = JobWork.at_hand(prepared, rows, retry_failed)
    if rows:
        logger.info("%d of the job's field points found in %s", len(work.found), store.label)
    try:
        since = 0.0 if started is None else time.monotonic() - started
        bar = Progress(progress, log_every_s, since_s=since)
        if job.response.zero_point:
            from fieldprop.engine.zero_point import run_zero_point

            result = run_zero_point(work, store, executor, bar)
        else:
            result = run_job(work, store, executor, bar)
        if job.response.optical_wavelengths_nm:
            from fieldprop.engine.optical import with_optical

            result = with_optical(result, prepared, store, executor)
        return result
    finally:
        if own_executor:
            executor.close()
        if own_store:
            store.close()


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
            allow_partial: bool = False, check_geometry: bool = True) -> RunResult:
    """The result of ``job`` from the points ``store`` holds and point ``lines``
    give (see :func:`gather`), with no PySCF work.

    Raises IncompleteError (exit 3) naming the missing points' ids when any
    planned point is not found, and the points' own error when a stored point
    failed: never an extrapolation from a partial set. With ``allow_partial``,
    missing and failed points (not zero field) are left out instead: the
    components that need them are MISSING, the others are reported.
    ``check_geometry=False``: no warning for a geometry that is not a minimum
    (the zero-point average's displaced geometries are not, on purpose).
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
    # What is missing and what failed, as the stage engine sees them (no retry:
    # collect computes nothing).
    work = JobWork.at_hand(prepared, rows)
    if zero.key in work.failed and zero.key not in work.found:
        raise failed_points_error(prepared, [work.failed[zero.key]])
    missing = [t for t in prepared.computed_tasks if work.wanted(t)]
    if missing and not allow_partial:
        ids = " ".join(short_id(t.key) for t in missing[:8])
        raise IncompleteError(f"{job.path}: {len(missing)} of the {to_compute(prepared)} are "
                              f"not in {where}: {ids}{' ...' if len(missing) > 8 else ''}")
    failures = [work.failed[t.key] for t in prepared.computed_tasks
                if t.key in work.failed and t.key not in work.found]
    if failures and (not allow_partial or not rows[zero.key].ok):
        raise failed_points_error(prepared, failures)
    found = {t.point.index: rows[t.key].record(t.point) for t in prepared.computed_tasks
             if t.key in rows and rows[t.key].ok}
    counts = point_counts(prepared, 0, len(found))
    model = store.get_model(zero.model_key) if store is not None else None
    result = analyse(prepared, prepared.expand(found), counts, where,
                     time.perf_counter() - start,
                     reference=None if model is None or not check_geometry else model[0])
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
    if job.response.zero_point:
        from fieldprop.engine.zero_point import collect_zero_point

        result = collect_zero_point(result, prepared, store, lines)
    if job.response.optical_wavelengths_nm:
        from fieldprop.engine.optical import with_optical

        result = with_optical(result, prepared, store)
    return result


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
