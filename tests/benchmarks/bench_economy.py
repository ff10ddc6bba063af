"""Field points per job: symmetry on and off, energy and dipole routes,
molecules of several point groups placed on and off their axes, and the
automatic window (whole ladder and adaptive) against a fixed 3-level ladder
(prints tables).

Run: python tests/benchmarks/bench_economy.py [--wall] [--analytic] [--density-fit]
     [--overhead]
Counting needs no SCF (the plans only), except for the adaptive window, whose
points depend on the numbers (beta of three small molecules is computed). --wall also runs water off its axes
(4-nitroaniline, HF/6-31G, mu, alpha, beta, dipole route) with and without
symmetry, one worker, and prints the wall times. --analytic times the full beta of 4-nitroaniline
(HF/6-31G, our geometry in configs/molecules, automatic window) by
`fieldprop run` against an analytic 2n+1 beta of the same model (SCF, CPHF
alpha, beta: PySCF's properties extension, pyscf-properties on PyPI, a
benchmark and test dependency only), each a whole process, in one run, all
cores to each (fieldprop: a worker per core; analytic: a BLAS thread per core).
--density-fit runs 4-nitroaniline at HF/6-31G* (152 basis functions; mu, alpha,
beta, 3 levels, h0 = 0.001 au) with exact and with density-fitted integrals
(PySCF's default auxiliary basis), one worker each, and prints the speed-up
and how far alpha_iso and beta_parallel move. --overhead runs `fieldprop run`
on 4-nitroaniline (HF/6-31G, mu, alpha, beta, 3 levels) as a whole process on
one worker under a profiler and splits its wall time into the backend's work
(integrals, zero-field reference, field points) and the rest (process start,
imports, planning, store, extrapolation, reports).

Geometries are our own idealised shapes (angstrom); every one is placed a
second time turned by a fixed rotation and shifted off the origin.
"""

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import textwrap  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
from scipy.spatial.transform import Rotation  # noqa: E402
from tabulate import tabulate  # noqa: E402

from fieldprop.engine.prepare import prepare  # noqa: E402
from fieldprop.engine.run import compute  # noqa: E402
from fieldprop.inputs.job import load_job  # noqa: E402


def _pyramid(bond, height):
    r = math.sqrt(bond ** 2 - height ** 2)
    return [(0, 0, 0)] + [(r * math.cos(2 * math.pi * k / 3), r * math.sin(2 * math.pi * k / 3),
                           -height) for k in range(3)]


MOLECULES = {
    "bromochlorofluoromethane (C1)": (
        ["C", "H", "F", "Cl", "Br"], [(0, 0, 0), (0.63, 0.63, 0.63), (-0.78, -0.78, 0.78),
                                      (-1.02, 1.02, -1.02), (1.11, -1.11, -1.11)]),
    "water (C2v)": (["O", "H", "H"], [(0, 0, 0.1173), (0, 0.7572, -0.4692), (0, -0.7572, -0.4692)]),
    "ammonia (C3v)": (["N", "H", "H", "H"], _pyramid(1.012, 0.38)),
    "ethylene (D2h)": (["C", "C", "H", "H", "H", "H"], [(0, 0, 0.667), (0, 0, -0.667), (0, 0.923, 1.232),
                                  (0, -0.923, 1.232), (0, 0.923, -1.232), (0, -0.923, -1.232)]),
    "hydrogen cyanide (C-inf-v)": (["H", "C", "N"], [(0, 0, -1.066), (0, 0, 0), (0, 0, 1.156)]),
    "helium (atom)": (["He"], [(0, 0, 0)]),
}

TURN = Rotation.from_euler("zyx", [37.0, 23.0, -61.0], degrees=True).as_matrix()


def job_text(symbols, coords, props, route, symmetry, field=True, levels=3):
    lines = "\n".join(f"{s} {x:.10f} {y:.10f} {z:.10f}" for s, (x, y, z) in zip(symbols, coords))
    return textwrap.dedent(f"""
        [molecule]
        geometry = \"\"\"
{lines}
        \"\"\"
        [model]
        method = "hf"
        basis = "6-31g"
        [response]
        properties = {props!r}
        differentiate = "{route}"
        symmetry = {str(symmetry).lower()}
        """).replace("'", '"') + (f"field_au = 0.002\nlevels = {levels}\n" if field else "")


NITROANILINE = Path(__file__).resolve().parents[2] / "configs" / "molecules" / \
    "nitroaniline.xyz"


def nitroaniline_job(path: Path, basis: str, properties, extra: str = "",
                     model_extra: str = "") -> Path:
    """A job file for 4-nitroaniline (our geometry in configs/molecules), HF;
    ``extra`` and ``model_extra``: more lines of [response] and [model]."""
    lines = "\n".join(["[molecule]", f'xyz = "{NITROANILINE}"', "[model]", 'method = "hf"',
                       f'basis = "{basis}"', model_extra, "[response]",
                       "properties = [" + ", ".join(f'"{p}"' for p in properties) + "]",
                       extra])
    path.write_text(lines + "\n")
    return path


def computed(folder, text) -> int:
    path = Path(folder) / "job.toml"
    path.write_text(text)
    return len(prepare(load_job(path), facts={}).computed_tasks)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--wall", action="store_true", help="also time a job with and "
                        "without symmetry")
    parser.add_argument("--analytic", action="store_true", help="also time the full beta of "
                        "4-nitroaniline against an analytic 2n+1 beta")
    parser.add_argument("--density-fit", action="store_true", help="also time 4-nitroaniline "
                        "with and without density fitting")
    parser.add_argument("--overhead", action="store_true", help="also measure the time "
                        "outside the field-point solves")
    args = parser.parse_args()
    props = ["dipole", "alpha", "beta", "gamma"]
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        for name, (symbols, coords) in MOLECULES.items():
            for placed in ("in its axes", "off its axes"):
                x = np.array(coords, dtype=float)
                if placed == "off its axes":
                    x = x @ TURN.T + np.array([0.31, -0.17, 0.52])
                row = [name, placed]
                for route in ("energy", "dipole"):
                    row += [computed(folder, job_text(symbols, x, props, route, False)),
                            computed(folder, job_text(symbols, x, props, route, True))]
                rows.append(row)
        print("Points computed for mu, alpha, beta, gamma at 3 levels (h0 = 0.002 au):")
        print(tabulate(rows, headers=["molecule", "placed", "energy, no symmetry",
                                      "energy, symmetry", "dipole, no symmetry",
                                      "dipole, symmetry"]))
        print()
        # The automatic window against a fixed 3-level ladder, beta alone: the
        # adaptive window's points depend on the numbers, so those jobs run.
        rows = []
        others = {"chlorofluoromethanol (C1)": (
            ["C", "H", "F", "Cl", "O", "H"], [(0, 0, 0), (0.63, 0.63, 0.63), (-0.78, -0.78, 0.78),
                                             (-1.02, 1.02, -1.02), (0.82, -0.82, -0.82),
                                             (1.55, -0.45, -1.30)]),
                  "lithium hydride (C-inf-v)": (["Li", "H"], [(0, 0, 0), (0, 0, 1.60)])}
        for name in ("chlorofluoromethanol (C1)", "water (C2v)", "lithium hydride (C-inf-v)"):
            symbols, coords = MOLECULES.get(name) or others[name]
            x = np.array(coords, dtype=float) @ TURN.T
            for route in ("energy", "dipole"):
                fixed = computed(folder, job_text(symbols, x, ["beta"], route, True))
                full = computed(folder, job_text(symbols, x, ["beta"], route, True,
                                                 field=False) + 'window = "full"\n')
                path = Path(folder) / "adaptive.toml"
                path.write_text(job_text(symbols, x, ["beta"], route, True, field=False))
                result = compute(load_job(path), workers=2, progress=False)
                auto = result.counts.computed
                rows.append([name, route, fixed, full, auto, f"{full / fixed:.2f}",
                             f"{auto / fixed:.2f}"])
        print("beta alone, HF/6-31G, symmetry on, placed off the axes: points computed on a "
              "fixed 3-level ladder, the whole automatic ladder and the adaptive window")
        print(tabulate(rows, headers=["molecule", "route", "3 levels", "whole ladder",
                                      "adaptive", "whole / 3 levels",
                                      "adaptive / 3 levels (target <= 1.3)"]))
        if args.analytic:
            print()
            analytic_beta(Path(folder))
        if args.density_fit:
            print()
            density_fitting(Path(folder))
        if args.overhead:
            print()
            overhead(Path(folder))
        if args.wall:
            print()
            rows = []
            for symmetry in (False, True):
                path = nitroaniline_job(Path(folder) / f"wall-{symmetry}.toml", "6-31g",
                                        ["dipole", "alpha", "beta"],
                                        f"field_au = 0.001\nsymmetry = {str(symmetry).lower()}")
                start = time.perf_counter()
                result = compute(load_job(path), workers=1, progress=False)
                wall = time.perf_counter() - start
                cycles = sum(r.scf_cycles for r in result.computed_records)
                rows.append([symmetry, result.counts.computed, cycles, f"{wall:.1f}"])
            print("4-nitroaniline (C2v, in its axes), HF/6-31G, mu, alpha, beta, 3 levels, "
                  "one worker:")
            print(tabulate(rows, headers=["symmetry", "points computed", "SCF cycles",
                                          "wall time (s)"]))


#: The analytic reference: SCF, CPHF alpha and the 2n+1 beta of the same model.
ANALYTIC = """
import json, sys, warnings
import numpy as np
from pyscf import gto, scf
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from pyscf.prop.polarizability import rhf
rows = [line.split() for line in open(sys.argv[1]).read().splitlines()[2:] if line.strip()]
mol = gto.M(atom=[(r[0], tuple(map(float, r[1:4]))) for r in rows], basis="6-31g", verbose=0)
mf = scf.RHF(mol).run(conv_tol=1e-10, conv_tol_grad=1e-8)
prop = rhf.Polarizability(mf)
alpha, beta = prop.polarizability(), prop.hyper_polarizability()
json.dump({"alpha": alpha.tolist(), "beta": beta.tolist()}, open(sys.argv[2], "w"))
"""


def analytic_beta(folder: Path) -> None:
    xyz = NITROANILINE
    runs = {}
    for window in ("adaptive", "full"):
        job = nitroaniline_job(folder / f"nitroaniline-{window}.toml", "6-31g", ["beta"],
                               f'origin = "zero"\nwindow = "{window}"')
        start = time.perf_counter()
        done = subprocess.run([sys.executable, "-m", "fieldprop", "run", str(job), "--no-store",
                               "--quiet", "--json", str(folder / f"ff-{window}.json")],
                              capture_output=True, text=True,
                              env={**os.environ, "OMP_NUM_THREADS": "1"})
        wall = time.perf_counter() - start
        if done.returncode != 0:
            raise SystemExit(done.stderr)
        runs[window] = (json.loads((folder / f"ff-{window}.json").read_text()), wall)
    cores = str(os.cpu_count() or 1)
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", ANALYTIC, str(xyz), str(folder / "an.json")],
                          capture_output=True, text=True,
                          env={**os.environ, "OMP_NUM_THREADS": cores,
                               "OPENBLAS_NUM_THREADS": cores})
    an_wall = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(done.stderr)
    an = json.loads((folder / "an.json").read_text())
    ref = np.array(an["beta"])
    big = np.max(np.abs(ref))
    print(f"4-nitroaniline, HF/6-31G, full beta, whole processes, {cores} cores each:")
    rows = []
    for window, (ff, wall) in runs.items():
        rows.append([f"fieldprop run, automatic ladder, {window} window",
                     ff["points"]["computed"], f"{wall:.1f}", f"{wall / an_wall:.2f}"])
    rows.append(["analytic 2n+1 (SCF + CPHF alpha + beta)", "-", f"{an_wall:.1f}", "1.00"])
    print(tabulate(rows, headers=["", "points computed", "wall time (s)",
                                  "ratio (target <= 4)"]))
    for window, (ff, _) in runs.items():
        value = np.array(ff["tensors"]["beta"]["value"], dtype=float)
        error = np.array(ff["tensors"]["beta"]["error"], dtype=float)
        diff = np.abs(value - ref)
        print(f"{window}: largest |beta| {big:.1f} au; largest |fieldprop - analytic| "
              f"{np.max(diff):.2e} au ({np.max(diff) / big:.1e} of it); largest fieldprop "
              f"error bar {np.max(error):.2e}")


def density_fitting(folder: Path) -> None:
    rows, results = [], {}
    for fit in ("false", "true"):
        path = nitroaniline_job(folder / f"fit-{fit}.toml", "6-31g*", ["dipole", "alpha", "beta"],
                                "field_au = 0.001", f"density_fit = {fit}")
        start = time.perf_counter()
        result = compute(load_job(path), workers=1, progress=False)
        wall = time.perf_counter() - start
        inv = {i.name: i for i in result.invariants}
        results[fit] = (wall, inv)
        rows.append([{"false": "exact integrals", "true": "density fitting"}[fit],
                     result.backend_facts.get("n_basis_functions"),
                     result.backend_facts.get("n_auxiliary_functions", "-"),
                     result.counts.computed, f"{wall:.1f}",
                     f"{inv['alpha_iso'].value_au:.6f} +- {inv['alpha_iso'].error_au:.1e}",
                     f"{inv['beta_parallel'].value_au:.4f} +- "
                     f"{inv['beta_parallel'].error_au:.1e}"])
    print("4-nitroaniline, HF/6-31G*, mu, alpha, beta (3 levels, h0 = 0.001 au), one worker:")
    print(tabulate(rows, headers=["", "basis functions", "auxiliary functions",
                                  "points computed", "wall time (s)", "alpha_iso (au)",
                                  "beta_parallel (au)"]))
    (w0, i0), (w1, i1) = results["false"], results["true"]
    print(f"speed-up {w0 / w1:.2f}; alpha_iso moves by "
          f"{(i1['alpha_iso'].value_au - i0['alpha_iso'].value_au) / i0['alpha_iso'].value_au:.1e}"
          ", beta_parallel by "
          f"{(i1['beta_parallel'].value_au - i0['beta_parallel'].value_au) / i0['beta_parallel'].value_au:.1e}"
          " (relative)")


def overhead(folder: Path) -> None:
    """Whole-process wall time of `fieldprop run`, split by a profile of it
    (cProfile, which adds a few per cent of its own) into the backend's work
    (stages.compute_jobs: integrals, zero-field reference, field points)
    and fieldprop's own (planning, store, extrapolation, reports) plus
    process start and imports."""
    import pstats

    job = nitroaniline_job(folder / "overhead.toml", "6-31g", ["dipole", "alpha", "beta"],
                           "field_au = 0.001")
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import fieldprop.cli, pyscf.scf, pyscf.dft"],
                   check=True, env=env)
    imports = time.perf_counter() - start
    profile = folder / "run.prof"
    start = time.perf_counter()
    subprocess.run([sys.executable, "-m", "cProfile", "-o", str(profile), "-m", "fieldprop",
                    "run", str(job), "--workers", "1", "--quiet", "--store",
                    str(folder / "overhead.sqlite")],
                   check=True, env=env, stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - start
    stats = pstats.Stats(str(profile)).stats

    def cumulative(module: str, name: str) -> float:
        return sum(v[3] for (f, _, n), v in stats.items()
                   if n == name and f.replace(os.sep, "/").endswith(module))

    backend = cumulative("fieldprop/engine/stages.py", "compute_jobs")
    reference = cumulative("fieldprop/backend/tasks.py", "reference_task")
    context = cumulative("fieldprop/backend/context.py", "__init__")
    rows = [["whole process (profiled)", f"{wall:.1f}", "1.000"],
            ["backend: integrals, zero-field reference, field points", f"{backend:.1f}",
             f"{backend / wall:.3f}"],
            ["  of which the zero-field reference (SCF, response, symmetry)",
             f"{reference:.1f}", f"{reference / wall:.3f}"],
            ["  of which the integrals of the model (once per process)", f"{context:.1f}",
             f"{context / wall:.3f}"],
            ["outside the backend: start, imports, planning, store, analysis, reports",
             f"{wall - backend:.1f}", f"{(wall - backend) / wall:.3f}"],
            ["  of which python start and imports (a separate process)", f"{imports:.1f}",
             f"{imports / wall:.3f}"]]
    print("4-nitroaniline, HF/6-31G, mu, alpha, beta (3 levels), one worker, fieldprop run "
          "as a whole process:")
    print(tabulate(rows, headers=["", "wall time (s)", "share (target outside <= 0.05)"]))


if __name__ == "__main__":
    main()
