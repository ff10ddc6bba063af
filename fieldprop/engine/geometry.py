"""The nuclei: geometry optimisation and nuclear relaxation.

With [geometry] optimise, the optimised geometry (:func:`optimised`, stored
under :func:`geometry_key`, moved exactly onto its point group by
:func:`symmetrised_optimum`); with [response] nuclear_relaxation, the
zero-field minimum every relaxation is held to (:func:`relaxed_reference`),
the relaxed points' tasks (:func:`relaxed_tasks`) and one field's relaxed
structure (:func:`relax_at_field`). It may import the pure rooms (numerics,
inputs, points), the backend's functions lazily (only where a geometry or a
frame is computed), and of the engine :mod:`fieldprop.engine.prepare` alone.
"""

from __future__ import annotations

import dataclasses
import logging
import time

import numpy as np

from fieldprop import errors
from fieldprop.engine.prepare import Prepared, symmetric_molecule
from fieldprop.errors import IncompleteError
from fieldprop.inputs.job import Job
from fieldprop.inputs.molecule import MoleculeSpec, build_molecule
from fieldprop.numerics.methods import Route
from fieldprop.points.keys import model_document, model_key, short_id
from fieldprop.points.records import PointTask

logger = logging.getLogger(__name__)


def geometry_key(job: Job) -> str:
    """The store key of a job's optimised geometry: the starting nuclei (as
    :func:`fieldprop.keys.model_document` fixes them), charge, multiplicity,
    the optimisation's model (method, functional, basis, reference, density
    fitting, DFT grid), the numerics version, the criteria and step limit."""
    from fieldprop.backend import optimisation_model
    from fieldprop.points.keys import digest

    model = optimisation_model(job)
    molecule = build_molecule(job.molecule, job.response.origin)
    document = model_document(molecule, model, job.scf)
    document["scf"] = {"grid_level": job.scf.grid_level}  # the optimiser's SCF is its own
    return digest({"kind": "fieldprop-geometry", "model": document,
                   "criteria": job.geometry.thresholds(), "max_steps": job.geometry.max_steps})


def with_geometry(job: Job, document: dict) -> Job:
    """``job`` with the optimised coordinates of ``document`` (the stored
    optimisation), moved onto their point group (:func:`symmetrised_optimum`),
    and the document itself as ``job.optimisation``."""
    from fieldprop.inputs.job import Atom

    document = symmetrised_optimum(job, document)
    coords = document["coords_bohr"]
    if len(coords) != len(job.molecule.atoms):
        raise ValueError(f"{job.path}: a stored optimised geometry has {len(coords)} atoms, "
                         f"the molecule {len(job.molecule.atoms)}")
    atoms = tuple(Atom(a.symbol, tuple(float(v) for v in xyz))
                  for a, xyz in zip(job.molecule.atoms, coords))
    molecule = dataclasses.replace(job.molecule, atoms=atoms,
                                   source=f"{job.molecule.source}, optimised")
    return dataclasses.replace(job, molecule=molecule, optimisation=document)


def optimised(job: Job, store=None, compute: bool = True) -> Job:
    """The job at its optimised geometry when [geometry] optimise is set:
    from the store, or optimised now (``compute``) and stored; else ``job``.
    Without ``compute`` a geometry not stored is IncompleteError (exit 3)."""
    if not job.geometry.optimize or job.optimisation is not None:
        return job
    key = geometry_key(job)
    document = store.get_geometry(key) if store is not None else None
    if document is None:
        if not compute:
            raise IncompleteError(f"{job.path}: [geometry] optimise: the optimised geometry "
                                  f"(key {short_id(key)}) is not in "
                                  f"{store.label if store is not None else 'any store'}; "
                                  "fieldprop run, or fieldprop point --zero-field, optimises "
                                  "it first")
        from fieldprop.backend import optimize_geometry

        start = time.perf_counter()
        logger.info("%s: optimising the geometry (%s criteria, at most %d steps)", job.path,
                    job.geometry.criteria, job.geometry.max_steps)
        molecule = build_molecule(job.molecule, job.response.origin)
        document = optimize_geometry(job, molecule)
        document["wall_time_s"] = time.perf_counter() - start
        if store is not None:
            store.put_geometry(key, document)
        logger.info("%s: geometry optimised in %d steps, %.1f s (largest gradient %.1e Eh/bohr)",
                    job.path, document["steps"], document["wall_time_s"],
                    document["largest_gradient_au"])
    else:
        logger.info("%s: the optimised geometry from %s", job.path, store.label)
    return with_geometry(job, document)


def symmetrised_optimum(job: Job, document: dict) -> dict:
    """An optimised geometry made exactly symmetric at its source.

    An optimiser leaves its structure a little off the point group it
    converged to (formaldehyde came out tilted by ~1e-7 angstrom): computed as
    it stands, forbidden components are small numbers with tiny bars instead
    of zeros. The geometry is moved onto the group of the starting geometry
    (whose operations, for a molecule placed in its symmetry axes, keep the
    elements on those axes) where that group fits the optimum within
    symmetry.SYMMETRY_TOLERANCE_BOHR, else onto the group the optimum itself
    is near; the move (within the optimiser's own tolerance) is recorded as
    ``document["symmetrised"]``. So the geometry reported and written is the
    one computed, and symmetry applies to it exactly."""
    from fieldprop.numerics import symmetry

    start = build_molecule(job.molecule, job.response.origin)
    charges = start.nuclear_charges
    optimum = np.asarray(document["coords_bohr"], dtype=float)
    group = symmetry.detect(charges, start.coords_bohr)
    coords = None if group is None else symmetry.symmetrise_like(group, charges, optimum)
    if coords is None:
        group = symmetry.detect(charges, optimum)
        coords = None if group is None else np.asarray(group.coords_bohr, dtype=float)
    if coords is None:
        return document
    moved = float(np.max(np.linalg.norm(coords - optimum, axis=1)))
    return {**document, "coords_bohr": [[float(v) for v in row] for row in coords],
            "symmetrised": {"group": group.name, "moved_bohr": moved}}


def relaxation_key(job: Job, molecule: MoleculeSpec) -> str:
    """The store key of a job's zero-field relaxation frame: the model's
    reference key (nuclei, model, SCF), the route (the dipole's tolerance
    applies on the dipole route) and the relaxation's tolerances."""
    from fieldprop.numerics import relaxation as nr
    from fieldprop.points.keys import digest

    document = {"kind": "fieldprop-relaxation-frame",
                "model": model_key(molecule, job.model, job.scf),
                "route": str(job.response.route),
                "tolerances": [nr.MINIMUM_GRADIENT_AU, nr.ENERGY_TOLERANCE_AU,
                               nr.DIPOLE_TOLERANCE_AU, nr.MAX_STEPS, nr.STALL_FACTOR]}
    if job.molecule.isotope_masses:  # the frame's masses (the Eckart conditions, the modes)
        document["isotopes"] = [list(pair) for pair in job.molecule.isotope_masses]
    return digest(document)


def needs_frame(job: Job) -> bool:
    """Whether the job needs the zero-field minimum's frame (Hessian, modes):
    nuclear relaxation or zero-point averaging."""
    return job.response.nuclear_relaxation or job.response.zero_point


def relaxed_reference(job: Job, store=None, compute: bool = True) -> Job:
    """With [response] nuclear_relaxation or zero_point: ``job`` at the zero-field minimum
    of its model (the frame every relaxation is held to: from the store, or
    computed now and stored; ``job.relaxation`` its document). Refuses
    (InputError) a geometry that is not a minimum. Without ``compute`` a frame
    not stored is IncompleteError (exit 3). Otherwise ``job`` itself."""
    if not needs_frame(job) or job.relaxation is not None:
        return job
    molecule, _ = symmetric_molecule(job)
    key = relaxation_key(job, molecule)
    document = store.get_geometry(key) if store is not None else None
    if document is None:
        if not compute:
            key_name = "nuclear_relaxation" if job.response.nuclear_relaxation else "zero_point"
            raise IncompleteError(f"{job.path}: [response] {key_name}: the zero-field "
                                  f"frame (key {short_id(key)}) is not in "
                                  f"{store.label if store is not None else 'any store'}; "
                                  "fieldprop run computes it first")
        from fieldprop.backend import relaxation_frame

        logger.info("%s: the zero-field minimum for %s: gradient, Hessian, dipole "
                    "derivatives", job.path, " and ".join(
                        w for w, on in (("nuclear relaxation", job.response.nuclear_relaxation),
                                        ("zero-point averaging", job.response.zero_point))
                        if on))
        document = relaxation_frame(job, molecule, job.response.route is Route.DIPOLE)
        if store is not None:
            store.put_geometry(key, document)
        logger.info("%s: zero-field minimum polished in %d step%s (moved %.1e bohr), lowest "
                    "harmonic frequency %.0f cm^-1, %.1f s", job.path, document["polish_steps"],
                    "" if document["polish_steps"] == 1 else "s", document["moved_bohr"],
                    document["frequencies_cm"][0] if document["frequencies_cm"] else 0.0,
                    document["wall_time_s"])
    from fieldprop.inputs.job import Atom

    # The polish moves the minimum by the gradient's noise: back onto its group.
    document = symmetrised_optimum(job, document)
    atoms = tuple(Atom(a.symbol, tuple(float(v) for v in xyz))
                  for a, xyz in zip(job.molecule.atoms, document["coords_bohr"]))
    molecule_input = dataclasses.replace(job.molecule, atoms=atoms)
    return dataclasses.replace(job, molecule=molecule_input, relaxation=document)


def relax_target(prepared: Prepared):
    """The RelaxTarget of a prepared job with a relaxation frame."""
    from fieldprop.points.records import RelaxTarget
    from fieldprop.numerics.relaxation import Frame

    job = prepared.job
    doc = job.relaxation
    frame = Frame.build(doc["coords_bohr"], doc["masses_u"], doc["hessian_cartesian"],
                        doc["dipole_derivatives_cartesian"])
    return RelaxTarget(frame, job.response.route is Route.DIPOLE,
                       relaxation_key(job, prepared.molecule))


def relaxed_tasks(prepared: Prepared) -> list[PointTask]:
    """The relaxed points of the computed tasks (zero field: the clamped
    point itself, the frame being its minimum), keyed by the clamped point's
    key and the frame's."""
    from fieldprop.points.keys import digest

    target = relax_target(prepared)
    out = []
    for task in prepared.computed_tasks:
        if task.is_zero_field:
            out.append(task)
            continue
        key = digest({"kind": "fieldprop-relaxed-point", "point": task.key,
                      "frame": target.key})
        out.append(dataclasses.replace(task, key=key, relax=target))
    return out


def relax_at_field(prepared: Prepared, field_au) -> dict:
    """The nuclei of a prepared job (at its zero-field minimum: relaxed_reference)
    relaxed in one static field, under the Eckart conditions: the forces the
    field puts on the zero-field minimum, the relaxed structure, each atom's
    displacement, the relaxation energy and the dipole before and after. A
    document (bohr, Eh, au). Raises ScfNotConvergedError when an SCF or the
    relaxation does not converge."""
    from fieldprop.numerics import relaxation
    from fieldprop.backend import StructureEvaluator

    start = time.perf_counter()
    job, molecule = prepared.job, prepared.molecule
    field = np.asarray(field_au, dtype=float)
    target = relax_target(prepared)
    frame = target.frame
    evaluate = StructureEvaluator(molecule, job.model, job.scf, field,
                                  label="(" + ", ".join(f"{v:g}" for v in field) + ") au")
    clamped = evaluate(frame.coords_bohr)
    try:
        relaxed = relaxation.relax(frame, field, evaluate, dipole_matters=True)
    except relaxation.NotRelaxed as exc:
        raise errors.ScfNotConvergedError(f"{job.path}: field {evaluate.label}: the structure "
                                          f"was {exc}") from exc
    shift, turn = relaxation.eckart_residuals(frame.coords_bohr, relaxed.coords_bohr,
                                              frame.masses)
    moved = relaxed.coords_bohr - frame.coords_bohr
    return {
        "field_au": [float(v) for v in field],
        "symbols": list(molecule.symbols),
        "origin_bohr": [float(v) for v in molecule.origin_bohr],
        "masses_u": [float(m) for m in frame.masses],
        "zero_field_minimum_bohr": [[float(v) for v in row] for row in frame.coords_bohr],
        "forces_at_minimum_au": [[float(-v) for v in row] for row in clamped.gradient],
        "relaxed_bohr": [[float(v) for v in row] for row in relaxed.coords_bohr],
        "displacement_bohr": [[float(v) for v in row] for row in moved],
        "energy_clamped_au": clamped.energy_au,
        "energy_relaxed_au": relaxed.evaluation.energy_au,
        "relaxation_energy_au": clamped.energy_au - relaxed.evaluation.energy_au,
        "dipole_clamped_au": [float(v) for v in clamped.dipole_au],
        "dipole_relaxed_au": [float(v) for v in relaxed.evaluation.dipole_au],
        "eckart_residuals": {"translation_bohr": shift, "rotation_bohr2": turn},
        **{k: v for k, v in relaxed.document().items() if k != "coords_bohr"},
        "gradients": evaluate.gradients,
        "wall_time_s": time.perf_counter() - start,
    }
