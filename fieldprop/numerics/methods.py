"""Which energy method has which route: the one table that says so.

A *route* names the per-point quantity that is differentiated by finite fields:

- ``energy``: the total energy E(F) of the method (every method);
- ``dipole``: the analytic dipole mu(F) of the SCF determinant (SCF methods only:
  for them mu(F) = -dE/dF exactly, one order lower, fewer points);
- ``alpha``: the analytic CPHF/CPKS polarizability alpha(F) (SCF methods with a
  real orbital Hessian: RHF, UHF, RKS, UKS), the reference route of
  ``fieldprop check``.

Pure data; no PySCF. Every module asks this table instead of comparing method
names.

>>> METHODS["dft"].has(Route.DIPOLE), METHODS["mp2"].has(Route.DIPOLE)
(True, False)
>>> Route("alpha") is Route.ALPHA and Route.ENERGY == "energy"
True
"""

from __future__ import annotations

import enum
from dataclasses import dataclass


class Route(str, enum.Enum):
    """The differentiated quantity. A ``str`` enum: it compares equal to its name
    and serialises as it (JSON, logs)."""

    ENERGY = "energy"
    DIPOLE = "dipole"
    ALPHA = "alpha"

    def __str__(self) -> str:
        return self.value


@dataclass(frozen=True)
class MethodTraits:
    """What fieldprop can do with an energy method.

    ``mean_field``: the method's energy is the SCF energy itself (variational in
    the orbitals: its error is ~g^2 in the orbital gradient g; post-SCF energies
    err by ~g). ``routes``: the routes available (the alpha route not for a
    restricted open shell: alpha_route_for; ROHF/ROKS have an orbital Hessian
    in fieldprop for their Newton steps, but no analytic alpha is offered for
    them). ``restricted_open_shell``: whether the
    method runs on a restricted open-shell reference at all. ``amplitude_solver``:
    a coupled-cluster solver, whose amplitude tolerance adds to the energy noise.
    ``nuclear_gradient``: nuclear relaxation in a field and a geometry
    optimisation are available.
    ``integration_grid``: the energy is integrated on a grid fixed in the input
    axes (DFT: atom-centred Lebedev grids, invariant only under signed
    permutations of those axes), so a symmetry operation maps a field point onto
    another exactly only when it is one of those.
    """

    name: str
    mean_field: bool
    routes: frozenset[Route]
    restricted_open_shell: bool
    amplitude_solver: bool = False
    integration_grid: bool = False
    #: PySCF has the method's nuclear gradient, so E(R; F) can be minimised
    #: over the nuclei ([response] nuclear_relaxation, [geometry] optimise).
    nuclear_gradient: bool = False

    def has(self, route: Route | str) -> bool:
        return Route(route) in self.routes

    def alpha_route_for(self, reference: str, multiplicity: int) -> bool:
        """The analytic alpha (CPHF/CPKS) exists for this reference."""
        return self.has(Route.ALPHA) and not (reference == "restricted" and multiplicity > 1)


_SCF_ROUTES = frozenset({Route.ENERGY, Route.DIPOLE, Route.ALPHA})
_ENERGY_ONLY = frozenset({Route.ENERGY})

METHODS: dict[str, MethodTraits] = {
    "hf": MethodTraits("hf", True, _SCF_ROUTES, True, nuclear_gradient=True),
    "dft": MethodTraits("dft", True, _SCF_ROUTES, True, integration_grid=True,
                        nuclear_gradient=True),
    "mp2": MethodTraits("mp2", False, _ENERGY_ONLY, False, nuclear_gradient=True),
    "ccsd": MethodTraits("ccsd", False, _ENERGY_ONLY, False, amplitude_solver=True),
    "ccsd(t)": MethodTraits("ccsd(t)", False, _ENERGY_ONLY, False, amplitude_solver=True),
}


def methods_with(route: Route) -> tuple[str, ...]:
    """Names of the methods that have ``route``, in table order."""
    return tuple(name for name, traits in METHODS.items() if traits.has(route))
