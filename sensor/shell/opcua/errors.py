"""The exceptions of the OPC UA shell (children of :class:`~sensor.errors.SigmatrackError`).

Messages say where (the endpoint, the file, the unit and tag) and what, in that order; the CLI
prints them on one line and exits 2.
"""

from __future__ import annotations

from pathlib import Path

from sensor.errors import SigmatrackError


class OpcUaError(SigmatrackError, RuntimeError):
    """An OPC UA server cannot be used as configured (unreachable, refusing us, a node id that
    does not parse).

    Parameters
    ----------
    where : the endpoint URL, or a unit and tag
    problem : what is wrong, in plain words
    """

    def __init__(self, where: str, problem: str) -> None:
        self.where = where
        self.problem = problem
        super().__init__(f"{where}: {problem}")


class SecurityFileError(SigmatrackError, PermissionError):
    """A secret, key, certificate or users file cannot be used: missing, unreadable, readable by
    others, or malformed.

    Parameters
    ----------
    file : the file
    problem : what is wrong
    line : the 1-based line at fault, where one is
    """

    def __init__(self, file: Path | str, problem: str, line: int | None = None) -> None:
        self.file = str(file)
        self.problem = problem
        self.line = line
        where = f"{self.file}, line {line}" if line is not None else self.file
        super().__init__(f"{where}: {problem}")
