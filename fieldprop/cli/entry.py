"""The process around a command: the BLAS thread defaults (set before NumPy
loads), logging to stderr, SIGTERM handled as Ctrl-C, and every outcome turned
into the contract's exit code: 0 success; 1 a calculation failed or results are
unstable; 2 bad input (one line on stderr, nothing written); 3 incomplete; 130
interrupted; 143 terminated."""

from __future__ import annotations

import os

# Small molecules run fastest with one BLAS/OpenMP thread per process (threads
# fight over tiny matrices); parallelism comes from worker processes (--workers,
# by default one per core). Set before NumPy loads; a user's own setting wins.
# fieldprop.cli imports this module before anything else of the command line,
# so any import of the command line sets them first.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import logging  # noqa: E402
import sys  # noqa: E402
from typing import Sequence  # noqa: E402

from fieldprop.cli.parser import build_parser  # noqa: E402
from fieldprop.errors import FieldpropError  # noqa: E402


def _configure_logging(quiet: bool, verbose: bool = False) -> None:
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("fieldprop: %(message)s"))
    root = logging.getLogger("fieldprop")
    root.handlers[:] = [handler]
    root.setLevel(logging.WARNING if quiet else logging.INFO)
    root.propagate = False
    from fieldprop.points.progress import POINT_LOG

    POINT_LOG.setLevel(logging.INFO if verbose and not quiet else logging.WARNING)


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
        code = _main(argv)
    except Terminated:  # arrived as the command was ending, outside _main's handling
        print("fieldprop: error: terminated: SIGTERM", file=sys.stderr)
        code = 143
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
    if argv is None and code in (130, 143):
        _end_now(code)
    return code


def _end_now(code: int) -> None:
    """End an interrupted command now. Its points are stored, its files
    written or left as they were and its workers stopped; what Python would
    still do at exit is join the worker pool's manager thread, which an
    interrupt arriving inside the pool's own locking can leave waiting for
    ever (a batch system's wall-time SIGTERM must end the job)."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    os._exit(code)


def _main(argv: Sequence[str] | None) -> int:
    try:
        args = build_parser().parse_args(argv)
        _configure_logging(getattr(args, "quiet", False), getattr(args, "verbose", False))
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
