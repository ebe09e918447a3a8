"""The store's backends (SQLite, PostgreSQL) and the OPC UA tests' site fixtures, for the
service's tests."""

from tests.shell.opcua.conftest import demo_site, short_settings
from tests.shell.store.conftest import backend, postgres

__all__ = ["backend", "demo_site", "postgres", "short_settings"]
