"""The users of sigmatrack's own OPC UA server, and what each may do.

``opcua.server.users_file`` lists who may log in with a user name and password, one user a
line::

    # name:role:password hash
    shift-lead-a:operator:scrypt$16384$8$1$<salt, base64>$<hash, base64>
    process-eng:viewer:scrypt$16384$8$1$...

Roles: ``operator`` may read, acknowledge and shelve alarms; ``viewer`` may read. Nobody may
write a variable. Passwords are kept only as scrypt hashes (RFC 7914) with a random 16-byte salt
and the cost N = 2^14, r = 8, p = 1 (the parameters the scrypt paper gives for interactive
logins; quoted from memory: C. Percival, "Stronger key derivation via sequential memory-hard
functions", 2009); a check costs some tens of milliseconds, which slows guessing. The file holds
secrets' hashes and is read only if group and others cannot read it
(:func:`~sensor.shell.opcua.credentials.check_private_file`). ``sigmatrack user add`` writes it.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import os
import re
import tempfile
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from sensor.shell.opcua.credentials import read_private_text
from sensor.shell.opcua.errors import SecurityFileError

Role = Literal["operator", "viewer"]
ROLES: tuple[Role, ...] = ("operator", "viewer")
SCRYPT_N, SCRYPT_R, SCRYPT_P = 2**14, 8, 1
SALT_BYTES = 16
HASH_BYTES = 32
USER_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._@-]{0,63}")
"""A user name: letters, digits and ``. _ @ -``, at most 64 characters."""
MIN_PASSWORD_LENGTH = 12
"""Shortest password ``sigmatrack user add`` accepts (common practice for a shared service)."""


def _b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def hash_password(password: str, salt: bytes) -> str:
    """The stored form of ``password`` with ``salt`` (``scrypt$N$r$p$salt$hash``).

    >>> hash_password("correct horse battery", bytes(16))[:22]
    'scrypt$16384$8$1$AAAAA'
    """
    digest = hashlib.scrypt(
        password.encode("utf-8"),
        salt=salt,
        n=SCRYPT_N,
        r=SCRYPT_R,
        p=SCRYPT_P,
        dklen=HASH_BYTES,
    )
    return f"scrypt${SCRYPT_N}${SCRYPT_R}${SCRYPT_P}${_b64(salt)}${_b64(digest)}"


def verify_password(password: str, stored: str) -> bool:
    """Whether ``password`` matches the stored hash (compared in constant time)."""
    try:
        scheme, n, r, p, salt, digest = stored.split("$")
        expected = base64.b64decode(digest, validate=True)
        computed = hashlib.scrypt(
            password.encode("utf-8"),
            salt=base64.b64decode(salt, validate=True),
            n=int(n),
            r=int(r),
            p=int(p),
            dklen=len(expected),
        )
    except ValueError:
        return False
    return scheme == "scrypt" and hmac.compare_digest(computed, expected)


@dataclass(frozen=True)
class UserRecord:
    """One user of the server: ``name``, ``role`` and the stored password hash."""

    name: str
    role: Role
    password_hash: str

    def line(self) -> str:
        return f"{self.name}:{self.role}:{self.password_hash}"


def parse_users(text: str, file: Path) -> dict[str, UserRecord]:
    """The users in a users file's text, by name.

    Raises
    ------
    SecurityFileError
        For a malformed line, an unknown role or a name given twice (naming the line).
    """
    users: dict[str, UserRecord] = {}
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        parts = line.split(":")
        if len(parts) != 3:
            raise SecurityFileError(file, "expected name:role:password hash", number)
        name, role, stored = parts
        if not USER_NAME.fullmatch(name):
            raise SecurityFileError(file, f"{name!r} is not a valid user name", number)
        if role not in ROLES:
            raise SecurityFileError(file, f"role {role!r} is not one of {', '.join(ROLES)}", number)
        if not stored.startswith("scrypt$") or stored.count("$") != 5:
            raise SecurityFileError(file, f"the password of {name!r} is not a scrypt hash", number)
        if name in users:
            raise SecurityFileError(file, f"user {name!r} is listed twice", number)
        users[name] = UserRecord(name, role, stored)  # type: ignore[arg-type]
    return users


def load_users(file: Path) -> dict[str, UserRecord]:
    """Read a users file (refused if group or others can read it)."""
    return parse_users(read_private_text(file, "the users file"), file)


class Users:
    """The users the server lets in (empty: nobody logs in with a password)."""

    def __init__(self, records: Mapping[str, UserRecord] | None = None) -> None:
        self._records = dict(records or {})

    def __len__(self) -> int:
        """How many users there are (none: nobody logs in)."""
        return len(self._records)

    @classmethod
    def from_file(cls, file: Path | None) -> Users:
        return cls(None if file is None else load_users(file))

    def authenticate(self, name: str, password: str) -> UserRecord | None:
        """The user, if ``password`` is theirs; None otherwise."""
        record = self._records.get(name)
        if record is None:
            # Spend the same time as a real check, so that a guess does not learn which
            # names exist.
            hash_password(password, bytes(SALT_BYTES))
            return None
        return record if verify_password(password, record.password_hash) else None

    def role(self, name: str | None) -> Role | None:
        record = self._records.get(name) if name else None
        return None if record is None else record.role


def write_users(file: Path, records: Iterable[UserRecord]) -> None:
    """Write a users file, readable by its owner only (mode 600), replacing it atomically."""
    body = "# sigmatrack users: name:role:password hash (scrypt); see `sigmatrack user --help`\n"
    body += "".join(f"{record.line()}\n" for record in records)
    file.parent.mkdir(parents=True, exist_ok=True)
    handle, temp = tempfile.mkstemp(dir=file.parent, prefix=f".{file.name}.")
    try:
        os.fchmod(handle, 0o600)
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            out.write(body)
        os.replace(temp, file)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise


def new_salt() -> bytes:
    """A random salt (from the operating system's generator)."""
    return os.urandom(SALT_BYTES)
