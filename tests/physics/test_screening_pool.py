"""One pool of field points across molecules: a real Dask cluster (a
distributed.LocalCluster of 2 worker processes) gives the numbers of a serial
run, and a point that fails ends its molecule only."""

import textwrap

import numpy as np
import pytest

from fieldprop.inputs.campaign import load_set
from fieldprop.engine.stages import make_executor
from fieldprop.points.executors import DaskPool
from fieldprop.engine.screening import run_campaign
from fieldprop.points.store import PointStore

pytest.importorskip("pyscf")

SET = textwrap.dedent("""
    [[molecule]]
    name = "water"
    smiles = "O"
    [[molecule]]
    name = "ammonia"
    smiles = "N"
    [[molecule]]
    name = "hydrogen-fluoride"
    geometry = \"\"\"
    F 0 0 0
    H 0 0 0.92
    \"\"\"
    [model]
    method = "hf"
    basis = "sto-3g"
    [response]
    properties = ["dipole", "alpha", "beta"]
    """)


def components(outcomes):
    out = {}
    for o in outcomes:
        for name, tensor in o.result.tensors.items():
            for c in tensor.components:
                out[o.candidate.name, c.plan.name] = (c.estimate.value_au, c.estimate.error_au)
    return out


@pytest.mark.parametrize("workers, threads", [(2, 1), (1, 2)],
                         ids=["two processes", "one process, two threads"])
def test_a_dask_cluster_gives_the_numbers_of_a_serial_run(tmp_path, workers, threads):
    """Two worker processes, or one worker whose two threads run points of the
    same model at once (each thread has its own model context, the worker's
    table of them guarded by a lock)."""
    from distributed import Client, LocalCluster

    (tmp_path / "set.toml").write_text(SET)
    campaign = load_set(tmp_path / "set.toml")
    with PointStore.in_memory() as store:
        serial, _ = run_campaign(campaign, store, make_executor(1, 1))
    with LocalCluster(n_workers=workers, threads_per_worker=threads, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        with PointStore.in_memory() as store:
            spread, counts = run_campaign(campaign, store, DaskPool(client=client))
    assert counts.failed == 0 and counts.computed == sum(o.computed for o in serial)
    a, b = components(serial), components(spread)
    assert a.keys() == b.keys() and len(a) > 50
    # Each point starts from its predecessors' orbitals alone, whichever
    # worker computed them: number for number, bit for bit.
    assert a == b
    for o, p in zip(serial, spread):
        assert o.result.energy_au == p.result.energy_au


def test_a_point_that_fails_ends_its_molecule_only(tmp_path, monkeypatch):
    from fieldprop.backend import points as backend_points
    from fieldprop.errors import ScfNotConvergedError

    real = backend_points._converge

    def stubborn(mf, context, point, *rest):  # every ammonia field point along +x fails
        if context.molecule.formula == "H3N" and point.field_vector_au[0] > 0:
            raise ScfNotConvergedError(f"SCF did not converge at field point {point.label}")
        return real(mf, context, point, *rest)

    monkeypatch.setattr(backend_points, "_converge", stubborn)
    (tmp_path / "set.toml").write_text(SET)
    campaign = load_set(tmp_path / "set.toml")
    with PointStore.in_memory() as store:
        outcomes, counts = run_campaign(campaign, store, make_executor(2, 1))
    by_name = {o.candidate.name: o for o in outcomes}
    assert counts.failed == 1
    assert by_name["ammonia"].result is None
    assert "did not converge" in by_name["ammonia"].failure
    for name in ("water", "hydrogen-fluoride"):
        assert by_name[name].result is not None and not by_name[name].failure
        alpha = by_name[name].result.tensors["alpha"]
        assert np.all(np.isfinite(alpha.value_au))


def test_screen_sends_its_points_to_a_dask_scheduler_by_address(tmp_path):
    """The command line's --scheduler: the same campaign through a running
    cluster's scheduler, results and store written by the command."""
    import csv
    import subprocess
    import sys

    from distributed import LocalCluster

    (tmp_path / "set.toml").write_text(SET)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster:
        done = subprocess.run([sys.executable, "-m", "fieldprop", "screen", "set.toml",
                               "--scheduler", cluster.scheduler_address, "--csv", "ranked.csv"],
                              capture_output=True, text=True, timeout=600, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "Dask scheduler" in done.stderr and "3 done, 0 failed" in done.stderr
    rows = list(csv.DictReader((tmp_path / "ranked.csv").open()))
    assert len(rows) == 3 and all(r["status"] == "ok" for r in rows)
    assert (tmp_path / "fieldprop-points.sqlite").exists()


def test_a_campaign_does_not_mix_points_of_another_backend_version(tmp_path, monkeypatch):
    """A molecule whose stored model was computed with another PySCF (simulated)
    fails with both versions named, and computes nothing, when it has points
    to compute; one whose points are all stored is analysed as usual."""
    import pyscf

    small = textwrap.dedent("""
        [[molecule]]
        name = "hydrogen"
        geometry = \"\"\"
        H 0 0 0
        H 0 0 0.74
        \"\"\"
        [model]
        method = "hf"
        basis = "sto-3g"
        [response]
        properties = ["alpha"]
        field_au = 0.002
        levels = {levels}
        """)
    (tmp_path / "two.toml").write_text(small.format(levels=2))
    (tmp_path / "three.toml").write_text(small.format(levels=3))
    with PointStore.open(tmp_path / "points.sqlite") as store:
        first, counts = run_campaign(load_set(tmp_path / "two.toml"), store, make_executor(1, 1))
        assert counts.failed == 0 and counts.computed > 0
        installed = pyscf.__version__
        monkeypatch.setattr(pyscf, "__version__", "0.0.1")
        again, counts = run_campaign(load_set(tmp_path / "two.toml"), store, make_executor(1, 1))
        assert counts.failed == 0 and counts.computed == 0
        more, counts = run_campaign(load_set(tmp_path / "three.toml"), store, make_executor(1, 1))
    assert counts.failed == 1 and counts.computed == 0
    (outcome,) = more
    assert outcome.result is None and outcome.kind == "InputError"
    assert f"PySCF {installed}" in outcome.failure and "PySCF 0.0.1" in outcome.failure
