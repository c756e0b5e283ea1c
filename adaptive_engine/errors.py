"""The project's error types.

Every error a user can cause subclasses :class:`AdaptiveEngineError`, which itself
subclasses :class:`ValueError`, so callers may catch either.  Errors that concern a
place in a file carry that place in ``location`` (``"line 7"``, ``"item W-012"``,
``"[stopping] se"``) and the CLI prints them as ``LOCATION: problem``.
"""

from __future__ import annotations

from typing import Iterable, NamedTuple


class Problem(NamedTuple):
    """One problem found while validating user input."""

    location: str
    message: str

    def __str__(self) -> str:
        return f"{self.location}: {self.message}" if self.location else self.message


class AdaptiveEngineError(ValueError):
    """Base class of every error caused by user input or misuse of the library.

    Parameters
    ----------
    problems : str or iterable of Problem
        A single message, or the list of problems found.
    location : str, optional
        Where a single-message error happened.
    """

    def __init__(self, problems: "str | Iterable[Problem]", location: str = ""):
        if isinstance(problems, str):
            problems = [Problem(location, problems)]
        self.problems: list[Problem] = list(problems)
        if not self.problems:
            raise TypeError("an error needs at least one problem")
        self.location = self.problems[0].location
        super().__init__("\n".join(str(p) for p in self.problems))


class BankError(AdaptiveEngineError):
    """An item bank file or array set is malformed."""


class ResponseDataError(AdaptiveEngineError):
    """Response data (answers to items) are malformed or do not match the bank."""


class DesignError(AdaptiveEngineError):
    """A test design file is malformed or does not fit the bank."""


class SessionError(AdaptiveEngineError):
    """A live-session request cannot be carried out (unknown session, wrong item, ...)."""


class CalibrationError(AdaptiveEngineError):
    """Response data cannot be calibrated as asked."""


class SimulationError(AdaptiveEngineError):
    """A simulation request cannot be carried out (bad sizes, settings, banks that do not match)."""


class OutputError(AdaptiveEngineError):
    """An output file or folder cannot be written where asked (missing folder, a folder
    where a file should go, no permission)."""


class DeprecatedDesignKey(DeprecationWarning):
    """A design uses the old spelling of a renamed key or option value.

    The old spellings are read for one release; the message names the key as the design
    file spells it and its new spelling.  The command line prints these as ``warning:``
    lines.
    """
