"""The workbench's own exceptions.

Every error a user can cause (bad data, bad options, a bad command line) is a
:class:`WorkbenchError`; the command line prints its message on one line and
exits with status 2. Anything else is a bug in the workbench.
"""

from difflib import get_close_matches
from typing import Iterable


def did_you_mean(name: str, known: Iterable[str]) -> str:
    """``"; did you mean 'x'?"`` for the known name closest to ``name``, else ``""``."""
    close = get_close_matches(name, list(known), n=1)
    return f"; did you mean '{close[0]}'?" if close else ""


class WorkbenchWarning(UserWarning):
    """Something the user should know that does not stop the run (shown, never hidden)."""


class WorkbenchError(Exception):
    """A problem the user can fix; the message says what was expected and found."""

    exit_code = 2


class DataError(WorkbenchError):
    """The table does not fit the recipe (columns, values, types)."""


class OptionError(WorkbenchError):
    """An option, prior override or recipe name is unknown or out of range."""


class ModelFileError(WorkbenchError):
    """A user's model or recipe file cannot be loaded or used."""


class OutputError(WorkbenchError):
    """An output folder exists and may not be overwritten, or cannot be written."""
