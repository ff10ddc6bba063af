"""Coverage and sharpness of the error bars per case, route and tensor (prints a table).

Run: python tests/benchmarks/bench_calibration.py   (about 15 minutes on one core)
"""

import collections
import os
import sys
import tempfile
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "physics"))

from tabulate import tabulate  # noqa: E402

from calibration import collect, figures  # noqa: E402


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        rows = collect(tmp)
    groups = collections.defaultdict(list)
    for row in rows:
        groups[(row[0], row[1], row[2].split("_")[0])].append(row)
    table = []
    for (case, route, tensor), group in groups.items():
        coverage, sharpness, n, n_resolved = figures(group)
        table.append([case, route, tensor, n, f"{coverage:.2f}",
                      f"{sharpness:.1f}" if n_resolved else "-",
                      f"{max(r[5] for r in group):.1e}", f"{max(r[4] for r in group):.1e}"])
    print(tabulate(table, headers=["case", "route", "tensor", "components", "coverage",
                                   "median bar/true", "max true error", "max error bar"]))
    coverage, sharpness, n, n_resolved = figures(rows)
    print(f"\nall: coverage {coverage:.3f} of {n} components; median bar/true error "
          f"{sharpness:.1f} over {n_resolved} resolvable components")


if __name__ == "__main__":
    main()
