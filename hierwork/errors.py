"""One family of user errors.

Every mistake a user can make in a spec, a data file or a run folder is raised
as a :class:`HierworkError`; the CLI prints it as one line and exits with code
2. Anything else that escapes is a bug (exit code 1).
"""
from __future__ import annotations

import difflib


class HierworkError(Exception):
    """A problem with the user's input, stated so that it can be fixed.

    Parameters
    ----------
    message : str
        What is wrong.
    where : str, optional
        Where it is: ``file:line: key.path`` or ``file: row 12``.
    hint : str, optional
        How to fix it.
    """

    def __init__(self, message: str, where: str | None = None, hint: str | None = None):
        self.message = message
        self.where = where
        self.hint = hint
        super().__init__(self.__str__())

    def __str__(self) -> str:
        text = f"{self.where}: {self.message}" if self.where else self.message
        if self.hint:
            text += f" ({self.hint})"
        return text


class SpecError(HierworkError):
    """The model spec is malformed or inconsistent."""


class DataError(HierworkError):
    """The data file does not fit the spec."""


class RunFolderError(HierworkError):
    """A run folder is missing, incomplete or from an unknown format."""


def did_you_mean(value: str, choices) -> str:
    """Return ``"did you mean 'x'? "`` for a close match among ``choices``, else ``""``."""
    close = difflib.get_close_matches(str(value), [str(c) for c in choices], n=1, cutoff=0.6)
    return f"did you mean {close[0]!r}? " if close else ""


def choices_hint(value: str, choices) -> str:
    """A fix-it hint naming a close match (if any) and every valid choice."""
    listed = ", ".join(repr(c) for c in choices)
    return f"{did_you_mean(value, choices)}valid: {listed}"
