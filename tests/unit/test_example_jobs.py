"""Every example job in configs/ is a valid job (the set files are checked in
tests/cli/test_screen.py)."""

from pathlib import Path

import pytest

from fieldprop.inputs.job import load_job

CONFIGS = Path(__file__).resolve().parents[2] / "configs"
JOBS = [p for p in sorted(CONFIGS.glob("*.toml")) if "[[molecule]]" not in p.read_text()]


@pytest.mark.parametrize("path", JOBS, ids=[p.stem for p in JOBS])
def test_an_example_job_loads(path):
    job = load_job(path)
    assert job.molecule.atoms and job.response.properties
