"""An aborted local pool ends its running workers at once (Ctrl-C, SIGTERM:
a batch system's wall-time limit does not wait for a long field point)."""

import time

from fieldprop.points.executors import LocalPool


def _sleep(seconds: float) -> float:
    time.sleep(seconds)
    return seconds


def test_abort_terminates_the_workers_of_running_tasks():
    pool = LocalPool(2)
    futures = [pool.submit(_sleep, 600.0) for _ in range(3)]
    deadline = time.monotonic() + 60
    while not all(f.running() for f in futures[:2]) and time.monotonic() < deadline:
        time.sleep(0.02)
    processes = list(pool._pool._processes.values())
    assert len(processes) == 2 and all(p.is_alive() for p in processes)
    pool.close(abort=True, pending=futures)
    # Without terminating them, the workers would still sleep for ten minutes.
    assert not any(p.is_alive() for p in processes)
    assert futures[2].cancelled() or futures[2].done()
