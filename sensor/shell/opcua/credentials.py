"""Secrets outside the site file: the OPC UA password, private keys and the users file.

A site file never holds a secret (it refuses ``password`` keys). The password sigmatrack logs in
to the plant's server with comes from an environment variable (``opcua.password_env``) or from a
file (``opcua.password_file``); private keys and the users file are files. A file holding a
secret must be a regular file that neither the group nor others may read or write (mode 600 or
400, owned by the service account): the rule libpq applies to a password file (PostgreSQL
documentation, "The Password File"), which OpenSSH applies to private keys as well. A file that
breaks it is refused, naming the file and its mode; nothing is read from it.

On systems without POSIX permissions (Windows) the mode is not checked; protect the files with
the system's own access control.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Mapping
from pathlib import Path

from sensor.shell.config import OpcUaConfig
from sensor.shell.opcua.errors import SecurityFileError

PRIVATE_MODE_MASK = 0o077
"""Permission bits of group and others: none may be set on a file that holds a secret."""


def check_private_file(path: Path, what: str) -> None:
    """Refuse ``path`` unless it is a regular file only its owner may read or write.

    Parameters
    ----------
    path : the file
    what : what it holds, for the message (``"the OPC UA password file"``)

    Raises
    ------
    SecurityFileError
        If it is missing, not a regular file, or open to group or others.
    """
    try:
        info = path.stat()
    except OSError as error:
        raise SecurityFileError(path, f"{what} cannot be read ({error.strerror})") from None
    if not stat.S_ISREG(info.st_mode):
        raise SecurityFileError(path, f"{what} is not a regular file")
    if os.name == "posix" and info.st_mode & PRIVATE_MODE_MASK:
        mode = stat.S_IMODE(info.st_mode)
        raise SecurityFileError(
            path,
            f"{what} is open to group or others (mode {mode:03o}): it holds a secret; "
            f"run chmod 600 on it (and keep it owned by the service account)",
        )


def read_private_text(path: Path, what: str) -> str:
    """The text of a file that holds a secret, after :func:`check_private_file`."""
    check_private_file(path, what)
    try:
        return path.read_text(encoding="utf-8")
    except OSError as error:
        raise SecurityFileError(path, f"{what} cannot be read ({error.strerror})") from None
    except UnicodeDecodeError:
        raise SecurityFileError(path, f"{what} is not UTF-8 text") from None


def opcua_password(config: OpcUaConfig, environ: Mapping[str, str]) -> str | None:
    """The password for ``opcua.username``, from the environment or the password file; None
    when the site logs in without one.

    Parameters
    ----------
    config : the ``[opcua]`` section
    environ : the environment to read ``password_env`` from (``os.environ`` in the service)

    Raises
    ------
    SecurityFileError
        If the variable is unset or empty, or the file is missing, open to others, or empty.
    """
    if config.password_env is not None:
        password = environ.get(config.password_env, "")
        if not password:
            raise SecurityFileError(
                f"environment variable {config.password_env}",
                "is not set or empty (opcua.password_env names it)",
            )
        return password
    if config.password_file is not None:
        text = read_private_text(config.password_file, "the OPC UA password file")
        password = text.splitlines()[0] if text else ""
        if not password:
            raise SecurityFileError(config.password_file, "the OPC UA password file is empty")
        return password
    return None
