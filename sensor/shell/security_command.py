"""``sigmatrack certificate`` and ``sigmatrack user``: a site's OPC UA identity and the users of
sigmatrack's own server.

- ``certificate create --config FILE``: sigmatrack's application instance certificate and key
  at the site file's ``opcua.certificate`` and ``opcua.private_key``, for
  ``opcua.application_uri`` (:func:`~sensor.shell.opcua.security.create_application_certificate`).
- ``certificate show FILE``: what a certificate says (URI, hosts, validity, fingerprint), to
  compare with what a peer shows before trusting it.
- ``user add NAME --role operator|viewer --config FILE``, ``user remove NAME``, ``user list``:
  the users file ``opcua.server.users_file`` (:mod:`~sensor.shell.opcua.users`). The password is
  asked twice on the terminal, or read as one line from standard input with
  ``--password-stdin``; it is never an argument (it would show in the process list).
"""

from __future__ import annotations

import argparse
import getpass
import socket
import sys
from datetime import UTC, datetime
from pathlib import Path

from cryptography import x509

from sensor.errors import SigmatrackError
from sensor.shell.config import SiteConfig, load_site_file
from sensor.shell.opcua.errors import SecurityFileError
from sensor.shell.opcua.security import (
    CERTIFICATE_DAYS,
    create_application_certificate,
    load_certificate,
    thumbprint,
)
from sensor.shell.opcua.users import (
    MIN_PASSWORD_LENGTH,
    ROLES,
    USER_NAME,
    UserRecord,
    hash_password,
    load_users,
    new_salt,
    write_users,
)


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``certificate``."""
    certificate = commands.add_parser(
        "certificate",
        help="make or show sigmatrack's OPC UA application certificate",
        description="Make sigmatrack's OPC UA application instance certificate, or show one.",
    )
    actions = certificate.add_subparsers(dest="action", required=True, metavar="ACTION")
    create = actions.add_parser(
        "create",
        help="make the certificate and key the site file names",
        description=(
            "Make a self-signed application instance certificate (DER) and its private key "
            "(PEM, mode 600) at opcua.certificate and opcua.private_key, for "
            "opcua.application_uri. Existing files are never overwritten."
        ),
    )
    create.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    create.add_argument(
        "--host",
        action="append",
        metavar="NAME",
        help="a DNS name or IP address of this machine, for the certificate (repeat; default: "
        "this machine's host name and localhost)",
    )
    create.add_argument(
        "--days", type=int, default=CERTIFICATE_DAYS, help=f"validity (default {CERTIFICATE_DAYS})"
    )
    create.add_argument("--organization", default="", help="the subject's organization")
    create.set_defaults(run=run_create)
    show = actions.add_parser("show", help="print what a certificate says")
    show.add_argument("file", metavar="CERT", help="a certificate (DER or PEM)")
    show.set_defaults(run=run_show)


def register_user(commands: argparse._SubParsersAction) -> None:
    """Add ``user``."""
    user = commands.add_parser(
        "user",
        help="manage who may log in to sigmatrack's OPC UA server",
        description=(
            "Manage opcua.server.users_file: operators may acknowledge and shelve alarms, "
            "viewers may read. Passwords are stored as scrypt hashes only."
        ),
    )
    user_actions = user.add_subparsers(dest="action", required=True, metavar="ACTION")
    add = user_actions.add_parser("add", help="add a user or set a user's role and password")
    add.add_argument("name", help="the user name")
    add.add_argument("--role", required=True, choices=ROLES)
    add.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    add.add_argument(
        "--password-stdin", action="store_true", help="read the password from standard input"
    )
    add.set_defaults(run=run_user_add)
    remove = user_actions.add_parser("remove", help="remove a user")
    remove.add_argument("name")
    remove.add_argument("--config", required=True, metavar="FILE")
    remove.set_defaults(run=run_user_remove)
    listing = user_actions.add_parser("list", help="list the users and their roles")
    listing.add_argument("--config", required=True, metavar="FILE")
    listing.set_defaults(run=run_user_list)


def _describe(certificate: x509.Certificate) -> list[str]:
    try:
        san = certificate.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
        uris = san.get_values_for_type(x509.UniformResourceIdentifier)
        hosts = [*san.get_values_for_type(x509.DNSName)]
        hosts += [str(ip) for ip in san.get_values_for_type(x509.IPAddress)]
    except x509.ExtensionNotFound:
        uris, hosts = [], []
    return [
        f"  subject      {certificate.subject.rfc4514_string()}",
        f"  URI          {', '.join(uris) or 'none'}",
        f"  hosts        {', '.join(hosts) or 'none'}",
        f"  valid        {certificate.not_valid_before_utc:%Y-%m-%d} to "
        f"{certificate.not_valid_after_utc:%Y-%m-%d}",
        f"  SHA-256      {thumbprint(certificate)}",
    ]


def run_create(args: argparse.Namespace) -> int:
    site = load_site_file(args.config)
    config = site.opcua
    for key in ("certificate", "private_key"):
        if getattr(config, key) is None:
            raise SigmatrackError(
                f"{site.path}: opcua.{key}: not set: say in the site file where the "
                "certificate and its key go"
            )
    assert config.certificate is not None
    assert config.private_key is not None
    hosts = args.host or [socket.gethostname(), "localhost"]
    certificate = create_application_certificate(
        config.certificate,
        config.private_key,
        config.application_uri,
        hosts,
        days=args.days,
        organization=args.organization,
    )
    print(f"Made {config.certificate} and its key {config.private_key} (mode 600):")
    print("\n".join(_describe(certificate)))
    print(
        "Next: give the certificate (never the key) to the plant server's administrator to "
        "trust, and to every client of sigmatrack's server; put the certificates sigmatrack "
        "must trust in opcua.trust_dir (servers) and opcua.server.trust_dir (clients). "
        "Compare fingerprints by a second channel before trusting one."
    )
    return 0


def run_show(args: argparse.Namespace) -> int:
    certificate = load_certificate(Path(args.file))
    print(f"{args.file}:")
    print("\n".join(_describe(certificate)))
    if certificate.not_valid_after_utc < datetime.now(UTC):
        print("  EXPIRED")
    return 0


def _users_file(site: SiteConfig) -> Path:
    file = site.opcua.server.users_file
    if file is None:
        raise SigmatrackError(
            f"{site.path}: opcua.server.users_file: not set: say in the site file where the "
            "users file goes"
        )
    return file


def _read_password(from_stdin: bool) -> str:
    if from_stdin:
        password = sys.stdin.readline().rstrip("\n")
    else:
        password = getpass.getpass("password: ")
        if getpass.getpass("again: ") != password:
            raise SigmatrackError("the two passwords differ")
    if len(password) < MIN_PASSWORD_LENGTH:
        raise SigmatrackError(f"the password must have at least {MIN_PASSWORD_LENGTH} characters")
    return password


def run_user_add(args: argparse.Namespace) -> int:
    site = load_site_file(args.config)
    file = _users_file(site)
    if not USER_NAME.fullmatch(args.name):
        raise SigmatrackError(f"{args.name!r} is not a valid user name (letters, digits, ._@-)")
    users = load_users(file) if file.exists() else {}
    password = _read_password(args.password_stdin)
    users[args.name] = UserRecord(args.name, args.role, hash_password(password, new_salt()))
    write_users(file, users.values())
    article = "an" if args.role == "operator" else "a"
    print(f"{file}: {args.name} is {article} {args.role}")
    return 0


def run_user_remove(args: argparse.Namespace) -> int:
    site = load_site_file(args.config)
    file = _users_file(site)
    users = load_users(file)
    if args.name not in users:
        raise SecurityFileError(file, f"has no user {args.name!r}")
    del users[args.name]
    write_users(file, users.values())
    print(f"{file}: {args.name} removed")
    return 0


def run_user_list(args: argparse.Namespace) -> int:
    site = load_site_file(args.config)
    file = _users_file(site)
    users = load_users(file) if file.exists() else {}
    for record in users.values():
        print(f"{record.name}  {record.role}")
    if not users:
        print(f"{file}: no users")
    return 0
