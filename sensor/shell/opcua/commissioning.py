"""The commissioning check: every configured tag read once, read-only, and judged against the
site file (``sigmatrack check``).

For each tag of each unit: the node exists and is a variable; its data type can hold the
signal; for analog tags, its EngineeringUnits are the site's (°C for temperatures, the
analyzer's ``conc_unit``) and its EURange agrees with the site's limits; its current quality is
Good and its source timestamp recent (measured signals) and not in the future; a phase value is
one the site maps; and, for the tags sigmatrack writes, that the server lets this user write
them. Nothing is written, nothing is subscribed. Each finding that needs attention is one
:class:`Finding`.
"""

from __future__ import annotations

import contextlib
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from asyncua import Client, Node, ua

from sensor.samples import Severity, severity
from sensor.shell.config import SiteConfig, UnitConfig
from sensor.shell.opcua.advisor_server import CELSIUS
from sensor.shell.opcua.credentials import opcua_password
from sensor.shell.opcua.errors import OpcUaError
from sensor.shell.opcua.plant_client import variant_of
from sensor.shell.opcua.security import check_identity, secure_client, trust_store
from sensor.shell.opcua.tags import (
    ANALOG_KINDS,
    INTEGER_RANGES,
    INTEGER_TYPES,
    NUMERIC_TYPES,
    TagSpec,
    epoch_s,
    tag_specs,
)

MEASURED = ("temp", "jacket_temp", "conc")
"""Signals whose source timestamp must be recent (the others hold states that rarely change)."""
CELSIUS_NAMES = frozenset({"°C", "degC", "deg C", "℃"})
ABSTRACT_NUMBERS = frozenset({ua.ObjectIds.Number, ua.ObjectIds.Integer, ua.ObjectIds.UInteger})
"""DataTypes that say "some number" (OPC 10000-5, 12.2): judged by the value's own type."""


@dataclass(frozen=True)
class TagReport:
    """What one tag looks like on the server (for the table) and what is wrong with it."""

    spec: TagSpec
    data_type: str = ""
    unit: str = ""
    value_range: str = ""
    quality: str = ""
    value: str = ""
    writable: bool | None = None
    problems: tuple[str, ...] = ()


@dataclass(frozen=True)
class CheckReport:
    """The whole check: the server, every tag, and the problems (one line each)."""

    endpoint: str
    security: str
    server_name: str
    tags: tuple[TagReport, ...]

    @property
    def problems(self) -> tuple[str, ...]:
        return tuple(f"{t.spec.label}: {p}" for t in self.tags for p in t.problems)


def _type_name(data_type: ua.NodeId) -> str:
    variant = variant_of(data_type)
    if variant is not None:
        return variant.name
    if data_type.NamespaceIndex == 0 and data_type.Identifier in ABSTRACT_NUMBERS:
        return {
            ua.ObjectIds.Number: "Number",
            ua.ObjectIds.Integer: "Integer",
            ua.ObjectIds.UInteger: "UInteger",
        }[data_type.Identifier]
    return data_type.to_string()


def _type_fits(type_id: ua.NodeId, value_variant: ua.VariantType, spec: TagSpec) -> bool:
    """The tag's DataType can hold the signal. An abstract one ("some number") fits if it can
    hold one of the signal's types, and the current value, if any, is of one of them."""
    variant = variant_of(type_id)
    if variant is not None:
        return variant in spec.types
    if type_id.NamespaceIndex != 0 or type_id.Identifier not in ABSTRACT_NUMBERS:
        return False
    holds = {
        ua.ObjectIds.Number: NUMERIC_TYPES,
        ua.ObjectIds.Integer: INTEGER_TYPES,
        ua.ObjectIds.UInteger: frozenset(t for t in INTEGER_TYPES if INTEGER_RANGES[t][0] == 0),
    }[type_id.Identifier]
    if not holds & spec.types:
        return False
    return value_variant is ua.VariantType.Null or value_variant in spec.types


def _units_ok(spec: TagSpec, unit: UnitConfig, info: ua.EUInformation) -> bool:
    shown = (info.DisplayName.Text or "") if info.DisplayName else ""
    if spec.kind == "temperature":
        return info.UnitId == CELSIUS.UnitId or shown.strip() in CELSIUS_NAMES
    expected = unit.analyzer.conc_unit
    return shown.replace(" ", "").lower() == expected.replace(" ", "").lower()


def _range_problem(spec: TagSpec, site: SiteConfig, unit: UnitConfig, low: float, high: float):
    """What is wrong with an EURange ``[low, high]`` against the site file, or None."""
    if not (math.isfinite(low) and math.isfinite(high) and low < high):
        return f"EURange [{low:g}, {high:g}] is not a range"
    if spec.kind == "concentration":
        lo, hi = unit.analyzer.range
        if lo < low or hi > high:
            return (
                f"the analyzer's range in the site file [{lo:g}, {hi:g}] {unit.analyzer.conc_unit}"
                f" goes beyond the tag's EURange [{low:g}, {high:g}]"
            )
        return None
    if spec.signal == "remote_setpoint":
        final = site.guard.final_temp_c
        if not low <= final <= high:
            return (
                f"guard.final_temp_c {final:g} °C lies outside the tag's EURange "
                f"[{low:g}, {high:g}] °C: the DCS could not take the advisor's last setpoints"
            )
        return None
    lo, hi = site.validation.temp_range_c
    if high < lo or low > hi:
        return (
            f"EURange [{low:g}, {high:g}] does not overlap validation.temp_range_c "
            f"[{lo:g}, {hi:g}] °C: is the tag in another unit?"
        )
    return None


async def _child_value(node: Node, name: str) -> Any:
    """A property's value, or None if the node has no such property."""
    try:
        return await (await node.get_child(f"0:{name}")).read_value()
    except ua.UaStatusCodeError:
        return None


def _judge_value(
    spec: TagSpec,
    unit: UnitConfig,
    data: ua.DataValue,
    now_s: float,
    stale_after_s: float,
    tolerance_s: float,
) -> list[str]:
    problems = []
    code = data.StatusCode.value if data.StatusCode is not None else 0
    if severity(code) is not Severity.GOOD:
        problems.append(f"current quality {ua.StatusCode(code).name}")
    source = epoch_s(data.SourceTimestamp) or epoch_s(data.ServerTimestamp)
    if source is None:
        problems.append("no source or server timestamp")
    elif source > now_s + tolerance_s:
        problems.append(
            f"source timestamp {source - now_s:.0f} s ahead of this machine's clock: "
            "synchronise the clocks (NTP)"
        )
    elif spec.signal in MEASURED and now_s - source > stale_after_s:
        problems.append(
            f"source timestamp {now_s - source:.0f} s old (validation.stale_after_s is "
            f"{stale_after_s:g} s): is the value updated?"
        )
    value = data.Value.Value if data.Value is not None else None
    if spec.kind == "phase" and value is not None:
        mapped = {str(v) for v in unit.phase_values.values()}
        if str(value) not in mapped:
            problems.append(f"phase value {value!r} is not in the unit's phase_values")
    return problems


async def _check_tag(client: Client, site: SiteConfig, spec: TagSpec, now_s: float) -> TagReport:
    unit = site.unit[spec.unit_index]
    node = client.get_node(spec.node_id)
    attributes = await node.read_attributes(
        [
            ua.AttributeIds.NodeClass,
            ua.AttributeIds.DataType,
            ua.AttributeIds.Value,
            ua.AttributeIds.AccessLevel,
            ua.AttributeIds.UserAccessLevel,
        ]
    )
    node_class, data_type, value, access, user_access = attributes
    if not node_class.StatusCode.is_good():
        return TagReport(spec, problems=(f"no such node {spec.node_id.to_string()}",))
    if node_class.Value.Value != ua.NodeClass.Variable:
        return TagReport(spec, problems=(f"{spec.node_id.to_string()} is not a variable",))
    problems: list[str] = []
    type_id = data_type.Value.Value
    type_name = _type_name(type_id)
    value_variant = value.Value.VariantType if value.Value is not None else ua.VariantType.Null
    if variant_of(type_id) is None and value_variant is not ua.VariantType.Null:
        type_name = f"{type_name} ({value_variant.name})"
    if not _type_fits(type_id, value_variant, spec):
        allowed = ", ".join(sorted(t.name for t in spec.types))
        problems.append(f"data type {type_name} cannot hold this signal (expected {allowed})")
    unit_text = range_text = ""
    if spec.kind in ANALOG_KINDS:
        info = await _child_value(node, "EngineeringUnits")
        if info is None:
            problems.append("no EngineeringUnits: the unit cannot be confirmed")
        else:
            unit_text = (info.DisplayName.Text if info.DisplayName else "") or str(info.UnitId)
            if not _units_ok(spec, unit, info):
                wanted = "°C" if spec.kind == "temperature" else unit.analyzer.conc_unit
                problems.append(f"EngineeringUnits {unit_text!r}, the site file expects {wanted}")
        value_range = await _child_value(node, "EURange")
        if value_range is None:
            problems.append("no EURange: the range cannot be confirmed")
        else:
            range_text = f"{value_range.Low:g} to {value_range.High:g}"
            problem = _range_problem(spec, site, unit, value_range.Low, value_range.High)
            if problem:
                problems.append(problem)
    problems += _judge_value(
        spec,
        unit,
        value,
        now_s,
        site.validation.stale_after_s,
        site.opcua.future_tolerance_s,
    )
    writable = None
    if spec.signal in ("remote_setpoint", "heartbeat"):
        bit = ua.AccessLevel.CurrentWrite
        levels = [a.Value.Value if a.StatusCode.is_good() else 0 for a in (access, user_access)]
        writable = all(ua.ua_binary.test_bit(level, bit) for level in levels)
        if site.opcua.write_to_dcs and not writable:
            problems.append("not writable for sigmatrack's user (AccessLevel/UserAccessLevel)")
    shown = "" if value.Value is None or value.Value.Value is None else str(value.Value.Value)
    quality = ua.StatusCode(value.StatusCode.value).name if value.StatusCode else "Good"
    return TagReport(
        spec, type_name, unit_text, range_text, quality, shown[:24], writable, tuple(problems)
    )


def _security_text(site: SiteConfig) -> str:
    config = site.opcua
    who = f"user {config.username}" if config.username else "anonymous"
    if config.security_policy == "none":
        return f"no security, {who}"
    return f"{config.security_policy} {config.security_mode}, {who}"


async def check_plant(
    site: SiteConfig, *, now_s: float, environ: Mapping[str, str] | None = None
) -> CheckReport:
    """Connect read-only to the plant's server and check every tag (module docstring).

    Parameters
    ----------
    site : the site file
    now_s : this machine's clock [s since the Unix epoch], to judge the source timestamps
    environ : where ``opcua.password_env`` is looked up (default ``os.environ``)

    Raises
    ------
    OpcUaError
        If the server cannot be reached or refuses the connection.
    SecurityFileError
        If sigmatrack's certificate, key, trust folder or password cannot be used.
    """
    config = site.opcua
    password = opcua_password(config, os.environ if environ is None else environ)
    if config.security_policy != "none":
        assert config.trust_dir is not None
        check_identity(config)
        await trust_store(config.trust_dir)
    client = Client(config.endpoint, timeout=config.request_timeout_s)
    try:
        await secure_client(client, config, password)
        await client.connect()
    except (OSError, TimeoutError, ua.UaError) as error:
        text = str(error).strip() or type(error).__name__
        raise OpcUaError(config.endpoint, f"cannot connect: {text}") from None
    try:
        server_name = ""
        with contextlib.suppress(ua.UaError):
            product = client.get_node(ua.NodeId(ua.ObjectIds.Server_ServerStatus_BuildInfo))
            server_name = (await product.read_value()).ProductName or ""
        reports = [await _check_tag(client, site, spec, now_s) for spec in tag_specs(site)]
    except (OSError, TimeoutError, ua.UaError) as error:
        why = f"the connection failed during the check: {error}"
        raise OpcUaError(config.endpoint, why) from None
    finally:
        with contextlib.suppress(OSError, TimeoutError, ua.UaError):
            await client.disconnect()
    return CheckReport(config.endpoint, _security_text(site), server_name, tuple(reports))


def write_plan(site: SiteConfig, reports: Sequence[TagReport]) -> list[str]:
    """What sigmatrack would write, under which conditions, one line per tag (in words)."""
    guard = site.guard
    lines = []
    by_unit: dict[str, dict[str, TagReport]] = {}
    for report in reports:
        by_unit.setdefault(report.spec.unit_id, {})[report.spec.signal] = report
    for unit in site.unit:
        tags = by_unit.get(unit.id, {})
        permit = tags.get("permissive")
        permit_text = (
            f"{permit.spec.tag.name} is true (it reads {permit.value or 'nothing'} now)"
            if permit
            else "the permissive tag is true (none is configured)"
        )
        if "remote_setpoint" in tags:
            tag = tags["remote_setpoint"]
            lo, hi = guard.setpoint_range_c
            lines.append(
                f"{unit.id} remote_setpoint -> {tag.spec.tag.name} ({tag.data_type or '?'}, °C): "
                f"the advisor's reactor-temperature setpoint, every "
                f"{site.controller.update_interval_s:g} s, only while {permit_text}, in the "
                f"phases {', '.join(guard.proposal_phases)}, with the soft sensor's health "
                f"good, and inside the guard: {max(lo, guard.final_temp_c):g} to {hi:g} °C, "
                f"cooling at most {guard.max_cooling_rate_k_per_min:g} K/min and "
                f"{guard.max_step_k:g} K per update"
                + (
                    f", heating only in {', '.join(guard.heating_phases)}"
                    if guard.heating_phases
                    else ", never heating"
                )
            )
        if "heartbeat" in tags:
            tag = tags["heartbeat"]
            lines.append(
                f"{unit.id} heartbeat -> {tag.spec.tag.name} ({tag.data_type or '?'}): a counter "
                f"0 to 32767, one up every {guard.heartbeat_period_s:g} s, only while "
                f"{permit_text} and sigmatrack's health is good; set the DCS's watchdog to drop "
                "the permissive and return to its recipe when it stops changing"
            )
    return lines
