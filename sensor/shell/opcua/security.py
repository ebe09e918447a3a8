"""OPC UA security for both sides of sigmatrack: its client to the plant and its own server.

- **Channel**: security policy Basic256Sha256 with message security mode Sign or SignAndEncrypt
  (OPC 10000-7, the Basic256Sha256 profile; OPC 10000-4, 5.5 SecureChannel set). sigmatrack has
  one application instance certificate (``opcua.certificate``, ``opcua.private_key``), made by
  :func:`create_application_certificate` (``sigmatrack certificate create``), for its client and
  its server alike (application type ClientAndServer, both extended key usages).
- **Trust**: a peer's certificate is accepted only if it is in the trust folder
  (``opcua.trust_dir`` for plant servers, ``opcua.server.trust_dir`` for clients of sigmatrack's
  server), within its validity dates, with the key usages OPC UA asks for, and holding the
  ApplicationUri the peer announces (asyncua's ``CertificateValidator`` with its trusted-validation
  options). Anything else is refused before a session exists.
- **Users**: toward the plant, ``opcua.username`` with a password from the environment or a
  private file (:mod:`~sensor.shell.opcua.credentials`); a password is only ever sent over a
  signed or encrypted channel (the site file refuses a user name with security ``none``). On
  sigmatrack's server, anonymous clients may browse, read and subscribe if
  ``allow_anonymous_read``; users of the users file log in with a password; only an
  ``operator`` may call the alarm methods (acknowledge, shelve, unshelve), and nobody may write
  a variable (:class:`AdvisorPermissions`, :func:`caller_role`).
"""

from __future__ import annotations

import contextvars
import os
import socket
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from ipaddress import ip_address
from pathlib import Path
from typing import Any

from asyncua import Client, Server, ua
from asyncua.crypto import cert_gen
from asyncua.crypto.permission_rules import USER_TYPES, PermissionRuleset, User, UserRole
from asyncua.crypto.security_policies import SecurityPolicyBasic256Sha256
from asyncua.crypto.truststore import TrustStore
from asyncua.crypto.validator import CertificateValidator, CertificateValidatorOptions
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import rsa
from cryptography.x509.oid import ExtendedKeyUsageOID

from sensor.shell.config import OpcUaConfig, SecurityMode
from sensor.shell.opcua.credentials import check_private_file
from sensor.shell.opcua.errors import SecurityFileError
from sensor.shell.opcua.users import Role, Users

CLIENT_MODES: dict[SecurityMode, ua.MessageSecurityMode] = {
    "sign": ua.MessageSecurityMode.Sign,
    "sign-and-encrypt": ua.MessageSecurityMode.SignAndEncrypt,
}
SERVER_POLICIES: dict[SecurityMode, ua.SecurityPolicyType] = {
    "none": ua.SecurityPolicyType.NoSecurity,
    "sign": ua.SecurityPolicyType.Basic256Sha256_Sign,
    "sign-and-encrypt": ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt,
}
PEER_CHECKS = CertificateValidatorOptions.TRUSTED_VALIDATION
"""Validity dates, ApplicationUri, key usages, extended key usage, trusted, not revoked."""
CERTIFICATE_DAYS = 365
"""Default validity of a new certificate (common practice: renew yearly)."""


# --- the application instance certificate -----------------------------------------------------


def thumbprint(certificate: x509.Certificate) -> str:
    """The certificate's SHA-256 fingerprint, as colon-separated hex (to compare by eye)."""
    return certificate.fingerprint(hashes.SHA256()).hex(":").upper()


def _subject_alt_names(uri: str, hosts: Sequence[str]) -> list[x509.GeneralName]:
    names: list[x509.GeneralName] = [x509.UniformResourceIdentifier(uri)]
    for host in hosts:
        try:
            names.append(x509.IPAddress(ip_address(host)))
        except ValueError:
            names.append(x509.DNSName(host))
    return names


def create_application_certificate(
    certificate_file: Path,
    key_file: Path,
    application_uri: str,
    hosts: Sequence[str],
    *,
    days: int = CERTIFICATE_DAYS,
    organization: str = "",
) -> x509.Certificate:
    """Create sigmatrack's self-signed application instance certificate and its key.

    The certificate (DER) names ``application_uri`` and every host (DNS name or IP address) in
    its subjectAltName, carries both extended key usages (client and server authentication) and
    is valid for ``days`` from now (OPC 10000-6, 6.2.2, the certificate's fields). The key is a
    2048-bit RSA key (PEM, PKCS#8, unencrypted), written readable by its owner only (mode 600):
    keep it on the machine that runs sigmatrack.

    Raises
    ------
    SecurityFileError
        If either file already exists (an existing identity is never overwritten: delete it
        first, and tell the peers that trusted it), or cannot be written.
    """
    for path in (certificate_file, key_file):
        if path.exists():
            raise SecurityFileError(path, "exists already: delete it first to make a new one")
    if not 1 <= days <= 20 * 365:
        raise SecurityFileError(certificate_file, f"validity must be 1 to 7300 days; got {days}")
    key = cert_gen.generate_private_key()
    names = {"organizationName": organization} if organization else {}
    common_name = f"sigmatrack@{hosts[0] if hosts else socket.gethostname()}"[:64]
    certificate = cert_gen.generate_self_signed_app_certificate(
        key,
        common_name,
        names,
        _subject_alt_names(application_uri, hosts),
        [ExtendedKeyUsageOID.CLIENT_AUTH, ExtendedKeyUsageOID.SERVER_AUTH],
        days=days,
    )
    try:
        key_file.parent.mkdir(parents=True, exist_ok=True)
        certificate_file.parent.mkdir(parents=True, exist_ok=True)
        handle = os.open(key_file, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(handle, "wb") as out:
            out.write(cert_gen.dump_private_key_as_pem(key))
        certificate_file.write_bytes(certificate.public_bytes(serialization.Encoding.DER))
    except OSError as error:
        raise SecurityFileError(
            error.filename or certificate_file, f"cannot be written ({error.strerror})"
        ) from None
    return certificate


def load_certificate(path: Path) -> x509.Certificate:
    """A certificate file (DER or PEM)."""
    try:
        data = path.read_bytes()
    except OSError as error:
        why = f"the certificate cannot be read ({error.strerror})"
        raise SecurityFileError(path, why) from None
    try:
        if data.lstrip().startswith(b"-----BEGIN"):
            return x509.load_pem_x509_certificate(data)
        return x509.load_der_x509_certificate(data)
    except ValueError:
        raise SecurityFileError(path, "is not an X.509 certificate (DER or PEM)") from None


def check_identity(config: OpcUaConfig, now: datetime | None = None) -> x509.Certificate:
    """Check sigmatrack's own certificate and key before they are used: the key file is
    private, the key belongs to the certificate, the certificate names
    ``opcua.application_uri`` and is valid now.

    Raises
    ------
    SecurityFileError
        Naming the file and what is wrong.
    """
    assert config.certificate is not None
    assert config.private_key is not None
    certificate = load_certificate(config.certificate)
    check_private_file(config.private_key, "the private key")
    try:
        key = serialization.load_pem_private_key(config.private_key.read_bytes(), password=None)
    except (ValueError, TypeError):
        raise SecurityFileError(
            config.private_key, "is not an unencrypted PEM private key"
        ) from None
    if not isinstance(key, rsa.RSAPrivateKey) or key.public_key() != certificate.public_key():
        raise SecurityFileError(
            config.private_key, f"is not the key of the certificate {config.certificate}"
        )
    try:
        san = certificate.extensions.get_extension_for_class(x509.SubjectAlternativeName)
        uris = san.value.get_values_for_type(x509.UniformResourceIdentifier)
    except x509.ExtensionNotFound:
        uris = []
    if config.application_uri not in uris:
        raise SecurityFileError(
            config.certificate,
            f"does not name opcua.application_uri {config.application_uri!r} (it names "
            f"{', '.join(uris) or 'none'}): make a certificate for this URI",
        )
    moment = now or datetime.now(UTC)
    if not certificate.not_valid_before_utc <= moment <= certificate.not_valid_after_utc:
        raise SecurityFileError(
            config.certificate,
            f"is valid from {certificate.not_valid_before_utc:%Y-%m-%d} to "
            f"{certificate.not_valid_after_utc:%Y-%m-%d}, not now: make a new one",
        )
    return certificate


def expires_within(certificate: x509.Certificate, days: float, now: datetime) -> bool:
    """The certificate expires within ``days`` of ``now``."""
    return certificate.not_valid_after_utc - now < timedelta(days=days)


async def trust_store(directory: Path) -> TrustStore:
    """The certificates in ``directory`` (``*.der``, ``*.pem``), as a trust list.

    Raises
    ------
    SecurityFileError
        If the folder does not exist, holds no certificate, or holds a file that is not one.
    """
    if not directory.is_dir():
        raise SecurityFileError(directory, "the trust folder does not exist")
    if not any(path.suffix.lower() in (".der", ".pem") for path in directory.iterdir()):
        raise SecurityFileError(
            directory, "the trust folder holds no certificate (*.der, *.pem): no peer is trusted"
        )
    store = TrustStore([directory], [])
    try:
        await store.load()
    except ValueError as error:
        why = f"holds a file that is not a certificate ({error})"
        raise SecurityFileError(directory, why) from None
    return store


# --- the client to the plant --------------------------------------------------------------------


async def secure_client(client: Client, config: OpcUaConfig, password: str | None) -> None:
    """Give ``client`` sigmatrack's identity, the site's security and its user (before connect).

    With a security policy this asks the server for its endpoints over an unsecured channel
    (GetEndpoints, as OPC UA intends), picks the Basic256Sha256 endpoint of the configured
    mode and accepts the server only if its certificate passes the trust checks of
    ``opcua.trust_dir``.
    """
    client.application_uri = config.application_uri
    client.name = client.description = "sigmatrack advisor (client)"
    if config.security_policy != "none":
        assert config.trust_dir is not None
        assert config.private_key is not None
        assert config.certificate is not None
        check_identity(config)
        client.certificate_validator = CertificateValidator(
            PEER_CHECKS | CertificateValidatorOptions.PEER_SERVER,
            await trust_store(config.trust_dir),
        )
        await client.set_security(
            SecurityPolicyBasic256Sha256,
            config.certificate,
            config.private_key,
            mode=CLIENT_MODES[config.security_mode],
        )
    if config.username is not None:
        client.set_user(config.username)
        if password is not None:
            client.set_password(password)


# --- sigmatrack's own server --------------------------------------------------------------------

_CALLER: contextvars.ContextVar[User | None] = contextvars.ContextVar("opcua_caller", default=None)
"""The user of the request being processed. asyncua checks every request with the permission
ruleset and then processes it in the same task, so a method called by that request sees the
user set here (:func:`caller`)."""

READ_REQUESTS = frozenset(
    ua.NodeId(type_id)
    for type_id in USER_TYPES
    if type_id != ua.ObjectIds.WriteRequest_Encoding_DefaultBinary
)
"""Requests any session may make: browse, read, subscribe, call (methods check the caller's
role themselves). Writes, node management and history updates are refused to everyone."""


class AdvisorPermissions(PermissionRuleset):
    """What a session may ask of sigmatrack's server (module docstring)."""

    def check_validity(self, user: User, action_type_id: ua.NodeId, body: Any) -> bool:
        _CALLER.set(user)
        return action_type_id in READ_REQUESTS


def caller() -> User | None:
    """The user whose request is being processed (None outside a request)."""
    return _CALLER.get()


class AdvisorUserManager:
    """Who may open a session on sigmatrack's server: anonymous clients if allowed, and the
    users of the users file with their password. Nobody is ever an asyncua administrator."""

    def __init__(self, users: Users, allow_anonymous: bool) -> None:
        self.users = users
        self.allow_anonymous = allow_anonymous

    def get_user(
        self,
        iserver: Any,
        username: str | None = None,
        password: str | None = None,
        certificate: Any = None,
    ) -> User | None:
        if username is None:
            return User(role=UserRole.Anonymous) if self.allow_anonymous else None
        record = self.users.authenticate(username, password or "")
        return None if record is None else User(role=UserRole.User, name=record.name)


def caller_role(users: Users) -> tuple[str | None, Role | None]:
    """The name and role of the caller of the method being run (None, None for anonymous)."""
    user = caller()
    if user is None or user.role is not UserRole.User:
        return None, None
    return user.name, users.role(user.name)


async def secure_server(server: Server, config: OpcUaConfig, users: Users) -> None:
    """Give sigmatrack's server its endpoints, certificate, trust list, users and permissions
    (before it starts)."""
    server_config = config.server
    server.set_security_policy(
        [SERVER_POLICIES[mode] for mode in server_config.security_modes],
        permission_ruleset=AdvisorPermissions(),
    )
    tokens: list[type] = []
    if server_config.allow_anonymous_read:
        tokens.append(ua.AnonymousIdentityToken)
    if server_config.secure_modes:
        assert config.certificate is not None
        assert config.private_key is not None
        assert server_config.trust_dir is not None
        check_identity(config)
        await server.load_certificate(str(config.certificate))
        await server.load_private_key(str(config.private_key))
        server.set_certificate_validator(
            CertificateValidator(
                PEER_CHECKS | CertificateValidatorOptions.PEER_CLIENT,
                await trust_store(server_config.trust_dir),
            )
        )
        if server_config.users_file is not None:
            tokens.append(ua.UserNameIdentityToken)
    server.set_identity_tokens(tokens)
    server.iserver.set_user_manager(
        AdvisorUserManager(users, server_config.allow_anonymous_read)  # type: ignore[arg-type]
    )
    server.allow_remote_admin(False)
