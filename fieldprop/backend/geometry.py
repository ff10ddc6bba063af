"""Geometry optimisation at zero field: the model it is done at and the
optimisation itself (geomeTRIC through PySCF), with its final SCF checked.
"""

from __future__ import annotations

import contextlib
import dataclasses
import io
import logging
import os
import tempfile
import warnings

import numpy as np

from fieldprop.backend.molecule import _mean_field, build_mole, frozen_orbitals
from fieldprop.backend.solver import _gradient_norm
from fieldprop.inputs.job import DEFAULT_GRID_LEVEL, Job

logger = logging.getLogger(__name__)


#: The SCF inside a geometry optimisation (each step's and the final one):
#: an energy to 1e-10 Eh (far below the criteria's energy changes, 1e-8 to 1e-6 Eh) and
#: an orbital gradient of 1e-6, which moved PySCF's nuclear gradient of water
#: by 2e-9 (HF/6-31G) and 4e-8 Eh/bohr (B3LYP) from a converged SCF's, below
#: the finest criteria's largest gradient (3e-6 Eh/bohr).
OPTIMISATION_ENERGY_TOL_AU = 1e-10
OPTIMISATION_GRADIENT_TOL = 1e-6


def optimisation_model(job: Job):
    """The model the geometry is optimised at: [geometry] method, functional
    and basis where given, else the job's model."""

    g = job.geometry
    model = job.model
    if g.method is not None and g.method != model.method:
        model = dataclasses.replace(model, method=g.method, functional=g.functional,
                                    frozen_core=False if g.method in ("hf", "dft") else
                                    model.frozen_core)
    elif g.functional is not None:
        model = dataclasses.replace(model, functional=g.functional)
    if g.basis is not None:
        model = dataclasses.replace(model, basis=g.basis)
    return model


_GEOMETRIC_LOG_CONFIG = """[loggers]
keys=root
[handlers]
keys=errors
[formatters]
keys=plain
[logger_root]
level=ERROR
handlers=errors
[handler_errors]
class=NullHandler
level=ERROR
formatter=plain
args=()
[formatter_plain]
format=%(message)s
"""


def _step(env: dict, steps: list, job, thresholds: dict) -> None:
    """One optimisation step done: counted, and logged (a long optimisation
    is otherwise silent in a batch log)."""
    steps.append(1)
    gradient = float(np.abs(env["gradients"]).max())
    logger.info("%s: optimisation step %d: E = %.10f Eh, largest gradient %.1e Eh/bohr "
                "(converged below %.0e)", job.path, len(steps), float(env["energy"]), gradient,
                thresholds["gradient_max_au"])


def _optimiser_thresholds(thresholds: dict[str, float]) -> dict[str, float]:
    """The job's criteria (job.GEOMETRY_CRITERIA) as the optimiser's keyword
    arguments (steps in angstrom there)."""
    from pyscf.data.nist import BOHR

    return {"convergence_energy": thresholds["energy_change_au"],
            "convergence_gmax": thresholds["gradient_max_au"],
            "convergence_grms": thresholds["gradient_rms_au"],
            "convergence_dmax": thresholds["step_max_bohr"] * BOHR,
            "convergence_drms": thresholds["step_rms_bohr"] * BOHR}


def optimize_geometry(job: Job, molecule) -> dict:
    """Optimise ``molecule`` (a MoleculeSpec) at the job's optimisation model
    with geomeTRIC through PySCF, at zero field, to the job's criteria.

    Returns a document: coordinates (bohr), energy, steps, the largest
    remaining gradient component, the criteria, the model. Raises
    ScfNotConvergedError (named) when it does not converge in max_steps, or
    when the SCF at the geometry it ends at does not converge.
    """
    from pyscf.geomopt import geometric_solver

    from fieldprop.errors import ScfNotConvergedError

    model = optimisation_model(job)
    where = "[geometry] basis" if job.geometry.basis is not None else "[model] basis"
    mol = build_mole(molecule, model.basis, f"{job.path}: {where}", model.cartesian)
    scf_spec = job.scf
    if model.method == "dft" and scf_spec.grid_level is None:
        scf_spec = dataclasses.replace(scf_spec, grid_level=DEFAULT_GRID_LEVEL)
    mf = _mean_field(mol, model, scf_spec)
    mf.conv_tol, mf.conv_tol_grad = OPTIMISATION_ENERGY_TOL_AU, OPTIMISATION_GRADIENT_TOL
    method = mf
    if model.method == "mp2":
        from pyscf import mp

        method = mp.MP2(mf, frozen=frozen_orbitals(mol, model) or None)
    thresholds = job.geometry.thresholds()
    params = _optimiser_thresholds(thresholds)
    steps = []
    try:
        with warnings.catch_warnings(), contextlib.redirect_stdout(io.StringIO()), \
                tempfile.TemporaryDirectory() as folder:
            warnings.simplefilter("ignore")
            # geomeTRIC logs every step (and its banner) to stderr through a
            # logging configuration file; ours keeps only its errors.
            quiet = os.path.join(folder, "log.ini")
            with open(quiet, "w", encoding="utf-8") as out:
                out.write(_GEOMETRIC_LOG_CONFIG)
            converged, mol_eq = geometric_solver.kernel(
                method, maxsteps=job.geometry.max_steps, assert_convergence=False,
                callback=lambda env: _step(env, steps, job, thresholds), logIni=quiet,
                **params)
    except Exception as exc:  # noqa: BLE001 - named, never a traceback
        raise ScfNotConvergedError(f"{job.path}: [geometry] optimise: the optimisation failed "
                                   f"inside the backend ({type(exc).__name__}: "
                                   f"{' '.join(str(exc).split())[:200]})") from exc
    if not converged:
        raise ScfNotConvergedError(f"{job.path}: [geometry] optimise: not converged in "
                                   f"max_steps = {job.geometry.max_steps} steps; raise it, or "
                                   "start from a better geometry")
    final = _mean_field(mol_eq, model, scf_spec)
    final.conv_tol, final.conv_tol_grad = OPTIMISATION_ENERGY_TOL_AU, OPTIMISATION_GRADIENT_TOL
    final.kernel()
    if not final.converged:
        # Its gradient, energy and coordinates would be those of no state.
        raise ScfNotConvergedError(
            f"{job.path}: [geometry] optimise: the SCF at the optimised geometry did not "
            f"converge in [scf] max_iterations = {final.max_cycle} cycles (orbital gradient "
            f"{_gradient_norm(final):.1e}, target {final.conv_tol_grad:g}); no geometry is "
            "formed from it")
    target = final
    if model.method == "mp2":
        from pyscf import mp

        target = mp.MP2(final, frozen=frozen_orbitals(mol_eq, model) or None).run()
    gradient = target.nuc_grad_method().kernel()
    return {"coords_bohr": [[float(v) for v in row] for row in mol_eq.atom_coords()],
            "energy_au": float(target.e_tot), "steps": len(steps),
            "largest_gradient_au": float(np.max(np.abs(gradient))),
            "criteria": job.geometry.criteria, "thresholds": thresholds,
            "optimiser": "geomeTRIC through PySCF",
            "model": {"method": model.method, "functional": model.functional,
                      "basis": model.basis if isinstance(model.basis, str) else
                      dict(model.basis), "reference": model.reference}}
