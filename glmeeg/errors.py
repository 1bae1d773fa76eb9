"""glmeeg's own exception types.

Every error a user can cause by a file, a setting or a table is a :class:`GlmeegError`. Its
message is one line that names the file, subject, column or key at fault and what was expected.
The command-line interface catches these once, prints the line and exits with code 2.
"""

from __future__ import annotations

__all__ = ["GlmeegError", "DesignFileError", "StudyError", "FormulaError", "ContrastError",
           "ModelError", "ExecutionError"]


class GlmeegError(ValueError):
    """Base class of every input error glmeeg reports to its user.

    ``parameter`` names the keyword, option or key at fault when the error is about one (made
    with :meth:`of`): the message then reads ``"parameter: detail"``, and a caller that names
    its parameters otherwise (the command line's options) renames it from the data, not from
    the text.
    """

    def __init__(self, message: str, *, parameter: str | None = None) -> None:
        # One line, always: a message built from user data must not break the CLI's contract.
        self.detail = " ".join(str(message).split())
        self.parameter = parameter
        super().__init__(f"{parameter}: {self.detail}" if parameter else self.detail)

    @classmethod
    def of(cls, parameter: str, message: str) -> "GlmeegError":
        """An error about one parameter: ``cls.of("n", "expected at least 3, got 2")``."""
        return cls(message, parameter=parameter)

    def renamed(self, names: dict[str, str]) -> "GlmeegError":
        """The same error with its parameter renamed by ``names`` (itself when not listed)."""
        if self.parameter not in names:
            return self
        return type(self)(self.detail, parameter=names[self.parameter])


class DesignFileError(GlmeegError):
    """The design file cannot be read or does not follow the schema."""


class StudyError(GlmeegError):
    """A study file (trials, subjects, channels, epoch arrays) is missing or malformed."""


class FormulaError(GlmeegError):
    """A formula cannot be turned into a usable design matrix."""


class ContrastError(GlmeegError):
    """A contrast does not fit the design it is applied to."""


class ModelError(GlmeegError):
    """The model cannot be estimated with these data (too few subjects, no residual df ...)."""


class ExecutionError(GlmeegError):
    """The work cannot be run as asked: an unreachable scheduler, workers that die on every try,
    a memory budget too small for the work."""
