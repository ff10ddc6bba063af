"""fieldprop: static electric response (mu, alpha, beta, gamma) by finite fields.

The flow, one folder per stage (arrows point down; DEVELOPERS.md has the map)::

    cli/       the command line
    outputs/   tables, result documents, listings, ranking, plots, check's verdict
    engine/    prepare -> stages (what to compute, on which executor) -> analyse
    backend/   PySCF: every SCF, response and gradient (nothing else imports it)
    points/    keys, records, the store, point lines, executors, progress
    inputs/    job and set files, molecules, SMILES structures
    numerics/  plan, symmetry, window, Richardson, continuity, tensors (pure)
"""

__version__ = "0.1.0"
