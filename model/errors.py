"""Errors a user can act on.

Every error Seawall raises for bad input, bad data or a bad artifact derives
from :class:`SeawallError`; the command line prints its message on one line
and exits non-zero, without a traceback.  Messages start with the operation
and say what to do.
"""


class SeawallError(Exception):
    """Base of every user-actionable Seawall error."""


class DataError(SeawallError, ValueError):
    """Training or evaluation data is missing, malformed or unusable."""


class ArtifactError(SeawallError, ValueError):
    """A model file is corrupt, tampered with, or of an unknown format."""


class BudgetError(SeawallError, ValueError):
    """A model cannot be made to fit its size budget (``max_bytes``) with the settings given."""
