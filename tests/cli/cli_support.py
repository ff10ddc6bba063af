"""What the command-line tests share: one way to run fieldprop as a user
does (a fresh ``python -m fieldprop`` process), and the job texts several
tests use."""

import os
import subprocess
import sys
import textwrap

#: The command line of fieldprop in this interpreter.
COMMAND = (sys.executable, "-m", "fieldprop")


def environment() -> dict:
    """The test process's environment with one BLAS thread (as the CLI sets
    by default) and no warning filters of the test runner's."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHONWARNINGS")}
    env["OMP_NUM_THREADS"] = "1"
    return env


def fieldprop(*args, cwd, stdin=None, timeout=600, **kwargs) -> subprocess.CompletedProcess:
    """``fieldprop ARGS`` in ``cwd``: exit code, stdout and stderr as text."""
    return subprocess.run([*COMMAND, *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, input=stdin, timeout=timeout, env=environment(), **kwargs)


def start(*args, cwd, **kwargs) -> subprocess.Popen:
    """``fieldprop ARGS`` started in the background (to signal or kill it)."""
    return subprocess.Popen([*COMMAND, *map(str, args)], cwd=cwd, env=environment(),
                            **kwargs)


#: Water at HF/STO-3G in its symmetry axes (our idealised geometry): the
#: smallest job that has every property's components, seconds to run.
WATER_STO3G = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    O 0.0 0.0 0.1173
    H 0.0 0.7572 -0.4692
    H 0.0 -0.7572 -0.4692
    \"\"\"
    [model]
    method = "hf"
    basis = "sto-3g"
    [response]
    properties = ["dipole", "alpha", "beta"]
    """)
