"""Coverage and sharpness of the error bars per case, route and tensor (prints a table),
and per size class: the small validation set (up to four heavy atoms, 6-31+G*,
h0 = 0.002 au) and the larger molecules (3-aminopropenal, 4-nitroaniline at
HF/6-31G, h0 = 0.001 au).

Run: python tests/benchmarks/bench_calibration.py [--small | --larger] [--workers N]
     [--window adaptive|full]
(small set about 15 minutes on one core; larger set about 10 minutes on two)
"""

import argparse
import collections
import os
import sys
import tempfile
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "physics"))

from tabulate import tabulate  # noqa: E402

from calibration import LARGER_SET, VALIDATION_SET, collect, figures  # noqa: E402


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    which = parser.add_mutually_exclusive_group()
    which.add_argument("--small", action="store_true", help="the small validation set only")
    which.add_argument("--larger", action="store_true", help="the larger molecules only")
    parser.add_argument("--workers", type=int, default=1)
    parser.add_argument("--window", choices=("adaptive", "full"), default=None,
                        help="run every case on the automatic ladder with this window "
                        "instead of its own field_au")
    args = parser.parse_args()
    classes = [("small", VALIDATION_SET), ("larger", LARGER_SET)]
    if args.small or args.larger:
        classes = [classes[0] if args.small else classes[1]]
    rows, by_class = [], {}
    with tempfile.TemporaryDirectory() as tmp:
        for label, cases in classes:
            folder = Path(tmp) / label
            folder.mkdir()
            points = []
            by_class[label] = collect(folder, cases, args.workers, args.window, points)
            print(f"{label}: {sum(points)} field points computed")
            rows += by_class[label]
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
    print()
    for label, group in list(by_class.items()) + [("all", rows)]:
        coverage, sharpness, n, n_resolved = figures(group)
        print(f"{label}: coverage {coverage:.3f} of {n} components; median bar/true error "
              f"{sharpness:.1f} over {n_resolved} resolvable components")


if __name__ == "__main__":
    main()
