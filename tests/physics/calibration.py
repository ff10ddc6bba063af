"""Calibration of fieldprop's error bars on a validation set (used by the slow test
and by tests/benchmarks/bench_calibration.py).

For each molecule and model, finite-field tensors (energy route: mu, alpha, beta;
dipole route: alpha, beta) are compared with references that are far more precise
and built without fieldprop's numerics: PySCF's analytic SCF dipole, the CPHF/CPKS
alpha of analytic_reference.py (an independent solver), and beta from central
differences of that alpha at fields put into PySCF's core Hamiltonian here
(beta_reference; two orders below the energy route). For every component the true error
|ff - ref| and the reported error bar are collected.

Coverage: the fraction of components whose error bar covers the true error.
Sharpness: the median of error bar / true error over components whose true error
is resolvable above the reference's own uncertainty (a bar 1000x the error is as
useless as one that misses).
"""

import textwrap
from pathlib import Path

import numpy as np

from analytic_reference import cphf_polarizability
from support import NH2_ANGSTROM, bent_triatomic, geometry_text, mean_field, rotation

from fieldprop.engine.run import compute
from fieldprop.inputs.job import load_job


def _tilted(symbols, local_angstrom):
    return geometry_text(symbols, np.asarray(local_angstrom) @ rotation().T)


def _xyz(name: str):
    """Symbols and coordinates (angstrom) of one of configs/molecules/*.xyz (ours)."""
    lines = (Path(__file__).resolve().parents[2] / "configs" / "molecules" /
             f"{name}.xyz").read_text().splitlines()[2:]
    rows = [line.split() for line in lines if line.strip()]
    return [r[0] for r in rows], [[float(v) for v in r[1:4]] for r in rows]


#: Our own geometries (angstrom), near the usual equilibrium ones, tilted off the axes.
MOLECULES = {
    "water": ("OHH", bent_triatomic(0.958, 104.5), 0, 1),
    "ammonia": ("NHHH", [[0, 0, 0.0], [0.94, 0, 0.38], [-0.47, 0.814, 0.38],
                         [-0.47, -0.814, 0.38]], 0, 1),
    "hydrogen fluoride": ("FH", [[0, 0, 0], [0, 0, 0.917]], 0, 1),
    "formaldehyde": ("COHH", [[0, 0, 0], [0, 0, 1.205], [0, 0.94, -0.58], [0, -0.94, -0.58]],
                     0, 1),
    "amidogen radical": ("NHH", NH2_ANGSTROM, 0, 2),
    "water cation": ("OHH", bent_triatomic(0.99, np.degrees(1.9)), 1, 2),
    # Larger, strongly polarisable: a push-pull aromatic and a push-pull chain.
    "4-nitroaniline": (*_xyz("nitroaniline"), 0, 1),
    "3-aminopropenal": (*_xyz("aminopropenal"), 0, 1),
}

#: (molecule, model lines): HF and DFT, closed and open shell.
VALIDATION_SET = [
    ("water", 'method = "hf"'),
    ("ammonia", 'method = "hf"'),
    ("formaldehyde", 'method = "hf"'),
    ("amidogen radical", 'method = "hf"'),
    ("water cation", 'method = "hf"'),
    ("hydrogen fluoride", 'method = "dft"\nfunctional = "pbe0"'),
    ("water", 'method = "dft"\nfunctional = "b3lyp"'),
    ("amidogen radical", 'method = "dft"\nfunctional = "pbe"'),
]

#: The larger molecules (10 and 16 atoms), at HF/6-31G and h0 = 0.001 au (the
#: setting of a screening run): (molecule, model lines, basis, field_au).
LARGER_SET = [
    ("3-aminopropenal", 'method = "hf"', "6-31g", 0.001),
    ("4-nitroaniline", 'method = "hf"', "6-31g", 0.001),
]


def job_text(name: str, model: str, route: str, props, basis: str = "6-31+g*",
             field_au: float | None = 0.002, window: str = "adaptive") -> str:
    """The job of one case; ``field_au`` None: the automatic ladder, its levels
    chosen by ``window`` ("adaptive" or "full")."""
    symbols, local, charge, multiplicity = MOLECULES[name]
    dft = "dft" in model
    return textwrap.dedent("""
        [molecule]
        geometry = \"\"\"
        {geometry}
        \"\"\"
        charge = {charge}
        multiplicity = {multiplicity}
        [model]
        {model}
        basis = "{basis}"
        [response]
        properties = {props}
        differentiate = "{route}"
        {field}
        {scf}
        """).format(geometry=_tilted(symbols, local).replace("\n", "\n        "),
                    charge=charge, multiplicity=multiplicity,
                    model=model.replace("\n", "\n        "),
                    props="[" + ", ".join(f'"{p}"' for p in props) + "]", route=route,
                    basis=basis, field=(f"window = \"{window}\"" if field_au is None
                                        else f"field_au = {field_au}"),
                    scf="[scf]\n        grid_level = 3" if dft else "")


def collect(tmp_dir: Path, cases=VALIDATION_SET, workers: int = 1, window: str | None = None,
            points: list | None = None):
    """Rows (case, route, component, value, error bar, true error, reference error).
    ``window``: "adaptive" or "full" runs each case on the automatic ladder
    (None: the case's own field_au); ``points``, if given, receives the points
    each job computed."""
    rows, betas = [], {}
    for n, (name, model, *setting) in enumerate(cases):
        for route, props in (("energy", ("dipole", "alpha", "beta")),
                             ("dipole", ("alpha", "beta"))):
            path = Path(tmp_dir) / f"case{n}_{route}.toml"
            if window is None:
                path.write_text(job_text(name, model, route, props, *setting))
            else:
                basis = setting[0] if setting else "6-31+g*"
                path.write_text(job_text(name, model, route, props, basis, None, window))
            job = load_job(path)
            result = compute(job, progress=False, workers=workers)
            if points is not None:
                points.append(result.counts.computed)
            mf = mean_field(job)
            origin = result.molecule.origin_bohr
            # The references' own uncertainty, from the reference SCF's measured
            # orbital gradient g (support.mean_field converges it to ~1e-11): the
            # CPHF alpha errs by ~g |alpha| (water, HF: 1.8e-11 between g = 4.4e-12
            # and 2e-12, |alpha| = 9) plus the solver's tolerance (1e-11 relative,
            # analytic_reference._TOL) times |alpha|; the SCF dipole by ~g for a
            # closed shell and up to ~6 g for the open shells here (measured
            # against a second-order SCF converged to 1e-13), hence 10 g.
            g_ref = float(np.linalg.norm(mf.get_grad(mf.mo_coeff, mf.mo_occ)))
            alpha_ref = cphf_polarizability(mf, origin)
            alpha_err = (g_ref + 1e-11) * max(float(np.abs(alpha_ref).max()), 1.0)
            refs = {"alpha": (alpha_ref, np.full((3, 3), alpha_err))}
            if "dipole" in props:
                from analytic_reference import scf_dipole

                open_shell = MOLECULES[name][3] > 1
                refs["dipole"] = (scf_dipole(mf, origin),
                                  np.full(3, (10.0 if open_shell else 1.0) * g_ref))
            if (name, model) not in betas:
                betas[name, model] = beta_reference(job, origin)
            refs["beta"] = betas[name, model]
            label = f"{name} {model.split(chr(10))[-1].split('=')[-1].strip()}"
            for tensor, (ref, ref_err) in refs.items():
                t = result.tensors[tensor]
                for c in t.components:
                    idx = c.entries[0]
                    rows.append((label, route, c.plan.name, c.estimate.value_au,
                                 c.estimate.error_au, abs(c.estimate.value_au - ref[idx]),
                                 float(ref_err[idx])))
    return rows


def beta_reference(job, origin, steps=(0.001, 0.002, 0.004)):
    """beta_ijk = d alpha_ij / dF_k from central differences of the CPHF/CPKS
    alpha of PySCF SCFs with the field in their core Hamiltonian (test code
    only: analytic_reference and support.mean_field), one Richardson step over
    the first two steps; its uncertainty, the difference from the same step
    over the last two (the truncation it leaves is far smaller)."""
    estimates, noise = [], 1e-10  # the CPHF alphas' own noise (~g |alpha|, see collect)
    for h in steps:
        d = np.zeros((3, 3, 3))
        for k in range(3):
            f = np.zeros(3)
            f[k] = h
            alphas = []
            for sign in (1.0, -1.0):
                mf = mean_field(job, field=sign * f, origin=origin, accept_gradient=1e-9)
                alpha = cphf_polarizability(mf, origin)
                g = float(np.linalg.norm(mf.get_grad(mf.mo_coeff, mf.mo_occ)))
                if h == steps[0]:
                    noise = max(noise, (g + 1e-11) * float(np.abs(alpha).max()))
                alphas.append(alpha)
            d[:, :, k] = (alphas[0] - alphas[1]) / (2 * h)
        estimates.append(d)
    first = (4 * estimates[0] - estimates[1]) / 3
    second = (4 * estimates[1] - estimates[2]) / 3
    # Symmetrised over all index orders (the static beta is fully symmetric):
    # the finite-field tensors compared with it are too, entry by entry.
    value = sum(np.transpose(first, p) for p in _PERMUTATIONS) / 6
    spread = sum(np.transpose(np.abs(first - second), p) for p in _PERMUTATIONS) / 6
    # Plus the CPHF alphas' noise through the Richardson step (4/3 of two
    # central differences over 2h, the larger step's share a quarter of it).
    return value, spread + 2.0 * noise / steps[0]


_PERMUTATIONS = ((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0))


def figures(rows):
    """Coverage and median sharpness (see the module docstring)."""
    covered = [abs_err <= err + ref_err for _, _, _, _, err, abs_err, ref_err in rows]
    ratios = [err / abs_err for _, _, _, _, err, abs_err, ref_err in rows
              if abs_err > 3 * ref_err and abs_err > 0]
    sharpness = float(np.median(ratios)) if ratios else float("nan")
    return float(np.mean(covered)), sharpness, len(rows), len(ratios)
