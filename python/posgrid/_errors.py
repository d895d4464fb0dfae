"""posgrid's exceptions: one class per failure class of the command line, with its exit code."""

from typing import Optional


class Error(Exception):
    """Base class of posgrid's errors.

    ``str(e)`` is the message the command line prints after ``posgrid: error:``;
    ``exit_code`` is the status it exits with; ``path`` is the file the error concerns,
    where there is one.
    """

    exit_code: int = 1

    def __init__(self, message: str, path: Optional[str] = None, exit_code: Optional[int] = None):
        super().__init__(message)
        self.message = message
        self.path = path
        if exit_code is not None:
            self.exit_code = exit_code

    def __reduce__(self):
        return (type(self), (self.message, self.path, self.exit_code))


class UsageError(Error, ValueError):
    """A bad argument, or arguments that do not fit together (exit code 2)."""

    exit_code = 2


class InvalidInputError(Error):
    """The input cannot be read or is not a valid checkpoint (exit code 3)."""

    exit_code = 3


class TableError(Error):
    """No position table found, a named tensor missing, or a table ambiguous (exit code 4)."""

    exit_code = 4


class WriteError(Error):
    """The output cannot be written; nothing was left behind (exit code 5)."""

    exit_code = 5


class RefusedError(Error):
    """A table refused: non-finite values, an integer dtype, or over the memory guard (exit code 6)."""

    exit_code = 6
