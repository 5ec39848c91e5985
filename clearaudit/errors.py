"""Exception hierarchy.

Every error a user can cause by their input is an :class:`InputError`: the command line turns
it into one line on stderr (``clearaudit: error: FILE: PROBLEM``) and exit code 2, without a
traceback and without writing partial outputs.
"""
from __future__ import annotations

from pathlib import Path


class ClearauditError(Exception):
    """Base class of all errors raised by clearaudit."""


class InputError(ClearauditError):
    """Bad user input: a file that is missing, unreadable, empty or inconsistent.

    Parameters
    ----------
    source
        The file (or option) at fault; ``None`` when the problem is not tied to one file.
    problem
        One plain sentence describing what is wrong.
    """

    def __init__(self, source: str | Path | None, problem: str):
        self.source = None if source is None else str(source)
        self.problem = problem
        super().__init__(f"{self.source}: {problem}" if self.source else problem)


class StageError(ClearauditError):
    """A processing stage failed for a reason that is not the user's input."""

    def __init__(self, stage: str, problem: str):
        self.stage = stage
        self.problem = problem
        super().__init__(f"stage {stage!r}: {problem}")
