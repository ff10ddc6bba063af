"""Cost and quality of nuclear relaxation ([response] nuclear_relaxation).

Each case runs twice through ``fieldprop run`` in a fresh folder (so every
point is computed; the geometry is optimised first, at the job's model): with
clamped nuclei and with nuclear relaxation. Printed per case: the time of the
zero-field minimum (gradient, Hessian, dipole derivatives, polish), relaxed
points, Newton steps per relaxed point (mean and largest), gradients per point, the
largest remaining energy error of a relaxed point, wall time of the clamped
run and of the relaxed run and their ratio (the relaxed run includes the
clamped points, the zero-field Hessian and dipole derivatives), alpha^nr_iso
against the double-harmonic alpha^nr_iso from the zero-field Hessian (their
relative difference: the same quantity, so only the Hessian's and the
differentiation's errors separate them), and |beta^nr| / |beta^e| (largest
components).

    python tests/benchmarks/bench_relaxation.py [--case N] [--workers N]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
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

from fieldprop.cli import main  # noqa: E402

WATER = """O 0.000000 0.000000 0.117300
H 0.000000 0.757200 -0.469200
H 0.000000 -0.757200 -0.469200"""
#: Formaldehyde, our geometry: C=O 1.205 A, C-H 1.11 A, H-C-H 116 degrees.
FORMALDEHYDE = """C 0.000000 0.000000 0.000000
O 0.000000 0.000000 1.205000
H 0.000000 0.941376 -0.588252
H 0.000000 -0.941376 -0.588252"""

CASES = [
    # name, method, functional, basis, geometry or xyz path, properties
    ("water HF/6-31G", "hf", None, "6-31g", WATER, '["alpha", "beta"]'),
    ("formaldehyde B3LYP/6-31G", "dft", "b3lyp", "6-31g", FORMALDEHYDE, '["alpha", "beta"]'),
    ("water MP2/6-31G (energy route)", "mp2", None, "6-31g", WATER, '["alpha"]'),
    ("aminopropenal HF/6-31G", "hf", None, "6-31g",
     ROOT / "configs" / "molecules" / "aminopropenal.xyz", '["alpha", "beta"]'),
]


def job_text(method, functional, basis, geometry, properties, relax: bool) -> str:
    where = (f'xyz = "{geometry}"' if isinstance(geometry, Path)
             else f'geometry = """\n{geometry}\n"""')
    return textwrap.dedent(f"""\
        [molecule]
        {{where}}
        [model]
        method = "{method}"
        basis = "{basis}"
        {f'functional = "{functional}"' if functional else ""}
        [geometry]
        optimise = true
        [response]
        properties = {properties}
        nuclear_relaxation = {"true" if relax else "false"}
        """).replace("{where}", where)


def run(case, relax: bool, workers: int) -> tuple[dict, float]:
    name, method, functional, basis, geometry, properties = case
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "job.toml"
        path.write_text(job_text(method, functional, basis, geometry, properties, relax))
        start = time.perf_counter()
        with contextlib.redirect_stdout(io.StringIO()):  # the tables: not this table's
            code = main(["run", str(path), "--quiet", "--workers", str(workers)])
        wall = time.perf_counter() - start
        if code != 0:
            raise SystemExit(f"{name}: exit {code}")
        return json.loads((Path(folder) / "job.result.json").read_text()), wall


def main_(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", type=int, action="append", help="case index (repeatable)")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)
    rows = []
    for i, case in enumerate(CASES):
        if args.case and i not in args.case:
            continue
        clamped, t_clamped = run(case, False, args.workers)
        relaxed, t_relaxed = run(case, True, args.workers)
        nr = relaxed["nuclear_relaxation"]
        steps = [p["steps"] for p in nr["relaxed"]]
        gradients = [p["gradients"] for p in nr["relaxed"]]
        worst = max(p["energy_change_au"] for p in nr["relaxed"])
        alpha = np.array(relaxed["tensors_nuclear_relaxation"]["alpha"]["value"], dtype=float)
        harmonic = np.array(nr["minimum"]["double_harmonic_alpha_au"])
        iso, iso_h = np.trace(alpha) / 3, np.trace(harmonic) / 3
        beta_ratio = "-"
        if "beta" in relaxed["tensors"]:
            b_e = np.nanmax(np.abs(np.array(relaxed["tensors"]["beta"]["value"], dtype=float)))
            b_n = np.nanmax(np.abs(np.array(relaxed["tensors_nuclear_relaxation"]["beta"]
                                            ["value"], dtype=float)))
            beta_ratio = f"{b_n / b_e:.2f}"
        rows.append([case[0], f"{nr['minimum']['wall_time_s']:.1f}", len(steps),
                     f"{np.mean(steps):.1f} / {max(steps)}",
                     f"{np.mean(gradients):.1f}", f"{worst:.1e}", f"{t_clamped:.1f}",
                     f"{t_relaxed:.1f}", f"{t_relaxed / t_clamped:.1f}x",
                     f"{iso:.6f}", f"{abs(iso - iso_h) / abs(iso_h):.1e}", beta_ratio])
        print(tabulate([rows[-1]], tablefmt="plain"), flush=True)
    print()
    print(tabulate(rows, headers=["case", "minimum s", "relaxed pts", "steps mean/max", "grads/pt",
                                  "worst dE (Eh)", "clamped s", "relaxed s", "ratio",
                                  "alpha_nr iso", "vs harmonic", "|b_nr|/|b_e|"],
                   disable_numparse=True))


if __name__ == "__main__":
    main_()
