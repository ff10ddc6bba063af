"""Exception hierarchy; each class carries the contract's exit code.

The library raises these with a full message (what, where, the value, what would
be valid); ``cli.main`` prints ``fieldprop: error: <message>`` on one line and
returns ``exit_code``. Any other exception is a bug and keeps its traceback.
"""


class FieldpropError(Exception):
    """A calculation failed or a check disagreed (exit code 1)."""

    exit_code = 1


class InputError(FieldpropError):
    """Bad job file or arguments; nothing was computed or written (exit code 2)."""

    exit_code = 2


class IncompleteError(FieldpropError):
    """Planned field points are missing (exit code 3)."""

    exit_code = 3


class ScfNotConvergedError(FieldpropError):
    """An SCF (or post-HF) solution did not converge at some field point."""


class UnstableResultError(FieldpropError):
    """Some tensor component's Richardson table never stabilised."""


class BackendError(FieldpropError):
    """An exception inside the backend (PySCF) at one field point; the point is
    recorded as failed, the others go on."""
