"""Cost against molecule size: push-pull polyenes H2N-(CH=CH)n-CHO (prints a table).

For each size (10, 14, 18, 22 and 30 atoms: fieldprop's own geometries in
configs/molecules/polyene_N.xyz) and model (HF/6-31G, B3LYP/6-31G), with the
job's defaults (mu, alpha, beta; automatic window; no symmetry: the force-field
geometries have none):

- a cold SCF of the model (PySCF from its initial guess with its default
  tolerances, integrals included; one thread): its cycles and wall time;
- ``fieldprop run`` as a whole process with ``--workers W`` (default: all
  cores), one BLAS thread per worker: its wall time, the field points it
  computed, and per field point (read back from its store) the median SCF
  cycles (Fock builds plus orbital-Hessian products) and wall time, each
  point on one worker with one thread;
- for HF, the analytic 2n+1 beta of the same model as a whole process with W
  BLAS threads (SCF, CPHF alpha, beta from the first-order orbitals: PySCF's
  properties extension, pyscf-properties on PyPI), and how far its beta is
  from fieldprop's; for DFT with --analytic-dft, the same extension's CPKS
  alpha and beta, whose beta leaves out the exchange-correlation kernel's
  third derivative (it differs from fieldprop's by a few per cent for B3LYP,
  and its time is a lower bound on a complete analytic route's).

Targets (issue of record: cost that does not grow with the molecule): per
point at most 0.3 of a cold SCF, HF and DFT, at every size; the 22-atom HF
beta at most 3x the analytic route; the ratio at 22 atoms at most 1.25x that
at 14.

    python tests/benchmarks/bench_scaling.py [--sizes 10 14 ...] [--models hf b3lyp]
                                             [--workers W] [--analytic-dft]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
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
MOLECULES = ROOT / "configs" / "molecules"
SIZES = (10, 14, 18, 22, 30)
MODELS = {"hf": 'method = "hf"', "b3lyp": 'method = "dft"\nfunctional = "b3lyp"'}

#: The cold SCF of the model, one thread: PySCF's defaults from its initial guess.
COLD = """
import json, sys, time
from pyscf import dft, gto, scf
start = time.perf_counter()
mol = gto.M(atom=sys.argv[1], basis="6-31g", verbose=0)
if sys.argv[2] == "hf":
    mf = scf.RHF(mol)
else:
    mf = dft.RKS(mol)
    mf.xc = sys.argv[2]
    mf.grids.level = int(sys.argv[3])
mf.kernel()
json.dump({"cycles": mf.cycles, "wall": time.perf_counter() - start,
           "converged": bool(mf.converged), "nao": mol.nao}, sys.stdout)
"""

#: The analytic reference: SCF, CPHF alpha and the 2n+1 beta of the same model.
ANALYTIC = """
import json, sys, warnings
from pyscf import gto, scf
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from pyscf.prop.polarizability import rhf
mol = gto.M(atom=sys.argv[1], basis="6-31g", verbose=0)
mf = scf.RHF(mol).run(conv_tol=1e-10, conv_tol_grad=1e-8)
prop = rhf.Polarizability(mf)
alpha, beta = prop.polarizability(), prop.hyper_polarizability()
json.dump({"beta": beta.tolist()}, sys.stdout)
"""

#: The same for DFT (--analytic-dft): its 2n+1 beta leaves out the
#: exchange-correlation kernel's third derivative (a few per cent of beta for
#: B3LYP), so it is cheaper than a complete analytic route: the ratio against
#: it is an upper bound.
ANALYTIC_DFT = """
import json, sys, warnings
from pyscf import dft, gto
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from pyscf.prop.polarizability import rks
mol = gto.M(atom=sys.argv[1], basis="6-31g", verbose=0)
mf = dft.RKS(mol)
mf.xc, mf.grids.level = sys.argv[2], int(sys.argv[3])
mf.run(conv_tol=1e-10, conv_tol_grad=1e-8)
prop = rks.Polarizability(mf)
alpha, beta = prop.polarizability(), prop.hyper_polarizability()
json.dump({"beta": beta.tolist()}, sys.stdout)
"""


def _python(code: str, *args: str, threads: int = 1) -> tuple[dict, float]:
    env = {**os.environ, "OMP_NUM_THREADS": str(threads), "OPENBLAS_NUM_THREADS": str(threads),
           "MKL_NUM_THREADS": str(threads)}
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True,
                          env=env)
    wall = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(done.stderr)
    return json.loads(done.stdout), wall


def _fieldprop(folder: Path, xyz: Path, model: str, workers: int):
    job = folder / f"{xyz.stem}-{model}.toml"
    job.write_text(textwrap.dedent(f"""
        [molecule]
        xyz = "{xyz}"
        [model]
        {MODELS[model]}
        basis = "6-31g"
        [response]
        properties = ["dipole", "alpha", "beta"]
        """).replace("\n        ", "\n"))
    store, out = folder / f"{job.stem}.sqlite", folder / f"{job.stem}.json"
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "fieldprop", "run", str(job), "--store",
                           str(store), "--workers", str(workers), "--threads", "1", "--quiet",
                           "--json", str(out)], capture_output=True, text=True, env=env)
    wall = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(done.stderr)
    lines = subprocess.run([sys.executable, "-m", "fieldprop", "inspect", str(store),
                            "--json-lines"], capture_output=True, text=True, env=env,
                           check=True).stdout.splitlines()
    points = [json.loads(line) for line in lines if line.strip()]
    field = [p for p in points if p["status"] == "ok" and any(p["field_vector_au"])]
    return json.loads(out.read_text()), wall, field


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=list(SIZES))
    parser.add_argument("--models", nargs="+", choices=sorted(MODELS), default=["hf", "b3lyp"])
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    parser.add_argument("--analytic-dft", action="store_true",
                        help="time PySCF's properties extension's DFT beta too (no XC "
                             "third derivative: a lower bound on an analytic route's cost)")
    args = parser.parse_args()
    from fieldprop.inputs.job import DEFAULT_GRID_LEVEL

    folder = Path(tempfile.mkdtemp())
    rows = []
    for model in args.models:
        for atoms in args.sizes:
            xyz = MOLECULES / f"polyene_{atoms}.xyz"
            text = "; ".join(" ".join(line.split()[:4])
                             for line in xyz.read_text().splitlines()[2:] if line.strip())
            cold, _ = _python(COLD, text, model, str(DEFAULT_GRID_LEVEL))
            result, wall, field = _fieldprop(folder, xyz, model, args.workers)
            cycles = statistics.median(p["scf_cycles"] for p in field)
            per_point = statistics.median(p["wall_time_s"] for p in field)
            row = [atoms, cold["nao"], model, len(field), f"{cycles:.0f}", cold["cycles"],
                   f"{per_point:.2f}", f"{cold['wall']:.2f}", f"{per_point / cold['wall']:.2f}",
                   f"{wall:.1f}"]
            analytic_run = ((ANALYTIC, text) if model == "hf" else
                            (ANALYTIC_DFT, text, model, str(DEFAULT_GRID_LEVEL))
                            if args.analytic_dft else None)
            if analytic_run is not None:
                analytic, an_wall = _python(*analytic_run, threads=args.workers)
                ref = np.array(analytic["beta"])
                beta = np.array(result["tensors"]["beta"]["value"], dtype=float)
                gap = float(np.max(np.abs(beta - ref)) / np.max(np.abs(ref)))
                row += [f"{an_wall:.1f}", f"{wall / an_wall:.2f}", f"{gap:.1e}"]
            else:
                row += ["-", "-", "-"]
            rows.append(row)
            print(tabulate([row], tablefmt="plain"), flush=True)
    print(f"\nH2N-(CH=CH)n-CHO, 6-31G, mu, alpha, beta; fieldprop run --workers {args.workers} "
          f"against the analytic route with {args.workers} BLAS threads, whole processes:")
    print(tabulate(rows, headers=[
        "atoms", "basis functions", "model", "field points", "cycles per point",
        "cold SCF cycles", "s per point", "cold SCF s", "point / cold SCF (target <= 0.3)",
        "fieldprop s", "analytic s", "ratio", "|beta - analytic| / max|beta|"]))


if __name__ == "__main__":
    main()
