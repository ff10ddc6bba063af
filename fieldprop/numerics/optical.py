r"""Optical-frequency estimates from the static beta: the two-state model.

fieldprop's tensors are static (zero frequency). Second-harmonic generation
(beta(-2w; w, w)) and the electro-optic effect (beta(-w; w, 0)) are measured
at optical frequencies, where dispersion near a charge-transfer band raises
beta. In the two-state model (one excited state e dominates beta: J. L. Oudar
and D. S. Chemla, J. Chem. Phys. 66, 2664 (1977); cited from memory), every
frequency-dependent beta is the static one times a dispersion factor of the
excitation energy w_eg alone,

    beta(-w_s; w_1, w_2) / beta(0) = w_eg^4 (3 w_eg^2 + w_1 w_2 - w_s^2)
                                     / (3 (w_eg^2 - w_1^2)(w_eg^2 - w_2^2)(w_eg^2 - w_s^2)),

which is the ratio of the two-state sum over states (its six permutation
terms) to its static limit; for second-harmonic generation (w_s = 2w,
w_1 = w_2 = w) w_eg^4 / ((w_eg^2 - w^2)(w_eg^2 - 4 w^2)), for the
electro-optic effect (w_s = w_1 = w, w_2 = 0) w_eg^2 (3 w_eg^2 - w^2) /
(3 (w_eg^2 - w^2)^2). Near a resonance (2w or w close to w_eg) the model
diverges, and an undamped estimate there means nothing: within
:data:`RESONANCE_MARGIN_EV` of the excitation, or beyond it, no number is
formed. An estimate is a guide to the size of dispersion, not a
frequency-dependent calculation.

>>> round(dispersion_factor("second-harmonic", 0.0, 0.15), 12)
1.0
>>> round(photon_energy_ev(1064.0), 4)   # the Nd:YAG fundamental
1.1653
"""

from __future__ import annotations

from fieldprop.numerics.units import HARTREE_J

#: The processes estimated, and the highest frequency each involves (in
#: units of the fundamental w): what must stay below the excitation.
PROCESSES = {"second-harmonic": 2.0, "electro-optic": 1.0}
#: An estimate whose highest frequency comes within this of the excitation
#: energy (eV), or above it, is resonant: no number. About the half-width of
#: a push-pull chromophore's charge-transfer band in solution (common
#: practice: 0.2-0.4 eV), where an undamped two-state factor stops meaning
#: anything.
RESONANCE_MARGIN_EV = 0.3
#: The excited states the rule looks at, lowest first.
STATES_SEEN = 8
#: How the dominant (charge-transfer) state is chosen among them.
RULE = (f"the lowest of the {STATES_SEEN} lowest excited states whose oscillator strength is "
        "at least half the largest among them (the lowest intense band: a push-pull "
        "chromophore's charge-transfer state)")


def _ev() -> float:
    from scipy import constants

    return constants.electron_volt


def photon_energy_au(wavelength_nm: float) -> float:
    """h c / lambda in hartree."""
    from scipy import constants

    return constants.h * constants.c / (wavelength_nm * 1e-9) / HARTREE_J


def photon_energy_ev(wavelength_nm: float) -> float:
    return photon_energy_au(wavelength_nm) * HARTREE_J / _ev()


def wavelength_nm(energy_au: float) -> float:
    """The wavelength (nm) of a photon of ``energy_au`` hartree."""
    from scipy import constants

    return constants.h * constants.c / (energy_au * HARTREE_J) * 1e9


def energy_ev(energy_au: float) -> float:
    return energy_au * HARTREE_J / _ev()


def dispersion_factor(process: str, omega_au: float, excitation_au: float) -> float:
    """beta(-w_s; w_1, w_2) / beta(0) of the two-state model (module text)."""
    w, e2 = float(omega_au), float(excitation_au) ** 2
    ws, w1, w2 = {"second-harmonic": (2 * w, w, w), "electro-optic": (w, w, 0.0)}[process]
    return (e2 * e2 * (3 * e2 + w1 * w2 - ws * ws)
            / (3 * (e2 - w1 * w1) * (e2 - w2 * w2) * (e2 - ws * ws)))


def resonant(process: str, omega_au: float, excitation_au: float) -> bool:
    """Whether the process's highest frequency comes within the margin of the
    excitation, or above it."""
    margin = RESONANCE_MARGIN_EV * _ev() / HARTREE_J
    return PROCESSES[process] * omega_au >= excitation_au - margin


def dominant_state(oscillator_strengths) -> int:
    """The index (from 0, energies ascending) of the state :data:`RULE` picks
    among the first STATES_SEEN; -1 where none has any strength."""
    seen = [float(f) for f in oscillator_strengths[:STATES_SEEN]]
    if not seen or max(seen) <= 0.0:
        return -1
    strongest = max(seen)
    return next(i for i, f in enumerate(seen) if f >= 0.5 * strongest)
