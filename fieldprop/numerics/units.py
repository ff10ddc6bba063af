"""Conversion factors from atomic units, derived from CODATA via ``scipy.constants``.

Nothing here is typed in: every factor is built from the elementary charge e, the
Bohr radius a0, the Hartree energy Eh and epsilon_0 (the CODATA edition is that of
the installed SciPy). The n-th order response tensor (n = 1 dipole, 2 alpha,
3 beta, 4 gamma) has the SI unit e^n a0^n / Eh^(n-1) and the Gaussian (esu) unit
e_G^n a0_cm^n / Eh_erg^(n-1), where e_G = e * sqrt(1e9 / (4 pi eps0)) statC.

Example
-------
>>> round(DIPOLE_AU_TO_DEBYE, 5)
2.54175
>>> round(ALPHA_AU_TO_ANGSTROM3, 6)
0.148185
"""

import math

from scipy import constants as _c

ELEMENTARY_CHARGE_C = _c.e
BOHR_M = _c.physical_constants["Bohr radius"][0]
HARTREE_J = _c.physical_constants["Hartree energy"][0]
EPSILON0_SI = _c.epsilon_0

BOHR_TO_ANGSTROM = BOHR_M / _c.angstrom
ANGSTROM_TO_BOHR = 1.0 / BOHR_TO_ANGSTROM

#: The bohr in angstrom with which the backend turns angstrom into bohr
#: (PySCF's ``pyscf.data.nist.BOHR``, CODATA 2010). A validator feeds both codes
#: the same angstrom XYZ; converted with another bohr, the "same" molecule
#: differs at ~1e-9 relative, enough to move alpha by several of fieldprop's
#: error bars. Held here, not imported, so that reading a job never imports
#: PySCF; the backend refuses to run if its value ever differs (and a test
#: compares the two).
BACKEND_BOHR_ANGSTROM = 0.52917721092

#: The values ``[molecule] bohr_angstrom`` accepts by name: the backend's, or
#: the CODATA edition of the installed SciPy.
NAMED_BOHR_ANGSTROM = {"backend": BACKEND_BOHR_ANGSTROM, "scipy": BOHR_TO_ANGSTROM}

#: Elementary charge in statcoulomb (Gaussian units): e * sqrt(1e9 / (4 pi eps0)).
ELEMENTARY_CHARGE_STATC = ELEMENTARY_CHARGE_C * math.sqrt(1e9 / (4.0 * math.pi * EPSILON0_SI))
_BOHR_CM = BOHR_M * 100.0
_HARTREE_ERG = HARTREE_J * 1e7

FIELD_AU_TO_V_PER_M = HARTREE_J / (ELEMENTARY_CHARGE_C * BOHR_M)

#: Order of each property in the field (the n of the n-th derivative of E).
PROPERTY_ORDER = {"dipole": 1, "alpha": 2, "beta": 3, "gamma": 4}


def si_factor(order: int) -> float:
    """SI value of one atomic unit of the ``order``-th response (C^n m^n J^-(n-1))."""
    return (ELEMENTARY_CHARGE_C * BOHR_M) ** order / HARTREE_J ** (order - 1)


def esu_factor(order: int) -> float:
    """Gaussian (esu) value of one atomic unit of the ``order``-th response."""
    return (ELEMENTARY_CHARGE_STATC * _BOHR_CM) ** order / _HARTREE_ERG ** (order - 1)


#: 1 D = 1e-18 statC cm.
DIPOLE_AU_TO_DEBYE = esu_factor(1) / 1e-18
#: alpha / (4 pi eps0) as a volume: one atomic unit is a0^3.
ALPHA_AU_TO_ANGSTROM3 = BOHR_TO_ANGSTROM**3

#: The unit systems of the tables (``--units``): per property (label, factor
#: from au). esu: the Gaussian units of the NLO literature, with the dipole in
#: debye, alpha as a volume (angstrom^3, = 1e-24 cm^3 esu) and beta and gamma
#: in the customary 1e-30 and 1e-36 esu (common practice); si: SI.
TABLE_UNITS = {
    "au": {p: ("au", 1.0) for p in PROPERTY_ORDER},
    "esu": {"dipole": ("debye", DIPOLE_AU_TO_DEBYE),
            "alpha": ("angstrom^3", ALPHA_AU_TO_ANGSTROM3),
            "beta": ("10^-30 esu", esu_factor(3) * 1e30),
            "gamma": ("10^-36 esu", esu_factor(4) * 1e36)},
    "si": {p: (label, si_factor(n)) for p, n, label in (
        ("dipole", 1, "C m"), ("alpha", 2, "C m^2 V^-1"), ("beta", 3, "C m^3 V^-2"),
        ("gamma", 4, "C m^4 V^-3"))},
}

#: Each unit spelled for a column name or a JSON key (letters, digits, _ and
#: -; no spaces or carets): {label: tag}.
LABEL_TAGS = {"au": "au", "debye": "debye", "angstrom^3": "angstrom3",
             "10^-30 esu": "1e-30_esu", "10^-36 esu": "1e-36_esu", "C m": "C_m",
             "C m^2 V^-1": "C_m2_per_V", "C m^3 V^-2": "C_m3_per_V2",
             "C m^4 V^-3": "C_m4_per_V3"}

#: For each property, the units reported beside atomic units in the result
#: JSON: ``{property: [(unit tag, factor from au), ...]}``.
DISPLAY_UNITS = {p: [(LABEL_TAGS[TABLE_UNITS[system][p][0]], TABLE_UNITS[system][p][1])
                     for system in ("esu", "si")] for p in PROPERTY_ORDER}


#: One unified atomic mass unit in electron masses (atomic units of mass).
AMU_TO_ME = _c.atomic_mass / _c.m_e
#: One hartree as a wavenumber (cm^-1): Eh / (h c), c in cm/s.
HARTREE_TO_CM = HARTREE_J / (_c.h * _c.c * 100.0)
