"""Screening campaigns: many molecules, one model, one pool.

Each molecule's geometry optimisation ([geometry] optimise) runs first, in
the pool; then every molecule is prepared (:func:`fieldprop.engine.run.gather`:
its plan and the points the store holds, as a stage-engine
:class:`~fieldprop.engine.stages.JobWork`) and all of them go to the one stage
engine at once (:func:`fieldprop.engine.stages.compute_jobs`), on the executor the
command chose (local processes or an existing Dask cluster): every
molecule's zero field first, then the field points, a molecule's before the
next one's while any molecule's points fill a worker that would otherwise
wait; each molecule's adaptive window moves on as its stage ends, and each
molecule is analysed as it finishes.

This process alone writes the store: every outcome is committed as it
arrives, so a killed campaign resumes where it stopped. A molecule that fails
(a model PySCF refuses for it, an SCF that does not converge) is reported with
its reason, and the others go on.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass

from fieldprop import errors
from fieldprop.inputs.campaign import Campaign, Candidate
from fieldprop.engine.analyse import RunResult
from fieldprop.engine.run import gather
from fieldprop.backend.tasks import optimise_task
from fieldprop.points.progress import Progress
from fieldprop.engine.stages import JobWork, compute_jobs

logger = logging.getLogger(__name__)


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
    text) on ``pool`` (an executor of fieldprop.points.executors);
    ``on_result(outcome)`` is called as each molecule finishes."""
    start = time.perf_counter()
    outcomes = [MoleculeOutcome(c) for c in campaign.candidates]
    jobs = _optimise(campaign.candidates, outcomes, store, pool, progress)
    works, owner = [], {}
    for candidate, outcome, job in zip(campaign.candidates, outcomes, jobs):
        if outcome.failure:
            if on_result is not None:
                on_result(outcome)
            continue
        work = _prepare(candidate, outcome, job, store, retry_failed)
        if work is None:
            if on_result is not None:
                on_result(outcome)
            continue
        works.append(work)
        owner[id(work)] = outcome

    def finished(work: JobWork) -> None:
        out = owner[id(work)]
        counts = work.counts()
        out.computed = len(work.computed_now)
        out.reused = counts.reused
        out.scf_cycles = work.scf_cycles
        if work.failure is not None:
            out.failure, out.kind = str(work.failure), type(work.failure).__name__
            logger.error("%s: failed: %s", out.candidate.name, out.failure)
        else:
            out.result = work.result(store.label, time.perf_counter() - start)
            if work.prepared.job.response.optical_wavelengths_nm:
                out.result = _with_estimates(out, work, store, pool)
        if on_result is not None:
            on_result(out)

    bar = Progress(progress, log_every_s, since_s=time.perf_counter() - start)
    try:
        compute_jobs(works, store, pool, bar, finished)
    finally:
        bar.close()
    pool.close()
    counts = CampaignCounts(len(outcomes), sum(1 for o in outcomes if o.result is None),
                            sum(o.computed for o in outcomes), sum(o.reused for o in outcomes),
                            sum(o.scf_cycles for o in outcomes), time.perf_counter() - start)
    return outcomes, counts


def _with_estimates(out: MoleculeOutcome, work: JobWork, store, pool):
    """A molecule's result with its optical-frequency estimates (the excited
    states computed on the pool and stored); None, the molecule failed, when
    they cannot be formed."""
    from fieldprop.engine.optical import with_optical

    try:
        return with_optical(out.result, work.prepared, store, pool)
    except errors.FieldpropError as exc:
        out.failure, out.kind = str(exc), type(exc).__name__
        logger.error("%s: failed: %s", out.candidate.name, exc)
        return None


def _optimise(candidates, outcomes, store, pool, progress: bool) -> list:
    """Geometry optimisations first ([geometry] optimise), in the pool, one
    task per molecule whose optimised geometry is not stored; each result is
    stored at once and logged. A failed optimisation fails its molecule.
    Returns each molecule's job (at its optimised geometry where optimised)."""
    from fieldprop.engine.geometry import geometry_key, with_geometry

    jobs = [c.job for c in candidates]
    pending = {}
    for n, candidate in enumerate(candidates):
        job = candidate.job
        if not job.geometry.optimize:
            continue
        key = geometry_key(job)
        document = store.get_geometry(key)
        if document is not None:
            jobs[n] = with_geometry(job, document)
        else:
            pending[pool.submit(optimise_task, job, pool.threads)] = (n, key)
    if not pending:
        return jobs
    total = len(pending)
    logger.info("optimising %d geometr%s on %s", total, "y" if total == 1 else "ies",
                pool.label)
    bar = Progress(progress, 0.0, label="geometries")
    bar.grow(total)
    try:
        while pending:
            for future in pool.first_done(pending):
                n, key = pending.pop(future)
                name = candidates[n].name
                try:
                    document, failure = future.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails one molecule
                    document, failure = None, (f"{candidates[n].job.path}: [geometry] "
                                               f"optimize: its worker failed ({type(exc).__name__}"
                                               f": {' '.join(str(exc).split())[:200]})",
                                               errors.BackendError.__name__)
                bar.update(None)
                if failure is not None:
                    outcomes[n].failure, outcomes[n].kind = failure
                    logger.error("%s: geometry optimisation failed", name)
                    continue
                store.put_geometry(key, document)
                jobs[n] = with_geometry(candidates[n].job, document)
                logger.info("%s: geometry optimised in %d steps, %.1f s", name,
                            document["steps"], document.get("wall_time_s", 0.0))
    except BaseException:
        bar.close()
        pool.close(abort=True, pending=list(pending))
        raise
    bar.close()
    return jobs


def _prepare(candidate: Candidate, out: MoleculeOutcome, job, store,
             retry_failed: bool) -> JobWork | None:
    """The molecule's work: its plan and the points the store holds (the stage
    engine's JobWork); None, with ``out`` failed, for a model PySCF refuses
    for it or a model stored by another backend version (that molecule
    fails, not the set)."""
    from fieldprop.backend.tasks import refuse_another_backend

    try:
        prepared, rows = gather(job, store)
        work = JobWork.at_hand(prepared, rows, retry_failed, label=candidate.name)
        model = store.get_model(prepared.model_key)
        if model is not None and work.todo():
            refuse_another_backend(store, prepared.tasks[0], model[1])
    except errors.FieldpropError as exc:
        out.failure, out.kind = str(exc), type(exc).__name__
        logger.error("%s: failed: %s", candidate.name, out.failure)
        return None
    return work
