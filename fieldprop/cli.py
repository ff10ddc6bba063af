"""Command line: argv, environment, logging, exit codes.

Exit codes (contract): 0 success; 1 a calculation failed or results are
unstable; 2 bad input (one line on stderr, nothing written); 3 incomplete.
Data go to stdout, logs and progress to stderr.
"""

from __future__ import annotations

import os

# Small molecules run fastest with one BLAS/OpenMP thread per process (threads
# fight over tiny matrices); parallelism comes from --workers. Set before NumPy
# loads; a user's own setting wins.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import logging  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Sequence  # noqa: E402

from fieldprop import __version__  # noqa: E402
from fieldprop.errors import FieldpropError, InputError  # noqa: E402

logger = logging.getLogger("fieldprop")


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as one line and exit code 2."""

    def error(self, message: str):  # noqa: D401
        raise InputError(f"{self.prog}: {message} (see {self.prog} --help)")


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be >= 1, got {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="fieldprop", description="Static dipole moment, polarizability and "
                     "hyperpolarizabilities by finite fields with Richardson extrapolation.")
    parser.add_argument("--version", action="version", version=f"fieldprop {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    run = sub.add_parser("run", help="compute a job: tables on stdout, result JSON to a file")
    run.add_argument("job", type=Path, help="job file (TOML)")
    run.add_argument("--json", type=Path, help="result JSON path (default JOB.result.json "
                     "beside the job file)")
    run.add_argument("--workers", type=_positive_int, default=1,
                     help="processes computing field points in parallel (default 1)")
    run.add_argument("--quiet", action="store_true", help="no progress or log lines on stderr")
    run.set_defaults(handler=cmd_run)

    plan = sub.add_parser("plan", help="print the field points run would compute")
    plan.add_argument("job", type=Path, help="job file (TOML)")
    plan.add_argument("--json-lines", action="store_true", help="one JSON object per point")
    plan.set_defaults(handler=cmd_plan)
    return parser


def _configure_logging(quiet: bool) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("fieldprop: %(message)s"))
    root = logging.getLogger("fieldprop")
    root.handlers[:] = [handler]
    root.setLevel(logging.WARNING if quiet else logging.INFO)
    root.propagate = False


def default_result_path(job_path: Path) -> Path:
    """JOB.result.json beside the job file (``water.toml`` -> ``water.result.json``)."""
    return job_path.with_name(job_path.stem + ".result.json")


def cmd_run(args) -> int:
    from fieldprop.engine import compute, require_stable
    from fieldprop.job import load_job
    from fieldprop.report import (check_output_path, result_document, write_json_atomic,
                                  write_tables)

    job = load_job(args.job)
    out_path = args.json if args.json is not None else default_result_path(args.job)
    if out_path.resolve() == args.job.resolve():
        raise InputError(f"--json {out_path}: is the job file itself; give another path")
    check_output_path(out_path)
    result = compute(job, workers=args.workers, progress=not args.quiet and sys.stderr.isatty())
    write_tables(result, sys.stdout)
    write_json_atomic(result_document(result), out_path)
    logger.info("result written to %s (%.1f s)", out_path, result.wall_time_s)
    require_stable(result)
    return 0


def cmd_plan(args) -> int:
    from fieldprop.engine import make_plan
    from fieldprop.job import load_job
    from fieldprop.report import write_plan

    job = load_job(args.job)
    write_plan(make_plan(job), sys.stdout, json_lines=args.json_lines)
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``fieldprop`` command; returns the exit code."""
    try:
        args = build_parser().parse_args(argv)
        _configure_logging(getattr(args, "quiet", False))
        return args.handler(args)
    except FieldpropError as exc:
        print(f"fieldprop: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("fieldprop: error: interrupted", file=sys.stderr)
        return 130
