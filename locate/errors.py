"""The user-facing error types.

Every problem with a user's input (site file, recording, command-line value, result file)
is raised as a :class:`TdoaError`.  Its message is one line that names the file and the
field and says what to do; the CLI prints it and exits with :attr:`TdoaError.exit_code`.

Errors subclass :class:`ValueError` so that library callers can catch them the ordinary way.
"""

from __future__ import annotations

__all__ = [
    "TdoaError",
    "SiteFileError",
    "RecordingError",
    "ResultFileError",
    "OptionError",
    "NothingFoundError",
    "ConvergenceError",
]


class TdoaError(ValueError):
    """Base class: a problem the user can fix.

    Parameters
    ----------
    message : str
        What is wrong and what to do, one line.
    file : str or os.PathLike, optional
        The file the problem is in.
    field : str, optional
        The field, key, column or option that is wrong (e.g. ``mics[2].channel``).
    """

    exit_code = 2

    def __init__(self, message: str, *, file=None, field: str | None = None):
        self.message = " ".join(str(message).split())
        self.file = None if file is None else str(file)
        self.field = field
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = ": ".join(p for p in (self.file, self.field) if p)
        return f"{where}: {self.message}" if where else self.message


class SiteFileError(TdoaError):
    """The site file is malformed, incomplete or physically implausible."""


class RecordingError(TdoaError):
    """A recording cannot be read or does not match the site file."""


class ResultFileError(TdoaError):
    """A result JSON file is unreadable or of another schema/site."""


class OptionError(TdoaError):
    """A command-line option has an invalid value."""


class NothingFoundError(TdoaError):
    """The input was valid but nothing usable was found (e.g. no event): exit code 1."""

    exit_code = 1


class ConvergenceError(TdoaError, RuntimeError):
    """An inner physics or solver loop failed to converge."""

    exit_code = 1
