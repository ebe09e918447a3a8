"""The exceptions the store raises on purpose (children of :class:`~sensor.errors.SigmatrackError`).

Messages say where (the store's URL with any password hidden, or the row type and field) and
what, in that order; the CLI prints them on one line and exits 2.
"""

from __future__ import annotations

from sensor.errors import SigmatrackError


class StoreError(SigmatrackError, RuntimeError):
    """The store cannot do what was asked: unknown batch, a database of another schema version,
    a missing database driver, a durable queue already in use.

    Parameters
    ----------
    where : the store's URL (password hidden), the queue's folder, or a row type and field
    problem : what is wrong, in plain words
    """

    def __init__(self, where: str, problem: str) -> None:
        self.where = where
        self.problem = problem
        super().__init__(f"{where}: {problem}")


class RowError(StoreError, ValueError):
    """A row handed to the store holds an impossible value (a naive timestamp, an empty key,
    a status code outside 32 bits); raised when the row is built, never in the writer."""


class StoreUnavailableError(StoreError, ConnectionError):
    """The database cannot be reached to read from it (writes never raise this: they wait in
    the durable queue)."""
