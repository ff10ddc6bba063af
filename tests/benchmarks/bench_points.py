"""Cost of a field point: SCF cycles per point and wall time against analytic alpha.

For each case, the finite-field job runs twice in this process with no store
(every point computed): with the default solver (response start, Newton finish)
and with [scf] solver = "diis" (DIIS from the zero-field density, the earlier
default). Printed per run: field points, mean SCF cycles per field point (zero
field excluded; cycles = Fock builds plus orbital-Hessian products), the cycles
of a cold zero-field SCF (PySCF's DIIS from its initial guess to the same
orbital-gradient target), their ratio, wall time, and the wall time over that of
an analytic alpha of the same model (a cold PySCF SCF with its default
tolerances plus fieldprop's CPHF/CPKS solve), measured in the same run.

Targets (the solver's contract): <= 0.3 cold-SCF cycles per field point;
finite-field alpha (2 levels) <= 2x the analytic alpha; the push-pull beta
(3 levels) within 10 minutes on 2 cores.

    python tests/benchmarks/bench_points.py [--quick] [--case N] [--solver S] [--workers N]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import textwrap
import time
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
from tabulate import tabulate  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from fieldprop.engine.run import compute  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402

WATER = """O 0.000000 0.000000 0.117300
H 0.000000 0.757200 -0.469200
H 0.000000 -0.757200 -0.469200"""
#: Formaldehyde, our geometry: C=O 1.205 A, C-H 1.11 A, H-C-H 116 degrees.
FORMALDEHYDE = """C 0.000000 0.000000 0.000000
O 0.000000 0.000000 1.205000
H 0.000000 0.941376 -0.588252
H 0.000000 -0.941376 -0.588252"""

CASES = [
    # name, model, geometry (inline) or xyz file, properties, levels, analytic model
    ("water", "hf", None, "aug-cc-pvdz", WATER, '["alpha"]', 2),
    ("formaldehyde", "dft", "b3lyp", "aug-cc-pvdz", FORMALDEHYDE, '["alpha"]', 2),
    ("aminopropenal (push-pull)", "dft", "b3lyp", "6-31g",
     ROOT / "configs" / "molecules" / "aminopropenal.xyz", '["dipole", "alpha", "beta"]', 3),
]


def job_text(method, functional, basis, geometry, properties, levels, solver) -> str:
    if isinstance(geometry, Path):
        molecule = f'xyz = "{geometry}"'
    else:
        molecule = f'geometry = """\n{geometry}\n"""'
    model = f'method = "{method}"\n' + (f'functional = "{functional}"\n' if functional else "")
    return textwrap.dedent(f"""
[molecule]
{molecule}
[model]
{model}basis = "{basis}"
[response]
properties = {properties}
field_au = 0.001
levels = {levels}
[scf]
solver = "{solver}"
""")


def cold_scf(job):
    """PySCF's DIIS from its initial guess to the job's orbital-gradient target."""
    from fieldprop.backend import ModelContext

    context = ModelContext(_molecule(job), job.model, job.scf)
    mf = context.mean_field((0.0, 0.0, 0.0))
    mf.conv_tol, mf.conv_tol_grad, mf.max_cycle = job.scf.energy_conv_tol_au, \
        job.scf.gradient_target, 500
    mf.kernel()
    return int(mf.cycles), bool(mf.converged)


def analytic_alpha_seconds(job) -> float:
    """A cold SCF with PySCF's default tolerances plus the CPHF/CPKS solve."""
    from fieldprop.backend import ModelContext, analytic_polarizability

    start = time.perf_counter()
    context = ModelContext(_molecule(job), job.model, job.scf)
    mf = context.mean_field((0.0, 0.0, 0.0))
    mf.conv_tol, mf.conv_tol_grad = 1e-9, None
    mf.kernel()
    analytic_polarizability(mf, context.r)
    return time.perf_counter() - start


def _molecule(job):
    from fieldprop.inputs.molecule import build_molecule

    return build_molecule(job.molecule, job.response.origin)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="the first two cases only")
    parser.add_argument("--case", type=int, action="append", help="run case N only (0, 1, 2; "
                        "repeatable)")
    parser.add_argument("--solver", action="append", choices=("newton", "diis"),
                        help="run this solver only (repeatable; default both)")
    parser.add_argument("--workers", type=int, default=1)
    args = parser.parse_args()
    cases = [CASES[i] for i in args.case] if args.case else (CASES[:2] if args.quick else CASES)
    solvers = args.solver or ["newton", "diis"]
    rows = []
    folder = Path(tempfile.mkdtemp())
    for name, method, functional, basis, geometry, properties, levels in cases:
        analytic = None
        for solver in solvers:
            path = folder / f"{name.split()[0]}-{solver}.toml"
            path.write_text(job_text(method, functional, basis, geometry, properties, levels,
                                     solver))
            job = load_job(path)
            if analytic is None:
                cold, cold_ok = cold_scf(job)
                analytic = analytic_alpha_seconds(job)
            start = time.perf_counter()
            result = compute(job, workers=args.workers, progress=False)
            wall = time.perf_counter() - start
            cycles = [r.scf_cycles for r in result.records[1:]]
            mean = float(np.mean(cycles))
            rows.append([name, f"{method}/{functional + '/' if functional else ''}{basis}",
                         properties.strip("[]").replace('"', ""), solver, len(result.records),
                         f"{mean:.1f}", f"{cold}{'' if cold_ok else ' (unconverged)'}",
                         f"{mean / cold:.2f}", f"{wall:.1f}", f"{wall / analytic:.1f}",
                         f"{analytic:.1f}"])
            print(tabulate(rows[-1:], tablefmt="plain"), flush=True)
    print()
    print(tabulate(rows, headers=["molecule", "model", "properties", "solver", "points",
                                  "cycles/point", "cold SCF cycles", "ratio", "wall s",
                                  "wall / analytic alpha", "analytic alpha s"],
                   disable_numparse=True))
    print(f"\n{os.cpu_count()} cores, {args.workers} worker(s), OMP_NUM_THREADS="
          f"{os.environ.get('OMP_NUM_THREADS')}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
