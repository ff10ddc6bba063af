"""The backend's tasks as an executor runs them: plain functions of picklable
arguments, each turning any exception into a named failure (never a
traceback), so that one point's failure ends no run.

A worker keeps the model contexts (integrals, grid, zero-field response) of
the last few models it worked on, per thread, and a point starts from the
converged orbitals of the points handed to it alone, never from whatever its
worker solved before: the same task gives the same numbers on any executor
(:mod:`fieldprop.points.executors`).
"""

from __future__ import annotations

import logging
import signal
import threading
import time

from fieldprop.errors import BackendError, FieldpropError, InputError
from fieldprop.points.executors import end_with_parent
from fieldprop.points.records import PointFailure, PointRecord, PointTask, ZeroFieldReference

logger = logging.getLogger(__name__)


def set_threads(threads: int) -> None:
    """This process's BLAS and OpenMP threads (PySCF's and NumPy's)."""
    from pyscf import lib
    from threadpoolctl import threadpool_limits

    lib.num_threads(threads)
    threadpool_limits(threads)


def init_worker(parent: int, threads: int) -> None:
    """A local worker process: Ctrl-C reaches the whole process group, and only
    the parent acts on it (it stops the workers); SIGTERM from the parent ends
    a worker at once; ``threads`` BLAS threads (N workers share N cores)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if parent:
        end_with_parent(parent)
    set_threads(threads)


#: Model contexts a worker keeps (each holds its model's integrals).
CONTEXTS_KEPT = 2
#: The process's model contexts, {(model key, thread id): ModelContext}: a Dask
#: worker runs tasks in several threads, and a context's solved points are its
#: own. The lock guards the dictionary, not the contexts (one thread each).
_CONTEXTS: dict = {}
_CONTEXTS_LOCK = threading.Lock()


def _context_key(model_key: str):
    return model_key, threading.get_ident()


def _keep_context(key, context) -> None:
    with _CONTEXTS_LOCK:
        _CONTEXTS[key] = context
        while len(_CONTEXTS) > CONTEXTS_KEPT:
            _CONTEXTS.pop(next(iter(_CONTEXTS)))


def _cached_context(key):
    with _CONTEXTS_LOCK:
        return _CONTEXTS.get(key)


def _named_failure(task: PointTask, what: str, exc: Exception, start: float) -> PointFailure:
    """An exception inside the backend as a named failure (never a traceback)."""
    logger.debug("%s", what, exc_info=True)
    text = " ".join(str(exc).split())[:300] or "no message"
    return PointFailure(task.point, f"{what} failed inside the backend ({type(exc).__name__}: "
                        f"{text}); no number is formed from it", BackendError.__name__,
                        time.perf_counter() - start)


def reference_task(task: PointTask, threads: int = 0, check_geometry: bool = True,
                   guess=None):
    """A model's zero-field point and its reference: (PointRecord,
    ZeroFieldReference), or (PointFailure, None); with its geometry check
    unless another worker does it (``check_geometry`` False: warm_task).
    ``guess``: an AO density to start the SCF from (a nearby geometry's: the
    zero-point average's displaced geometries start from the minimum's)."""
    from fieldprop.backend.context import ModelContext
    from fieldprop.backend.points import compute_reference

    if threads:
        set_threads(threads)
    start = time.perf_counter()
    try:
        context = ModelContext(task.molecule, task.model, task.scf)
        context.guess = guess
        record, reference = compute_reference(context, task, check_geometry)
    except FieldpropError as exc:
        return PointFailure(task.point, str(exc), type(exc).__name__,
                            time.perf_counter() - start), None
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        return _named_failure(task, "the zero-field point", exc, start), None
    _keep_context(_context_key(task.model_key), context)
    return record, reference


def warm_task(task: PointTask, threads: int = 0, check: bool = False):
    """Build and keep a model's context (integrals, DFT grid) in a worker that
    would otherwise wait while another computes the model's zero-field
    reference: its first field point then only attaches the reference. With
    ``check`` (a model above points.GEOMETRY_CHECK_FIT_ABOVE basis functions,
    where the check costs more than this worker's own SCF), also the model's
    geometry check there (an SCF of its own at
    zero field and its nuclear gradient: backend.points.geometry_check),
    returned; None where there is none. Only saves time: whatever goes wrong
    is left to the points (and the check is then not done)."""
    from fieldprop.backend.context import ModelContext
    from fieldprop.backend.points import geometry_check

    if threads:
        set_threads(threads)
    key = _context_key(task.model_key)
    context = _cached_context(key)
    try:
        if context is None:
            context = ModelContext(task.molecule, task.model, task.scf)
            _keep_context(key, context)
        return geometry_check(context) if check else None
    except Exception:  # noqa: BLE001 - the point that needs it builds it again, and says why
        logger.debug("building the context of model %s ahead failed", task.model_key[:12],
                     exc_info=True)
        return None


def point_task(task: PointTask, reference: ZeroFieldReference, solved: dict,
               threads: int = 0):
    """One field point of any model, clamped or with relaxed nuclei:
    (PointRecord or PointFailure, its converged rotation or None). ``solved``:
    the converged rotations of the points it starts from (and nothing else:
    its numbers do not depend on where it runs)."""
    from fieldprop.backend.context import ModelContext
    from fieldprop.backend.gradients import compute_relaxed_point
    from fieldprop.backend.points import compute_point
    from fieldprop.backend.solver import field_key

    if threads:
        set_threads(threads)
    start = time.perf_counter()
    key = _context_key(task.model_key)
    context = _cached_context(key)
    if context is None:
        try:
            context = ModelContext(task.molecule, task.model, task.scf, reference)
        except Exception as exc:  # noqa: BLE001 - named, never a traceback
            return _named_failure(task, f"field point {task.point.label}: the model's set-up",
                                  exc, start), None
        _keep_context(key, context)
    elif context.reference is None:  # built ahead (warm_task)
        context.attach(reference)
    context.solved.clear()
    try:
        if task.relax is not None:
            outcome = compute_relaxed_point(context, task)
        else:
            outcome = compute_point(context, task, solved)
    except FieldpropError as exc:
        return PointFailure(task.point, str(exc), type(exc).__name__,
                            time.perf_counter() - start), None
    except Exception as exc:  # noqa: BLE001 - one point's failure must not end the run
        return _named_failure(task, f"field point {task.point.label}", exc, start), None
    rotation = context.solved.get(field_key(task.point.field_vector_au)) \
        if isinstance(outcome, PointRecord) else None
    return outcome, rotation


def optimise_task(job, threads: int = 0):
    """A molecule's geometry optimisation: (document, None) or (None,
    (reason, kind))."""
    from fieldprop.backend.geometry import optimize_geometry
    from fieldprop.inputs.molecule import build_molecule

    if threads:
        set_threads(threads)
    start = time.perf_counter()
    try:
        document = optimize_geometry(job, build_molecule(job.molecule, job.response.origin))
    except FieldpropError as exc:
        return None, (str(exc), type(exc).__name__)
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        text = " ".join(str(exc).split())[:300] or "no message"
        return None, (f"{job.path}: [geometry] optimise failed inside the backend "
                      f"({type(exc).__name__}: {text})", BackendError.__name__)
    document["wall_time_s"] = time.perf_counter() - start
    return document, None




def _task_failure(label: str, what: str, exc: Exception) -> tuple[str, str]:
    """(reason, kind) of a plain task's exception: a FieldpropError as it
    says, anything else named as a failure inside the backend."""
    if isinstance(exc, FieldpropError):
        return f"{label}: {exc}", type(exc).__name__
    logger.debug("%s: %s", label, what, exc_info=True)
    text = " ".join(str(exc).split())[:300] or "no message"
    return (f"{label}: {what} failed inside the backend ({type(exc).__name__}: {text})",
            BackendError.__name__)


def gradient_task(molecule, model, scf, label: str, threads: int = 0):
    """Energy and nuclear gradient at zero field of ``molecule`` as it stands
    (a geometry of the zero-point average): ({"energy_au", "gradient_au",
    "scf_cycles", "wall_time_s"}, None), or (None, (reason, kind))."""
    import numpy as np

    from fieldprop.backend.gradients import StructureEvaluator

    if threads:
        set_threads(threads)
    start = time.perf_counter()
    try:
        evaluate = StructureEvaluator(molecule, model, scf, (0.0, 0.0, 0.0), label=label)
        evaluation = evaluate(np.asarray(molecule.coords_bohr, dtype=float))
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        return None, _task_failure(label, "the nuclear gradient", exc)
    return {"energy_au": float(evaluation.energy_au),
            "gradient_au": [[float(v) for v in row] for row in evaluation.gradient],
            "scf_cycles": evaluate.cycles,
            "wall_time_s": time.perf_counter() - start}, None


def excitation_task(molecule, model, scf, states: int, label: str, threads: int = 0):
    """The lowest ``states`` excited states of the model at zero field: TDHF
    for hf, TDDFT for dft (both the full linear response, not the
    Tamm-Dancoff approximation; singlets of a closed shell). ({"method",
    "states": [{"energy_au", "oscillator_strength", "transition_dipole_au"}]},
    None), or (None, (reason, kind))."""
    import numpy as np

    from fieldprop.backend.gradients import field_mean_field

    if threads:
        set_threads(threads)
    start = time.perf_counter()
    try:
        mf, _ = field_mean_field(molecule, model, scf, (0.0, 0.0, 0.0))
        mf.conv_tol, mf.conv_tol_grad = 1e-11, 1e-7
        mf.kernel()
        if not mf.converged:
            mf = mf.newton()
            mf.kernel(mf.make_rdm1())
        if not mf.converged:
            return None, (f"{label}: the zero-field SCF of the excited states did not "
                          "converge; no estimate is formed", "ScfNotConvergedError")
        # A solvated model's own TD (PySCF's): vertical, non-equilibrium: the
        # ground state's reaction field, no continuum response to the transition.
        td = mf.TDHF() if model.method == "hf" else mf.TDDFT()
        td.nstates, td.verbose = states, 0
        td.kernel()
        converged = np.atleast_1d(td.converged)
        if not converged.all():
            return None, (f"{label}: the excited-state solver did not converge for state(s) "
                          f"{', '.join(str(i + 1) for i in np.flatnonzero(~converged))}; no "
                          "estimate is formed", "ScfNotConvergedError")
        strengths = td.oscillator_strength(gauge="length")
        dipoles = td.transition_dipole()
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        return None, _task_failure(label, "the excited states", exc)
    method = "TDHF" if model.method == "hf" else f"TDDFT ({model.functional})"
    return {"method": f"{method}, full linear response (not Tamm-Dancoff), zero field",
            "states": [{"energy_au": float(e), "oscillator_strength": float(f),
                        "transition_dipole_au": [float(v) for v in d]}
                       for e, f, d in zip(td.e, strengths, dipoles)],
            "wall_time_s": time.perf_counter() - start}, None


def refuse_another_backend(store, zero: PointTask, stored_facts: dict) -> None:
    """InputError (one line, both versions) when the stored model was computed
    with another backend version than this process has: its new points would
    join the stored ones in one Richardson table (keys.backend_version_conflict)."""
    from fieldprop.backend.molecule import backend_versions
    from fieldprop.points.keys import backend_version_conflict

    conflict = backend_version_conflict(stored_facts, backend_versions(zero.model.method))
    if conflict is not None:
        raise InputError(
            f"store {store.label}: model {zero.model_key[:12]} was computed with "
            f"{conflict[0]}, this process has {conflict[1]}: its new points would join the "
            "stored ones in one Richardson table; give --store another path (the model is "
            f"then computed anew), or compute with {conflict[0]}")
