"""Command line: argv, environment, logging, exit codes.

Exit codes (contract): 0 success; 1 a calculation failed or results are
unstable; 2 bad input (one line on stderr, nothing written); 3 incomplete.
Data go to stdout, logs and progress to stderr.
"""

from __future__ import annotations

import os

# Small molecules run fastest with one BLAS/OpenMP thread per process (threads
# fight over tiny matrices); parallelism comes from worker processes (--workers,
# by default one per core). Set before NumPy
# loads; a user's own setting wins.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import logging  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Sequence  # noqa: E402

from fieldprop import __version__  # noqa: E402
from fieldprop.outputs.files import replacing  # noqa: E402
from fieldprop.errors import CampaignError, FieldpropError, IncompleteError, InputError  # noqa: E402,E501

logger = logging.getLogger("fieldprop")

#: The first words of check's error line when references and results disagree.
CHECK_DISAGREES = "check disagrees"


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as one line and exit code 2."""

    def error(self, message: str):  # noqa: D401
        raise InputError(f"{self.prog}: {message} (see {self.prog} --help)")


def _whole_number(text: str, minimum: int = 1) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None
    if value < minimum:
        raise argparse.ArgumentTypeError(f"must be >= {minimum}, got {value}")
    return value


def _positive_int(text: str) -> int:
    return _whole_number(text, 1)


def _non_negative_int(text: str) -> int:
    return _whole_number(text, 0)


#: How to read a component row (also in the README, "Reading the tables").
READING_THE_TABLES = """\
reading the tables:
  status        ok                  trust it; the error bar is the Richardson table's
                                    spread (the truncation error, resolved)
                ok-at-noise-floor   trust it; the error bar is the SCF noise carried
                                    through the stencil (a tighter SCF or a larger field
                                    would shrink it)
                ok-zero-field       trust it; a value at zero field, no derivative:
                                    the error bar is its noise
                zero-by-symmetry    exactly 0: the molecule's point group forbids it
                unstable            no number: the table did not settle (exit code 1)
                missing             no number: the points it needs are not computed
                                    (collect --allow-partial; exit code 3)
  Richardson    h<k>, <m> steps     the extrapolated entry that starts at the k-th field
  entry                             strength h_k = h0 ratio^k and took m steps (it uses
                                    h_k .. h_k+m); F = 0: no derivative taken
"""

EXIT_CODES = """\
exit codes (every command):
  0    success
  1    a calculation failed, a component is unstable, or check disagrees (stderr says
       what and why: fieldprop: error: <what>: <message>)
  2    bad input: one line naming the file and key; nothing written
  3    incomplete: points missing (collect names their ids)
  130  interrupted (Ctrl-C); 143 terminated (SIGTERM): finished points stay stored
data go to stdout; logs and progress to stderr. Each command's --help has examples.
"""

RUN_EXAMPLES = """
examples:
  fieldprop run water.toml                        tables; water.result.json beside the job
  fieldprop run water.toml --json - | jq '.invariants.alpha_iso'
  fieldprop run water.toml --workers 2 --units esu --plot plots/
"""

CHECK_EXAMPLES = """
examples:
  fieldprop check water.toml                      against PySCF's analytic tensors
  fieldprop check water.toml --against mycode.json --sigmas 3 || echo "disagrees"
  fieldprop check water.toml --against mycode.json --strict --json - | jq .agree
without --strict an entry may agree by a floor (1e-5 au for alpha) far above its
error bars: the table marks it "ok by floor" and the verdict counts such entries.
"""

RELAX_EXAMPLES = """\
examples:
  fieldprop relax water.toml --field 0 0 0.01     forces, relaxed structure, water.relaxed.xyz
  fieldprop relax water.toml --field 0 0.005 0 --json - | jq '.relaxation_energy_au'
the nuclei are relaxed under the Eckart conditions of the zero-field minimum (no overall
translation or rotation); the job's geometry must be that minimum ([geometry] optimize).
"""

INSPECT_EXAMPLES = """\
examples:
  fieldprop inspect fieldprop-points.sqlite
  fieldprop inspect fieldprop-points.sqlite --json-lines > points.jsonl   (collect --points reads it)
"""

PLAN_EXAMPLES = """\
examples:
  fieldprop plan water.toml                      the points, and which are stored
  fieldprop plan water.toml --format json        one JSON object per point
  fieldprop plan water.toml --missing --ids      ids of the points still to compute
  n=$(fieldprop plan water.toml --count)         size of a job array (0..n-1) for
                                                 fieldprop point water.toml --index I
"""

POINT_EXAMPLES = """\
examples:
  fieldprop point water.toml --zero-field                compute zero field first, once
  fieldprop point water.toml --id 3f2a9c01b7de           one point into the store
  fieldprop point water.toml --index "$ARRAY_INDEX"      a job-array element (after
                                                         fieldprop plan water.toml --count)
  fieldprop plan water.toml --missing --ids | xargs -n 4 -P 2 fieldprop point water.toml --id
  fieldprop point water.toml --id 3f2a9c01b7de --stdout >> points.jsonl
                                                         a point line; the store only read
exit codes: 0 every point computed or stored already; 1 a point failed (its reason on
stderr; stored as failed); 2 bad input (an id not in the plan, no to-do list); 130/143
interrupted.
"""

COLLECT_EXAMPLES = """\
examples:
  fieldprop collect water.toml                        tables; water.result.json beside it
  fieldprop collect water.toml --points points/ --json -    lines of point --stdout files
  ... | fieldprop collect water.toml --points -       point lines from a pipe
  fieldprop collect water.toml --allow-partial        what the stored points determine
exit codes: 0 complete and stable; 1 a stored point failed, or a component is unstable;
2 bad input (a corrupt, foreign or out-of-plan point line); 3 points missing (their ids
on stderr; with --allow-partial the result is written all the same).
"""

REPORT_EXAMPLES = """\
examples:
  fieldprop report water.result.json urea.result.json --units esu
  fieldprop report results/*.json --format csv > table.csv
  fieldprop report water.result.json --components --convention perturbation
"""

SCREEN_EXAMPLES = """\
examples:
  fieldprop screen candidates.toml --csv ranked.csv --units esu
  fieldprop screen candidates.toml --rank-by beta_parallel --csv - | sort -t, -k1n
  fieldprop screen candidates.toml --scheduler tcp://head-node:8786   a Dask cluster
exit codes: 0 every molecule has every number; 1 some molecule failed or lacks a number
(the others' results are written, the failed ones named with their reason); 2 bad input
(one line naming the set file, the molecule and the key; nothing computed); 130/143
interrupted (finished points stay stored: the same command resumes).
"""

#: Seconds between progress lines in a batch log (stderr not a terminal).
DEFAULT_LOG_EVERY_S = 60.0


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number >= 0, got {text}")
    return value


def _progress(args) -> tuple[bool, float | None]:
    """(progress bar, log-line interval): a bar on a terminal, lines in a batch
    log, nothing with --quiet."""
    if args.quiet:
        return False, None
    if sys.stderr.isatty():
        return True, None
    return False, args.log_every


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not value > 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0, got {text}")
    return value


def build_parser() -> argparse.ArgumentParser:
    from fieldprop.points.store import DEFAULT_NAME as DEFAULT_STORE_NAME

    parser = _Parser(prog="fieldprop", epilog=EXIT_CODES,
                     formatter_class=argparse.RawDescriptionHelpFormatter,
                     description="Static dipole moment, polarizability and "
                     "hyperpolarizabilities by finite fields with Richardson extrapolation.")
    parser.add_argument("--version", action="version", version=f"fieldprop {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    run = sub.add_parser("run", help="compute a job: tables on stdout, result JSON to a file",
                         epilog=READING_THE_TABLES + RUN_EXAMPLES,
                         formatter_class=argparse.RawDescriptionHelpFormatter)
    run.add_argument("job", type=Path, help="job file (TOML)")
    run.add_argument("--json", type=Path, help="result JSON path (default JOB.result.json "
                     "beside the job file; - writes it to stdout instead of the tables)")
    _executor_options(run)
    run.add_argument("--quiet", action="store_true", help="no progress or log lines on stderr")
    run.add_argument("--log-every", type=_non_negative_float, default=DEFAULT_LOG_EVERY_S,
                     metavar="SECONDS", help="when stderr is not a terminal (a batch log), "
                     "a progress line at most this often: points done, SCF cycles, elapsed "
                     f"and remaining time (default {DEFAULT_LOG_EVERY_S:g}); a terminal gets "
                     "a progress bar")
    run.add_argument("--units", choices=("au", "esu", "si"), default="au",
                     help="units of the tables' tensor components (au; esu: dipole in "
                     "debye, alpha in angstrom^3, beta and gamma in esu; si); the JSON "
                     "stays in au")
    run.add_argument("--plot", type=Path, metavar="DIR", help="write a PNG per property into "
                     "DIR: each component's Richardson table against field strength")
    run.add_argument("--format", choices=("table", "json", "csv"), default="table",
                     help="what goes to stdout: the tables (default), the result JSON, or a "
                     "CSV of the tensor components; the result file is written all the same")
    _store_options(run)
    run.set_defaults(handler=cmd_run)

    check = sub.add_parser("check", help="finite-field tensors versus analytic ones (PySCF's, "
                           "or a tensor file of another code); exit 0 agree, 1 disagree",
                           epilog=READING_THE_TABLES + CHECK_EXAMPLES,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    check.add_argument("job", type=Path, help="job file (TOML)")
    check.add_argument("--against", type=Path, help="reference tensors: result-style JSON, "
                       ".npy or .npz (default: fieldprop's analytic SCF references)")
    check.add_argument("--json", type=Path, help="write the comparison as JSON to this path "
                       "(- writes it to stdout instead of the table)")
    check.add_argument("--sigmas", type=_positive_float, default=None,
                       help="agreement within this many error bars (default 3)")
    check.add_argument("--strict", action="store_true",
                       help="error bars only (the finite-field one plus the reference's own, "
                       "when it has one), no relative or absolute floor")
    check.add_argument("--rel-floor", type=_positive_float, default=None,
                       help="relative floor of the allowed difference (default 1e-6)")
    check.add_argument("--abs-floor-au", type=_positive_float, default=None,
                       help="absolute floor for every order, au (default 1e-6, 1e-5, 1e-3, "
                       "0.1 for mu, alpha, beta, gamma)")
    _executor_options(check)
    check.add_argument("--quiet", action="store_true", help="no progress or log lines on stderr")
    check.add_argument("--log-every", type=_non_negative_float, default=DEFAULT_LOG_EVERY_S,
                       metavar="SECONDS", help="progress line interval when stderr is not a "
                       f"terminal (default {DEFAULT_LOG_EVERY_S:g})")
    _store_options(check)
    check.set_defaults(handler=cmd_check)

    plan = sub.add_parser("plan", help="the field points run would compute, and which of them "
                          "the store holds already; ids and counts for job arrays",
                          epilog=PLAN_EXAMPLES,
                          formatter_class=argparse.RawDescriptionHelpFormatter)
    plan.add_argument("job", type=Path, help="job file (TOML)")
    plan.add_argument("--format", choices=("table", "json", "csv"), default="table",
                      help="table (default); json: one JSON object per point (a stable id "
                      "from its store key, field vector in au, ladder level, whether it is "
                      "stored); csv")
    plan.add_argument("--json-lines", action="store_true", help="the same as --format json")
    plan.add_argument("--ids", action="store_true", help="just the points' ids, one per line")
    plan.add_argument("--missing", action="store_true", help="list only the points still to "
                      "compute (not stored; stored failures too with --retry-failed)")
    plan.add_argument("--count", action="store_true", help="just the number of points still "
                      "to compute, for sizing a job array; it also fixes that list in the "
                      "store, so that point --index N finds the same N-th point however many "
                      "elements have finished meanwhile")
    plan.add_argument("--retry-failed", action="store_true", help="count stored failures as "
                      "still to compute")
    plan.add_argument("--points", type=Path, metavar="PATH", nargs="+", help="point lines "
                      "whose points count as computed, beside the store's: files, "
                      "directories (their *.jsonl files) or - for standard input")
    plan.add_argument("--store", type=Path, metavar="PATH", help="the point store to look in "
                      f"(default {DEFAULT_STORE_NAME} beside the job file); written only by "
                      "--count")
    plan.set_defaults(handler=cmd_plan)

    point = sub.add_parser("point", help="compute planned field points into the store (or "
                           "as point lines on stdout): one job-array element",
                           epilog=POINT_EXAMPLES,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    point.add_argument("job", type=Path, help="job file (TOML)")
    which = point.add_mutually_exclusive_group(required=True)
    which.add_argument("--id", action="extend", nargs="+", metavar="ID", dest="ids",
                       help="point ids from fieldprop plan, computed one after the other in "
                       "this process (- reads ids, or plan's JSON lines, from standard input)")
    which.add_argument("--index", type=_non_negative_int, metavar="N", help="the N-th point "
                       "(from 0) of the to-do list fixed by fieldprop plan --count: a job "
                       "array's element index")
    which.add_argument("--zero-field", action="store_true", help="the zero-field point, "
                       "which every other point starts from: compute it first, once")
    point.add_argument("--stdout", action="store_true", help="write each point as a point "
                       "line (JSON) on stdout instead of storing it; the store is only read")
    point.add_argument("--threads", type=_positive_int, default=None, help="BLAS/OpenMP "
                       "threads of this process (default: OMP_NUM_THREADS, else 1)")
    point.add_argument("--retry-failed", action="store_true", help="compute again a point "
                       "stored as failed")
    point.add_argument("--quiet", action="store_true", help="no log lines on stderr")
    point.add_argument("--store", type=Path, metavar="PATH", help="the point store "
                       f"(default {DEFAULT_STORE_NAME} beside the job file)")
    point.set_defaults(handler=cmd_point)

    collect = sub.add_parser("collect", help="the result from stored points and point lines, "
                             "no computation; exit 3 naming the missing points if any",
                             epilog=COLLECT_EXAMPLES,
                             formatter_class=argparse.RawDescriptionHelpFormatter)
    collect.add_argument("job", type=Path, help="job file (TOML)")
    collect.add_argument("--json", type=Path, help="result JSON path (default JOB.result.json "
                         "beside the job file; - writes it to stdout instead of the tables)")
    collect.add_argument("--points", type=Path, metavar="PATH", nargs="+", help="point lines "
                         "of fieldprop point --stdout, beside the store's points: files, "
                         "directories (their *.jsonl files) or - for standard input")
    collect.add_argument("--allow-partial", action="store_true", help="report what the points "
                         "found determine; components that need missing points are marked "
                         "missing (exit code 3 all the same)")
    collect.add_argument("--store", type=Path, metavar="PATH", help="the point store (default "
                         f"{DEFAULT_STORE_NAME} beside the job file); never written")
    collect.add_argument("--format", choices=("table", "json", "csv"), default="table",
                         help="what goes to stdout: the tables (default), the result JSON, or "
                         "a CSV of the tensor components")
    collect.add_argument("--quiet", action="store_true", help="no log lines on stderr")
    collect.add_argument("--units", choices=("au", "esu", "si"), default="au",
                         help="units of the tables' tensor components (the JSON stays in au)")
    collect.set_defaults(handler=cmd_collect)

    report = sub.add_parser("report", help="result JSON files as a table, CSV or JSON in any "
                            "unit system and convention, without computing",
                            epilog=REPORT_EXAMPLES,
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    report.add_argument("results", type=Path, nargs="+", metavar="RESULT.json",
                        help="result files of fieldprop run or collect")
    report.add_argument("--units", choices=("au", "esu", "si"), default="au",
                        help="au (default); esu: dipole in debye, alpha in angstrom^3, beta "
                        "and gamma in esu; si")
    report.add_argument("--convention", choices=("taylor", "perturbation"), default="taylor",
                        help="taylor (default, fieldprop's) or perturbation (the B "
                        "convention: beta/2, gamma/6)")
    report.add_argument("--format", choices=("table", "csv", "json"), default="table",
                        help="a table for people (default), CSV with one header row, or "
                        "one JSON document (schema fieldprop-report-1: columns and rows)")
    report.add_argument("--components", action="store_true", help="one row per tensor "
                        "component instead of one row of invariants per result")
    report.set_defaults(handler=cmd_report)

    screen = sub.add_parser("screen", help="many molecules, one model: every molecule's "
                            "result and a ranked table", epilog=SCREEN_EXAMPLES,
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    screen.add_argument("set", type=Path, help="set file (TOML): molecules and the model, "
                        "response and geometry options they share")
    from fieldprop.outputs.ranking import RANK_KEYS

    screen.add_argument("--rank-by", choices=RANK_KEYS, default=None,
                        help="ranking invariant, by magnitude (default: beta_hrs when beta is "
                        "computed, else gamma_parallel, else alpha_iso, else dipole_norm)")
    screen.add_argument("--units", choices=("au", "esu", "si"), default="au",
                        help="units of the table and the CSV (the result files stay in au)")
    screen.add_argument("--csv", type=Path, help="write the ranked table as CSV to PATH "
                        "(- for stdout, in place of the table)")
    screen.add_argument("--png", type=Path, help="summary picture (default "
                        "SET.summary.png beside the set file)")
    screen.add_argument("--results", type=Path, metavar="DIR", help="folder of the molecules' "
                        "result JSON files, NAME.result.json (default SET.results beside the "
                        "set file)")
    _executor_options(screen)
    screen.add_argument("--quiet", action="store_true", help="no progress or log lines")
    screen.add_argument("--log-every", type=_non_negative_float, default=DEFAULT_LOG_EVERY_S,
                        metavar="SECONDS", help="in a batch log, a progress line at most this "
                        f"often (default {DEFAULT_LOG_EVERY_S:g})")
    _store_options(screen)
    screen.set_defaults(handler=cmd_screen)

    relax = sub.add_parser("relax", help="the nuclei in one static field: forces on the "
                           "zero-field minimum, the relaxed structure (XYZ) and its displacement",
                           epilog=RELAX_EXAMPLES,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    relax.add_argument("job", type=Path, help="job file (TOML); its [model], [scf] and "
                       "[geometry] are used, [response] only for the origin")
    relax.add_argument("--field", type=float, nargs=3, required=True, metavar=("FX", "FY", "FZ"),
                       help="the field vector in atomic units (1 au = 5.14e11 V/m)")
    relax.add_argument("--xyz", type=Path, help="the relaxed structure as XYZ (default "
                       "JOB.relaxed.xyz beside the job file)")
    relax.add_argument("--json", type=Path, help="the forces, structures and energies as JSON "
                       "(- writes it to stdout instead of the table)")
    relax.add_argument("--quiet", action="store_true", help="no log lines on stderr")
    _store_options(relax)
    relax.set_defaults(handler=cmd_relax)

    inspect = sub.add_parser("inspect", epilog=INSPECT_EXAMPLES,
                             formatter_class=argparse.RawDescriptionHelpFormatter,
                             help="what a point store holds: molecules and models, "
                             "points computed and failed, size; or every point as JSON lines")
    inspect.add_argument("store", type=Path, help="a point store file")
    inspect.add_argument("--json-lines", action="store_true", help="export every stored point "
                         "as one JSON object per line")
    inspect.set_defaults(handler=cmd_inspect)
    return parser


def _executor_options(parser) -> None:
    """Where the points are computed: the same options for run, check and screen."""
    parser.add_argument("--workers", type=_positive_int, default=None,
                        help="local processes computing field points in parallel (default: "
                        "one per core this process may use, divided by --threads)")
    parser.add_argument("--threads", type=_positive_int, default=1,
                        help="BLAS threads per worker process or Dask task (default 1: small "
                        "matrices run faster in more processes than in more threads)")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS", help="send the points to the Dask "
                       "cluster whose scheduler listens at ADDRESS (tcp://host:8786); this "
                       "process stays the store's only writer")
    where.add_argument("--scheduler-file", type=Path, metavar="PATH",
                       help="the same, with the scheduler's address from its scheduler file")


def _executor(args):
    """The executor of --workers/--threads/--scheduler/--scheduler-file."""
    from fieldprop.engine.stages import make_executor

    workers = args.workers or max(1, default_workers() // args.threads)
    return make_executor(workers, args.threads, args.scheduler,
                         str(args.scheduler_file) if args.scheduler_file else None)


def _store_options(parser) -> None:
    from fieldprop.points.store import DEFAULT_NAME as DEFAULT_STORE_NAME

    group = parser.add_mutually_exclusive_group()
    group.add_argument("--store", type=Path, metavar="PATH", help="point store: computed points "
                       "are kept there and reused by any job that needs them (default "
                       f"{DEFAULT_STORE_NAME} beside the job file)")
    group.add_argument("--no-store", action="store_true", help="keep the points in memory "
                       "only: nothing is read or written")
    parser.add_argument("--retry-failed", action="store_true", help="compute again the points "
                        "stored as failed (by default a stored failure fails the job again)")


def _open_store(args, job_path: Path, read_only: bool = False):
    """The store the options name: in memory, --store PATH, or the default file."""
    from fieldprop.points.store import PointStore, default_store_path

    if getattr(args, "no_store", False):
        return PointStore.in_memory()
    path = args.store if args.store is not None else default_store_path(job_path)
    if read_only and not path.exists():
        return None  # nothing stored yet
    return PointStore.open(path, read_only=read_only, verify=True)


def _configure_logging(quiet: bool) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("fieldprop: %(message)s"))
    root = logging.getLogger("fieldprop")
    root.handlers[:] = [handler]
    root.setLevel(logging.WARNING if quiet else logging.INFO)
    root.propagate = False


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


def _at_relaxation_minimum(prepared, store):
    """``prepared`` again at the zero-field minimum the nuclear relaxation is
    held to (computed now or found in ``store``), when the job asks for it."""
    from fieldprop.engine.geometry import relaxed_reference
    from fieldprop.engine.prepare import prepare

    if not prepared.job.response.nuclear_relaxation:
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


def cmd_run(args) -> int:
    from fieldprop.engine.analyse import require_stable
    from fieldprop.engine.prepare import prepare
    from fieldprop.engine.run import run_prepared
    from fieldprop.inputs.job import load_job
    from fieldprop.outputs.report import (check_output_path, is_stdout, result_document,
                                  write_json_atomic)

    job = load_job(args.job)
    out_path = args.json if args.json is not None else default_result_path(args.job)
    if not is_stdout(out_path) and out_path.resolve() == args.job.resolve():
        raise InputError(f"--json {out_path}: is the job file itself; give another path")
    check_output_path(out_path)
    if args.plot is not None and not args.plot.is_dir():
        raise InputError(f"--plot {args.plot}: is not an existing folder; create it first")
    if args.plot is not None and not os.access(args.plot, os.W_OK | os.X_OK):
        raise InputError(f"--plot {args.plot}: folder is not writable; give another folder")
    prepared = prepare(job)
    bar, log_every = _progress(args)
    with _open_store(args, args.job) as store:
        prepared = _at_optimised_geometry(prepared, store, args.job)
        prepared = _at_relaxation_minimum(prepared, store)
        executor = _executor(args)
        try:
            result = run_prepared(prepared, store, progress=bar, retry_failed=args.retry_failed,
                                  log_every_s=log_every, executor=executor)
        finally:
            executor.close()
    # The file first: a closed stdout (``| head``) must not lose the result.
    if is_stdout(out_path):  # --json -: the JSON is the output, no tables
        _to_stdout(lambda: write_json_atomic(result_document(result), out_path))
    else:
        write_json_atomic(result_document(result), out_path)
        logger.info("result written to %s (%.1f s)", out_path, result.wall_time_s)
        _to_stdout(lambda: _write_result(result, args.format, args.units, out_path))
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
    from fieldprop.outputs.report import (check_output_path, comparison_document, is_stdout,
                                  write_comparison, write_json_atomic)

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
    with _open_store(args, args.job) as store:
        prepared = _at_optimised_geometry(prepared, store, args.job)
        job = prepared.job
        executor = _executor(args)
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
    floors = (dict(compare.DEFAULT_ABS_FLOOR_AU) if args.abs_floor_au is None
              else {n: args.abs_floor_au for n in range(1, 5)})
    return compare.AgreementRule(
        sigmas=compare.DEFAULT_SIGMAS if args.sigmas is None else args.sigmas,
        rel_floor=compare.DEFAULT_REL_FLOOR if args.rel_floor is None else args.rel_floor,
        abs_floor_au=floors, strict=args.strict)


def _write_result(result, fmt: str, units: str, label) -> None:
    """A result on stdout: the tables, the result JSON, or a CSV of components."""
    from fieldprop.outputs.report import result_document, write_tables

    if fmt == "table":
        write_tables(result, sys.stdout, units)
    elif fmt == "json":
        json.dump(result_document(result), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    else:
        from fieldprop.outputs import summary

        summary.write([(str(label), result_document(result))], sys.stdout, units, "taylor",
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
        files = sorted(path.glob("*.jsonl")) if path.is_dir() else [path]
        if not files:
            raise InputError(f"--points {path}: a directory without *.jsonl files")
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
    from fieldprop.outputs.report import write_plan
    from fieldprop.engine.stages import JobWork
    from fieldprop.points.store import PointStore, default_store_path

    job = load_job(args.job)
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
        fmt = "ids" if args.ids else "json" if args.json_lines else args.format
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
        rows = real.get_points(t.key for t in targets) if real is not None else {}
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
    from fieldprop.outputs.report import check_output_path, is_stdout, result_document, write_json_atomic
    from fieldprop.points.store import PointStore, default_store_path

    job = load_job(args.job)
    out_path = args.json if args.json is not None else default_result_path(args.job)
    if not is_stdout(out_path) and out_path.resolve() == args.job.resolve():
        raise InputError(f"--json {out_path}: is the job file itself; give another path")
    check_output_path(out_path)
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
        _to_stdout(lambda: _write_result(result, args.format, args.units, out_path))
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
    from fieldprop.outputs.report import check_output_path, is_stdout, result_document, \
        write_json_atomic
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
    needed = ranking.PROPERTY_OF[ranking.resolve_key(key)]
    if needed not in props:
        raise InputError(f"--rank-by {key}: needs {needed}, which the set's [response] "
                         f"properties ({', '.join(props)}) do not compute")
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
    for o in outcomes:
        if o.result is not None:
            entries.append(ranking.entry_from(o.candidate.name, result_document(o.result)))
        else:
            entries.append(ranking.entry_from(o.candidate.name, None, o.failure,
                                              _formula_text(o.candidate.job),
                                              _model_text(o.candidate.job)))
    rows = ranking.rank(entries, key)
    if args.csv is not None and not is_stdout(args.csv):
        ranking.write_csv_file(rows, args.units, args.csv)
        logger.info("ranked table written to %s", args.csv)
    if any(r.rank is not None for r in rows):
        ranking.write_png(rows, key, args.units, png)
        logger.info("summary picture written to %s", png)
    elif png.exists():
        png.unlink()  # an earlier campaign's picture: nothing is ranked now
    logger.info("%d molecules: %d done, %d failed; %d field points computed, %d reused; "
                "%d SCF cycles; %.1f s; results in %s", counts.molecules,
                counts.molecules - counts.failed, counts.failed, counts.computed, counts.reused,
                counts.scf_cycles, counts.wall_time_s, results)
    if args.csv is not None and is_stdout(args.csv):
        _to_stdout(lambda: ranking.write_csv(rows, args.units, sys.stdout))
    else:
        _to_stdout(lambda: ranking.write_table(rows, args.units, key, sys.stdout))
    bad = [r for r in rows if r.status != "ok"]
    if bad:
        raise CampaignError(f"{campaign.path}: {len(bad)} of {len(rows)} molecules without "
                            f"every number: " + "; ".join(f"{r.entry.name} ({r.status})"
                                                          for r in bad[:5])
                            + (" ..." if len(bad) > 5 else ""))
    return 0


def _formula_text(job) -> str:
    from fieldprop.inputs.molecule import build_molecule

    try:
        return build_molecule(job.molecule, job.response.origin).formula
    except Exception:  # noqa: BLE001 - a label only
        return ""


def _model_text(job) -> str:
    m = job.model
    basis = m.basis if isinstance(m.basis, str) else "per-element basis"
    return "/".join(x for x in (m.method.upper(), m.functional, basis) if x)


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
    from fieldprop.outputs.report import (check_output_path, is_stdout, write_json_atomic,
                                  write_relaxation_table, write_relaxed_structure)

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
    _to_stdout(lambda: summary.write(docs, sys.stdout, args.units, args.convention,
                                     args.format, args.components))
    return 0


def cmd_inspect(args) -> int:
    from fieldprop.outputs.report import write_store_lines, write_store_summary
    from fieldprop.points.store import PointStore

    with PointStore.open(args.store, read_only=True, verify=True) as store:
        if args.json_lines:
            write_store_lines(store, sys.stdout)
        else:
            write_store_summary(store, args.store, sys.stdout)
    return 0


class Terminated(KeyboardInterrupt):
    """SIGTERM (a batch system's wall-time limit, ``kill``): handled as Ctrl-C is,
    so the points finished so far stay stored and the workers are stopped."""


def _on_sigterm(signum, frame):
    raise Terminated()


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``fieldprop`` command; returns the exit code."""
    import signal
    import threading

    if threading.current_thread() is threading.main_thread():
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    else:
        previous = None
    try:
        return _main(argv)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _main(argv: Sequence[str] | None) -> int:
    try:
        args = build_parser().parse_args(argv)
        _configure_logging(getattr(args, "quiet", False))
        return args.handler(args)
    except FieldpropError as exc:
        print(f"fieldprop: error: {exc.kind}: {exc}", file=sys.stderr)
        return exc.exit_code
    except Terminated:
        print("fieldprop: error: terminated: SIGTERM", file=sys.stderr)
        return 143
    except KeyboardInterrupt:
        print("fieldprop: error: interrupted: Ctrl-C", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader of stdout went away (e.g. `| head`): stop quietly, and keep
        # Python from complaining again when it flushes stdout at exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
