"""The error hierarchy.

Every error the tool raises on purpose derives from :class:`CorpusprepError`
and also from the built-in class that fits it, so callers may catch either.
Messages say what went wrong, where (file, line, dotted key) and what to do.
"""

from __future__ import annotations

__all__ = [
    "CorpusprepError",
    "DefinitionError",
    "InputError",
    "IntegrityError",
    "OutputExistsError",
    "TooManyRejectedError",
    "WorkerDiedError",
]


class CorpusprepError(Exception):
    """Base class of every error corpusprep raises on purpose."""


class DefinitionError(CorpusprepError, ValueError):
    """A pipeline definition is malformed: unknown key, wrong type, bad value."""


class InputError(CorpusprepError, OSError):
    """The input folder cannot be used at all (missing, not a folder, unreadable)."""


class OutputExistsError(CorpusprepError, FileExistsError):
    """The output folder exists and is not empty, and the run was not forced."""


class TooManyRejectedError(CorpusprepError, RuntimeError):
    """More input records were rejected than the definition allows."""


class IntegrityError(CorpusprepError, RuntimeError):
    """A finished output or an internal invariant (such as the ledger sum) does not hold."""


class WorkerDiedError(CorpusprepError, RuntimeError):
    """A worker process ended abruptly (killed, out of memory); nothing was published."""
