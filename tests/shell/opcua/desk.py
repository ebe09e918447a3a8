"""What the security and server tests share: an alarm engine behind the server's methods, a
secured server's site file, clients of it, users."""

from __future__ import annotations

import os

from asyncua import Client, ua
from asyncua.crypto.security_policies import SecurityPolicyBasic256Sha256

from controller.alarm_set import crystallizer_alarm_engine, crystallizer_alarms
from sensor.shell.opcua.advisor_server import UnitOutputs
from sensor.shell.opcua.users import UserRecord, hash_password, write_users
from tests.shell.opcua.conftest import ADVISOR_URI, PEER_URI, loopback, with_opcua, with_server

UNIT = "CR-301"
OPERATOR, VIEWER = ("shift-a", "operator password 1"), ("eng-b", "viewer password 22")
ALARM = "communication-lost"
ENCRYPT = ua.MessageSecurityMode.SignAndEncrypt
SIGN = ua.MessageSecurityMode.Sign


def secure_site(demo_site, pki, **changes):
    return with_opcua(
        demo_site,
        application_uri=ADVISOR_URI,
        certificate=pki.advisor_cert,
        private_key=pki.advisor_key,
        **changes,
    )


class AlarmDesk:
    """The alarm engine of one unit behind the server's methods (what the service will wire)."""

    def __init__(self, site):
        settings = site.alarms.settings(site.guard.heating_phases)
        self.definitions = crystallizer_alarms(settings)
        self.engine = crystallizer_alarm_engine(settings)
        self.actions = []
        self.time_s = 0.0

    def raise_communication_lost(self):
        events = []
        for time_s in (0.0, 40.0):  # past the 30 s on-delay
            readings = {d.name: float(d.name == ALARM) for d in self.definitions}
            readings["undersaturated"] = 0.5  # sigma at half its limit: not undersaturated
            events += self.engine.update(time_s, "controlled-cooling", readings)
        self.time_s = 40.0
        return events

    async def act(self, action):
        self.actions.append(action)
        self.time_s += 1.0
        if action.action == "acknowledge":
            return self.engine.acknowledge(action.alarm, self.time_s, action.comment)
        if action.action == "shelve":
            return self.engine.shelve(action.alarm, self.time_s, action.duration_s, action.comment)
        return self.engine.unshelve(action.alarm, self.time_s, action.comment)

    def outputs(self, events=()):
        statuses = [self.engine.status(d.name) for d in self.definitions]
        return UnitOutputs(time_s=1.0e9 + self.time_s, alarms=statuses, events=tuple(events))


def users_file(tmp_path):
    file = tmp_path / "users"
    write_users(
        file,
        [
            UserRecord(OPERATOR[0], "operator", hash_password(OPERATOR[1], os.urandom(16))),
            UserRecord(VIEWER[0], "viewer", hash_password(VIEWER[1], os.urandom(16))),
        ],
    )
    return file


def server_site(demo_site, pki, tmp_path, **server_changes):
    site = secure_site(demo_site, pki)
    return with_server(
        site,
        endpoint=loopback("sigmatrack"),
        security_modes=("none", "sign", "sign-and-encrypt"),
        trust_dir=pki.trusted_by_advisor,
        users_file=users_file(tmp_path),
        **server_changes,
    )


async def client_of(site, *, cert, key, mode, user=None, uri=PEER_URI):
    client = Client(site.opcua.server.endpoint, timeout=5)
    client.application_uri = uri
    if mode is not None:
        await client.set_security(SecurityPolicyBasic256Sha256, str(cert), str(key), mode=mode)
    if user is not None:
        client.set_user(user[0])
        client.set_password(user[1])
    return client


def alarm_nodes(client, server):
    base = f"{UNIT}.alarms.{ALARM}"
    alarm = client.get_node(ua.NodeId(base, server.namespace_index))
    method = ua.NodeId(f"{base}.acknowledge", server.namespace_index)
    state = client.get_node(ua.NodeId(f"{base}.state", server.namespace_index))
    return alarm, method, state
