"""OPC UA security, for real on loopback: Basic256Sha256 with Sign and SignAndEncrypt,
certificates and trust lists, user names and passwords, on sigmatrack's server and on its
client. A wrong certificate, an untrusted certificate, a wrong password and an anonymous write
are refused; an operator's acknowledgement goes through and names the operator."""

from __future__ import annotations

import asyncio
import dataclasses
import os
from datetime import UTC, datetime, timedelta

import pytest
from asyncua import ua
from cryptography import x509
from cryptography.x509.oid import ExtendedKeyUsageOID

from sensor.shell.opcua.advisor_server import AdvisorServer
from sensor.shell.opcua.errors import SecurityFileError
from sensor.shell.opcua.plant_client import ConnectionState, PlantClient
from sensor.shell.opcua.security import check_identity, create_application_certificate
from tests.shell.opcua.conftest import (
    ADVISOR_URI,
    PEER_URI,
    loopback,
    run,
    wait_until,
    with_opcua,
)
from tests.shell.opcua.desk import (
    ALARM,
    ENCRYPT,
    OPERATOR,
    SIGN,
    UNIT,
    VIEWER,
    AlarmDesk,
    alarm_nodes,
    client_of,
    secure_site,
    server_site,
)
from tests.shell.opcua.miniplant import MiniPlant, Security


def _load(path):
    return x509.load_der_x509_certificate(path.read_bytes())


def test_a_new_application_certificate(pki, tmp_path):
    certificate = _load(pki.advisor_cert)
    san = certificate.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
    assert san.get_values_for_type(x509.UniformResourceIdentifier) == [ADVISOR_URI]
    assert san.get_values_for_type(x509.DNSName) == ["localhost"]
    assert [str(ip) for ip in san.get_values_for_type(x509.IPAddress)] == ["127.0.0.1"]
    usage = certificate.extensions.get_extension_for_class(x509.ExtendedKeyUsage).value
    assert set(usage) == {ExtendedKeyUsageOID.CLIENT_AUTH, ExtendedKeyUsageOID.SERVER_AUTH}
    keys = certificate.extensions.get_extension_for_class(x509.KeyUsage).value
    # the key usages OPC 10000-6, 6.2.2 asks of an application instance certificate
    assert keys.digital_signature
    assert keys.content_commitment
    assert keys.key_encipherment
    assert keys.data_encipherment
    lifetime = certificate.not_valid_after_utc - certificate.not_valid_before_utc
    assert lifetime == timedelta(days=30)
    if os.name == "posix":
        assert pki.advisor_key.stat().st_mode & 0o777 == 0o600
    with pytest.raises(SecurityFileError, match="exists already: delete it first"):
        create_application_certificate(
            pki.advisor_cert, tmp_path / "key.pem", ADVISOR_URI, ["localhost"]
        )


def test_the_identity_is_checked_before_use(demo_site, pki, tmp_path):
    site = secure_site(demo_site, pki)
    assert check_identity(site.opcua) == _load(pki.advisor_cert)
    wrong_uri = dataclasses.replace(site.opcua, application_uri="urn:sigmatrack:elsewhere")
    with pytest.raises(SecurityFileError, match=r"does not name opcua\.application_uri"):
        check_identity(wrong_uri)
    wrong_key = dataclasses.replace(site.opcua, private_key=pki.peer_key)
    with pytest.raises(SecurityFileError, match="is not the key of the certificate"):
        check_identity(wrong_key)
    expired = dataclasses.replace(site.opcua)
    with pytest.raises(SecurityFileError, match="not now: make a new one"):
        check_identity(expired, now=datetime.now(UTC) + timedelta(days=400))
    if os.name == "posix":
        open_key = tmp_path / "open-key.pem"
        open_key.write_bytes(pki.advisor_key.read_bytes())
        open_key.chmod(0o644)
        with pytest.raises(SecurityFileError, match=r"the private key is open to group or others"):
            check_identity(dataclasses.replace(site.opcua, private_key=open_key))


# --- sigmatrack's own server --------------------------------------------------------------------


@pytest.mark.parametrize("mode", [ENCRYPT, SIGN], ids=["sign-and-encrypt", "sign"])
def test_an_operator_acknowledges_over_a_secure_channel(demo_site, pki, tmp_path, mode):
    site = server_site(demo_site, pki, tmp_path)
    desk = AlarmDesk(site)

    async def exercise():
        async with AdvisorServer(site, desk.definitions, desk.act) as server:
            await server.publish(UNIT, desk.outputs(desk.raise_communication_lost()))
            client = await client_of(
                site, cert=pki.peer_cert, key=pki.peer_key, mode=mode, user=OPERATOR
            )
            async with client:
                assert client.security_policy.Mode == mode
                alarm, method, state = alarm_nodes(client, server)
                before = await state.read_value()
                event_type = await client.nodes.base_event_type.get_child(
                    f"{server.namespace_index}:AlarmEventType"
                )
                subscription = await client.create_subscription(50, handler=None)
                await subscription.subscribe_events(ua.ObjectIds.Server, event_type)
                await alarm.call_method(method, "seen; jacket checked")
                event = None
                for _ in range(40):  # at most 4 s
                    found = await subscription.next_event(timeout=0.1)
                    if found is not None:
                        event = found.event
                        break
                await server.publish(UNIT, desk.outputs())
                after = await state.read_value()
            return before, after, event

    before, after, event = run(exercise())
    assert before == "unacknowledged"
    assert after == "acknowledged"
    assert [(a.action, a.user, a.comment) for a in desk.actions] == [
        ("acknowledge", "shift-a", "seen; jacket checked")
    ]
    assert event is not None
    assert event.Alarm == ALARM
    assert event.Event == "acknowledged"
    assert event.UserName == "shift-a"
    assert event.Comment == "seen; jacket checked"
    assert event.Severity == 800  # communication-lost is a high-priority alarm
    assert "by shift-a" in event.Message.Text


REFUSED_AT_CONNECT = (
    ("stranger", "BadCertificateUntrusted"),  # the peer's URI with another key: a wrong one
    ("wrong-uri", "BadCertificateUriInvalid"),  # a trusted certificate, claimed by another
    ("wrong-password", "BadUserAccessDenied"),
)


def test_wrong_untrusted_unauthenticated_or_unauthorised_clients_are_refused(
    demo_site, pki, tmp_path
):
    # One server for every case (each case is its own client): a wrong certificate, an
    # untrusted one, a wrong password are refused at connection; anonymous clients and viewers
    # may read but neither call an alarm method nor write a variable.
    site = server_site(demo_site, pki, tmp_path)
    desk = AlarmDesk(site)

    async def refused_at_connect(who):
        cert, key, uri, user = pki.peer_cert, pki.peer_key, PEER_URI, OPERATOR
        if who == "stranger":
            cert, key = pki.stranger_cert, pki.stranger_key
        elif who == "wrong-uri":
            uri = "urn:sigmatrack:test:someone-else"
        else:
            user = (OPERATOR[0], "not the password")
        client = await client_of(site, cert=cert, key=key, mode=ENCRYPT, user=user, uri=uri)
        try:
            await client.connect()
        except ua.UaStatusCodeError as error:
            return str(error)
        await client.disconnect()
        return "connected"

    async def reads_only(server, who):
        if who == "anonymous":  # over the endpoint without security, as the site allows
            client = await client_of(site, cert=None, key=None, mode=None)
        else:
            client = await client_of(
                site, cert=pki.peer_cert, key=pki.peer_key, mode=ENCRYPT, user=VIEWER
            )
        outcomes = []
        async with client:
            alarm, method, state = alarm_nodes(client, server)
            outcomes.append(await state.read_value())
            for attempt in (
                lambda: alarm.call_method(method, "let me"),
                lambda: state.write_value("acknowledged"),
            ):
                try:
                    await attempt()
                    outcomes.append("done")
                except ua.UaStatusCodeError as error:
                    outcomes.append(type(error).__name__)
        return outcomes

    async def exercise():
        async with AdvisorServer(site, desk.definitions, desk.act) as server:
            await server.publish(UNIT, desk.outputs(desk.raise_communication_lost()))
            connects = {who: await refused_at_connect(who) for who, _code in REFUSED_AT_CONNECT}
            reads = {who: await reads_only(server, who) for who in ("anonymous", "viewer")}
            return connects, reads

    connects, reads = run(exercise())
    for who, code in REFUSED_AT_CONNECT:
        assert code in connects[who], who
    for who in ("anonymous", "viewer"):
        assert reads[who] == ["unacknowledged", "BadUserAccessDenied", "BadUserAccessDenied"], who
    assert desk.actions == []
    assert desk.engine.status(ALARM).state.value == "unacknowledged"


def test_anonymous_sessions_refused_when_the_site_says_so(demo_site, pki, tmp_path):
    site = server_site(demo_site, pki, tmp_path, allow_anonymous_read=False)
    desk = AlarmDesk(site)

    async def exercise():
        async with AdvisorServer(site, desk.definitions, desk.act):
            client = await client_of(site, cert=None, key=None, mode=None)
            with pytest.raises(ua.UaStatusCodeError, match="BadIdentityTokenRejected"):
                await client.connect()

    run(exercise())


# --- the client to the plant --------------------------------------------------------------------


def _plant_security(pki, trusted_clients, password="plant password 333"):
    return Security(pki.peer_cert, pki.peer_key, PEER_URI, trusted_clients, "advisor", password)


def _plant_client_site(demo_site, pki, endpoint, trust_dir):
    return secure_site(
        demo_site,
        pki,
        endpoint=endpoint,
        security_policy="Basic256Sha256",
        security_mode="sign-and-encrypt",
        trust_dir=trust_dir,
        username="advisor",
        password_env="SIGMATRACK_TEST_PLANT_PASSWORD",
        reconnect_initial_s=0.2,
        reconnect_max_s=0.4,
    )


ENVIRON = {"SIGMATRACK_TEST_PLANT_PASSWORD": "plant password 333"}


def test_the_client_connects_to_a_trusted_plant_with_its_user(demo_site, pki):
    endpoint = loopback()
    site = _plant_client_site(demo_site, pki, endpoint, pki.trusted_by_advisor)

    async def exercise():
        plant = MiniPlant(
            site.unit[0], endpoint, security=_plant_security(pki, pki.trusted_by_peer)
        )
        async with plant, PlantClient(site, environ=ENVIRON) as client:
            await client.wait_for(ConnectionState.CONNECTED, 15.0)
            now = datetime.now(UTC)
            await plant.set("temp", 41.0, now)
            await wait_until(
                lambda: client.sample(UNIT, now.timestamp() + 1).sample.temp is not None,
                5.0,
                "a temperature over the encrypted link",
            )
            return client.status

    assert run(exercise()).connections == 1


@pytest.mark.parametrize(
    ("case", "expected"),
    [
        ("plant-untrusted", "BadCertificateUntrusted"),  # the plant's certificate, not ours
        ("we-are-untrusted", "BadCertificateUntrusted"),  # the plant does not trust us
        ("wrong-password", "BadUserAccessDenied"),
    ],
)
def test_the_client_refuses_and_is_refused(demo_site, pki, tmp_path, case, expected):
    endpoint = loopback()
    strangers = tmp_path / "strangers-only"
    strangers.mkdir()
    (strangers / "stranger.der").write_bytes(pki.stranger_cert.read_bytes())
    trust_dir = strangers if case == "plant-untrusted" else pki.trusted_by_advisor
    trusted_clients = strangers if case == "we-are-untrusted" else pki.trusted_by_peer
    password = "another one" if case == "wrong-password" else "plant password 333"
    site = _plant_client_site(demo_site, pki, endpoint, trust_dir)

    async def exercise():
        security = _plant_security(pki, trusted_clients, password)
        plant = MiniPlant(site.unit[0], endpoint, security=security)
        async with plant, PlantClient(site, environ=ENVIRON) as client:
            await wait_until(lambda: client.status.failures >= 2, 15.0, "two failed attempts")
            await asyncio.sleep(0.5)
            return client.status, plant.writes

    status, writes = run(exercise())
    assert status.state is not ConnectionState.CONNECTED
    assert status.connections == 0
    assert expected in status.last_error
    assert writes == []


def test_the_client_will_not_start_with_an_empty_trust_folder(demo_site, pki, tmp_path):
    site = _plant_client_site(demo_site, pki, loopback(), tmp_path)

    async def exercise():
        client = PlantClient(site, environ=ENVIRON)
        with pytest.raises(SecurityFileError, match="holds no certificate"):
            await client.start()

    run(exercise())


def test_the_client_will_not_start_with_a_key_open_to_others(demo_site, pki, tmp_path):
    if os.name != "posix":
        pytest.skip("file modes are POSIX")
    open_key = tmp_path / "key.pem"
    open_key.write_bytes(pki.advisor_key.read_bytes())
    open_key.chmod(0o640)
    site = _plant_client_site(demo_site, pki, loopback(), pki.trusted_by_advisor)
    site = with_opcua(site, private_key=open_key)

    async def exercise():
        client = PlantClient(site, environ=ENVIRON)
        with pytest.raises(SecurityFileError, match=r"key\.pem: the private key is open to group"):
            await client.start()

    run(exercise())
