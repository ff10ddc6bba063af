"""Standard atomic weights by atomic number: the masses of the centre-of-mass origin.

The values are those of PySCF's element table (``pyscf.data.elements.MASSES``,
PySCF 2.14), kept here so that the origin (and so every key of a job with
``origin = "centre-of-mass"``) is computed alike with and without PySCF, and
``collect`` never imports it. PySCF's source for them:

    J. Meija, T. B. Coplen, M. Berglund et al., "Atomic weights of the elements
    2013 (IUPAC Technical Report)", Pure Appl. Chem. 88, 265-291 (2016),
    doi:10.1515/pac-2015-0305.

Table 1's standard atomic weights without their uncertainties; for the
elements whose weight is an interval (H, Li, B, C, N, O, Mg, Si, S, Cl, Br,
Tl) the conventional weight of Table 3; for the elements without a stable
isotope (Tc, Pm, Po to Ac, and from Np on) the mass of the longest-lived
isotope of Table 4. ``tests/physics/test_atomic_weights.py`` checks every
value against PySCF's table.

>>> ATOMIC_WEIGHTS[8], ATOMIC_WEIGHTS[1]
(15.999, 1.008)
"""

#: Atomic weights (unified atomic mass units, u) by atomic number Z; index 0 is
#: the placeholder of fieldprop.job.ELEMENTS.
ATOMIC_WEIGHTS = (
    0.0,
    1.008, 4.002602, 6.94, 9.0121831, 10.81, 12.011,                            #   1 H-C
    14.007, 15.999, 18.998403163, 20.1797, 22.98976928, 24.305,                 #   7 N-Mg
    26.9815385, 28.085, 30.973761998, 32.06, 35.45, 39.948,                     #  13 Al-Ar
    39.0983, 40.078, 44.955908, 47.867, 50.9415, 51.9961,                       #  19 K-Cr
    54.938044, 55.845, 58.933194, 58.6934, 63.546, 65.38,                       #  25 Mn-Zn
    69.723, 72.63, 74.921595, 78.971, 79.904, 83.798,                           #  31 Ga-Kr
    85.4678, 87.62, 88.90584, 91.224, 92.90637, 95.95,                          #  37 Rb-Mo
    97.90721, 101.07, 102.9055, 106.42, 107.8682, 112.414,                      #  43 Tc-Cd
    114.818, 118.71, 121.76, 127.6, 126.90447, 131.293,                         #  49 In-Xe
    132.90545196, 137.327, 138.90547, 140.116, 140.90766, 144.242,              #  55 Cs-Nd
    144.91276, 150.36, 151.964, 157.25, 158.92535, 162.5,                       #  61 Pm-Dy
    164.93033, 167.259, 168.93422, 173.054, 174.9668, 178.49,                   #  67 Ho-Hf
    180.94788, 183.84, 186.207, 190.23, 192.217, 195.084,                       #  73 Ta-Pt
    196.966569, 200.592, 204.38, 207.2, 208.9804, 208.98243,                    #  79 Au-Po
    209.98715, 222.01758, 223.01974, 226.02541, 227.02775, 232.0377,            #  85 At-Th
    231.03588, 238.02891, 237.04817, 244.06421, 243.06138, 247.07035,           #  91 Pa-Cm
    247.07031, 251.07959, 252.083, 257.09511, 258.09843, 259.101,               #  97 Bk-No
    262.11, 267.122, 268.126, 271.134, 270.133, 269.1338,                       # 103 Lr-Hs
    278.156, 281.165, 281.166, 285.177, 286.182, 289.19,                        # 109 Mt-Fl
    289.194, 293.204, 293.208, 294.214,                                         # 115 Mc-Og
)
