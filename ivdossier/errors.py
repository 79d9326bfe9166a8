"""One exception hierarchy for the whole package; the CLI turns each into a one-line message."""

from __future__ import annotations


class IvdossierError(Exception):
    """Base class: the message is one sentence naming what is wrong and how to fix it."""


class NotFoundError(IvdossierError):
    """A named entity (program, instrument, threat, run...) does not exist."""


class InvalidInputError(IvdossierError, ValueError):
    """Input (an option, a file, a column, a value) is malformed or inconsistent."""


class EstimationError(IvdossierError):
    """The numerics cannot proceed: rank deficiency, too few instruments, no variation."""


class ConflictError(IvdossierError):
    """A write would overwrite someone else's change or duplicate an existing entity."""
