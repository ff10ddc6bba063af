"""Points, SCF cycles and wall time per route and worker count (prints a table).

Run: python tests/benchmarks/bench_routes.py
Water (our geometry), HF/6-31+G*, properties dipole..beta, h0 = 0.001 au, 3 levels.
"""

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import tempfile  # noqa: E402
import textwrap  # noqa: E402
from pathlib import Path  # noqa: E402

from tabulate import tabulate  # noqa: E402

from fieldprop.engine.run import compute  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402

JOB = textwrap.dedent("""
    [molecule]
    geometry = \"\"\"
    O   0.000000  0.000000  0.117300
    H   0.000000  0.757200 -0.469200
    H   0.000000 -0.757200 -0.469200
    \"\"\"
    [model]
    method = "hf"
    basis = "6-31+g*"
    [response]
    properties = ["dipole", "alpha", "beta"]
    field_au = 0.001
    differentiate = "{route}"
    """)


def main() -> None:
    rows = []
    base = None
    with tempfile.TemporaryDirectory() as tmp:
        for route in ("energy", "dipole"):
            for workers in (1, 2):
                path = Path(tmp) / f"{route}.toml"
                path.write_text(JOB.format(route=route))
                result = compute(load_job(path), workers=workers, progress=False)
                alpha = result.tensors["alpha"]
                beta = result.tensors["beta"]
                base = base or result.wall_time_s
                rows.append([route, workers, len(result.records),
                             sum(r.scf_cycles for r in result.records),
                             f"{result.wall_time_s:.1f}", f"{result.wall_time_s / base:.2f}",
                             f"{alpha.error_au.max():.1e}", f"{beta.error_au.max():.1e}"])
    print(tabulate(rows, headers=["route", "workers", "points", "SCF cycles", "wall s",
                                  "time ratio", "max alpha err", "max beta err"]))


if __name__ == "__main__":
    main()
