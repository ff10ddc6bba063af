"""fieldprop: static electric response (mu, alpha, beta, gamma) by finite fields.

The data flow, one module per stage::

    job.py -> molecule.py -> plan.py -> backend_pyscf.py (via execute.py)
           -> extrapolate.py -> tensors.py -> report.py

``plan``, ``extrapolate`` and ``tensors`` are pure numerics and never import PySCF.
"""

__version__ = "0.1.0"
