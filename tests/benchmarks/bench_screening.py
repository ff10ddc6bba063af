"""Screening throughput (prints a table): field points per minute for a set of
ten small molecules (SMILES; HF/6-31G; mu, alpha, beta on the automatic
ladder) on 1 local worker with 1 and 2 BLAS threads, 2 local workers with one
thread each, and a Dask LocalCluster of 2 worker processes; the share of the
workers' time not spent inside a point's SCF (idle, model set-up, waiting at
the end of a stage or of the campaign); and the store's overhead per point.

Run: python tests/benchmarks/bench_screening.py   (about 2 minutes on 2 cores)
"""

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import tempfile  # noqa: E402
import textwrap  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

from tabulate import tabulate  # noqa: E402

from fieldprop.inputs.campaign import load_set  # noqa: E402
from fieldprop.engine.stages import make_executor
from fieldprop.points.executors import DaskPool
from fieldprop.engine.screening import run_campaign  # noqa: E402
from fieldprop.points.store import PointStore  # noqa: E402

#: Ten small molecules, as a campaign would list them.
SMILES = {"water": "O", "ammonia": "N", "hydrogen-fluoride": "F", "formaldehyde": "C=O",
          "methanol": "CO", "acetonitrile": "CC#N", "hydrogen-cyanide": "C#N",
          "ethylene": "C=C", "formamide": "NC=O", "fluoromethane": "CF"}


def set_text() -> str:
    molecules = "".join(f'[[molecule]]\nname = "{n}"\nsmiles = "{s}"\n'
                        for n, s in SMILES.items())
    return molecules + textwrap.dedent("""
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = ["dipole", "alpha", "beta"]
        """)


def one_run(campaign, pool, store):
    start = time.perf_counter()
    outcomes, counts = run_campaign(campaign, store, pool)
    wall = time.perf_counter() - start
    assert counts.failed == 0
    busy = sum(r.wall_time_s for o in outcomes for r in o.result.computed_records)
    return counts.computed, wall, busy


def main() -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "ten.toml"
        path.write_text(set_text())
        campaign = load_set(path)
        rows = []
        runs = [("1 local worker x 1 thread", lambda: make_executor(1, 1), 1),
                ("1 local worker x 2 threads", lambda: make_executor(1, 2), 2),
                ("2 local workers x 1 thread", lambda: make_executor(2, 1), 2)]
        results = {}
        for label, make, cores in runs:
            with PointStore.in_memory() as store:
                points, wall, busy = one_run(campaign, make(), store)
            slots = 1 if "1 local worker" in label else 2
            results[label] = wall
            rows.append([label, points, f"{wall:.1f}", f"{60 * points / wall:.0f}",
                         f"{1 - busy / (slots * wall):.2f}"])
        from distributed import Client, LocalCluster

        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                          dashboard_address=None) as cluster, Client(cluster) as client:
            with PointStore.in_memory() as store:
                points, wall, busy = one_run(campaign, DaskPool(client=client), store)
        rows.append(["Dask LocalCluster, 2 workers x 1 thread", points, f"{wall:.1f}",
                     f"{60 * points / wall:.0f}", f"{1 - busy / (2 * wall):.2f}"])
        print("ten molecules from SMILES, HF/6-31G, mu, alpha, beta (adaptive window):")
        print(tabulate(rows, headers=["pool", "points", "wall time (s)", "points / min",
                                      "share of worker time outside field points (zero field, set-up, idle)"]))
        base = results["1 local worker x 1 thread"]
        print(f"speed-up over 1 worker x 1 thread: 1 x 2 threads "
              f"{base / results['1 local worker x 2 threads']:.2f}, 2 workers x 1 thread "
              f"{base / results['2 local workers x 1 thread']:.2f}")
        # The store's overhead: every outcome of one campaign written into a
        # fresh SQLite file, one transaction per point, as the campaign does.
        file_store = Path(folder) / "points.sqlite"
        with PointStore.in_memory() as memory:
            outcomes, _ = run_campaign(campaign, memory, make_executor(2, 1))
        pairs = []
        from fieldprop.engine.prepare import prepare

        for o in outcomes:
            tasks = prepare(o.result.job, facts=o.result.backend_facts).tasks
            pairs += [(tasks[r.point.index], r) for r in o.result.computed_records]
        with PointStore.open(file_store) as store:
            start = time.perf_counter()
            for task, record in pairs:
                store.put_point(task, record)
            per_point = (time.perf_counter() - start) / len(pairs)
        print(f"store: {1000 * per_point:.2f} ms per point written ({len(pairs)} points, one "
              f"transaction each) against {1000 * busy / points:.0f} ms per point's SCF")


if __name__ == "__main__":
    main()
