"""The backend: the only room that imports PySCF (always inside functions, so
that importing it loads none of PySCF).

PySCF objects are built inside the worker from the plain data of a
:class:`~fieldprop.points.records.PointTask`, with ``verbose=0`` (stdout
carries data). Other rooms import from here (``from fieldprop.backend import
compute_point, ModelContext``) or from the module that holds a name.

Modules, each importing only those above it:

``molecule``
    The PySCF ``Mole`` and mean-field object of a model; the checks only PySCF
    can make before any work (:func:`validate`); the frozen core; the backend
    versions a model is computed with.
``orbital_hessian``
    The layout of orbital rotations per kind of mean field, the orbital
    Hessian A + B over them and its conjugate-gradient solve, PySCF's
    density-response function.
``states``
    The state checks: occupied orbitals, <S^2>, the symmetry operations the
    zero-field state shares and their characters, the verdict on one point.
``orientation``
    Degenerate open shells: the orientation constraints that keep each point
    at zero field's orientation, the turn to a reproducible frame, its record.
``response``
    Linear response of a converged SCF: its dipole, the analytic (CPHF)
    polarizability, the dipole error the remaining orbital gradient leaves.
``context``
    The field term (:func:`~fieldprop.backend.context._apply_field`) and
    :class:`ModelContext`: integrals, grid, zero-field reference and response
    shared by every point of one model in one process.
``solver``
    The SCF of a field point: starts, Newton steps, PySCF's ladder, and
    ``_converge``, which accepts or refuses the result.
``correlated``
    MP2, CCSD and CCSD(T) energies on the field-perturbed mean field.
``points``
    One clamped point: the zero-field reference (:func:`compute_reference`)
    and every other point (:func:`compute_point`).
``gradients``
    Nuclear gradients in a field: structures in one field
    (:class:`StructureEvaluator`), the nuclear Hessian, the relaxation frame
    (:func:`relaxation_frame`), points with relaxed nuclei
    (:func:`compute_relaxed_point`).
``geometry``
    Geometry optimisation at zero field (:func:`optimize_geometry`).
``tasks``
    The worker functions an executor runs (picklable arguments, named
    failures), and the process's cache of model contexts.
"""

from fieldprop.backend.molecule import (auxiliary_basis, backend_versions, build_mole,
                                        frozen_orbitals, validate)
from fieldprop.backend.orbital_hessian import response_function
from fieldprop.backend.states import state_issues, symmetry_operations
from fieldprop.backend.orientation import orientation_constraints, orientation_record
from fieldprop.backend.response import (analytic_polarizability, diagonal_dipole_step,
                                        newton_dipole_step)
from fieldprop.backend.context import ModelContext
from fieldprop.backend.solver import field_key
from fieldprop.backend.points import compute_point, compute_reference
from fieldprop.backend.gradients import (StructureEvaluator, atom_masses,
                                         compute_relaxed_point, field_mean_field,
                                         relaxation_frame)
from fieldprop.backend.geometry import optimisation_model, optimize_geometry
from fieldprop.backend.tasks import (gradient_task, optimise_task, point_task,
                                     reference_task, refuse_another_backend)

__all__ = [
    "ModelContext", "StructureEvaluator", "analytic_polarizability", "atom_masses",
    "auxiliary_basis", "backend_versions", "build_mole", "compute_point",
    "compute_reference", "compute_relaxed_point", "diagonal_dipole_step", "field_key",
    "field_mean_field", "frozen_orbitals", "gradient_task", "newton_dipole_step",
    "optimisation_model",
    "optimise_task", "optimize_geometry", "orientation_constraints", "orientation_record",
    "point_task", "reference_task", "refuse_another_backend", "relaxation_frame",
    "response_function", "state_issues", "symmetry_operations", "validate",
]
