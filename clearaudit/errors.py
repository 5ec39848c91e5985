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

    def __reduce__(self):  # picklable (a Dask worker's error comes back to the driver)
        return (type(self), (self.source, self.problem))


class StageError(ClearauditError):
    """A processing stage failed for a reason that is not the user's input."""

    def __init__(self, stage: str, problem: str):
        self.stage = stage
        self.problem = problem
        super().__init__(f"stage {stage!r}: {problem}")

    def __reduce__(self):
        return (type(self), (self.stage, self.problem))


class StorageError(ClearauditError):
    """The disk ran full (or over its quota) while a run wrote its files: not the input's
    fault, so the command line prints one line and exits with code 1. The run's partial
    output folder and its work folder are removed as for any other error."""

    def __init__(self, folders: list[str | Path], problem: str):
        self.folders = [str(f) for f in folders]
        self.problem = problem
        super().__init__(f"{problem} (writing in {' and '.join(self.folders)}); free some space "
                         f"there or choose other folders (--out, --work-dir)")

    def __reduce__(self):
        return (type(self), (self.folders, self.problem))


#: ``errno`` values of a full disk or an exhausted quota.
DISK_FULL_ERRNOS = frozenset({28, 122})  # ENOSPC, EDQUOT (Linux)


def is_disk_full(exc: BaseException) -> bool:
    """Whether ``exc`` (or an exception it was raised from) is a full disk or quota."""
    seen = 0
    while exc is not None and seen < 10:
        if isinstance(exc, OSError) and exc.errno in DISK_FULL_ERRNOS:
            return True
        exc = exc.__cause__ or exc.__context__
        seen += 1
    return False


class EngineError(ClearauditError):
    """The Dask cluster failed under a run (its scheduler lost, a task that kept killing its
    workers): the command line prints one line and exits with code 1; nothing is written."""

    def __init__(self, address: str | None, problem: str):
        self.address = address
        self.problem = problem
        where = f"the Dask cluster at {address}" if address else "the Dask cluster"
        super().__init__(f"{where} failed while the audit ran ({problem}); nothing was written")

    def __reduce__(self):
        return (type(self), (self.address, self.problem))
