"""Units of work and their results, shared by the executor, the backend and reports.

A :class:`PointTask` is everything a worker needs to compute one field point
besides the zero-field reference, which is passed beside it (computed once per
molecule and model, stored once, sent once); it is frozen and picklable (plain
dataclasses, tuples and NumPy arrays; no PySCF object). A :class:`PointRecord`
is what comes back; a :class:`PointFailure` is a point that could not be
computed, with the reason.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from fieldprop.inputs.job import ModelSpec, ScfSpec
from fieldprop.points.keys import Quantities
from fieldprop.inputs.molecule import MoleculeSpec
from fieldprop.numerics.plan import FieldPoint
from fieldprop.numerics.relaxation import Frame

#: Relative residual at which the CPHF/CPKS linear equations count as solved: far
#: below the finite-difference precision of any derivative taken of alpha. Used
#: by the backend's solver and by the noise model of the analysis.
CPHF_RTOL = 1e-11

#: Names of the SCF strategies in ``PointRecord.attempts``, as the backend
#: appends them (defined here once, so that what counts as a retry follows the
#: solver): the starts of a field point's Newton steps (the zero-field orbitals
#: rotated by the linear response, by the opposite point's rotation and
#: those of points on the same line, or not rotated when there is no response:
#: backend.solver._start_orbitals), DIIS, the turn of a degenerate open shell
#: onto its fixed orientation, the Newton steps, the exact one-electron solution.
RESPONSE_START = "response_start"
MIRROR_START = "mirror_start"
LINE_START = "line_start"
REFERENCE_START = "reference_start"
FIELD_STARTS = (RESPONSE_START, MIRROR_START, LINE_START, REFERENCE_START)
#: Solved points on a field point's line (besides the one at the opposite
#: field) that its start uses at most, in the order of :func:`line_preference`:
#: the start's polynomial (backend.solver._start_orbitals) and the points a
#: point waits for (points.executors.predecessors) follow this one number.
MAX_LINE_POINTS = 4


def line_preference(t: float) -> tuple[float, float, float]:
    """Sort key of a solved point at t F (t != 0, 1, -1) for the start of the
    point F on its line: nearest to |t| = 1 on a log scale first (inside,
    ``|t| < 1``, the farthest from zero field; outside, the nearest), the one
    farther out at equal distance (interpolation between it and zero field
    rather than extrapolation), the opposite side first at equal size. A point
    that the adaptive window adds inside points already solved (a smaller
    step) so starts from the polynomial through them, an interpolation,
    instead of from the linear response alone."""
    return (abs(math.log(abs(t))), -abs(t), t)
DIIS = "diis"
ORIENTATION = "orientation"
NEWTON = "newton"
ONE_ELECTRON = "one_electron"

#: The SCF strategies a point takes when nothing goes wrong: a field point's
#: start and Newton steps; zero field's DIIS (and turn) and Newton steps; DIIS
#: alone ([scf] solver = "diis", a relaxed structure);
#: one electron: exact. Anything else went down PySCF's ladder (a retry).
PRIMARY_PATHS = frozenset({(start, NEWTON) for start in FIELD_STARTS}
                          | {(DIIS, NEWTON), (DIIS, ORIENTATION, NEWTON), (DIIS,),
                             (ONE_ELECTRON,)})


@dataclass(frozen=True, eq=False)
class SymmetryOperation:
    """A point-group operation of the molecule (nuclei, charges and basis alike).

    ``matrix`` (3, 3) acts on vectors of the input frame; ``representation``
    (nao, nao) holds <chi_mu | R chi_nu>, the operation on the basis functions;
    ``characters`` are those of the zero-field occupied space, one per orbital
    set (see the backend): trace(C^T representation C), integers for a state of
    the molecule's symmetry.
    """

    name: str
    matrix: np.ndarray
    representation: np.ndarray
    characters: tuple[float, ...]


@dataclass(frozen=True, eq=False)
class ZeroFieldReference:
    """What each field point is started from and compared with.

    ``density`` is the converged zero-field AO density (shape (nao, nao), or
    (2, nao, nao) unrestricted): the warm start. ``occupied`` holds the occupied
    orbital coefficients per spin (the state reference); ``s2`` is <S^2>;
    ``symmetry`` the operations (of the largest abelian subgroup) whose
    characters the zero-field state has, for the occupation-by-symmetry check.
    ``mo_coeff`` (nao, nmo), or (2, nao, nmo) unrestricted, and ``mo_occ`` are
    the converged zero-field orbitals (semi-canonical) and occupations;
    ``field_rotations`` (3, n) their linear response to a field along x, y, z:
    the occupied-virtual rotations kappa = -(A + B)^-1 r_vo (CPHF/CPKS), in the
    block order of the backend's orbital Hessian; empty where there is none
    (one electron). A point at field F starts from the
    zero-field orbitals rotated by sum_j F_j kappa_j: exact to first order in F.
    ``response_subspace``: (directions, products), rows: the search directions
    of the solves that gave ``field_rotations`` and their products with the
    orbital Hessian, which deflate the field points' Newton steps (carried to
    the workers in memory; not stored: a process that reads the reference
    from a store solves them again). ``gradient_floor``: the orbital gradient
    from which the zero-field Newton steps stopped halving it (the floor
    double precision allows for this molecule and model; 0 where they never
    stalled): field points aim at no less than a margin above it
    (solver._point_target). ``nuclear_gradient``: (largest |component|,
    Eh/bohr; its atom, from 0) of the nuclear gradient at zero field, where
    the model has one (HF, DFT): the geometry check (None: not checked).
    """

    density: np.ndarray
    occupied: tuple[np.ndarray, ...]
    s2: float
    symmetry: tuple[SymmetryOperation, ...] = ()
    mo_coeff: np.ndarray | None = None
    mo_occ: np.ndarray | None = None
    field_rotations: np.ndarray | None = None
    response_subspace: tuple[np.ndarray, np.ndarray] | None = None
    gradient_floor: float = 0.0
    nuclear_gradient: tuple[float, int] | None = None


@dataclass(frozen=True)
class Orientation:
    """The orientation of a degenerate open shell's zero-field determinant (an
    atom, or a linear molecule, whose unpaired density breaks its rotational
    symmetry), which the backend turned it to and every field point keeps.

    ``kind``: "linear" or "atom". ``axes``: rows, unit vectors in the input
    frame (MoleculeSpec.orientation_frame): linear (u, v, n), the unpaired
    density along u, n the molecular axis; atom (x, y, z), the unpaired
    density's principal axes, largest second moment first.
    ``unpaired_second_moments_bohr2``: the unpaired (alpha minus beta)
    density's second moments along those axes about ``centre_bohr`` (the
    atom's nucleus, or the first atom on the axis), in e bohr^2.

    >>> o = Orientation("linear", ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0), (0.0, 0.0, 1.0)),
    ...                 (2.1, 0.6, 0.7), (0.0, 0.0, 0.0))
    >>> o.labels, o.average, Orientation.from_document(o.document()) == o
    (('u', 'v', 'n'), 'cylindrical', True)
    """

    kind: str
    axes: tuple[tuple[float, float, float], ...]
    unpaired_second_moments_bohr2: tuple[float, float, float]
    centre_bohr: tuple[float, float, float]

    @property
    def labels(self) -> tuple[str, str, str]:
        """The names of ``axes`` in tables and component names."""
        return ("u", "v", "n") if self.kind == "linear" else ("x", "y", "z")

    @property
    def average(self) -> str:
        """What a freely turning molecule shows: the average over turns about
        the axis ("cylindrical") or over all turns ("spherical", an atom)."""
        return "cylindrical" if self.kind == "linear" else "spherical"

    def document(self) -> dict:
        """As stored (JSON)."""
        return {"kind": self.kind, "axes": [list(a) for a in self.axes],
                "unpaired_second_moments_bohr2": list(self.unpaired_second_moments_bohr2),
                "centre_bohr": list(self.centre_bohr)}

    @classmethod
    def from_document(cls, doc: dict) -> "Orientation":
        """The inverse of :meth:`document`; ValueError for anything else."""
        try:
            kind = doc["kind"]
            axes = tuple(tuple(float(v) for v in row) for row in doc["axes"])
            moments = tuple(float(v) for v in doc["unpaired_second_moments_bohr2"])
            centre = tuple(float(v) for v in doc["centre_bohr"])
        except (KeyError, TypeError, ValueError):
            raise ValueError("not an orientation document") from None
        if kind not in ("linear", "atom") or len(axes) != 3 or any(len(a) != 3 for a in axes) \
                or len(moments) != 3 or len(centre) != 3:
            raise ValueError("not an orientation document")
        return cls(kind, axes, moments, centre)


@dataclass(frozen=True, eq=False)
class RelaxTarget:
    """What makes a field point a relaxed one: the nuclei move to the minimum
    of E(R; F) under the Eckart conditions of ``frame`` (the zero-field
    minimum, its Hessian and dipole derivatives: fieldprop.relaxation.Frame);
    ``dipole_route``: the dipole is differentiated, so its optimiser error
    counts too. ``key``: the frame's key (part of the point's key)."""

    frame: Frame
    dipole_route: bool
    key: str


@dataclass(frozen=True, eq=False)
class PointTask:
    """One field point of one job, ready for any worker process.

    ``key`` is the point's store key (:func:`fieldprop.keys.point_key`),
    ``model_key`` that of its zero-field reference. ``quantities`` says what is
    computed beside the energy: the analytic dipole, the analytic CPHF/CPKS alpha,
    and for the dipole's convergence error the full-Hessian estimate
    (backend.newton_dipole_step) rather than the diagonal one.
    """

    molecule: MoleculeSpec
    model: ModelSpec
    scf: ScfSpec
    point: FieldPoint
    quantities: Quantities
    key: str = ""
    model_key: str = ""
    #: Relax the nuclei in the field (None: clamped nuclei, the usual point).
    relax: RelaxTarget | None = None
    #: Tightening steps of its convergence (``scf`` is then the model's
    #: ScfSpec.tightened(tightening)); 0: the model's own targets.
    tightening: int = 0

    @property
    def is_zero_field(self) -> bool:
        return self.point.offsets == (0, 0, 0)

    @property
    def tolerances(self) -> dict | None:
        """A tightened point's convergence targets, as its key holds them
        (None: the model's own)."""
        from fieldprop.points.keys import tolerance_document

        return tolerance_document(self.scf) if self.tightening else None


@dataclass(frozen=True, eq=False)
class PointRecord:
    """The computed point.

    ``energy_au`` is the total energy of the requested method; ``scf_energy_au``
    that of the reference determinant; ``dipole_au`` (3,) the analytic SCF dipole
    (nuclear minus electronic, about the job's origin) or None. ``attempts`` lists
    the SCF strategies tried, the last one being the one that converged.
    ``occupied_overlap`` is the smallest singular value of the overlap between
    the occupied spaces at this field and at zero field (1 = same state).
    ``alpha_au`` (3, 3) is the analytic (CPHF/CPKS) polarizability at this field,
    when asked for. ``state_issue`` is empty when the point is on the zero-field
    state, and otherwise says which state check failed (occupied overlap below
    MIN_OCCUPIED_OVERLAP, <S^2> moved, occupation by symmetry changed); such a
    point is never differentiated through. ``gradient_norm`` is the norm of the
    converged SCF's orbital gradient: the measured convergence, from which the
    noise model is built.
    """

    point: FieldPoint
    energy_au: float
    scf_energy_au: float
    dipole_au: tuple[float, float, float] | None
    scf_cycles: int
    attempts: tuple[str, ...]
    s2: float
    occupied_overlap: float
    gradient_norm: float
    alpha_au: tuple[tuple[float, float, float], ...] | None = None
    dipole_error_au: float = 0.0  # first-order estimate of the dipole's convergence error
    state_issue: str = ""
    wall_time_s: float = 0.0
    #: |E_one-electron| + |E_two-electron| + |E_nuclear| of the SCF energy (Eh):
    #: the terms whose cancellation sets the energy's rounding noise (0: unknown).
    energy_scale_au: float = 0.0
    #: A relaxed point's structure and optimiser errors (fieldprop.numerics.relaxation:
    #: coords_bohr, steps, energy_change_au, dipole_change_au,
    #: largest_gradient_au, gradients); None for clamped nuclei.
    relaxation: dict | None = None
    #: Coupled-cluster points: what one more iteration of the converged
    #: amplitudes (a Jacobi step) changes, in the CCSD energy (Eh, signed) and
    #: in the amplitudes (norm): the convergence reached, from which the noise
    #: model takes the energy's. None: not an amplitude solver, or a point
    #: stored before they were recorded.
    correlation_energy_change_au: float | None = None
    amplitude_change: float | None = None
    #: Zero field of a degenerate open shell: the orientation its determinant
    #: was turned to, which every point keeps (None otherwise).
    orientation: Orientation | None = None

    @property
    def retried(self) -> bool:
        """The SCF needed PySCF's ladder beyond the solver's own path."""
        return self.attempts not in PRIMARY_PATHS


@dataclass(frozen=True)
class PointFailure:
    """A point that could not be computed: no number is ever formed from it.

    ``reason`` is the one-line message (it names the point); ``kind`` the
    exception class name (``ScfNotConvergedError``, ...).
    """

    point: FieldPoint
    reason: str
    kind: str
    wall_time_s: float = 0.0
