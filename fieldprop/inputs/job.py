r"""Read and validate a job file (TOML) into a frozen :class:`Job`.

Every problem is an :class:`~fieldprop.errors.InputError` whose message is one
line naming the file, the section and key, what is wrong and what would be valid,
e.g. ``water.toml: [response] field_au must be > 0, got -0.001``. Unknown keys are
errors, never ignored. Nothing is computed or written here.

Example
-------
>>> import tempfile, pathlib
>>> d = pathlib.Path(tempfile.mkdtemp())
>>> _ = (d / "h2.toml").write_text('''
... [molecule]
... geometry = "H 0 0 0\\nH 0 0 0.74"
... [model]
... method = "hf"
... basis = "sto-3g"
... [response]
... properties = ["alpha"]
... ''')
>>> job = load_job(d / "h2.toml")
>>> job.model.reference, job.response.levels, job.response.ratio
('restricted', 6, 2.0)
"""

from __future__ import annotations

import logging
import math
import os
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from fieldprop.errors import InputError
from fieldprop.numerics.methods import METHODS, Route, methods_with
from fieldprop.numerics.plan import INDEX_SYMMETRY
from fieldprop.numerics.units import BACKEND_BOHR_ANGSTROM, NAMED_BOHR_ANGSTROM, PROPERTY_ORDER

logger = logging.getLogger(__name__)

#: Element symbols by atomic number (index 0 is a placeholder); the periodic table.
ELEMENTS = (
    "X H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn "
    "Ga Ge As Se Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I Xe Cs Ba La Ce Pr "
    "Nd Pm Sm Eu Gd Tb Dy Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi Po At Rn Fr Ra "
    "Ac Th Pa U Np Pu Am Cm Bk Cf Es Fm Md No Lr Rf Db Sg Bh Hs Mt Ds Rg Cn Nh Fl Mc Lv Ts Og"
).split()
_Z_OF = {sym.lower(): z for z, sym in enumerate(ELEMENTS) if z > 0}

#: [model] method and [geometry] method: the names of the method table.
METHOD_NAMES = tuple(METHODS)
REFERENCES = ("auto", "restricted", "unrestricted")
ROUTES = ("auto", "energy", "dipole")
#: [response] window: grow each component's levels of the automatic ladder
#: while its table has not settled, or compute every level.
WINDOWS = ("adaptive", "full")
UNITS = ("angstrom", "bohr")
#: [response] symmetry = "symmetrise": a geometry near a point group is moved
#: onto it (the moved nuclei are the molecule computed).
SYMMETRISE = "symmetrise"
ORIGINS = ("nuclear-charge", "centre-of-mass", "zero")
#: Other spellings accepted for an origin.
ORIGIN_ALIASES = {"center-of-mass": "centre-of-mass"}
#: Methods whose analytic dipole is available at every field point (the dipole route).
DIPOLE_ROUTE_METHODS = methods_with(Route.DIPOLE)

#: Two nuclei closer than this (bohr) are taken as a typing error: 0.5 bohr = 0.26 A,
#: well below any chemical bond (H2 is 1.4 bohr).
MIN_DISTANCE_BOHR = 0.5
#: A coordinate (or origin component) farther than this from zero (bohr, 53 um) is
#: taken as a typing error; far larger values overflow in PySCF (inf, NaN).
MAX_COORDINATE_BOHR = 1e6

#: The automatic window, used when the job gives no field_au: a wide ladder whose
#: Richardson table picks, per component, the entry between the round-off floor
#: (small h) and contamination by higher orders (large h). Smallest field by
#: highest order of the energy derivative, with AUTO_LEVELS steps of ratio 2:
#: 2.5e-4..8e-3 au for mu and alpha, 5e-4..1.6e-2 au for beta and gamma, which
#: spans REFERENCES' practice (h0 ~ 1e-4..5e-4 au for alpha, a window of
#: ~1e-3..1e-2 au for gamma) with room on both sides.
AUTO_FIELD_AU = {1: 0.00025, 2: 0.00025, 3: 0.0005, 4: 0.0005}
AUTO_LEVELS = 6
#: Most field strengths a job may ask for: five Richardson steps remove the h^2
#: to h^10 terms, beyond which the largest field (32 h0 at ratio 2) is no longer
#: perturbative for any useful h0 (common practice: 4-6 amplitudes).
MAX_LEVELS = 6

_SECTIONS = {
    "molecule": {"geometry", "xyz", "units", "charge", "multiplicity", "allow_close_atoms",
                 "bohr_angstrom", "isotope_masses"},
    "model": {"method", "functional", "basis", "reference", "frozen_core", "cartesian",
              "density_fit", "solvent", "solvent_model"},
    "response": {"properties", "field_au", "ratio", "levels", "origin", "differentiate", "route",
                 "symmetry", "window", "index_symmetry",
                 "nuclear_relaxation", "zero_point", "optical_wavelengths_nm"},
    "geometry": {"optimise", "optimize", "method", "functional", "basis", "criteria",
                 "max_steps"},
    "scf": {"energy_conv_tol_au", "max_iterations", "grid_level", "gradient_target",
            "gradient_needed", "solver", "scaled_target"},
    "correlation": {"energy_change_au", "amplitude_change"},
}

#: Keys of earlier versions, refused in one line naming the new one.
RENAMED_KEYS = {("scf", "max_cycle"): "max_iterations"}


@dataclass(frozen=True)
class Atom:
    """One nucleus: element symbol and position in bohr."""

    symbol: str
    coords_bohr: tuple[float, float, float]

    @property
    def charge(self) -> int:
        """Nuclear charge Z."""
        return _Z_OF[self.symbol.lower()]


@dataclass(frozen=True)
class MoleculeInput:
    """The molecule as given; coordinates already converted to bohr."""

    atoms: tuple[Atom, ...]
    charge: int
    multiplicity: int
    units: str
    source: str  # "inline" or the xyz path as written in the job
    #: Atoms closer than backend.molecule.CLOSE_FRACTION of their covalent bond
    #: length are refused unless this is set ([molecule] allow_close_atoms).
    allow_close_atoms: bool = False
    #: The bohr in angstrom that turned angstrom input into bohr ([molecule]
    #: bohr_angstrom: by default the backend's, units.BACKEND_BOHR_ANGSTROM), and
    #: what the job said: "backend", "scipy" or "given".
    bohr_angstrom: float = BACKEND_BOHR_ANGSTROM
    bohr_source: str = "backend"
    #: The nuclei the job file gave (bohr): ``atoms`` until an optimisation or
    #: a nuclear relaxation's polished minimum replaces those
    #: (engine.with_geometry, engine.relaxed_reference); what the job echo
    #: writes as [molecule] geometry. None: the same as ``atoms``.
    given_atoms: tuple[Atom, ...] | None = None
    #: ([molecule] isotope_masses) (atom index from 0, mass in u) of the atoms
    #: whose nuclei are not the most abundant isotope: the vibrations'
    #: masses (zero-point averaging, the Eckart frame); the electrons do not
    #: see them.
    isotope_masses: tuple[tuple[int, float], ...] = ()

    @property
    def angstrom_to_bohr(self) -> float:
        """The factor from the job's angstrom to bohr (1 / bohr_angstrom)."""
        return 1.0 / self.bohr_angstrom

    @property
    def unit_scale(self) -> float:
        """The factor from the job's length unit to bohr."""
        return self.angstrom_to_bohr if self.units == "angstrom" else 1.0

    @property
    def n_electrons(self) -> int:
        return sum(a.charge for a in self.atoms) - self.charge


@dataclass(frozen=True)
class ModelSpec:
    """Model chemistry: method, functional (dft only), basis, reference.

    ``basis`` is a basis name PySCF knows, or per element a tuple of
    (symbol, name or basis text in NWChem format) pairs, sorted by symbol.
    """

    method: str
    basis: str | tuple[tuple[str, str], ...]
    reference: str  # resolved: "restricted" or "unrestricted"
    functional: str | None = None
    #: Correlated methods: the inner shells (1s for B-Mg, 1s2s2p for Al-Ca,
    #: and so on: the backend counts them) left uncorrelated; the trade's usual default for valence
    #: correlation. Always False for HF and DFT.
    frozen_core: bool = False
    #: Cartesian instead of spherical d and f functions (6d/10f).
    cartesian: bool = False
    #: Density fitting of the two-electron integrals (HF and DFT): the
    #: auxiliary basis named (lower case), "auto" for PySCF's default one for
    #: the orbital basis, or None for exact integrals. A model change, not a
    #: numerical error: it is part of every point's key.
    density_fit: str | None = None
    #: A continuum solvent ([model] solvent): its name in the solvent table
    #: (None: given by its dielectric constant alone, or no solvent), its
    #: static dielectric constant, and the continuum model ("iefpcm" or
    #: "cpcm"; None without a solvent). Part of every point's key.
    solvent: str | None = None
    solvent_epsilon: float | None = None
    solvent_model: str | None = None
    #: The named solvent's refractive index (the local-field factors); not
    #: part of the key.
    solvent_refractive_index: float | None = None


@dataclass(frozen=True)
class ResponseSpec:
    """What to compute and on which field ladder."""

    properties: tuple[str, ...]
    field_au: float
    field_au_source: str  # "job" or "default for order n"
    ratio: float
    levels: int
    origin: str | tuple[float, float, float]  # one of ORIGINS, or bohr
    route: Route  # ENERGY or DIPOLE after resolution
    nuclear_relaxation: bool = False
    #: Compute only symmetry-unique field points and map the others (closed
    #: shells): True where the geometry is symmetric to round-off as given,
    #: SYMMETRISE to move a near-symmetric one onto its group first, False never.
    symmetry: bool | str = True
    #: Which levels of the ladder are computed: "adaptive" (the automatic
    #: ladder, each component's levels grown from three while its table has not
    #: settled: fieldprop.numerics.window), "full" (every level of the automatic ladder)
    #: or "fixed" (the job's own field_au: every level).
    window: str = "fixed"
    #: The zero-point vibrational average's correction ([response] zero_point:
    #: fieldprop.engine.zero_point).
    zero_point: bool = False
    #: Two-state optical-frequency estimates of beta at these wavelengths (nm):
    #: fieldprop.numerics.optical.
    optical_wavelengths_nm: tuple[float, ...] = ()
    #: On the dipole route, "assume" (each unique component one derivative of
    #: one mu_i, filling every permutation of its indices: fewer field
    #: points) or "test" (every derivative of every mu_i: the tensor's index
    #: symmetry checks the numbers); fieldprop.numerics.plan.
    index_symmetry: str = "assume"

    @property
    def max_order(self) -> int:
        return max(PROPERTY_ORDER[p] for p in self.properties)


@dataclass(frozen=True)
class CorrelationSpec:
    """Convergence of a coupled-cluster amplitude solver ([correlation]).

    The solver stops when one iteration changes the correlation energy by
    less than ``energy_change_au`` (Eh) and the amplitudes by less than
    ``amplitude_change`` (Euclidean norm of the change). A point whose solver
    did not get there fails, unless what it reached is within
    ``energy_accepted_au`` (a tightened point, see :meth:`ScfSpec.tightened`,
    accepts what its untightened twin would have). The noise model uses the
    convergence actually reached (PointRecord.correlation_energy_change_au).
    """

    energy_change_au: float
    amplitude_change: float
    energy_accepted_au: float = 0.0  # 0: the same as energy_change_au

    @property
    def accepted_au(self) -> float:
        return max(self.energy_change_au, self.energy_accepted_au)


#: Tightening of a field point's convergence ([response] window = "adaptive"):
#: a component at its noise floor whose error bar stays above the precision
#: expected of it (fieldprop.window.EXPECTED_PRECISION) has the points it uses
#: computed again with every convergence target divided by TIGHTENING_FACTOR
#: per step, at most MAX_TIGHTENING steps. Two decades per step: the noise of
#: a post-HF energy is linear in both targets, and a smaller step would cost a
#: stage of recomputed points for less than a digit.
TIGHTENING_FACTOR = 100.0
MAX_TIGHTENING = 2
#: The tightest targets a step may ask for: an orbital gradient of 1e-14 and a
#: coupled-cluster energy change of 1e-15 Eh lie at double precision's floor
#: for small molecules (measured: Newton steps stall at 1e-13..1e-14 for water;
#: PySCF's CCSD reached 2e-15 Eh for the HF molecule, aug-cc-pVDZ); an
#: amplitude change of 1e-12 goes with it.
TIGHTEST_GRADIENT = 1e-14
TIGHTEST_ENERGY_CHANGE_AU = 1e-15
TIGHTEST_AMPLITUDE_CHANGE = 1e-12


@dataclass(frozen=True)
class ScfSpec:
    """SCF settings; tolerances derived from the requested order unless given.

    ``gradient_target`` is the orbital-gradient norm each point aims at;
    ``gradient_needed`` the largest one at which a point is still accepted when
    it stalls (at the floor double precision allows for the molecule): there
    its noise alone would put the round-off floor of the highest-order component
    at the smallest field at the check's absolute floor (see
    :func:`needed_gradient`). ``solver``: "newton" (a start from the zero-field
    orbitals rotated by their linear response to the field, then Newton steps
    with the orbital Hessian) or "diis" (DIIS from the zero-field density).

    Both gradients hold at the smallest step; with ``target_power`` k > 0 a
    point farther out aims at them times (q / target_step_au)^k
    (:meth:`at_field`): on the dipole route a point's noise enters the
    order-n derivative divided by h^(n-1), k = n - 1, so a point whose
    stencils' step is s times the smallest may be s^k times noisier for the
    same share of the error bar (the bars always use the gradient reached).
    """

    energy_conv_tol_au: float
    gradient_target: float
    max_iterations: int
    grid_level: int | None  # dft only
    gradient_needed: float = 0.0  # 0: the same as gradient_target
    solver: str = "newton"
    #: The amplitude solver's convergence (coupled-cluster methods; None for
    #: the others): the [correlation] table, travelling with the SCF settings
    #: to every point.
    correlation: CorrelationSpec | None = None
    #: The power k and the step (au) of :meth:`at_field` (0: every point
    #: aims at the same gradients).
    target_power: int = 0
    target_step_au: float = 0.0

    @property
    def gradient_accepted(self) -> float:
        return max(self.gradient_target, self.gradient_needed)

    def at_field(self, field_vector_au) -> "ScfSpec":
        """These settings for the point at ``field_vector_au``: the gradients
        times (q / target_step_au)^target_power, q = max_i |F_i| (the
        smallest step of the stencils that use the point is at least q over
        their largest offset, which target_step_au counts in), never below
        these nor above SCALED_TARGET_CEILING."""
        q = max((abs(float(v)) for v in field_vector_au), default=0.0)
        if not self.target_power or not self.target_step_au or q <= self.target_step_au:
            return self
        scale = (q / self.target_step_au) ** self.target_power
        return replace(self,
                       gradient_target=min(self.gradient_target * scale,
                                             max(SCALED_TARGET_CEILING, self.gradient_target)),
                       gradient_needed=min(self.gradient_accepted * scale,
                                           max(SCALED_TARGET_CEILING, self.gradient_accepted)))

    def tightened(self, steps: int) -> "ScfSpec":
        """These settings with every convergence target ``steps`` times
        TIGHTENING_FACTOR tighter (down to the TIGHTEST_* floors), accepting
        what the untightened settings accept: a tightened point that stalls is
        never worse than its untightened twin, and the noise model uses what
        it reached. ``steps`` = 0: these settings themselves."""
        if steps <= 0:
            return self
        factor = TIGHTENING_FACTOR ** steps
        correlation = self.correlation
        if correlation is not None:
            correlation = CorrelationSpec(
                max(correlation.energy_change_au / factor, TIGHTEST_ENERGY_CHANGE_AU),
                max(correlation.amplitude_change / factor, TIGHTEST_AMPLITUDE_CHANGE),
                correlation.accepted_au)
        return replace(self, gradient_target=max(self.gradient_target / factor,
                                                   TIGHTEST_GRADIENT),
                       gradient_needed=self.gradient_accepted, correlation=correlation)

    def targets(self) -> tuple[float, ...]:
        """The convergence targets a tightening divides (orbital gradient;
        the amplitude solver's energy and amplitude changes)."""
        c = self.correlation
        return (self.gradient_target,) + (() if c is None else (c.energy_change_au,
                                                                  c.amplitude_change))

    def can_tighten(self, steps: int) -> bool:
        """Whether ``steps`` tightening steps are allowed and still change a target."""
        return (0 < steps <= MAX_TIGHTENING
                and self.tightened(steps).targets() != self.tightened(steps - 1).targets())


#: Convergence criteria of a geometry optimisation, by name. Each is built
#: from the largest remaining gradient g (Eh/bohr): the largest step at
#: convergence is g over a soft stiffness of 0.2 Eh/bohr^2 (what that gradient
#: still moves a soft bend or torsion), the root-mean-square values are half
#: the largest, and the energy change per step is a small share of
#: 1/2 k step^2 rounded up to a power of ten: ``coarse`` for ranking many
#: molecules, ``fine`` (the default) for response tensors whose bars matter,
#: ``finest`` for references. Every optimisation also stops only once all
#: five hold.
GEOMETRY_CRITERIA = {
    name: {"energy_change_au": energy, "gradient_max_au": g, "gradient_rms_au": g / 2.0,
           "step_max_bohr": g / 0.2, "step_rms_bohr": g / 0.4}
    for name, g, energy in (("coarse", 5e-4, 1e-6), ("fine", 2e-5, 1e-7),
                            ("finest", 3e-6, 1e-8))
}
#: Names of criteria sets of earlier versions: refused, naming the new ones.
OLD_CRITERIA = ("standard", "tight", "very-tight")


@dataclass(frozen=True)
class GeometrySpec:
    """A geometry optimisation before the response ([geometry]): at the job's
    own model, or at ``method``/``functional``/``basis`` when given."""

    optimize: bool = False
    method: str | None = None
    functional: str | None = None
    basis: str | None = None
    criteria: str = "fine"
    max_steps: int = 100

    def thresholds(self) -> dict[str, float]:
        return dict(GEOMETRY_CRITERIA[self.criteria])


@dataclass(frozen=True)
class Job:
    """A validated job; ``path`` is the job file it came from."""

    path: str
    molecule: MoleculeInput
    model: ModelSpec
    response: ResponseSpec
    scf: ScfSpec = field(default_factory=lambda: ScfSpec(1e-12, 1e-8, 200, None))
    geometry: GeometrySpec = field(default_factory=GeometrySpec)
    #: What the optimisation did (its stored document), once the molecule's
    #: coordinates are the optimised ones; None before, or without one.
    optimisation: dict | None = None
    #: The zero-field frame of a nuclear relaxation (its stored document), once
    #: the molecule's coordinates are its polished minimum; None before.
    relaxation: dict | None = None

    def to_dict(self) -> dict[str, Any]:
        """The job as understood, for the result JSON: the job file's sections
        and keys with every default filled in (automatic choices resolved to
        the value they took: reference, differentiate), so that a job file
        written from them loads as this job; its geometry the nuclei the job
        file gave, in bohr (``units = "bohr"``, every digit of the floats).

        ``"derived"`` holds what was worked out and is no input: the job's
        path; the molecule's nuclei as computed (``atoms``: after an
        optimisation its optimum), the units and source the job file used, the
        bohr in angstrom as a number and where it came from; the field
        strength and window the response used; the orbital gradient and the
        coupled-cluster energy change accepted; the optimisation criteria's
        thresholds; the optimisation and nuclear relaxation documents (None
        without them).
        """
        mol, model, response, scf, geometry = (self.molecule, self.model, self.response,
                                               self.scf, self.geometry)
        automatic = response.field_au_source != "job"
        # repr: the shortest text that reads back as the same float.
        geometry_text = "\n".join(" ".join([a.symbol, *map(repr, a.coords_bohr)])
                                  for a in mol.given_atoms or mol.atoms)
        sections: dict[str, Any] = {
            "molecule": {
                "geometry": geometry_text,
                "units": "bohr",
                "charge": mol.charge,
                "multiplicity": mol.multiplicity,
                "allow_close_atoms": mol.allow_close_atoms,
                "bohr_angstrom": (mol.bohr_source if mol.bohr_source in NAMED_BOHR_ANGSTROM
                                  else mol.bohr_angstrom),
                **({"isotope_masses": {str(i + 1): m for i, m in mol.isotope_masses}}
                   if mol.isotope_masses else {}),
            },
            "model": {
                "method": model.method,
                **({} if model.functional is None else {"functional": model.functional}),
                "basis": model.basis if isinstance(model.basis, str) else dict(model.basis),
                "reference": model.reference,
                "frozen_core": model.frozen_core,
                "cartesian": model.cartesian,
                "density_fit": {None: False, "auto": True}.get(model.density_fit,
                                                               model.density_fit),
                **({} if model.solvent_epsilon is None else {
                    "solvent": (model.solvent if model.solvent is not None
                                else {"epsilon": model.solvent_epsilon}),
                    "solvent_model": model.solvent_model}),
            },
            "response": {
                "properties": list(response.properties),
                **({} if automatic else {"field_au": response.field_au}),
                "ratio": response.ratio,
                "levels": response.levels,
                "origin": (response.origin if isinstance(response.origin, str)
                           else list(response.origin)),
                "differentiate": str(response.route),
                "symmetry": response.symmetry,
                **({"window": response.window} if automatic else {}),
                **({"index_symmetry": response.index_symmetry}
                   if response.route is Route.DIPOLE else {}),
                "nuclear_relaxation": response.nuclear_relaxation,
                "zero_point": response.zero_point,
                **({"optical_wavelengths_nm": list(response.optical_wavelengths_nm)}
                   if response.optical_wavelengths_nm else {}),
            },
            "scf": {
                "energy_conv_tol_au": scf.energy_conv_tol_au,
                "max_iterations": scf.max_iterations,
                **({} if scf.grid_level is None else {"grid_level": scf.grid_level}),
                "gradient_target": scf.gradient_target,
                "gradient_needed": scf.gradient_needed,
                "solver": scf.solver,
                "scaled_target": bool(scf.target_power),
            },
        }
        if scf.correlation is not None:
            sections["correlation"] = {"energy_change_au": scf.correlation.energy_change_au,
                                       "amplitude_change": scf.correlation.amplitude_change}
        sections["geometry"] = {"optimise": geometry.optimize}
        if geometry.optimize:
            sections["geometry"].update(
                {k: v for k, v in (("method", geometry.method),
                                   ("functional", geometry.functional),
                                   ("basis", geometry.basis)) if v is not None})
            sections["geometry"].update(criteria=geometry.criteria,
                                        max_steps=geometry.max_steps)
        derived = {
            "path": self.path,
            "molecule": {
                "atoms": [{"symbol": a.symbol, "coords_bohr": list(a.coords_bohr)}
                          for a in mol.atoms],
                "units": mol.units, "source": mol.source,
                "bohr_angstrom": mol.bohr_angstrom, "bohr_source": mol.bohr_source,
            },
            "response": {"field_au": response.field_au,
                         "field_au_source": response.field_au_source,
                         "window": response.window},
            "scf": {"gradient_accepted": scf.gradient_accepted,
                    "target_power": scf.target_power,
                    "target_step_au": scf.target_step_au},
            **({} if scf.correlation is None else
               {"correlation": {"accepted_au": scf.correlation.accepted_au}}),
            "geometry": {"thresholds": geometry.thresholds()},
            "optimisation": self.optimisation,
            "relaxation": self.relaxation,
        }
        return {**sections, "derived": derived}


def echo_atoms(echo: dict) -> list | None:
    """The nuclei as computed in a job echo (:meth:`Job.to_dict`, a result's
    ``"job"``): ``derived.molecule.atoms``, [{"symbol", "coords_bohr"}], or
    ``molecule.atoms`` in results written before the echo took the job file's
    keys; None when neither is there."""
    derived = echo.get("derived")
    for parent in (derived.get("molecule") if isinstance(derived, dict) else None,
                   echo.get("molecule")):
        if isinstance(parent, dict) and isinstance(parent.get("atoms"), list):
            return parent["atoms"]
    return None


#: The highest order requested up to which targets scale (beta). Jobs with
#: gamma keep one target: their lower orders, divided by smaller powers of h,
#: then carry more noise at the larger fields, and the adaptive window
#: answers with more points (measured: water, formaldehyde and HF at
#: HF/6-31G, mu to gamma: 96 points with k = 1 and 107 with k = 2, against
#: 86 unscaled; with mu to beta, and on push-pull polyenes of 14 and 22
#: atoms, the same points as unscaled).
MAX_SCALED_ORDER = 3
#: The loosest orbital gradient ScfSpec.at_field scales a target to: where
#: the Newton steps still converge quadratically from any start.
SCALED_TARGET_CEILING = 1e-8


def scaled_target_power(route: str, max_order: int) -> tuple[int, int]:
    """(k, m) of ScfSpec.at_field on ``route``: the dipole route divides a
    point's noise by h^(n-1) in the order-n derivative, k = max_order - 1,
    and its central stencils reach m = ceil(k / 2) steps out (a point at q
    serves steps down to q / m); (0, 1) elsewhere (the energy and alpha
    routes, and jobs beyond MAX_SCALED_ORDER, keep one target).

    >>> scaled_target_power("dipole", 3), scaled_target_power("energy", 3)
    ((2, 1), (0, 1))
    >>> scaled_target_power("dipole", 4)
    (0, 1)
    """
    if route != "dipole" or not 2 <= max_order <= MAX_SCALED_ORDER:
        return 0, 1
    k = max_order - 1
    return k, (k + 1) // 2


def model_text(method: str, functional: str | None, basis, solvent=None,
               solvent_model: str | None = None, reference: str | None = None,
               multiplicity: int = 1) -> str:
    """A model as every log line, table and CSV writes it: METHOD/functional/
    basis (a per-element basis: element:name pairs, a basis given as text
    ``custom``), e.g. ``HF/6-31g`` or ``DFT/b3lyp/6-31g``; in a continuum
    solvent (its name, or {"epsilon": ...}) ``HF/6-31g in water (IEF-PCM)``.
    The determinant, where it is not a closed shell's restricted one, is part
    of the name: an unrestricted ``reference`` gives UHF, UKS (for dft) or
    U + the correlated method (UMP2, UCCSD), a restricted one of
    ``multiplicity`` > 1 ROHF, ROKS, or the correlated method "on ROHF".

    >>> model_text("dft", "b3lyp", "6-31g", reference="unrestricted", multiplicity=2)
    'UKS/b3lyp/6-31g'
    >>> model_text("hf", None, "6-31g", reference="restricted", multiplicity=2)
    'ROHF/6-31g'
    """
    if not isinstance(basis, str):
        pairs = basis.items() if isinstance(basis, dict) else basis
        basis = "+".join(f"{sym}:{text if chr(10) not in str(text) else 'custom'}"
                         for sym, text in pairs) or "per-element basis"
    name = str(method or "?").upper()
    kind = ("U" if reference == "unrestricted"
            else "RO" if reference == "restricted" and multiplicity > 1 else "")
    if kind:
        mean_field = {"HF": "HF", "DFT": "KS"}.get(name)
        name = (kind + mean_field if mean_field else "U" + name if kind == "U"
                else f"{name} on ROHF")
    text = "/".join(str(x) for x in (name, functional, basis) if x)
    if solvent is None:
        return text
    where = (f"epsilon {solvent['epsilon']:g}" if isinstance(solvent, dict)
             else str(solvent))
    return f"{text} in {where} ({SOLVENT_MODEL_NAMES.get(solvent_model, solvent_model)})"


#: How the continuum models are written.
SOLVENT_MODEL_NAMES = {"iefpcm": "IEF-PCM", "cpcm": "C-PCM"}


def model_name(model: "ModelSpec", multiplicity: int = 1) -> str:
    """:func:`model_text` of a ModelSpec (of a molecule of ``multiplicity``)."""
    solvent = (None if model.solvent_epsilon is None else
               model.solvent if model.solvent is not None else {"epsilon": model.solvent_epsilon})
    return model_text(model.method, model.functional, model.basis, solvent, model.solvent_model,
                      model.reference, multiplicity)


def derived_energy_conv_tol_au(max_order: int) -> float:
    """SCF energy tolerance (Eh) for the highest derivative order requested.

    Round-off in an n-th derivative is about C_n * dE / h**n (REFERENCES sect. 2);
    for gamma at h = 0.002 au, dE = 1e-12 Eh already gives ~1 au, and tighter is
    not reachable in double precision for |E| ~ 100 Eh. Lower orders tolerate
    1e-10..1e-11 Eh (common practice).
    """
    return {1: 1e-10, 2: 1e-11}.get(max_order, 1e-12)


class _Reader:
    """Typed access to one TOML table, with messages naming file, section and key."""

    def __init__(self, path: str, section: str, table: dict[str, Any]):
        self.path, self.section, self.table = path, section, table

    def fail(self, key: str, problem: str) -> InputError:
        return InputError(f"{self.path}: [{self.section}] {key} {problem}")

    def has(self, key: str) -> bool:
        return key in self.table

    def string(self, key: str, default: str | None = None, choices=None) -> str | None:
        if key not in self.table:
            if default is None:
                raise self.fail(key, "is missing" + (f"; one of {', '.join(choices)}"
                                                     if choices else ""))
            return default
        value = self.table[key]
        if not isinstance(value, str):
            raise self.fail(key, f"must be a string, got {value!r}")
        value = value.strip()
        if choices is not None and value.lower() not in choices:
            raise self.fail(key, f"must be one of {', '.join(choices)}; got {value!r}")
        if not value:
            raise self.fail(key, "must not be empty")
        return value.lower() if choices is not None else value

    def integer(self, key: str, default: int | None, low: int | None = None) -> int:
        if key not in self.table:
            if default is None:
                raise self.fail(key, "is missing")
            return default
        value = self.table[key]
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.fail(key, f"must be an integer, got {value!r}")
        if low is not None and value < low:
            raise self.fail(key, f"must be >= {low}, got {value}")
        return value

    def number(self, key: str, default: float | None) -> float | None:
        if key not in self.table:
            return default
        value = self.table[key]
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.fail(key, f"must be a number, got {value!r}")
        if not math.isfinite(value):
            raise self.fail(key, f"must be finite, got {value!r}")
        return float(value)


def _read_toml(path: Path) -> dict[str, Any]:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise InputError(f"{path}: job file not found") from None
    except IsADirectoryError:
        raise InputError(f"{path}: is a directory, expected a job file (TOML)") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read job file: {exc.strerror}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: not UTF-8 text (byte {exc.start}); save the job file "
                         "as UTF-8") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML: {exc}") from None


def parse_geometry_lines(lines: list[str], units: str, where: str,
                         first_line: int = 1,
                         bohr_angstrom: float = BACKEND_BOHR_ANGSTROM) -> tuple[Atom, ...]:
    """Parse ``symbol x y z`` lines (units "angstrom" or "bohr") into atoms in bohr.

    ``where`` prefixes every message (file and key); ``first_line`` is the line
    number of ``lines[0]`` in its file (3 in an .xyz file). Angstrom becomes
    bohr as the backend converts it, x * (1 / bohr_angstrom), so the same
    text gives the same nuclei bit for bit in both. Raises InputError on an
    unknown element, a wrong column count, text or non-finite coordinates, an
    empty geometry, or two nuclei closer than MIN_DISTANCE_BOHR.
    """
    scale = 1.0 / bohr_angstrom if units == "angstrom" else 1.0
    atoms = []
    for number, line in enumerate(lines, start=first_line):
        fields = line.split()
        if not fields:
            continue
        if len(fields) != 4:
            raise InputError(f"{where}: line {number} has {len(fields)} columns, expected 4 "
                             f"(symbol x y z): {line.strip()!r}")
        symbol = fields[0]
        if symbol.lower() not in _Z_OF:
            raise InputError(f"{where}: line {number}: unknown element {symbol!r}; use a "
                             "symbol of the periodic table such as H, C, O")
        try:
            xyz = tuple(float(v) for v in fields[1:])
        except ValueError:
            raise InputError(f"{where}: line {number}: coordinates must be numbers, got "
                             f"{' '.join(fields[1:])!r}") from None
        if not all(math.isfinite(v) for v in xyz):
            raise InputError(f"{where}: line {number}: coordinates must be finite, got "
                             f"{' '.join(fields[1:])!r}")
        if not all(abs(v * scale) <= MAX_COORDINATE_BOHR for v in xyz):
            raise InputError(f"{where}: line {number}: coordinates beyond "
                             f"{MAX_COORDINATE_BOHR:g} bohr from the origin, got "
                             f"{' '.join(fields[1:])!r} {units}; check the numbers and units")
        canonical = ELEMENTS[_Z_OF[symbol.lower()]]
        atoms.append(Atom(canonical, tuple(v * scale for v in xyz)))
    if not atoms:
        raise InputError(f"{where}: geometry is empty; give one 'symbol x y z' line per atom")
    for i, a in enumerate(atoms):
        for j in range(i):
            d = math.dist(a.coords_bohr, atoms[j].coords_bohr)
            if d < MIN_DISTANCE_BOHR:
                raise InputError(
                    f"{where}: atoms {j + 1} ({atoms[j].symbol}) and {i + 1} ({a.symbol}) are "
                    f"{d:.3f} bohr apart; nuclei closer than {MIN_DISTANCE_BOHR} bohr overlap")
    return tuple(atoms)


def _read_xyz(job_path: Path, rel: str, units: str,
              bohr_angstrom: float = BACKEND_BOHR_ANGSTROM) -> tuple[Atom, ...]:
    where_key = f"{job_path}: [molecule] xyz"
    xyz_path = (job_path.parent / rel)
    try:
        text = xyz_path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise InputError(f"{where_key}: file {rel!r} not found (paths are relative to the "
                         "job file)") from None
    except IsADirectoryError:
        raise InputError(f"{where_key}: {rel!r} is a directory, expected an .xyz file") from None
    except UnicodeDecodeError:
        raise InputError(f"{where_key}: {rel!r} is not UTF-8 text") from None
    except OSError as exc:
        raise InputError(f"{where_key}: cannot read {rel!r}: {exc.strerror}") from None
    lines = text.splitlines()
    where = f"{xyz_path}"
    if not lines or not lines[0].strip():
        raise InputError(f"{where}: empty .xyz file; the first line must be the atom count")
    try:
        count = int(lines[0].strip())
    except ValueError:
        raise InputError(f"{where}: line 1 must be the atom count, got "
                         f"{lines[0].strip()!r}") from None
    body = [ln for ln in lines[2:] if ln.strip()]
    if count < 1 or len(body) != count:
        raise InputError(f"{where}: line 1 says {count} atoms but {len(body)} atom lines "
                         "follow the comment line")
    atoms = parse_geometry_lines(lines[2:], units, where, first_line=3,
                                 bohr_angstrom=bohr_angstrom)
    return atoms


def _parse_molecule(path: str, job_path: Path, table: dict[str, Any]) -> MoleculeInput:
    r = _Reader(path, "molecule", table)
    units = r.string("units", "angstrom", UNITS)
    bohr, bohr_source = _bohr_angstrom(r, table.get("bohr_angstrom", "backend"))
    if r.has("geometry") and r.has("xyz"):
        raise r.fail("geometry", "and xyz are both given; give exactly one")
    if r.has("geometry"):
        geometry = r.string("geometry")
        atoms = parse_geometry_lines(geometry.splitlines(), units,
                                     f"{path}: [molecule] geometry", bohr_angstrom=bohr)
        source = "inline"
    elif r.has("xyz"):
        source = r.string("xyz")
        atoms = _read_xyz(job_path, source, units, bohr)
    else:
        raise r.fail("geometry", "is missing; give geometry = \"\"\"...\"\"\" or xyz = \"file.xyz\"")
    charge = r.integer("charge", 0)
    multiplicity = r.integer("multiplicity", 1, low=1)
    n_el = sum(a.charge for a in atoms) - charge
    if n_el < 1:
        raise r.fail("charge", f"= {charge} leaves {n_el} electrons; at least one is needed")
    unpaired = multiplicity - 1
    if unpaired > n_el or (n_el - unpaired) % 2:
        raise r.fail("multiplicity", f"= {multiplicity} is impossible with {n_el} electrons; "
                     f"valid: {', '.join(str(m) for m in range(1 + n_el % 2, n_el + 2, 2)[:4])}"
                     f"{', ...' if n_el > 6 else ''}")
    allow_close = table.get("allow_close_atoms", False)
    if not isinstance(allow_close, bool):
        raise r.fail("allow_close_atoms", f"must be true or false, got {allow_close!r}")
    return MoleculeInput(atoms, charge, multiplicity, units, source, allow_close, bohr,
                         bohr_source, atoms, _isotope_masses(r, table, atoms))


#: A nuclear mass (u) outside this range is a typing mistake (the lightest
#: nucleus, 1H, weighs 1.007 u; the heaviest known about 300 u).
ISOTOPE_MASS_RANGE = (1.0, 320.0)


def _isotope_masses(r: "_Reader", table: dict[str, Any], atoms) -> tuple[tuple[int, float], ...]:
    """[molecule] isotope_masses = { 2 = 2.01410178, ... }: atom number (from 1,
    in the order of the geometry) to that nucleus's mass in u."""
    given = table.get("isotope_masses", {})
    if not isinstance(given, dict):
        raise r.fail("isotope_masses", "must be a table of atom number = mass in u, e.g. "
                     f"{{ 2 = 2.01410178 }}, got {given!r}")
    out = []
    for key, mass in given.items():
        try:
            n = int(key)
        except ValueError:
            n = 0
        if not 1 <= n <= len(atoms):
            raise r.fail("isotope_masses", f"key {key!r} is not an atom number (1 to "
                         f"{len(atoms)}, in the order of the geometry)")
        if isinstance(mass, bool) or not isinstance(mass, (int, float)) \
                or not ISOTOPE_MASS_RANGE[0] <= mass <= ISOTOPE_MASS_RANGE[1]:
            raise r.fail("isotope_masses", f"atom {n} ({atoms[n - 1].symbol}): the mass must be "
                         f"a number of u between {ISOTOPE_MASS_RANGE[0]:g} and "
                         f"{ISOTOPE_MASS_RANGE[1]:g}, got {mass!r}")
        out.append((n - 1, float(mass)))
    return tuple(sorted(out))


#: A bohr (angstrom) outside this range is a typing mistake, not another
#: CODATA edition (the editions since 1986 agree to 2e-8 relative).
BOHR_ANGSTROM_RANGE = (0.529, 0.5295)


def _bohr_angstrom(r: "_Reader", value: Any) -> tuple[float, str]:
    """[molecule] bohr_angstrom: a name of NAMED_BOHR_ANGSTROM, or a number."""
    if isinstance(value, str):
        if value not in NAMED_BOHR_ANGSTROM:
            raise r.fail("bohr_angstrom", f"must be {' or '.join(map(repr, NAMED_BOHR_ANGSTROM))}"
                         f" or the bohr in angstrom as a number, got {value!r}")
        return NAMED_BOHR_ANGSTROM[value], value
    low, high = BOHR_ANGSTROM_RANGE
    if isinstance(value, bool) or not isinstance(value, (int, float)) \
            or not low < value < high:
        raise r.fail("bohr_angstrom", f"must be the bohr in angstrom (between {low} and "
                     f"{high}, e.g. 0.529177210903) or one of "
                     f"{', '.join(map(repr, NAMED_BOHR_ANGSTROM))}, got {value!r}")
    return float(value), "given"


def _parse_model(path: str, table: dict[str, Any], multiplicity: int) -> ModelSpec:
    r = _Reader(path, "model", table)
    method = r.string("method", None, METHOD_NAMES)
    raw_basis = table.get("basis")
    if isinstance(raw_basis, dict):
        if not raw_basis:
            raise r.fail("basis", "table is empty; give element = \"basis name\" pairs")
        pairs = []
        for symbol, value in raw_basis.items():
            if symbol.lower() not in _Z_OF:
                raise r.fail("basis", f"table has unknown element {symbol!r}")
            if not isinstance(value, str) or not value.strip():
                raise r.fail("basis", f"for {symbol} must be a basis name or NWChem-format "
                             f"text, got {value!r}")
            pairs.append((ELEMENTS[_Z_OF[symbol.lower()]], value.strip()))
        basis: str | tuple[tuple[str, str], ...] = tuple(sorted(pairs))
    else:
        basis = r.string("basis")
    functional = r.string("functional") if r.has("functional") else None
    if method == "dft" and functional is None:
        raise r.fail("functional", "is missing; method = \"dft\" needs a functional such as "
                     "\"b3lyp\" or \"pbe0\"")
    if method != "dft" and functional is not None:
        raise r.fail("functional", f"is given but method = {method!r} uses none; remove it or "
                     "set method = \"dft\"")
    reference = r.string("reference", "auto", REFERENCES)
    if reference == "auto":
        reference = "restricted" if multiplicity == 1 else "unrestricted"
    if reference == "restricted" and multiplicity > 1 and \
            not METHODS[method].restricted_open_shell:
        allowed = " and ".join(m for m, t in METHODS.items() if t.restricted_open_shell)
        raise r.fail("reference", f"= \"restricted\" with multiplicity {multiplicity} is "
                     f"restricted open shell, available for {allowed} only; use "
                     f"\"unrestricted\" for {method}")
    correlated = not METHODS[method].mean_field
    frozen_core = table.get("frozen_core", correlated)
    if not isinstance(frozen_core, bool):
        raise r.fail("frozen_core", f"must be true or false, got {frozen_core!r}")
    if frozen_core and not correlated:
        raise r.fail("frozen_core", f"applies to correlated methods (mp2, ccsd, ccsd(t)), not "
                     f"to {method}; remove it")
    cartesian = table.get("cartesian", False)
    if not isinstance(cartesian, bool):
        raise r.fail("cartesian", f"must be true or false, got {cartesian!r}")
    density_fit = table.get("density_fit", False)
    if density_fit is True:
        density_fit = "auto"
    elif density_fit is False:
        density_fit = None
    elif not isinstance(density_fit, str) or not density_fit.strip():
        raise r.fail("density_fit", f"must be true, false or an auxiliary basis name such as "
                     f"\"def2-universal-jkfit\", got {density_fit!r}")
    else:
        density_fit = density_fit.strip().lower()
    if density_fit is not None and correlated:
        raise r.fail("density_fit", f"applies to hf and dft (their Coulomb and exchange "
                     f"integrals), not to {method}; remove it")
    solvent, epsilon, index, solvent_model = _solvent(r, table, method)
    return ModelSpec(method=method, basis=basis, reference=reference, functional=functional,
                     frozen_core=frozen_core, cartesian=cartesian, density_fit=density_fit,
                     solvent=solvent, solvent_epsilon=epsilon, solvent_model=solvent_model,
                     solvent_refractive_index=index)


SOLVENT_MODELS = ("iefpcm", "cpcm")
#: Short names people type for solvents of the table.
SOLVENT_ALIASES = {"dmso": "dimethylsulfoxide", "dmf": "n,n-dimethylformamide",
                   "thf": "tetrahydrofuran", "dcm": "dichloromethane"}


def _solvent(r: "_Reader", table: dict[str, Any], method: str):
    """[model] solvent = "<name>" or { epsilon = ... }, and solvent_model."""
    given = table.get("solvent")
    if given is None:
        if "solvent_model" in table:
            raise r.fail("solvent_model", "is given but there is no solvent; add solvent = "
                         "\"<name>\" or solvent = { epsilon = ... }, or remove it")
        return None, None, None, None
    if not METHODS[method].mean_field:
        raise r.fail("solvent", f"applies to hf and dft (their continuum reaction field at "
                     f"every field point); {method} has none yet: remove it, or use one of those")
    if isinstance(given, str):
        from fieldprop.backend.solvent import solvent_table

        name = SOLVENT_ALIASES.get(given.strip().lower(), given.strip().lower())
        known = solvent_table()
        if name not in known:
            near = sorted(k for k in known if k.startswith(name[:3]))[:6]
            raise r.fail("solvent", f"{given!r} is not in the solvent table (the Minnesota "
                         "Solvent Descriptor Database's names, e.g. water, acetonitrile, "
                         "dimethylsulfoxide, chloroform, methanol, toluene)"
                         + (f"; near it: {', '.join(near)}" if near else "")
                         + "; or give solvent = { epsilon = ... }")
        solvent, (epsilon, index) = name, known[name]
    elif isinstance(given, dict):
        extra = [k for k in given if k != "epsilon"]
        eps = given.get("epsilon")
        if extra or isinstance(eps, bool) or not isinstance(eps, (int, float)) \
                or not 1.0 <= eps <= 1000.0:
            raise r.fail("solvent", "as a table must be { epsilon = <static dielectric "
                         f"constant, 1 to 1000> }}, got {given!r}")
        solvent, epsilon, index = None, float(eps), None
    else:
        raise r.fail("solvent", f"must be a solvent's name or {{ epsilon = ... }}, got {given!r}")
    return solvent, epsilon, index, r.string("solvent_model", "iefpcm", SOLVENT_MODELS)


#: [response] differentiate was called ``route`` before; the old name still works
#: and draws a warning.
DIFFERENTIATE_OLD_NAME = "route"


def _differentiate_key(table: dict[str, Any]) -> str:
    return DIFFERENTIATE_OLD_NAME if (DIFFERENTIATE_OLD_NAME in table
                                      and "differentiate" not in table) else "differentiate"


def route_hint_is_dipole(table: dict[str, Any], method: str) -> bool:
    """True when the route (given or automatic) will be the dipole route."""
    route = str(table.get(_differentiate_key(table), "auto")).lower()
    return route == "dipole" or (route == "auto" and method in DIPOLE_ROUTE_METHODS)


def _parse_response(path: str, table: dict[str, Any], method: str,
                    origin_scale: float) -> ResponseSpec:
    r = _Reader(path, "response", table)
    props = table.get("properties")
    valid = ", ".join(PROPERTY_ORDER)
    if props is None:
        raise r.fail("properties", f"is missing; a list drawn from {valid}")
    if not isinstance(props, list) or not props or not all(isinstance(p, str) for p in props):
        raise r.fail("properties", f"must be a non-empty list of names from {valid}, got {props!r}")
    for p in props:
        if p.lower() not in PROPERTY_ORDER:
            raise r.fail("properties", f"has unknown property {p!r}; valid: {valid}")
    props_sorted = tuple(p for p in PROPERTY_ORDER if p in {q.lower() for q in props})
    max_order = max(PROPERTY_ORDER[p] for p in props_sorted)

    field_au = r.number("field_au", None)
    source = "job"
    automatic = field_au is None
    if automatic:
        field_au, source = AUTO_FIELD_AU[max_order], "automatic window"
    elif field_au <= 0:
        raise r.fail("field_au", f"must be > 0, got {field_au}")
    elif field_au > 0.05:
        raise r.fail("field_au", f"= {field_au} au is far beyond the perturbative regime "
                     "(2.6e10 V/m); use a value between 1e-4 and 1e-2")
    ratio = r.number("ratio", 2.0)
    if ratio <= 1.0:
        raise r.fail("ratio", f"must be > 1 (the ladder is h_k = field_au * ratio**k), got {ratio}")
    if ratio > 10.0:
        raise r.fail("ratio", f"= {ratio} spaces the ladder too widely for extrapolation; use "
                     "1.2 to 4 (2 is usual)")
    no_derivatives = route_hint_is_dipole(table, method) and max_order == 1
    levels = r.integer("levels", 1 if no_derivatives else (AUTO_LEVELS if automatic else 3),
                       low=1)
    if levels < 2 and not no_derivatives:
        raise r.fail("levels", f"= {levels} gives one field strength, whose truncation error "
                     "cannot be estimated; use levels >= 2 (3 is usual)")
    if levels > 1 and no_derivatives and "levels" in table:
        raise r.fail("levels", f"= {levels} is more than the order needs: the dipole alone on "
                     "the dipole route is the zero-field value, no ladder; remove levels")
    if levels > MAX_LEVELS:
        raise r.fail("levels", f"= {levels} is more field strengths than a Richardson table "
                     f"can use; use 2 to {MAX_LEVELS}")
    top_field = field_au * ratio ** (levels - 1) * (2 if max_order >= 3 else 1)
    if top_field > 0.1:
        raise r.fail("levels", f"= {levels} with field_au = {field_au} and ratio = {ratio} "
                     f"reaches a field of {top_field:.3g} au; lower one of them")
    origin_raw = table.get("origin", "nuclear-charge")
    if isinstance(origin_raw, str):
        name = ORIGIN_ALIASES.get(origin_raw.lower(), origin_raw.lower())
        if name not in ORIGINS:
            raise r.fail("origin", f"must be one of {', '.join(ORIGINS)} or [x, y, z]; "
                         f"got {origin_raw!r}")
        origin: str | tuple[float, float, float] = name
    elif isinstance(origin_raw, list):
        if len(origin_raw) != 3:
            raise r.fail("origin", f"must have 3 coordinates [x, y, z], got {len(origin_raw)}")
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                   and math.isfinite(v) for v in origin_raw):
            raise r.fail("origin", f"coordinates must be finite numbers, got {origin_raw!r}")
        origin = tuple(float(v) * origin_scale for v in origin_raw)
        if not all(abs(v) <= MAX_COORDINATE_BOHR for v in origin):
            raise r.fail("origin", f"coordinates must lie within {MAX_COORDINATE_BOHR:g} bohr "
                         f"of zero, got {origin_raw!r}")
    else:
        raise r.fail("origin", f"must be one of {', '.join(ORIGINS)} or [x, y, z]; "
                     f"got {origin_raw!r}")
    if DIFFERENTIATE_OLD_NAME in table and "differentiate" in table:
        raise r.fail("route", "and differentiate are both given; route is the old name of "
                     "differentiate: keep differentiate only")
    key = _differentiate_key(table)
    if key == DIFFERENTIATE_OLD_NAME:
        logger.warning("%s: [response] route is the old name of differentiate (what is "
                       "differentiated: \"energy\" or \"dipole\"); it still works, but "
                       "rename it", path)
    route = r.string(key, "auto", ROUTES)
    if route == "dipole" and method not in DIPOLE_ROUTE_METHODS:
        raise r.fail(key, f"= \"dipole\" needs an analytic dipole at each field, which "
                     f"fieldprop has for {', '.join(DIPOLE_ROUTE_METHODS)}; {method} "
                     f"takes {key} = \"energy\"")
    if route == "auto":
        route = "dipole" if method in DIPOLE_ROUTE_METHODS else "energy"
    route = Route(route)
    relax = table.get("nuclear_relaxation", False)
    if not isinstance(relax, bool):
        raise r.fail("nuclear_relaxation", f"must be true or false, got {relax!r}")
    if relax and not METHODS[method].nuclear_gradient:
        with_gradient = ", ".join(m for m, t in METHODS.items()
                                 if t.nuclear_gradient)
        raise r.fail("nuclear_relaxation", f"= true needs nuclear gradients of E(R; F), which "
                     f"fieldprop has for {with_gradient}; {method} has none: set it to false, "
                     "or use one of those")
    zero_point = table.get("zero_point", False)
    if not isinstance(zero_point, bool):
        raise r.fail("zero_point", f"must be true or false, got {zero_point!r}")
    if zero_point and not METHODS[method].nuclear_gradient:
        with_gradient = ", ".join(m for m, t in METHODS.items() if t.nuclear_gradient)
        raise r.fail("zero_point", f"= true needs nuclear gradients (the harmonic modes and "
                     f"the cubic force constants), which fieldprop has for {with_gradient}; "
                     f"{method} has none: set it to false, or use one of those")
    wavelengths = _wavelengths(r, table, method, props_sorted)
    symmetry = table.get("symmetry", True)
    if not isinstance(symmetry, bool) and symmetry != SYMMETRISE:
        raise r.fail("symmetry", f"must be true (symmetry of the geometry as given), false, "
                     f"or \"{SYMMETRISE}\" (move a near-symmetric geometry onto its point "
                     f"group first), got {symmetry!r}")
    window = r.string("window", "adaptive" if automatic else "fixed", WINDOWS)
    if not automatic and "window" in table:
        raise r.fail("window", f"= \"{window}\" chooses levels of the automatic ladder, which "
                     "a job with its own field_au does not use: remove window, or field_au")
    if automatic and no_derivatives:
        window = "full"
    index_symmetry = r.string("index_symmetry", "assume", INDEX_SYMMETRY)
    if index_symmetry == "test" and route is not Route.DIPOLE:
        raise r.fail("index_symmetry", "= \"test\" computes every derivative of every dipole "
                     "component (the dipole route); the energy route's components are "
                     "derivatives of one energy, symmetric by construction: remove "
                     "index_symmetry, or differentiate = \"dipole\"")
    return ResponseSpec(props_sorted, field_au, source, ratio, levels, origin, route, relax,
                        symmetry, window, zero_point, wavelengths, index_symmetry)


#: Wavelengths (nm) outside this range are typing mistakes, not optics (the
#: vacuum ultraviolet to the far infrared).
WAVELENGTH_RANGE_NM = (100.0, 100000.0)


def _wavelengths(r: "_Reader", table: dict[str, Any], method: str,
                 properties) -> tuple[float, ...]:
    """[response] optical_wavelengths_nm: a list of wavelengths (nm) for the
    two-state estimates; they need beta and the model's own excitations."""
    given = table.get("optical_wavelengths_nm", [])
    key = "optical_wavelengths_nm"
    if not isinstance(given, list) or any(isinstance(v, bool) or not isinstance(v, (int, float))
                                          for v in given):
        raise r.fail(key, f"must be a list of wavelengths in nm, e.g. [1064, 1907], got {given!r}")
    low, high = WAVELENGTH_RANGE_NM
    for v in given:
        if not low <= v <= high:
            raise r.fail(key, f"{v!r} is not a wavelength between {low:g} and {high:g} nm")
    if given and "beta" not in properties:
        raise r.fail(key, "estimates beta at optical frequencies from the static beta: add "
                     "\"beta\" to properties")
    if given and not METHODS[method].mean_field:
        raise r.fail(key, f"needs the model's own excited states (TDHF, TDDFT), which fieldprop "
                     f"has for hf and dft; {method} has none: remove the key, or use one of "
                     "those")
    return tuple(sorted({float(v) for v in given}))


def _parse_scf(path: str, table: dict[str, Any], method: str, max_order: int,
               route: str, open_shell: bool, field_au: float,
               correlation: dict[str, Any] | None = None) -> ScfSpec:
    r = _Reader(path, "scf", table)
    tol = r.number("energy_conv_tol_au", None)
    if tol is None:
        tol = derived_energy_conv_tol_au(max_order)
    elif not 1e-14 <= tol <= 1e-6:
        raise r.fail("energy_conv_tol_au", f"must lie in [1e-14, 1e-6] Eh, got {tol}")
    max_iterations = r.integer("max_iterations", 200, low=10)
    grid_level = None
    if r.has("grid_level"):
        if method != "dft":
            raise r.fail("grid_level", f"applies to method = \"dft\" only, not {method!r}")
        grid_level = r.integer("grid_level", None, low=0)
        if grid_level > 9:
            raise r.fail("grid_level", f"must be 0..9 (PySCF grid levels), got {grid_level}")
    elif method == "dft":
        grid_level = DEFAULT_GRID_LEVEL
    # The SCF energy is variational (error ~ g^2 in the orbital gradient g), so
    # g <= 1e-8 suffices for the energy route. The SCF dipole and post-HF energies
    # are not variational (error ~ g; measured: |d mu| ~ 0.9 g for water). The
    # dipole route divides by one power of h less; to beat the energy route's
    # double-precision floor (~1e-13 Eh) tenfold for beta it needs g ~ 1e-12
    # (DIIS: ~65 cycles for water/6-31+G* from the zero-field density, against
    # ~35 for 1e-10). DFT takes 1e-11: its grid noise limits beta and gamma
    # before that (REFERENCES sect. 6) and g = 1e-12 costs it ~60 % more cycles.
    # Open shells take 1e-10: UHF reached g = 1e-12 for the NH2 radical only after
    # ~230 cycles per point and not at all for H2O+ at 0.008 au; 1e-10 takes
    # ~100-150 cycles there.
    # Post-HF energies are linear in the orbital error too, and SCF cycles are
    # cheap next to MP2 or CC: 1e-11 for closed shells, 1e-10 for open ones.
    if route == "dipole":
        gradient_tol = (1e-10 if open_shell else 1e-12 if method == "hf" else 1e-11)
    elif METHODS[method].mean_field:
        gradient_tol = 1e-8
    else:
        gradient_tol = 1e-10 if open_shell else 1e-11
    target = r.number("gradient_target", None)
    if target is not None:
        if not 1e-14 <= target <= 1e-4:
            raise r.fail("gradient_target", f"must lie in [1e-14, 1e-4], got {target}")
        gradient_tol = target
    needed = r.number("gradient_needed", None)
    if needed is None:
        needed = needed_gradient(method, route, max_order, field_au)
    elif not 1e-14 <= needed <= 1e-3:
        raise r.fail("gradient_needed", f"must lie in [1e-14, 1e-3], got {needed}")
    solver = r.string("solver", "newton", SOLVERS)
    scaled = table.get("scaled_target", True)
    if not isinstance(scaled, bool):
        raise r.fail("scaled_target", f"must be true or false, got {scaled!r}")
    power, reach = scaled_target_power(route, max_order) if scaled else (0, 1)
    return ScfSpec(tol, gradient_tol, max_iterations, grid_level, max(needed, gradient_tol), solver,
                   _parse_correlation(path, correlation, method, max_order),
                   power, reach * field_au if power else 0.0)


#: Default convergence of the coupled-cluster amplitude solver by highest
#: order requested: the energy change per iteration as the SCF energy
#: tolerance of that order (derived_energy_conv_tol_au), and an amplitude
#: change that never binds first at it (measured: stopping at an energy change
#: of 1e-12 Eh left amplitude changes of 3e-10..1.3e-9 for HF and water). A
#: CC energy then ends up to ~4 tolerances from converged (measured: 3.3e-12
#: Eh at 1e-12); where that is the noise floor of a component whose error bar
#: matters, the adaptive window tightens the points (ScfSpec.tightened).
CORRELATION_DEFAULTS = {1: (1e-10, 1e-6), 2: (1e-11, 1e-7), 3: (1e-12, 1e-8),
                        4: (1e-12, 1e-8)}


def _parse_correlation(path: str, table: dict[str, Any], method: str,
                       max_order: int) -> CorrelationSpec | None:
    r = _Reader(path, "correlation", table)
    if not METHODS[method].amplitude_solver:
        if table:
            solvers = ", ".join(m for m, t in METHODS.items() if t.amplitude_solver)
            raise r.fail(next(iter(table)), f"applies to the amplitude solvers ({solvers}), "
                         f"not to method = {method!r}; remove the [correlation] table")
        return None
    energy_default, amplitude_default = CORRELATION_DEFAULTS[max_order]
    energy = r.number("energy_change_au", energy_default)
    if not 1e-15 <= energy <= 1e-5:
        raise r.fail("energy_change_au", f"must lie in [1e-15, 1e-5] Eh, got {energy}")
    amplitude = r.number("amplitude_change", amplitude_default)
    if not 1e-12 <= amplitude <= 1e-3:
        raise r.fail("amplitude_change", f"must lie in [1e-12, 1e-3], got {amplitude}")
    return CorrelationSpec(energy, amplitude)


#: [scf] grid_level of DFT when the job gives none: one fixed, fine grid for
#: every field point, since grid noise is amplified by finite differences
#: (REFERENCES sect. 6), and level 5 keeps it small.
DEFAULT_GRID_LEVEL = 5
#: SCF solvers of [scf] solver (see ScfSpec).
SOLVERS = ("newton", "diis")


def needed_gradient(method: str, route: str, max_order: int, field_au: float) -> float:
    """The largest orbital gradient a point may stall at and still be used.

    A point's noise enters the order-n derivative at step h as sum|w| noise /
    h^k (k = n on the energy route, n - 1 on the dipole route; sum|w| of the
    central stencil of that order). It is set equal to the check's absolute
    floor for order n (tensors.NEGLIGIBLE_ERROR_AU / 10: 1e-6, 1e-5, 1e-3, 0.1
    au) at the smallest field, with noise ~g^2 for an SCF energy and ~g for a
    dipole or post-HF energy (engine.NoiseModel). The error bars always use the
    gradient actually reached.

    >>> f"{needed_gradient('hf', 'dipole', 3, 0.0005):.1e}"
    '6.3e-11'
    >>> f"{needed_gradient('hf', 'energy', 2, 0.00025):.1e}"
    '4.0e-07'
    """
    from fieldprop.numerics.plan import central_weights
    from fieldprop.numerics.tensors import NEGLIGIBLE_ERROR_AU

    k = max_order - 1 if route == "dipole" else max_order
    weight = sum(abs(w) for _, w in central_weights(k)) if k > 0 else 1.0
    allowed = NEGLIGIBLE_ERROR_AU[max_order] / 10.0 * field_au ** k / weight
    if route != "dipole" and METHODS[method].mean_field:
        return math.sqrt(allowed)
    return allowed


def load_job(path: str | os.PathLike[str]) -> Job:
    """Read, validate and resolve a job file.

    Parameters
    ----------
    path : path of a TOML job file (sections [molecule], [model], [response],
        optional [scf]); an ``xyz`` path inside is relative to the job file.

    Returns
    -------
    Job with every default filled in: reference resolved, route resolved, origin
    as given (a name, or coordinates in bohr), SCF tolerances derived.

    Raises
    ------
    InputError : one line naming the file and key.
    """
    job_path = Path(path)
    return job_from_tables(str(path), job_path, _read_toml(job_path))


def job_from_tables(shown: str, job_path: Path, data: dict[str, Any]) -> Job:
    """:func:`load_job` for tables already read: ``shown`` names the job in
    every message (and becomes ``Job.path``), an ``xyz`` path is relative to
    ``job_path``'s folder."""
    for section, value in data.items():
        if section not in _SECTIONS:
            raise InputError(f"{shown}: unknown section [{section}]; valid sections: "
                             f"{', '.join('[' + s + ']' for s in _SECTIONS)}")
        if not isinstance(value, dict):
            raise InputError(f"{shown}: {section} must be a [{section}] table")
        for key in value:
            if (section, key) in RENAMED_KEYS:
                raise InputError(f"{shown}: [{section}] {key} is a name of earlier versions: "
                                 f"it is {RENAMED_KEYS[section, key]} now")
            if key not in _SECTIONS[section]:
                raise InputError(f"{shown}: [{section}] unknown key {key!r}; valid keys: "
                                 f"{', '.join(sorted(_SECTIONS[section]))}")
    for section in ("molecule", "model", "response"):
        if section not in data:
            raise InputError(f"{shown}: section [{section}] is missing")
    molecule = _parse_molecule(shown, job_path, data["molecule"])
    model = _parse_model(shown, data["model"], molecule.multiplicity)
    response = _parse_response(shown, data["response"], model.method, molecule.unit_scale)
    scf = _parse_scf(shown, data.get("scf", {}), model.method, response.max_order,
                     response.route, molecule.multiplicity > 1, response.field_au,
                     data.get("correlation", {}))
    geometry = _parse_geometry(shown, data.get("geometry", {}), model)
    for key in ("nuclear_relaxation", "zero_point"):
        if model.solvent_epsilon is not None and getattr(response, key):
            raise InputError(f"{shown}: [model] solvent with [response] {key} = true: not "
                             "available yet (it needs the solvated model's nuclear Hessian and "
                             "field-dependent gradients); remove one of them")
    if response.zero_point and len(molecule.atoms) < 2:
        raise InputError(f"{shown}: [response] zero_point = true: an atom has no vibrations; "
                         "set it to false")
    return Job(shown, molecule, model, response, scf, geometry)


def _parse_geometry(path: str, table: dict[str, Any], model: ModelSpec) -> GeometrySpec:
    r = _Reader(path, "geometry", table)
    # optimise, as every output spells it; optimize (earlier versions' key) is
    # the same key.
    if "optimise" in table and "optimize" in table:
        raise r.fail("optimize", "and optimise are one key: give one of them")
    key = "optimize" if "optimize" in table else "optimise"
    optimize = table.get(key, False)
    if not isinstance(optimize, bool):
        raise r.fail(key, f"must be true or false, got {optimize!r}")
    others = [k for k in table if k not in ("optimise", "optimize")]
    if others and not optimize:
        raise r.fail(others[0], "is given but optimise is not true; set optimise = true or "
                     "remove it")
    method = r.string("method", None, METHOD_NAMES) if r.has("method") else None
    functional = r.string("functional") if r.has("functional") else None
    basis = r.string("basis") if r.has("basis") else None
    effective = method or model.method
    if effective == "dft" and (functional or (model.functional if method in (None, "dft")
                                              else None)) is None:
        raise r.fail("functional", "is missing; method = \"dft\" needs a functional")
    if effective != "dft" and functional is not None:
        raise r.fail("functional", f"is given but the optimisation's method is {effective!r}")
    if optimize and not METHODS[effective].nuclear_gradient:
        with_gradient = ", ".join(m for m, t in METHODS.items() if t.nuclear_gradient)
        raise r.fail("method", f"= {effective!r} has no nuclear gradient in fieldprop; optimise "
                     f"at one of {with_gradient} (give [geometry] method and basis)")
    if table.get("criteria") in OLD_CRITERIA:
        raise r.fail("criteria", f"= {table['criteria']!r} is a name of earlier versions: use "
                     + ", ".join(f'"{n}" (largest gradient {c["gradient_max_au"]:g} Eh/bohr)'
                                 for n, c in GEOMETRY_CRITERIA.items()))
    criteria = r.string("criteria", "fine", tuple(GEOMETRY_CRITERIA))
    max_steps = r.integer("max_steps", 100, low=1)
    return GeometrySpec(optimize, method, functional, basis, criteria, max_steps)
