"""Secrets outside the site file: the password from the environment or a private file, the
users file and its scrypt hashes, the permission rule, and the site file's own refusals."""

from __future__ import annotations

import base64
import dataclasses
import os

import pytest

from sensor.errors import SiteConfigError
from sensor.shell.config import OpcUaConfig, parse_site
from sensor.shell.opcua.credentials import check_private_file, opcua_password
from sensor.shell.opcua.errors import SecurityFileError
from sensor.shell.opcua.users import (
    UserRecord,
    Users,
    hash_password,
    load_users,
    parse_users,
    verify_password,
    write_users,
)
from tests.conftest import DEMO_SITE

DEMO_TEXT = DEMO_SITE.read_text(encoding="utf-8")
POSIX = pytest.mark.skipif(os.name != "posix", reason="file modes are POSIX")


def _private(path, text, mode=0o600):
    path.write_text(text, encoding="utf-8")
    path.chmod(mode)
    return path


def test_scrypt_against_the_rfc_7914_test_vector():
    # RFC 7914 (C. Percival, S. Josefsson, 2016), section 12, third vector: P = "password",
    # S = "NaCl", N = 1024, r = 8, p = 16, dkLen = 64.
    vector = bytes.fromhex(
        "fdbabe1c9d3472007856e7190d01e9fe7c6ad7cbc8237830e77376634b373162"
        "2eaf30d92e22a3886ff109279d9830dac727afb94a83ee6d8360cbdfa2cc0640"
    )
    salt = base64.b64encode(b"NaCl").decode()
    stored = f"scrypt$1024$8$16${salt}${base64.b64encode(vector).decode()}"
    assert verify_password("password", stored)
    assert not verify_password("Password", stored)
    assert not verify_password("password", stored.replace("scrypt", "md5"))
    assert not verify_password("password", "scrypt$1024$8$16$!!$!!")


def test_a_stored_hash_checks_its_own_password_only():
    stored = hash_password("a long shift password", b"0123456789abcdef")
    assert stored.startswith("scrypt$16384$8$1$")
    assert verify_password("a long shift password", stored)
    assert not verify_password("a long shift passworD", stored)
    assert hash_password("a long shift password", b"fedcba9876543210") != stored


@POSIX
def test_password_from_the_environment_or_a_private_file(tmp_path):
    by_env = OpcUaConfig(
        security_policy="Basic256Sha256",
        security_mode="sign-and-encrypt",
        certificate=tmp_path / "c.der",
        private_key=tmp_path / "k.pem",
        trust_dir=tmp_path,
        username="advisor",
        password_env="SIGMATRACK_TEST_PASSWORD",
    )
    assert opcua_password(by_env, {"SIGMATRACK_TEST_PASSWORD": "s3cret"}) == "s3cret"
    with pytest.raises(
        SecurityFileError, match="environment variable SIGMATRACK_TEST_PASSWORD: is not set"
    ):
        opcua_password(by_env, {})
    file = _private(tmp_path / "password", "s3cret\n")
    by_file = dataclasses.replace(by_env, password_env=None, password_file=file)
    assert opcua_password(by_file, {}) == "s3cret"
    file.chmod(0o644)
    with pytest.raises(SecurityFileError, match=r"password: the OPC UA password file is open to "):
        opcua_password(by_file, {})
    with pytest.raises(SecurityFileError, match=r"\(mode 644\).*chmod 600"):
        opcua_password(by_file, {})
    file.chmod(0o640)  # group-readable is refused too (the rule libpq applies)
    with pytest.raises(SecurityFileError, match=r"mode 640"):
        opcua_password(by_file, {})
    _private(file, "")
    with pytest.raises(SecurityFileError, match="the OPC UA password file is empty"):
        opcua_password(by_file, {})
    assert opcua_password(dataclasses.replace(by_env, password_env=None, username=None), {}) is None


def test_a_missing_or_odd_secret_file(tmp_path):
    with pytest.raises(SecurityFileError, match=r"nothing: the key cannot be read"):
        check_private_file(tmp_path / "nothing", "the key")
    with pytest.raises(SecurityFileError, match="the key is not a regular file"):
        check_private_file(tmp_path, "the key")


@POSIX
def test_the_users_file(tmp_path):
    records = [
        UserRecord("shift-a", "operator", hash_password("operator password", bytes(16))),
        UserRecord("eng.b", "viewer", hash_password("viewer password", bytes(16))),
    ]
    file = tmp_path / "users"
    write_users(file, records)
    assert file.stat().st_mode & 0o777 == 0o600
    users = Users(load_users(file))
    assert users.authenticate("shift-a", "operator password").role == "operator"
    assert users.authenticate("shift-a", "viewer password") is None
    assert users.authenticate("nobody", "operator password") is None
    assert users.role("eng.b") == "viewer"
    assert users.role(None) is None
    file.chmod(0o604)
    with pytest.raises(SecurityFileError, match=r"users: the users file is open to group"):
        load_users(file)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("a:operator", r"users, line 1: expected name:role:password hash"),
        ("# users\n\nbad name:viewer:scrypt$1$2$3$4$5", r"line 3: 'bad name' is not a valid"),
        ("a:admin:scrypt$1$2$3$4$5", r"line 1: role 'admin' is not one of operator, viewer"),
        ("a:viewer:plaintext", r"line 1: the password of 'a' is not a scrypt hash"),
        ("a:viewer:scrypt$1$2$3$4$5\na:operator:scrypt$1$2$3$4$5", r"line 2: user 'a' is listed"),
    ],
)
def test_a_malformed_users_file_is_refused_naming_the_line(tmp_path, text, message):
    with pytest.raises(SecurityFileError, match=message):
        parse_users(text, tmp_path / "users")


def _edit(old: str, new: str) -> str:
    assert DEMO_TEXT.count(old) == 1, old
    return DEMO_TEXT.replace(old, new)


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        (
            '# username = "advisor"',
            'username = "advisor"',
            r"opcua\.username: a user name and password need security_policy 'Basic256Sha256'",
        ),
        (
            'security_modes = ["none"]',
            'security_modes = ["sign-and-encrypt"]',
            r"opcua\.server\.trust_dir: needed with a security mode other than 'none'",
        ),
        (
            'security_modes = ["none"]',
            'security_modes = ["sign"]\ntrust_dir = "pki"',
            r"opcua\.certificate: needed by the server's security_modes",
        ),
        (
            '# users_file = "/etc/sigmatrack/users"',
            'users_file = "users"',
            r"opcua\.server\.users_file: user names and passwords need a signed or encrypted",
        ),
        (
            "allow_anonymous_read = true",
            "allow_anonymous_read = false",
            r"opcua\.server\.allow_anonymous_read: is false and there is no users_file",
        ),
        (
            'security_modes = ["none"]',
            'security_modes = ["none", "none"]',
            r"opcua\.server\.security_modes: a mode is listed twice",
        ),
        (
            'application_uri = "urn:sigmatrack:advisor"',
            'application_uri = "http://x"',
            r"opcua\.application_uri: must be a URN without spaces",
        ),
        (
            "reconnect_max_s = 30.0",
            "reconnect_max_s = 0.5",
            r"opcua\.reconnect_max_s: must be at least reconnect_initial_s \(1\.0\)",
        ),
    ],
)
def test_the_site_file_refuses_unsafe_or_impossible_opcua_settings(old, new, message):
    with pytest.raises(SiteConfigError, match=message):
        parse_site(_edit(old, new), DEMO_SITE)
