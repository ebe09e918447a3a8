"""A small real OPC UA server holding one unit's tags, whose values, StatusCodes and source
timestamps a test sets itself: for what the simulator's plant server does not do on purpose
(timestamps that go backwards or lie in the future, wrong data types and units, read-only
setpoint tags, security with certificates and a user).

It is a test bench written for these tests (asyncua's own server, nothing mocked), not a model
of any DCS's server.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path

from asyncua import Node, Server, ua
from asyncua.common.callback import CallbackType
from asyncua.crypto.permission_rules import User, UserRole
from asyncua.crypto.truststore import TrustStore
from asyncua.crypto.validator import CertificateValidator, CertificateValidatorOptions

from sensor.shell.config import UnitConfig
from sensor.shell.opcua.advisor_server import CELSIUS, unece_unit

TYPES = {
    "temp": ua.VariantType.Double,
    "jacket_temp": ua.VariantType.Double,
    "jacket_setpoint": ua.VariantType.Double,
    "setpoint": ua.VariantType.Double,
    "remote_setpoint": ua.VariantType.Double,
    "conc": ua.VariantType.Double,
    "phase": ua.VariantType.Int32,
    "batch_id": ua.VariantType.String,
    "permissive": ua.VariantType.Boolean,
    "heartbeat": ua.VariantType.Int32,
}
ANALOG = ("temp", "jacket_temp", "jacket_setpoint", "setpoint", "remote_setpoint", "conc")
WRITABLE = ("permissive", "remote_setpoint", "heartbeat")


@dataclasses.dataclass(frozen=True)
class Security:
    """The mini plant's own certificate, the folder of clients it trusts, and its one user."""

    certificate: Path
    private_key: Path
    uri: str
    trusted_clients: Path
    user: str
    password: str


class _OneUser:
    def __init__(self, security: Security) -> None:
        self.security = security

    def get_user(self, iserver, username=None, password=None, certificate=None):
        if username == self.security.user and password == self.security.password:
            return User(role=UserRole.User, name=username)
        return None


class MiniPlant:
    """One unit's tags on a real asyncua server on a loopback ``endpoint``.

    Parameters
    ----------
    unit : the unit whose tags to serve (``ns=2;s=<tag name>``)
    endpoint : ``opc.tcp://127.0.0.1:PORT/PATH``
    types : data types to use instead of :data:`TYPES` (a wrong one, say)
    units : EngineeringUnits display names to use instead of the right ones
    ranges : EURange to use instead of the default
    writable : the signals clients may write
    security : certificates and a user (Basic256Sha256 SignAndEncrypt only), or none
    """

    def __init__(
        self,
        unit: UnitConfig,
        endpoint: str,
        *,
        types: Mapping[str, ua.VariantType] | None = None,
        units: Mapping[str, str] | None = None,
        ranges: Mapping[str, tuple[float, float]] | None = None,
        writable: tuple[str, ...] = WRITABLE,
        security: Security | None = None,
    ) -> None:
        self.unit = unit
        self.endpoint = endpoint
        self.types = {**TYPES, **(types or {})}
        self.units = dict(units or {})
        self.ranges = dict(ranges or {})
        self.writable = writable
        self.security = security
        self.nodes: dict[str, Node] = {}
        self.writes: list[tuple[str, object]] = []
        self._server: Server | None = None

    async def __aenter__(self) -> MiniPlant:
        server = Server(user_manager=_OneUser(self.security) if self.security else None)
        await server.init()
        server.set_endpoint(self.endpoint)
        server.set_server_name("mini plant (a test bench)")
        if self.security is None:
            server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
        else:
            await server.set_application_uri(self.security.uri)
            server.set_security_policy([ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt])
            server.set_identity_tokens([ua.UserNameIdentityToken])
            await server.load_certificate(str(self.security.certificate))
            await server.load_private_key(str(self.security.private_key))
            store = TrustStore([self.security.trusted_clients], [])
            await store.load()
            server.set_certificate_validator(
                CertificateValidator(
                    CertificateValidatorOptions.TRUSTED_VALIDATION
                    | CertificateValidatorOptions.PEER_CLIENT,
                    store,
                )
            )
        await server.register_namespace("urn:sigmatrack:test:mini-plant")
        folder = await server.nodes.objects.add_object(ua.NodeId(self.unit.id, 2), self.unit.id)
        for signal, tag in self.unit.tags.items():
            vtype = self.types[signal]
            node = await folder.add_variable(
                ua.NodeId(tag.name, 2), tag.name, ua.get_default_value(vtype), vtype
            )
            if signal in ANALOG:
                info = CELSIUS if signal != "conc" else unece_unit("", "g/100g", "")
                if signal in self.units:
                    info = unece_unit("", self.units[signal], "")
                low, high = self.ranges.get(signal, (-20.0, 120.0) if signal != "conc" else (0, 40))
                for name, value in (("EngineeringUnits", info), ("EURange", ua.Range(low, high))):
                    await node.add_property(
                        ua.NodeId(f"{tag.name}.{name}", 2), ua.QualifiedName(name, 0), value
                    )
            if signal in self.writable:
                await node.set_writable()
            self.nodes[signal] = node
        server.subscribe_server_callback(CallbackType.PreWrite, self._count_write)
        await server.start()
        self._server = server
        return self

    async def __aexit__(self, *exc: object) -> None:
        if self._server is not None:
            await self._server.stop()
            self._server = None

    async def _count_write(self, event, _dispatcher) -> None:
        by_node = {node.nodeid: signal for signal, node in self.nodes.items()}
        for item in event.request_params.NodesToWrite:
            if item.NodeId in by_node:
                self.writes.append((by_node[item.NodeId], item.Value.Value.Value))

    async def set(
        self,
        signal: str,
        value: object,
        source: datetime | None,
        status: int = ua.StatusCodes.Good,
        vtype: ua.VariantType | None = None,
    ) -> None:
        """Give a tag a value, a StatusCode and a source timestamp (None: none)."""
        assert self._server is not None
        variant = ua.Variant(value, vtype or self.types[signal])
        data = ua.DataValue(
            variant,
            StatusCode=ua.StatusCode(status),
            SourceTimestamp=source,
            ServerTimestamp=datetime.now(UTC),
        )
        await self._server.write_attribute_value(self.nodes[signal].nodeid, data)

    async def value(self, signal: str) -> object:
        return await self.nodes[signal].read_value()

    def close_client_connections(self) -> None:
        """Close every client's connection from the server's side."""
        assert self._server is not None
        for transport in list(self._server.iserver.asyncio_transports):
            transport.close()
