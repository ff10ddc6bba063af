"""How close smooth field points come to the Taylor-departure threshold (prints a table).

For the validation molecules of tests/physics/calibration.py (HF and DFT, closed
and open shell, tilted off the axes), the automatic window (six levels, the
largest fields of fieldprop's defaults) on the energy and dipole routes. A state
that stays the same must give no departure; the figure that matters is the
largest residual / field-induced change over the points whose residual rises
above their noise, against the threshold RELATIVE_DEPARTURE.

Run: python tests/benchmarks/bench_continuity.py [CASE_NUMBER ...]   (about 20 minutes on one core)
"""

import os
import sys
import tempfile
import time
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "physics"))

from tabulate import tabulate  # noqa: E402

from calibration import VALIDATION_SET, job_text  # noqa: E402

from fieldprop.numerics.continuity import RELATIVE_DEPARTURE  # noqa: E402
from fieldprop.engine.run import compute  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402


def main(selected) -> None:
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for n, (name, model) in enumerate(VALIDATION_SET):
            if selected and n not in selected:
                continue
            for route, props in (("energy", ("dipole", "alpha", "beta")),
                                 ("dipole", ("alpha", "beta"))):
                path = Path(tmp) / f"case{n}_{route}.toml"
                # The automatic window: no field_au.
                path.write_text(job_text(name, model, route, props).replace(
                    "field_au = 0.002", ""))
                start = time.perf_counter()
                result = compute(load_job(path), progress=False)
                report = result.continuity
                steps = result.plan.steps_au()
                rows.append([n, f"{name} {model.split(chr(10))[-1].split('=')[-1].strip()}",
                             route, f"{steps[0]:g}-{steps[-1]:g}", report.checked,
                             f"{report.largest_relative:.1e}", len(report.departures),
                             f"{min(r.occupied_overlap for r in result.records):.4f}",
                             f"{time.perf_counter() - start:.0f}"])
                print(*rows[-1], sep=" | ", flush=True)
    print(tabulate(rows, headers=["#", "case", "route", "fields (au)", "points checked",
                                  "largest residual/change", "departures",
                                  "smallest overlap", "time (s)"]))
    print(f"\nthreshold: residual > {RELATIVE_DEPARTURE} of the change (and > 10 noises)")


if __name__ == "__main__":
    main({int(a) for a in sys.argv[1:]})
