"""The command line's grammar: :func:`build_parser` (every command with its
options and their help), the argument types that refuse a bad value as bad input
(one line, exit code 2), the worked examples and exit codes ``--help`` shows, and
the options' defaults. Each command's handler is in :mod:`.commands`."""

from __future__ import annotations

import argparse
from pathlib import Path

from fieldprop import __version__
from fieldprop.cli.commands import (cmd_check, cmd_collect, cmd_inspect, cmd_plan, cmd_point,
                                    cmd_relax, cmd_report, cmd_run, cmd_screen)
from fieldprop.errors import InputError


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
  fieldprop inspect fieldprop-points.sqlite --json-lines > points.jsonl
      every point of every job in the store; collect --points refuses lines of points
      outside its job's plan, so keep a job's own (its ids: fieldprop plan JOB --ids):
  fieldprop inspect fieldprop-points.sqlite --json-lines | grep -F -f <(fieldprop plan job.toml --ids) > job.jsonl
"""

PLAN_EXAMPLES = """\
examples:
  fieldprop plan water.toml                      the points, and which are stored
  fieldprop plan water.toml --format jsonl       one JSON object per point and line
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
  fieldprop report water.result.json --format job > again.toml   the job, rebuilt
  fieldprop report water.result.json --components --convention perturbation
"""

SCREEN_EXAMPLES = """\
examples:
  fieldprop screen candidates.toml --csv ranked.csv --units esu
  fieldprop screen candidates.toml --rank-by beta_parallel --csv - | tail -n +2 | sort -t, -k1n
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


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not value > 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0, got {text}")
    return value


def _rank_key(text: str) -> str:
    """--rank-by: an invariant (or an old name of one), or an optical estimate."""
    from fieldprop.outputs.ranking import RANK_KEYS, resolve_key, valid_key

    key = resolve_key(text)
    if not valid_key(key):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a ranking key: give an invariant ({', '.join(RANK_KEYS)}) or an "
            "optical estimate such as beta_hrs_shg_1064nm")
    return key


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
    run.add_argument("--json", type=Path, metavar="PATH",
                     help="result JSON path (default JOB.result.json "
                     "beside the job file; - writes it to stdout instead of the tables)")
    _executor_options(run)
    _progress_options(run)
    _convention_option(run)
    _digits_option(run)
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
    check.add_argument("--against", type=Path, metavar="FILE",
                       help="reference tensors: result-style JSON, "
                       ".npy or .npz (default: fieldprop's analytic SCF references)")
    check.add_argument("--json", type=Path, metavar="PATH",
                       help="write the comparison as JSON to this path "
                       "(- writes it to stdout instead of the table)")
    check.add_argument("--sigmas", type=_positive_float, default=None, metavar="K",
                       help="agreement within this many error bars (default 3)")
    check.add_argument("--strict", action="store_true",
                       help="error bars only (the finite-field one plus the reference's own, "
                       "when it has one), no relative or absolute floor")
    check.add_argument("--rel-floor", type=_positive_float, default=None, metavar="R",
                       help="relative floor of the allowed difference (default 1e-6)")
    check.add_argument("--abs-floor-au", type=_positive_float, default=None, nargs="+",
                       metavar="X", help="absolute floor, au: one for every order, or four for "
                       "mu, alpha, beta, gamma in turn (default 1e-6 1e-5 1e-3 0.1)")
    _executor_options(check)
    _progress_options(check)
    _store_options(check)
    check.set_defaults(handler=cmd_check)

    plan = sub.add_parser("plan", help="the field points run would compute, and which of them "
                          "the store holds already; ids and counts for job arrays",
                          epilog=PLAN_EXAMPLES,
                          formatter_class=argparse.RawDescriptionHelpFormatter)
    plan.add_argument("job", type=Path, help="job file (TOML)")
    plan.add_argument("--format", choices=("table", "json", "jsonl", "csv"), default="table",
                      help="table (default); json: one JSON document (schema fieldprop-plan-1) "
                      "listing the points, as every command's json is one document; jsonl: "
                      "one JSON object per point and line (a stable id from its store key, "
                      "field vector in au, ladder level, whether it is stored); csv")
    plan.add_argument("--json-lines", action="store_true", help="the same as --format jsonl")
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
    point.add_argument("--threads", type=_positive_int, default=None, metavar="T",
                       help="BLAS/OpenMP "
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
    collect.add_argument("--json", type=Path, metavar="PATH",
                         help="result JSON path (default JOB.result.json "
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
    _convention_option(collect)
    _digits_option(collect)
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
    _convention_option(report)
    _digits_option(report)
    report.add_argument("--format", choices=("table", "csv", "json", "job"), default="table",
                        help="a table for people (default), CSV with one header row, one "
                        "JSON document (schema fieldprop-report-1: columns and rows), or "
                        "job: the job file (TOML) that computes the result again (one "
                        "result; its keys and values as the result records them)")
    report.add_argument("--frame", choices=("input", "dipole"), default="input",
                        help="with --components: the input geometry's frame (default) or the "
                        "dipole frame (z along the dipole moment, x along the largest "
                        "perpendicular axis of alpha; error bars carried linearly)")
    report.add_argument("--components", action="store_true", help="one row per tensor "
                        "component instead of one row of invariants per result")
    report.set_defaults(handler=cmd_report)

    screen = sub.add_parser("screen", help="many molecules, one model: every molecule's "
                            "result and a ranked table", epilog=SCREEN_EXAMPLES,
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    screen.add_argument("set", type=Path, help="set file (TOML): molecules and the model, "
                        "response and geometry options they share")
    from fieldprop.outputs.ranking import RANK_KEYS

    screen.add_argument("--rank-by", type=_rank_key, default=None, metavar="INVARIANT",
                        help="ranking invariant, by magnitude: " + ", ".join(RANK_KEYS)
                        + " (default: beta_hrs when beta is computed, else gamma_parallel, "
                        "else alpha_iso, else dipole_norm); or an optical estimate of the set's "
                        "optical_wavelengths_nm, such as beta_hrs_shg_1064nm (second-harmonic) "
                        "or beta_hrs_eo_1550nm (electro-optic)")
    _convention_option(screen)
    screen.add_argument("--units", choices=("au", "esu", "si"), default="au",
                        help="units of the table and the CSV (the result files stay in au)")
    screen.add_argument("--csv", type=Path, metavar="PATH",
                        help="write the ranked table as CSV to PATH "
                        "(- for stdout, in place of the table)")
    screen.add_argument("--png", type=Path, metavar="PATH", help="summary picture (default "
                        "SET.summary.png beside the set file)")
    screen.add_argument("--results", type=Path, metavar="DIR", help="folder of the molecules' "
                        "result JSON files, NAME.result.json (default SET.results beside the "
                        "set file)")
    _executor_options(screen)
    _progress_options(screen)
    _store_options(screen, beside="the set file")
    screen.set_defaults(handler=cmd_screen)

    relax = sub.add_parser("relax", help="the nuclei in one static field: forces on the "
                           "zero-field minimum, the relaxed structure (XYZ) and its displacement",
                           epilog=RELAX_EXAMPLES,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    relax.add_argument("job", type=Path, help="job file (TOML); its [model], [scf] and "
                       "[geometry] are used, [response] only for the origin")
    relax.add_argument("--field", type=float, nargs=3, required=True, metavar=("FX", "FY", "FZ"),
                       help="the field vector in atomic units (1 au = 5.14e11 V/m)")
    relax.add_argument("--xyz", type=Path, metavar="PATH",
                       help="the relaxed structure as XYZ (default "
                       "JOB.relaxed.xyz beside the job file)")
    relax.add_argument("--json", type=Path, metavar="PATH",
                       help="the forces, structures and energies as JSON "
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


def _convention_option(parser) -> None:
    """--convention, the same on every command that shows tensors."""
    parser.add_argument("--convention", choices=("taylor", "perturbation"), default="taylor",
                        help="of the tables and CSV: taylor (default, fieldprop's: E = E0 - "
                        "mu F - alpha F^2/2 - beta F^3/6 - gamma F^4/24) or perturbation "
                        "(beta/2, gamma/6); the result JSON stays taylor")


def _digits_option(parser) -> None:
    """--all-digits, the same on every command whose tables round values."""
    parser.add_argument("--all-digits", action="store_true",
                        help="tables show every digit the error bars support (default: at "
                        "most 6 significant digits); CSV and JSON always carry all")


def _progress_options(parser) -> None:
    """How a long command reports progress: the same options for run, check and screen."""
    parser.add_argument("--quiet", action="store_true", help="no progress or log lines on stderr")
    parser.add_argument("--verbose", action="store_true", help="also a log line per point: its "
                        "SCF cycles, time, strategies and the orbital gradient reached")
    parser.add_argument("--log-every", type=_non_negative_float, default=DEFAULT_LOG_EVERY_S,
                        metavar="SECONDS", help="when stderr is not a terminal (a batch log), "
                        "a progress line at most this often: points done, SCF cycles, elapsed "
                        f"and remaining time (default {DEFAULT_LOG_EVERY_S:g}); a terminal "
                        "gets a progress bar")


def _executor_options(parser) -> None:
    """Where the points are computed: the same options for run, check and screen."""
    parser.add_argument("--workers", type=_positive_int, default=None, metavar="N",
                        help="local processes computing field points in parallel (default: "
                        "one per core this process may use, divided by --threads)")
    parser.add_argument("--threads", type=_positive_int, default=1, metavar="T",
                        help="BLAS threads per worker process or Dask task (default 1: small "
                        "matrices run faster in more processes than in more threads)")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS", help="send the points to the Dask "
                       "cluster whose scheduler listens at ADDRESS (tcp://host:8786); this "
                       "process stays the store's only writer")
    where.add_argument("--scheduler-file", type=Path, metavar="PATH",
                       help="the same, with the scheduler's address from its scheduler file")


def _store_options(parser, beside: str = "the job file") -> None:
    from fieldprop.points.store import DEFAULT_NAME as DEFAULT_STORE_NAME

    group = parser.add_mutually_exclusive_group()
    group.add_argument("--store", type=Path, metavar="PATH", help="point store: computed points "
                       "are kept there and reused by any job that needs them (default "
                       f"{DEFAULT_STORE_NAME} beside {beside})")
    group.add_argument("--no-store", action="store_true", help="keep the points in memory "
                       "only: nothing is read or written")
    parser.add_argument("--retry-failed", action="store_true", help="compute again the points "
                        "stored as failed (by default a stored failure fails the job again)")
