"""One error hierarchy for everything a user can get wrong.

Every error a user can cause derives from :class:`ConductError`; the command
line prints its message as one paragraph and exits with code 2.  Anything else
that escapes is a bug in ``conduct`` and exits with code 1.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable

__all__ = [
    "ConductError",
    "DataError",
    "EstimationError",
    "IdentificationError",
    "StudyFileError",
    "suggest",
]


class ConductError(Exception):
    """Base class of every error a user can cause (exit code 2)."""

    exit_code: int = 2


class StudyFileError(ConductError):
    """The study file is unreadable, malformed, or has a bad key or value."""


class DataError(ConductError):
    """A data file is unreadable or its contents fail validation."""


class IdentificationError(ConductError):
    """The specification cannot identify what it asks to estimate."""


class EstimationError(ConductError):
    """The data cannot support the requested estimate (collinear, too few rows...)."""


def suggest(name: str, choices: Iterable[str]) -> str:
    """Return a did-you-mean phrase for ``name`` among ``choices`` (or '').

    Parameters
    ----------
    name : str
        What the user wrote.
    choices : iterable of str
        The valid names.

    Returns
    -------
    str
        ``" (did you mean 'x'?)"`` when a close match exists, else ``""``.
    """
    pool = [str(c) for c in choices]
    close = difflib.get_close_matches(name, pool, n=1, cutoff=0.6)
    if not close:
        lowered = {c.lower(): c for c in pool}
        if name.lower() in lowered:
            close = [lowered[name.lower()]]
    return f" (did you mean '{close[0]}'?)" if close else ""
