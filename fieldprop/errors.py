"""Exception hierarchy; each class carries the contract's exit code and the
words that name what happened.

The library raises these with a full message (what, where, the value, what would
be valid); ``cli.main`` prints ``fieldprop: error: <kind>: <message>`` on one
line and returns ``exit_code``. ``kind`` is a fixed vocabulary a script can act
on (README, "Exit codes"): ``bad input`` (2), ``incomplete`` (3),
``SCF not converged``, ``backend failure``, ``unstable`` (1); ``cli`` adds
``check disagrees`` (1). Any other exception is a bug and keeps its traceback.
"""


class FieldpropError(Exception):
    """A calculation failed or a check disagreed (exit code 1)."""

    exit_code = 1
    kind = "failed"


class InputError(FieldpropError):
    """Bad job file or arguments; nothing was computed or written (exit code 2)."""

    exit_code = 2
    kind = "bad input"


class IncompleteError(FieldpropError):
    """Planned field points are missing (exit code 3)."""

    exit_code = 3
    kind = "incomplete"


class ScfNotConvergedError(FieldpropError):
    """An SCF (or post-HF) solution did not converge at some field point."""

    kind = "SCF not converged"


class UnstableResultError(FieldpropError):
    """Some tensor component's Richardson table never stabilised."""

    kind = "unstable"


class BackendError(FieldpropError):
    """An exception inside the backend (PySCF) at one field point; the point is
    recorded as failed, the others go on."""

    kind = "backend failure"


class CampaignError(FieldpropError):
    """Some molecules of a screening campaign failed or lack a number (the
    others' results are written)."""

    kind = "molecules failed"
