"""Cost of the zero-point vibrational average ([response] zero_point).

Each case runs twice through ``fieldprop run`` in a fresh folder (every point
computed; the geometry optimised first at the job's model): the electronic
result alone, and with zero_point = true. Printed per case: modes, displaced
geometries (and how many are images of others by symmetry), field points of
the displaced geometries, wall time of both runs and their ratio, and the
zero-point correction of alpha_iso and of the largest beta component with
their error bars (relative to the electronic value).

    python tests/benchmarks/bench_zero_point.py [--case N] [--workers N]
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

HYDROGEN_FLUORIDE = """H 0 0 0
F 0 0 0.917"""
WATER = """O 0.000000 0.000000 0.117300
H 0.000000 0.757200 -0.469200
H 0.000000 -0.757200 -0.469200"""
#: Formaldehyde, our geometry: C=O 1.205 A, C-H 1.11 A, H-C-H 116 degrees.
FORMALDEHYDE = """C 0.000000 0.000000 0.000000
O 0.000000 0.000000 1.205000
H 0.000000 0.941376 -0.588252
H 0.000000 -0.941376 -0.588252"""

CASES = [
    # name, method, functional, basis, geometry, properties
    ("hydrogen fluoride HF/6-31G", "hf", None, "6-31g", HYDROGEN_FLUORIDE,
     '["dipole", "alpha", "beta"]'),
    ("water HF/6-31G", "hf", None, "6-31g", WATER, '["dipole", "alpha", "beta"]'),
    ("formaldehyde HF/6-31G", "hf", None, "6-31g", FORMALDEHYDE, '["dipole", "alpha", "beta"]'),
    ("water B3LYP/6-31G", "dft", "b3lyp", "6-31g", WATER, '["dipole", "alpha", "beta"]'),
    ("water MP2/6-31G (energy route)", "mp2", None, "6-31g", WATER, '["dipole", "alpha"]'),
]


def _job(folder: Path, method, functional, basis, geometry, properties, zero_point) -> Path:
    path = folder / "job.toml"
    path.write_text(textwrap.dedent(f"""\
        [molecule]
        geometry = \"\"\"
        {{}}
        \"\"\"
        [model]
        method = "{method}"
        {f'functional = "{functional}"' if functional else ""}
        basis = "{basis}"
        [response]
        properties = {properties}
        zero_point = {str(zero_point).lower()}
        [geometry]
        optimise = true
        """).format(geometry))
    return path


def _run(case, zero_point: bool, workers: int) -> tuple[dict, float]:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        job = _job(folder, *case[1:], zero_point)
        out = folder / "out.json"
        start = time.perf_counter()
        with contextlib.redirect_stdout(io.StringIO()):
            code = main(["run", str(job), "--workers", str(workers), "--quiet",
                         "--json", str(out)])
        wall = time.perf_counter() - start
        if code != 0:
            raise SystemExit(f"{case[0]}: fieldprop run exited {code}")
        return json.loads(out.read_text()), wall


def main_() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", type=int, action="append", help="case number (from 0)")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    rows = []
    for n, case in enumerate(CASES):
        if args.case and n not in args.case:
            continue
        plain, t_plain = _run(case, False, args.workers)
        doc, t_zp = _run(case, True, args.workers)
        zp = doc["zero_point"]
        alpha = np.array(doc["tensors"]["alpha"]["value"])
        d_alpha = np.array(doc["tensors_zero_point"]["alpha"]["value"])
        e_alpha = np.array(doc["tensors_zero_point"]["alpha"]["error"])
        row = [case[0], len(zp["modes"]), f"{zp['geometries']} ({zp['images_by_symmetry']})",
               zp["points"]["computed"], f"{t_plain:.1f}", f"{t_zp:.1f}",
               f"{t_zp / t_plain:.1f}x",
               f"{np.trace(d_alpha) / 3:+.4g} +- {np.trace(e_alpha) / 3:.1g} "
               f"({np.trace(d_alpha) / np.trace(alpha):+.1%})"]
        if "beta" in doc["tensors"]:
            beta = np.array(doc["tensors"]["beta"]["value"])
            k = np.unravel_index(np.abs(beta).argmax(), beta.shape)
            d = np.array(doc["tensors_zero_point"]["beta"]["value"])[k]
            e = np.array(doc["tensors_zero_point"]["beta"]["error"])[k]
            row.append(f"beta_{''.join('xyz'[i] for i in k)} {d:+.4g} +- {e:.1g} "
                       f"({d / beta[k]:+.1%})")
        else:
            row.append("-")
        rows.append(row)
        print(f"done: {case[0]}", file=sys.stderr, flush=True)
    print(tabulate(rows, headers=["case", "modes", "geometries (images)", "their points",
                                  "electronic s", "with zero point s", "ratio",
                                  "d alpha_iso (au)", "d beta, largest (au)"],
                   disable_numparse=True))


if __name__ == "__main__":
    main_()
