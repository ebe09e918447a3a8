"""The exceptions sigmatrack raises on purpose.

Every error a person can cause (a bad site file, a bad CSV, an impossible request to a model)
derives from :class:`SigmatrackError`, and also from the standard exception it refines, so that
callers who only know the standard library still catch it. The CLI turns these into one line on
stderr and exit status 2; anything else is a bug and keeps its traceback.

Messages say where (file, line, key) and what, in that order.
"""

from __future__ import annotations

from pathlib import Path


class SigmatrackError(Exception):
    """Base of the errors a user can cause and fix."""


class SiteConfigError(SigmatrackError, ValueError):
    """A site file is unreadable, incomplete or holds an impossible value.

    Parameters
    ----------
    file : path of the site file
    key : dotted key, e.g. ``"solubility.model"`` or ``"unit[1].tags.temp"``; empty for the
        whole file
    problem : what is wrong, in plain words
    """

    def __init__(self, file: Path | str, key: str, problem: str) -> None:
        self.file = str(file)
        self.key = key
        self.problem = problem
        where = f"{self.file}: {key}" if key else self.file
        super().__init__(f"{where}: {problem}")


class DataFileError(SigmatrackError, ValueError):
    """A data file (lab CSV, historian CSV) cannot be used as it stands.

    Parameters
    ----------
    file : path of the data file
    line : 1-based line number in the file, or ``None`` when the problem is the whole file
    problem : what is wrong, in plain words
    """

    def __init__(self, file: Path | str, line: int | None, problem: str) -> None:
        self.file = str(file)
        self.line = line
        self.problem = problem
        where = f"{self.file}, line {line}" if line is not None else self.file
        super().__init__(f"{where}: {problem}")


class FitError(SigmatrackError, ValueError):
    """A model cannot be fitted to the data given (too few points, no convergence, ...).

    Parameters
    ----------
    problem : what is wrong
    point : 0-based index of the data point at fault, when one point is; lets the caller name
        the file and line it came from
    """

    def __init__(self, problem: str, *, point: int | None = None) -> None:
        self.problem = problem
        self.point = point
        super().__init__(problem)


class SolubilityError(SigmatrackError, ValueError):
    """A solubility curve was asked something it cannot answer (e.g. an inverse on a curve
    that turns inside its domain)."""


class UnitError(SigmatrackError, ValueError):
    """A quantity cannot be converted: unknown unit, missing molar mass or density, or a value
    outside the range the unit allows (a mass fraction of 1.2, say)."""
