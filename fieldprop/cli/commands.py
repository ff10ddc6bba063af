"""The commands: one ``cmd_<name>(args)`` per command of :mod:`.parser` (run,
check, plan, point, collect, report, screen, relax, inspect), each returning its
exit code or raising a FieldpropError, and the helpers they share: the executor and
the store their options name, the optimised and relaxed references, the default
output paths, a stdout whose reader may go away. Data go to stdout, logs and
progress to stderr."""

from __future__ import annotations

import json
import logging
import os
import sys
import time
from pathlib import Path

from fieldprop.errors import CampaignError, IncompleteError, InputError
from fieldprop.outputs.files import replacing

logger = logging.getLogger("fieldprop")


#: The first words of check's error line when references and results disagree.
CHECK_DISAGREES = "check disagrees"


def _progress(args) -> tuple[bool, float | None]:
    """(progress bar, log-line interval): a bar on a terminal, lines in a batch
    log, nothing with --quiet."""
    if args.quiet:
        return False, None
    if sys.stderr.isatty():
        return True, None
    return False, args.log_every


def _executor(args):
    """The executor of --workers/--threads/--scheduler/--scheduler-file."""
    from fieldprop.engine.stages import make_executor

    workers = args.workers or max(1, default_workers() // args.threads)
    return make_executor(workers, args.threads, args.scheduler,
                         str(args.scheduler_file) if args.scheduler_file else None)


def _open_store(args, job_path: Path, read_only: bool = False):
    """The store the options name: in memory, --store PATH, or the default file."""
    from fieldprop.points.store import PointStore, default_store_path

    if getattr(args, "no_store", False):
        return PointStore.in_memory()
    path = args.store if args.store is not None else default_store_path(job_path)
    if read_only and not path.exists():
        return None  # nothing stored yet
    return PointStore.open(path, read_only=read_only, verify=True)


def _to_stdout(write) -> None:
    """Call ``write()``; a reader of stdout that went away (``| head``) after the
    results are safe is not a failure: stdout is then discarded and the
    command goes on (plots, exit code)."""
    try:
        write()
        sys.stdout.flush()
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())


def _at_optimised_geometry(prepared, store, job_path: Path):
    """``prepared`` again at the optimised geometry, when the job asks for
    one (optimised now or found in ``store``), with it written beside the job
    as JOB.optimised.xyz; else ``prepared`` itself."""
    from fieldprop.engine.geometry import optimised
    from fieldprop.engine.prepare import prepare

    job = prepared.job
    if not job.geometry.optimize:
        return prepared
    job = optimised(job, store)
    xyz = job_path.with_name(job_path.stem + ".optimised.xyz")
    write_xyz(job, xyz)
    logger.info("optimised geometry written to %s", xyz)
    return prepare(job, facts=prepared.facts)


def _clamped_only(job, command: str) -> None:
    """Refuse a job with nuclear relaxation in a command that handles
    clamped nuclei only (one line, exit 2)."""
    if job.response.nuclear_relaxation:
        raise InputError(f"{job.path}: [response] nuclear_relaxation = true: fieldprop "
                         f"{command} works with clamped nuclei only; fieldprop run computes "
                         "the relaxed points (resumable, --workers) and fieldprop collect "
                         "reads them back; set it to false here")
    if job.response.zero_point:
        raise InputError(f"{job.path}: [response] zero_point = true: fieldprop {command} works "
                         "at one geometry only; fieldprop run computes the displaced "
                         "geometries' points (resumable, --workers) and fieldprop collect "
                         "reads them back; set it to false here")


def _at_relaxation_minimum(prepared, store):
    """``prepared`` again at the zero-field minimum the nuclear relaxation is
    held to (computed now or found in ``store``), when the job asks for it."""
    from fieldprop.engine.geometry import relaxed_reference
    from fieldprop.engine.prepare import prepare

    from fieldprop.engine.geometry import needs_frame

    if not needs_frame(prepared.job):
        return prepared
    return prepare(relaxed_reference(prepared.job, store), facts=prepared.facts)


def write_xyz(job, path: Path) -> None:
    """The job's molecule as an XYZ file (angstrom, the job's bohr; 15 decimals,
    so that read back it gives the computed nuclei to the last bits), written
    atomically."""
    bohr = job.molecule.bohr_angstrom
    doc = job.optimisation or {}
    lines = [str(len(job.molecule.atoms)),
             f"{job.path}: optimised at {doc.get('model', {}).get('method', '?')}/"
             f"{doc.get('model', {}).get('basis', '?')}, E = {doc.get('energy_au', 0.0):.10f} Eh, "
             f"{doc.get('steps', '?')} steps, {doc.get('criteria', '?')} criteria"]
    for a in job.molecule.atoms:
        x, y, z = (v * bohr for v in a.coords_bohr)
        lines.append(f"{a.symbol:<2} {x:20.15f} {y:20.15f} {z:20.15f}")
    with replacing(path) as fh:
        fh.write("\n".join(lines) + "\n")


def default_result_path(job_path: Path) -> Path:
    """JOB.result.json beside the job file (``water.toml`` -> ``water.result.json``)."""
    return job_path.with_name(job_path.stem + ".result.json")


def default_workers() -> int:
    """Every core this process may use: one worker process each, one BLAS thread
    per worker (measured on 2 cores: two threads in one process ran water
    HF/aug-cc-pVDZ 5x slower than one, and formaldehyde B3LYP no faster; two
    workers ran both 10-20 % faster than one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def _result_path(args) -> Path:
    """Where run and collect write the result JSON (--json, default beside the
    job), refused before any work when it is the job file or not writable."""
    from fieldprop.outputs.documents import check_output_path, is_stdout

    out_path = args.json if args.json is not None else default_result_path(args.job)
    if not is_stdout(out_path) and out_path.resolve() == args.job.resolve():
        raise InputError(f"--json {out_path}: is the job file itself; give another path")
    check_output_path(out_path)
    return out_path


def cmd_run(args) -> int:
    from fieldprop.engine.analyse import require_stable
    from fieldprop.engine.prepare import prepare
    from fieldprop.engine.run import run_prepared
    from fieldprop.inputs.job import load_job
    from fieldprop.outputs.documents import (is_stdout, result_document,
                                             write_json_atomic)

    started = time.monotonic()
    job = load_job(args.job)
    out_path = _result_path(args)
    if args.plot is not None and not args.plot.is_dir():
        # A folder that does not exist yet is made (with its parents) before
        # any work; one that cannot be made is refused.
        if args.plot.exists():
            raise InputError(f"--plot {args.plot}: is a file, not a folder; give a folder")
        try:
            args.plot.mkdir(parents=True)
        except OSError as exc:
            raise InputError(f"--plot {args.plot}: cannot make this folder "
                             f"({exc.strerror or exc}); give another") from None
    if args.plot is not None and not os.access(args.plot, os.W_OK | os.X_OK):
        raise InputError(f"--plot {args.plot}: folder is not writable; give another folder")
    prepared = prepare(job)
    bar, log_every = _progress(args)
    executor = _executor(args)  # a scheduler that does not answer: before any file is made
    try:
        with _open_store(args, args.job) as store:
            prepared = _at_optimised_geometry(prepared, store, args.job)
            prepared = _at_relaxation_minimum(prepared, store)
            result = run_prepared(prepared, store, progress=bar,
                                  retry_failed=args.retry_failed, log_every_s=log_every,
                                  executor=executor, started=started)
    finally:
        executor.close()
    # The file first: a closed stdout (``| head``) must not lose the result.
    if is_stdout(out_path):  # --json -: the JSON is the output, no tables
        _to_stdout(lambda: write_json_atomic(result_document(result), out_path))
    else:
        write_json_atomic(result_document(result), out_path)
        logger.info("result written to %s (%.1f s)", out_path, result.wall_time_s)
        _to_stdout(lambda: _write_result(result, args.format, args.units, out_path,
                                               args.convention, args.all_digits))
    if args.plot is not None:
        from fieldprop.outputs.plots import write_plots

        for name in write_plots(result.tensors, result.plan, args.plot):
            logger.info("plot written to %s", args.plot / name)
    require_stable(result)
    return 0


def cmd_check(args) -> int:
    from fieldprop.outputs import compare
    from fieldprop.engine.prepare import prepare
    from fieldprop.engine.run import reference_tensors, run_prepared
    from fieldprop.inputs.job import load_job
    from fieldprop.numerics.methods import METHODS
    from fieldprop.outputs.documents import (check_output_path, comparison_document,
                                             is_stdout, write_json_atomic)
    from fieldprop.outputs.tables import write_comparison

    job = load_job(args.job)
    _clamped_only(job, "check")
    rule = _agreement_rule(args)
    json_out = args.json is not None and is_stdout(args.json)
    if args.json is not None and not json_out:
        if args.json.resolve() == args.job.resolve():
            raise InputError(f"--json {args.json}: is the job file itself; give another path")
        check_output_path(args.json)
    reference_file = None
    if args.against is not None:
        reference_file = compare.load_reference_file(args.against)
    else:
        traits = METHODS[job.model.method]
        if not traits.has("alpha"):
            having = ", ".join(n for n, t in METHODS.items() if t.has("alpha"))
            raise InputError(f"{job.path}: [model] method {job.model.method!r} has no analytic "
                             f"reference in fieldprop ({having} have); give --against FILE")
        if not traits.alpha_route_for(job.model.reference, job.molecule.multiplicity):
            raise InputError(f"{job.path}: [model] reference = \"restricted\" with "
                             f"multiplicity {job.molecule.multiplicity} (restricted open shell) "
                             "has no analytic polarizability in fieldprop; set reference = "
                             "\"unrestricted\", or give --against FILE")
    progress, log_every = _progress(args)
    prepared = prepare(job)
    executor = _executor(args)  # a scheduler that does not answer: before any file is made
    with _open_store(args, args.job) as store:
        prepared = _at_optimised_geometry(prepared, store, args.job)
        job = prepared.job
        try:
            result = run_prepared(prepared, store, progress=progress,
                                  retry_failed=args.retry_failed, log_every_s=log_every,
                                  executor=executor)
            if reference_file is not None:
                m = result.molecule
                reference = compare.align_reference(str(args.against), reference_file,
                                                    m.symbols, m.coords_bohr, m.charge,
                                                    m.origin_bohr)
            else:
                reference = reference_tensors(job, result, progress=progress, store=store,
                                              retry_failed=args.retry_failed,
                                              log_every_s=log_every, executor=executor)
        finally:
            executor.close()
    comparisons = compare.compare_tensors(result.tensors, reference, rule)
    if not comparisons:
        raise InputError(f"{args.against or job.path}: no tensor in common between the job's "
                         f"properties ({', '.join(result.tensors)}) and the reference "
                         f"({', '.join(reference.value) or 'none'})")
    diagnoses = compare.diagnose(result.tensors, reference, comparisons, rule)
    outcome = compare.verdict(comparisons, rule, diagnoses)
    document = comparison_document(comparisons, reference, rule, outcome, diagnoses)
    # Diagnoses and the verdict go where the verdict goes: after the table on
    # stdout, or on stderr when stdout carries the JSON.
    lines = [f"fieldprop check: diagnosis: {d.cause} ({d.property}): {d.detail}"
             for d in diagnoses] + [f"fieldprop check: {outcome.text}"]
    if json_out:
        _to_stdout(lambda: write_json_atomic(document, args.json))
        print("\n".join(lines), file=sys.stderr)
    else:
        _to_stdout(lambda: write_comparison(comparisons, reference, rule, sys.stdout))
        _to_stdout(lambda: print("\n".join(lines)))
        if args.json is not None:
            write_json_atomic(document, args.json)
    if not outcome.agree:
        print(f"fieldprop: error: {CHECK_DISAGREES}: {outcome.text}", file=sys.stderr)
        return 1
    return 0


def _agreement_rule(args):
    """check's rule from its options; --strict refuses the floors' options."""
    from fieldprop.outputs import compare

    if args.strict:
        given = [o for o, v in (("--rel-floor", args.rel_floor),
                                ("--abs-floor-au", args.abs_floor_au)) if v is not None]
        if given:
            raise InputError(f"fieldprop check: --strict uses no floor; drop {' and '.join(given)}")
    given = args.abs_floor_au
    if given is not None and len(given) not in (1, 4):
        raise InputError(f"fieldprop check: --abs-floor-au takes one number (every order) or "
                         f"four (mu, alpha, beta, gamma), got {len(given)}")
    floors = (dict(compare.DEFAULT_ABS_FLOOR_AU) if given is None
              else {n: given[0 if len(given) == 1 else n - 1] for n in range(1, 5)})
    return compare.AgreementRule(
        sigmas=compare.DEFAULT_SIGMAS if args.sigmas is None else args.sigmas,
        rel_floor=compare.DEFAULT_REL_FLOOR if args.rel_floor is None else args.rel_floor,
        abs_floor_au=floors, strict=args.strict)


def _write_result(result, fmt: str, units: str, label, convention: str = "taylor",
                  all_digits: bool = False) -> None:
    """A result on stdout: the tables, the result JSON (in au and the Taylor
    convention, whatever ``units`` and ``convention``), or a CSV of components."""
    from fieldprop.outputs.documents import result_document
    from fieldprop.outputs.tables import write_tables

    if fmt == "table":
        write_tables(result, sys.stdout, units, convention, all_digits)
    elif fmt == "json":
        json.dump(result_document(result), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    else:
        from fieldprop.outputs import summary

        summary.write([(str(label), result_document(result))], sys.stdout, units, convention,
                      "csv", components=True)


def _read_point_lines(paths: list[Path] | None):
    """[(lines, label), ...] of the --points arguments, or None: a file, a
    directory (its ``*.jsonl`` files, sorted), or - (standard input)."""
    if not paths:
        return None
    out = []
    for path in paths:
        if str(path) == "-":
            out.append((sys.stdin.read().splitlines(), "stdin"))
            continue
        if path.is_dir():
            files = sorted(path.glob("*.jsonl"))
            if not files:  # a job array's folder before its first element: zero points
                logger.info("--points %s: no *.jsonl files yet (zero points)", path)
            out += [([], str(path))] if not files else []
        else:
            files = [path]
        for file in files:
            try:
                out.append((file.read_text(encoding="utf-8").splitlines(), str(file)))
            except FileNotFoundError:
                raise InputError(f"--points {file}: no such file") from None
            except (OSError, UnicodeDecodeError) as exc:
                raise InputError(f"--points {file}: cannot be read "
                                 f"({getattr(exc, 'strerror', None) or exc})") from None
    return out


def cmd_plan(args) -> int:
    from fieldprop.engine.prepare import make_plan, to_compute, todo_list_key
    from fieldprop.engine.run import gather
    from fieldprop.inputs.job import load_job
    from fieldprop.outputs.listings import write_plan
    from fieldprop.engine.stages import JobWork
    from fieldprop.points.store import PointStore, default_store_path

    job = load_job(args.job)
    if job.response.zero_point and args.count:
        return _zero_point_todo(args, job)
    if job.response.zero_point:
        job = _zero_point_count(job)
    _clamped_only(job, "plan")
    lines = _read_point_lines(args.points)
    path = args.store if args.store is not None else default_store_path(args.job)
    if args.count:
        if not path.exists():  # bad input must not leave a new store behind
            from fieldprop.engine.prepare import prepare

            prepare(job)
        store = PointStore.open(path)  # fixes the to-do list: written
    else:
        store = PointStore.open(path, read_only=True) if path.exists() else None
    try:
        # The model is checked with the backend unless the store knows it (a
        # basis it lacks is bad input here, not in every point that follows).
        prepared, rows = gather(job, store, lines)
        todo = JobWork.at_hand(prepared, rows, args.retry_failed).todo()
        if args.count:
            when = store.put_todo(todo_list_key(prepared), [t.key for t in todo])
            logger.info("%d of the %s still missing; the list for point --index fixed in "
                        "%s at %s", len(todo), to_compute(prepared), store.label, when)
            _to_stdout(lambda: print(len(todo)))
            return 0
        fmt = "ids" if args.ids else "jsonl" if args.json_lines else args.format
        only = {t.key for t in todo} if args.missing else None
        full = (len(make_plan(job, prepared.plan.route).points)
                if prepared.symmetry is not None else None)
        stage = used = None
        if prepared.adaptive:
            used = set(prepared.used)
            stage = (f"adaptive window: {len(used)} of the ladder's {len(prepared.tasks)} "
                     "points in use, " + ("settled: no further stage" if prepared.settled else
                                          "this stage listed; once its points are computed, "
                                          "plan again for the next one (if any)"))
        _to_stdout(lambda: write_plan(prepared.plan, prepared.stage_tasks(), rows, sys.stdout,
                                      fmt, store.label if store is not None else None, only,
                                      prepared.images, prepared.symmetry, full, stage, used,
                                      prepared.near_symmetry))
    finally:
        if store is not None:
            store.close()
    return 0


def _zero_point_count(job):
    """Log what a zero-point average adds to a job's plan, and return the
    job without it (plan lists the minimum's points: the displaced
    geometries follow from its Hessian, which fieldprop run computes)."""
    import dataclasses

    import numpy as np

    from fieldprop.engine.prepare import make_plan
    from fieldprop.inputs.atomic_weights import ATOMIC_WEIGHTS
    from fieldprop.numerics import zero_point as zp
    from fieldprop.numerics.relaxation import eckart_basis

    # The vibrations as the frame counts them (3N - 6, 3N - 5 linear); the
    # masses do not change their number.
    modes = eckart_basis(np.array([a.coords_bohr for a in job.molecule.atoms]),
                         np.array([ATOMIC_WEIGHTS[a.charge] for a in job.molecule.atoms])
                         ).shape[1]
    geometries = modes * 2 * len(zp.STEPS)
    ladder = len(make_plan(job, None, None).points)
    logger.info("%s: [response] zero_point: %d mode%s, so %d displaced geometries, each a job "
                "of the same model on a ladder of up to %d field points (its own symmetry and "
                "the adaptive window use fewer), and %d zero-field gradients; fieldprop run "
                "computes them after the minimum's points listed here", job.path, modes,
                "" if modes == 1 else "s", geometries, ladder, geometries + 1)
    return dataclasses.replace(job, response=dataclasses.replace(job.response,
                                                                 zero_point=False))


def _zero_point_parts(job, store, retry_failed: bool):
    """A zero-point job's parts as the stage engine sees them: the JobWork of
    the minimum, then those of the displaced geometries, from ``store``
    (which must hold the minimum's frame: point --zero-field computes it)."""
    from fieldprop.engine.run import gather
    from fieldprop.engine.stages import JobWork
    from fieldprop.engine.zero_point import displaced_works

    prepared, rows = gather(job, store)
    zpw = displaced_works(prepared, store, retry_failed)
    return [JobWork.at_hand(prepared, rows, retry_failed)] + zpw.works


def _zero_point_todo_key(works) -> str:
    from fieldprop.engine.prepare import todo_list_key
    from fieldprop.points.keys import digest

    return digest({"kind": "fieldprop-zero-point-todo",
                   "parts": [todo_list_key(w.prepared) for w in works]})


def _zero_point_todo(args, job) -> int:
    """``plan --count`` of a zero-point job: one to-do list of the minimum's
    points and every displaced geometry's (their current stages)."""
    from fieldprop.points.store import PointStore, default_store_path

    if args.points:
        raise InputError(f"{job.path}: [response] zero_point = true: plan --count reads the "
                         "store only; give the points to it (fieldprop point without --stdout)")
    path = args.store if args.store is not None else default_store_path(args.job)
    if not path.exists():
        raise IncompleteError(f"{job.path}: [response] zero_point: no store at {path}; "
                              "fieldprop point --zero-field computes the minimum's frame and "
                              "gradients first")
    with PointStore.open(path) as store:
        works = _zero_point_parts(job, store, args.retry_failed)
        keys = [t.key for w in works for t in w.todo()]
        when = store.put_todo(_zero_point_todo_key(works), keys)
        logger.info("%d field points still missing at the minimum and %d displaced geometries "
                    "(their current stages); the list for point --index fixed in %s at %s",
                    len(keys), len(works) - 1, store.label, when)
    _to_stdout(lambda: print(len(keys)))
    return 0


def _zero_point_point(args, job) -> int:
    """``point`` of a zero-point job: --zero-field computes the optimised
    geometry, the minimum's frame, every geometry's zero-field gradient and
    the minimum's zero-field point; --index and --id any point of the
    minimum or of a displaced geometry (the to-do list of plan --count)."""
    from threadpoolctl import threadpool_limits

    from fieldprop.backend.tasks import set_threads
    from fieldprop.engine.geometry import optimised, relaxed_reference
    from fieldprop.engine.prepare import prepare
    from fieldprop.engine.stages import compute_jobs
    from fieldprop.engine.zero_point import displaced_works, gradients
    from fieldprop.points.executors import InProcess
    from fieldprop.points.keys import short_id
    from fieldprop.points.store import PointStore, default_store_path

    if args.stdout:
        raise InputError(f"{job.path}: [response] zero_point = true: point --stdout is not "
                         "available (the displaced geometries follow from the store's frame); "
                         "compute into the store")
    threads = args.threads or _env_threads()
    set_threads(threads)
    path = args.store if args.store is not None else default_store_path(args.job)
    with PointStore.open(path) as store, threadpool_limits(threads):
        if args.zero_field:
            minimum = relaxed_reference(optimised(job, store), store)
            prepared = prepare(minimum)
            gradients(prepared, displaced_works(prepared, store), store, InProcess())
            works = _zero_point_parts(job, store, args.retry_failed)
            works[0].only = (works[0].prepared.tasks[0],)
            compute_jobs([works[0]], store, InProcess())
            if works[0].failure is not None:
                raise works[0].failure
            return 0
        works = _zero_point_parts(job, store, args.retry_failed)
        if args.index is not None:
            todo = store.get_todo(_zero_point_todo_key(works))
            if todo is None:
                raise InputError(f"{job.path}: --index {args.index}: no to-do list of this "
                                 f"job in {store.label}; run fieldprop plan {job.path} --count "
                                 "first (it fixes the list --index counts in)")
            keys, when = todo
            if args.index >= len(keys):
                raise InputError(f"{job.path}: --index {args.index}: the to-do list fixed at "
                                 f"{when} has {len(keys)} point(s)")
            wanted = [keys[args.index]]
        else:
            wanted = _requested_ids(args)
        for ident in wanted:
            text = ident.strip().lower()
            found = [(w, t) for w in works for t in w.prepared.all_tasks()
                     if text and t.key.startswith(text)]
            if len(found) != 1:
                raise InputError(f"{job.path}: --id {ident}: " + (
                    "matches several points; give more digits" if found else
                    "is not a point of this job's minimum or displaced geometries"))
            work, task = found[0]
            if not work.wanted(task):
                logger.info("point %s (%s) is stored already: not computed again",
                            short_id(task.key), task.point.label)
                continue
            work.only = (task,)
            compute_jobs([work], store, InProcess())
            if work.failure is not None:
                raise work.failure
            if task.key not in work.found:
                from fieldprop.engine.analyse import failed_points_error

                raise failed_points_error(work.prepared, [work.failed[task.key]],
                                          args.retry_failed)
            logger.info("point %s (%s%s) computed", short_id(task.key), task.point.label,
                        f", {work.label}" if work.label else "")
    return 0


def _requested_ids(args) -> list[str]:
    """The ids of --id, with - read from standard input (ids, or plan's JSON lines)."""
    out = []
    for given in args.ids:
        if given != "-":
            out.append(given)
            continue
        for number, text in enumerate(sys.stdin.read().splitlines(), start=1):
            text = text.strip()
            if text.startswith("{"):
                try:
                    out.append(str(json.loads(text)["id"]))
                except (ValueError, KeyError, TypeError):
                    raise InputError(f"--id -: stdin line {number} is neither an id nor a "
                                     "JSON line of fieldprop plan") from None
            else:
                out.extend(text.split())
    if not out:
        raise InputError("--id: no point id given (stdin was empty)")
    return out


def _targets(args, prepared, store) -> list:
    """The planned tasks a ``point`` command is asked for, in order, once each."""
    from fieldprop.engine.prepare import todo_list_key
    from fieldprop.points.keys import short_id

    tasks = prepared.all_tasks()  # a later stage may ask for tightened points
    if args.zero_field:
        return [tasks[0]]
    by_key = {t.key: t for t in tasks}
    if args.index is not None:
        todo = store.get_todo(todo_list_key(prepared)) if store is not None else None
        if todo is None:
            raise InputError(f"{prepared.job.path}: --index {args.index}: no to-do list of this "
                             f"plan in {store.label if store is not None else 'any store'}; "
                             f"run fieldprop plan {prepared.job.path} --count first (it fixes "
                             "the list --index counts in)")
        keys, when = todo
        if args.index >= len(keys):
            raise InputError(f"{prepared.job.path}: --index {args.index}: the to-do list fixed "
                             f"at {when} has {len(keys)} point(s), indices 0.."
                             f"{len(keys) - 1}" if keys else
                             f"{prepared.job.path}: --index {args.index}: the to-do list "
                             f"fixed at {when} is empty: nothing to compute")
        return [by_key[keys[args.index]]]
    out, seen = [], set()
    for ident in _requested_ids(args):
        text = ident.strip().lower()
        found = [t for t in tasks if text and t.key.startswith(text)]
        if len(found) == 1 and prepared.images and \
                prepared.images[found[0].point.index][1] is not None:
            rep = prepared.tasks[prepared.images[found[0].point.index][0]]
            raise InputError(f"{prepared.job.path}: --id {ident}: is the image of point "
                             f"{short_id(rep.key)} under a symmetry operation of the "
                             "molecule, never computed itself; compute that point")
        if len(found) != 1:
            why = ("matches several points; give more digits" if found else
                   "is not in this job's plan (fieldprop plan lists the ids)")
            raise InputError(f"{prepared.job.path}: --id {ident}: {why}")
        if found[0].key in seen:
            logger.info("point %s given more than once: computed once", short_id(found[0].key))
            continue
        seen.add(found[0].key)
        out.append(found[0])
    return out


def cmd_point(args) -> int:
    from threadpoolctl import threadpool_limits

    from fieldprop.engine.prepare import prepare
    from fieldprop.points.executors import InProcess
    from fieldprop.inputs.job import load_job
    from fieldprop.points.keys import short_id
    from fieldprop.points.pointlines import line_document, write_line
    from fieldprop.engine.stages import JobWork, compute_jobs
    from fieldprop.points.store import PointStore, default_store_path

    job = load_job(args.job)
    if job.response.zero_point:
        return _zero_point_point(args, job)
    _clamped_only(job, "point")
    prepared = prepare(job)
    path = args.store if args.store is not None else default_store_path(args.job)
    if args.stdout:
        real = PointStore.open(path, read_only=True) if path.exists() else None
    else:
        real = PointStore.open(path)
    try:
        if job.geometry.optimize:
            from fieldprop.engine.geometry import optimised

            job = optimised(job, real, compute=True)
            prepared = prepare(job, facts=prepared.facts)
        targets = _targets(args, prepared, real)
        # The zero field too: every point starts from it (stored as failed, it
        # is not computed again unasked).
        rows = (real.get_points([prepared.tasks[0].key, *(t.key for t in targets)])
                if real is not None else {})
        # The stage engine's policy: a stored point is not computed again, a
        # stored failure only with --retry-failed.
        work = JobWork.at_hand(prepared, rows, args.retry_failed, only=tuple(targets))
        for t in targets:
            if not work.wanted(t):
                logger.info("point %s (%s) is stored already as %s: not computed again%s",
                            short_id(t.key), t.point.label,
                            "computed" if t.key in work.found else "failed",
                            "" if t.key in work.found else " (--retry-failed computes it)")
        store = real
        if args.stdout:  # the store is only read: the points go to a store in memory
            store = PointStore.in_memory("memory (point --stdout)")
            found = real.get_model(prepared.model_key) if real is not None else None
            if found is not None:  # the stored reference: zero field is not recomputed
                zero = prepared.tasks[0]
                zero_row = real.get_points([zero.key]).get(zero.key)
                store.put_model(prepared.model_key, prepared.description(), found[1], found[0],
                                (zero, zero_row.record(zero.point)) if zero_row is not None
                                and zero_row.ok else None)
        todo = work.todo()
        if todo:
            threads = args.threads or _env_threads()
            from fieldprop.backend.tasks import set_threads

            set_threads(threads)
            with threadpool_limits(threads):
                compute_jobs([work], store, InProcess())
        if work.failure is not None:  # the zero-field point failed: nothing could start
            raise work.failure
        failed = []
        for t in targets:
            if t in todo:
                if t.key in work.found:
                    record = work.found[t.key]
                    logger.info("point %s (%s): %d SCF cycles, %.1f s", short_id(t.key),
                                t.point.label, record.scf_cycles, record.wall_time_s)
                else:
                    logger.error("point %s (%s) failed: %s", short_id(t.key), t.point.label,
                                 work.failed[t.key].reason)
            if t.key not in work.found:
                failed.append(work.failed[t.key])
            if args.stdout:
                row = store.get_points([t.key]).get(t.key) or rows.get(t.key)
                doc = line_document(row, t.point.field_vector_au, t.molecule.origin_bohr,
                                    t.quantities.canonical(), prepared.facts,
                                    prepared.description(), t.tolerances)
                _to_stdout(lambda: write_line(doc, sys.stdout))
        if store is not real:
            store.close()
    finally:
        if real is not None:
            real.close()
    if work.failure is not None:
        raise work.failure
    if failed:
        from fieldprop.engine.analyse import failed_points_error

        raise failed_points_error(prepared, failed, args.retry_failed)
    return 0


def _env_threads() -> int:
    try:
        return max(1, int(os.environ.get("OMP_NUM_THREADS") or 1))
    except ValueError:
        return 1


def cmd_collect(args) -> int:
    from fieldprop.engine.analyse import require_stable
    from fieldprop.engine.run import collect
    from fieldprop.inputs.job import load_job
    from fieldprop.outputs.documents import (is_stdout, result_document,
                                             write_json_atomic)
    from fieldprop.points.store import PointStore, default_store_path

    job = load_job(args.job)
    out_path = _result_path(args)
    lines = _read_point_lines(args.points)
    path = args.store if args.store is not None else default_store_path(args.job)
    if not path.exists() and lines is None:
        raise IncompleteError(f"{job.path}: no point store at {path}: nothing computed yet; "
                              "compute the points with fieldprop run or point (or give "
                              "--store PATH, or --points)")
    store = PointStore.open(path, read_only=True, verify=True) if path.exists() else None
    try:
        result = collect(job, store, lines=lines, allow_partial=args.allow_partial)
    finally:
        if store is not None:
            store.close()
    if is_stdout(out_path):
        _to_stdout(lambda: write_json_atomic(result_document(result), out_path))
    else:
        write_json_atomic(result_document(result), out_path)
        logger.info("result written to %s (from %d points)", out_path,
                    len(result.computed_records))
        _to_stdout(lambda: _write_result(result, args.format, args.units, out_path,
                                               args.convention, args.all_digits))
    if result.missing:
        raise IncompleteError(f"{job.path}: {len(result.missing)} point(s) to compute missing "
                              f"({' '.join(i for _, i in result.missing[:8])}"
                              f"{' ...' if len(result.missing) > 8 else ''}); "
                              f"{len(result.missing_components)} component(s) reported as "
                              "missing; compute the points and collect again")
    require_stable(result)
    return 0


def cmd_screen(args) -> int:
    from fieldprop.outputs import ranking
    from fieldprop.inputs.campaign import load_set
    from fieldprop.outputs.documents import (check_output_path, is_stdout, result_document,
                                             write_json_atomic)
    from fieldprop.engine.screening import run_campaign

    campaign = load_set(args.set)
    stem = args.set.with_suffix("")
    results = args.results or stem.with_name(stem.name + ".results")
    png = args.png or stem.with_name(stem.name + ".summary.png")
    if results.exists() and not results.is_dir():
        raise InputError(f"--results {results}: exists and is not a folder")
    check_output_path(png, "--png", "summary.png")
    if args.csv is not None and not is_stdout(args.csv):
        check_output_path(args.csv, "--csv", "ranked.csv")
    props = campaign.candidates[0].job.response.properties
    key = args.rank_by or next(k for p, k in (("beta", "beta_hrs"), ("gamma", "gamma_parallel"),
                                              ("alpha", "alpha_iso"), ("dipole", "dipole_norm"))
                               if p in props)
    needed = ranking.property_of(ranking.resolve_key(key))
    if needed not in props:
        raise InputError(f"--rank-by {key}: needs {needed}, which the set's [response] "
                         f"properties ({', '.join(props)}) do not compute")
    estimate = ranking.estimate_parts(key)
    if estimate is not None and campaign.conformers is not None:
        raise InputError(f"--rank-by {key}: a set with [conformers] ranks by the ensemble's "
                         "static invariants; the optical estimates stay in each conformer's "
                         "result: rank by an invariant")
    wavelengths = campaign.candidates[0].job.response.optical_wavelengths_nm
    if estimate is not None and estimate[2] not in wavelengths:
        raise InputError(f"--rank-by {key}: {estimate[2]:g} nm is not among the set's [response] "
                         "optical_wavelengths_nm ("
                         + (", ".join(f"{w:g}" for w in wavelengths) or "none") + ")")
    pool = _executor(args)
    logger.info("%s: %d molecules, %s/%s; %s", campaign.path, len(campaign.candidates),
                campaign.candidates[0].job.model.method, campaign.candidates[0].job.model.basis,
                pool.label)
    bar, log_every = _progress(args)

    def keep(outcome) -> None:
        path = results / f"{outcome.candidate.name}.result.json"
        if outcome.result is not None:
            write_json_atomic(result_document(outcome.result), path)
            if outcome.result.job.optimisation is not None:
                write_xyz(outcome.result.job,
                          results / f"{outcome.candidate.name}.optimised.xyz")
        elif path.exists():  # an earlier campaign's result must not pass for this one's
            path.unlink()
            logger.info("%s: removed (from an earlier campaign; this one failed)", path)

    with _open_store(args, args.set) as store:
        results.mkdir(parents=True, exist_ok=True)
        outcomes, counts = run_campaign(campaign, store, pool, progress=bar,
                                        log_every_s=log_every, on_result=keep,
                                        retry_failed=args.retry_failed)
    entries = []
    groups: dict[str, list] = {}
    for o in outcomes:
        if o.candidate.group is not None:
            groups.setdefault(o.candidate.group, []).append(o)
        elif o.result is not None:
            entries.append(ranking.entry_from(o.candidate.name, result_document(o.result)))
        else:
            entries.append(ranking.entry_from(o.candidate.name, None, o.failure,
                                              _formula_text(o.candidate.job),
                                              _model_text(o.candidate.job)))
    for name, members in groups.items():
        entries.append(_ensemble_entry(name, members, campaign.conformers, results, key))
    rows = ranking.rank(entries, key)
    if args.csv is not None and not is_stdout(args.csv):
        ranking.write_csv_file(rows, args.units, args.csv, args.convention, key)
        logger.info("ranked table written to %s", args.csv)
    if any(r.rank is not None for r in rows):
        ranking.write_png(rows, key, args.units, png, args.convention)
        logger.info("summary picture written to %s", png)
    elif png.exists():
        png.unlink()  # an earlier campaign's picture: nothing is ranked now
    what = (f"{counts.molecules} structures ({len(entries)} molecules, their conformers)"
            if groups else f"{counts.molecules} molecules")
    logger.info("%s: %d done, %d failed; %d field points computed, %d reused; "
                "%d SCF cycles; %.1f s; results in %s", what,
                counts.molecules - counts.failed, counts.failed, counts.computed, counts.reused,
                counts.scf_cycles, counts.wall_time_s, results)
    if args.csv is not None and is_stdout(args.csv):
        _to_stdout(lambda: ranking.write_csv(rows, args.units, sys.stdout, args.convention,
                                             key))
    else:
        _to_stdout(lambda: ranking.write_table(rows, args.units, key, sys.stdout,
                                               args.convention))
    bad = [r for r in rows if r.status not in ("ok", "resonant")]  # resonant: no estimate, by rule
    if bad:
        raise CampaignError(f"{campaign.path}: {len(bad)} of {len(rows)} molecules without "
                            f"every number: " + "; ".join(f"{r.entry.name} ({r.status})"
                                                          for r in bad[:5])
                            + (" ..." if len(bad) > 5 else ""))
    return 0


def _ensemble_entry(name: str, members, options, results: Path, key: str):
    """A SMILES molecule's conformers as one ranked entry: its ensemble
    document (written as <name>.ensemble.json) or, where a conformer failed,
    the failure."""
    from fieldprop.outputs import ranking
    from fieldprop.outputs.documents import result_document, write_json_atomic
    from fieldprop.outputs.ensembles import ensemble_document

    path = results / f"{name}.ensemble.json"
    failed = [o for o in members if o.result is None]
    if failed:
        if path.exists():
            path.unlink()
        o = failed[0]
        return ranking.entry_from(name, None, f"conformer {o.candidate.conformer}: {o.failure}",
                                  _formula_text(o.candidate.job), _model_text(o.candidate.job))
    from fieldprop.inputs.structures import symmetric_rmsd

    smiles, bohr = members[0].candidate.smiles, members[0].candidate.job.molecule.bohr_angstrom
    document = ensemble_document(
        name, [(o.candidate.conformer, o.candidate.force_field_kcal_mol,
                f"{o.candidate.name}.result.json", result_document(o.result)) for o in members],
        options.temperature_k, lambda a, b: symmetric_rmsd(smiles, a, b, bohr))
    write_json_atomic(document, path)
    kept = [c for c in document["conformers"] if c["same_minimum_as"] is None]
    value = document["invariants"].get(ranking.estimate_parts(key)[0]
                                       if ranking.estimate_parts(key) else key) or {}
    note = (f"{len(kept)} of {len(members)} at {options.temperature_k:g} K: weights "
            + "/".join(f"{c['weight']:.2f}" for c in kept))
    logger.info("%s: ensemble of %s%s; written to %s", name, note,
                f"; {key} from {value['min']:.6g} to {value['max']:.6g} across them"
                if value.get("min") is not None else "", path)
    return ranking.entry_from(name, document, note=note)


def _formula_text(job) -> str:
    from fieldprop.inputs.molecule import build_molecule

    try:
        return build_molecule(job.molecule, job.response.origin).formula
    except Exception:  # noqa: BLE001 - a label only
        return ""


def _model_text(job) -> str:
    from fieldprop.inputs.job import model_name

    return model_name(job.model, job.molecule.multiplicity)


#: The largest field ``relax`` takes (au): beyond it the structure leaves the
#: perturbative regime (the job parser's limit for field_au, 2.6e10 V/m).
RELAX_MAX_FIELD_AU = 0.05


def cmd_relax(args) -> int:
    import dataclasses

    import numpy as np

    from fieldprop.engine.geometry import relax_at_field
    from fieldprop.engine.prepare import prepare
    from fieldprop.inputs.job import load_job
    from fieldprop.numerics.methods import METHODS
    from fieldprop.outputs.documents import (check_output_path, is_stdout, write_json_atomic,
                                             write_relaxed_structure)
    from fieldprop.outputs.tables import write_relaxation_table

    job = load_job(args.job)
    field = np.array(args.field, dtype=float)
    if not np.all(np.isfinite(field)) or np.linalg.norm(field) > RELAX_MAX_FIELD_AU:
        raise InputError(f"--field {' '.join(f'{v:g}' for v in args.field)}: must be finite "
                         f"and at most {RELAX_MAX_FIELD_AU:g} au long (beyond it the structure "
                         "leaves the perturbative regime)")
    if not METHODS[job.model.method].nuclear_gradient:
        with_gradient = ", ".join(m for m, t in METHODS.items() if t.nuclear_gradient)
        raise InputError(f"{job.path}: [model] method = \"{job.model.method}\": relax needs "
                         f"nuclear gradients, which fieldprop has for {with_gradient}")
    xyz = args.xyz if args.xyz is not None else args.job.with_name(args.job.stem
                                                                     + ".relaxed.xyz")
    check_output_path(xyz, "--xyz", "relaxed.xyz")
    if args.json is not None and not is_stdout(args.json):
        check_output_path(args.json)
    job = dataclasses.replace(job, response=dataclasses.replace(job.response,
                                                                nuclear_relaxation=True))
    prepared = prepare(job)
    with _open_store(args, args.job) as store:
        prepared = _at_optimised_geometry(prepared, store, args.job)
        prepared = _at_relaxation_minimum(prepared, store)
    document = relax_at_field(prepared, field)
    write_relaxed_structure(document, xyz, str(job.path), job.molecule.bohr_angstrom)
    logger.info("relaxed structure written to %s", xyz)
    if args.json is not None:
        write_json_atomic(document, args.json)
        if is_stdout(args.json):
            return 0
    _to_stdout(lambda: write_relaxation_table(document, sys.stdout,
                                              job.molecule.bohr_angstrom))
    return 0


def cmd_report(args) -> int:
    from fieldprop.outputs import summary

    docs = [(str(path), summary.load_result(path)) for path in args.results]
    if args.format == "job":
        if len(docs) != 1:
            raise InputError(f"fieldprop report --format job: one result file, got {len(docs)}")
        _to_stdout(lambda: sys.stdout.write(summary.job_file_text(*docs[0])))
        return 0
    if args.frame != "input" and not args.components:
        raise InputError("fieldprop report: --frame applies to --components (the invariants "
                         "are the same in every frame)")
    _to_stdout(lambda: summary.write(docs, sys.stdout, args.units, args.convention,
                                     args.format, args.components, args.all_digits,
                                     args.frame))
    return 0


def cmd_inspect(args) -> int:
    from fieldprop.outputs.listings import write_store_lines, write_store_summary
    from fieldprop.points.store import PointStore

    with PointStore.open(args.store, read_only=True, verify=True) as store:
        if args.json_lines:
            write_store_lines(store, sys.stdout)
        else:
            write_store_summary(store, args.store, sys.stdout)
    return 0
