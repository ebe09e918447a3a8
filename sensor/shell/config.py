"""The site file: one TOML file that describes a plant's crystallizers to sigmatrack.

:func:`load_site_file` reads it (stdlib ``tomllib``) into the frozen dataclasses below and
refuses, naming the file and the key, anything unknown, missing, mistyped or impossible. Keys
carry their units in their names (``_c``, ``_k``, ``_s``, ``_kg``, ``_k_per_min``, ...); the code
that builds the science objects from these converts them to SI once. ``config/demo-site.toml``
documents every key with a comment; ``tests/shell/test_config.py`` keeps the two in step.

The optional ``[simulator]`` table is kept raw here and read by the plant simulator, which
owns its schema: the estimator never sees it.
"""

from __future__ import annotations

import hashlib
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from controller.alarm_set import AlarmSettings
from controller.guard import Fallback, GuardLimits
from controller.law import LawSettings
from sensor.errors import SiteConfigError
from sensor.shell.tomlschema import (
    Invalid,
    ascending_pair,
    at_least,
    check,
    non_negative,
    open_fraction,
    positive,
    read_table,
)
from sensor.units import celsius_to_kelvin, per_minute_to_per_second

BATCH_PHASES = (
    "idle",
    "heat",
    "dissolve",
    "cool-to-seed",
    "seed",
    "seed-hold",
    "controlled-cooling",
    "final-hold",
    "discharge",
)
"""The batch phases sigmatrack knows, in recipe order; a unit's ``phase_values`` maps the DCS's
phase tag values onto them."""

SIGNALS = (
    "temp",
    "jacket_temp",
    "jacket_setpoint",
    "conc",
    "phase",
    "batch_id",
    "permissive",
    "remote_setpoint",
    "heartbeat",
    "setpoint",
)
"""The signals a unit's ``tags`` table may name. ``temp``, ``jacket_temp`` and ``conc`` are
required; the rest are needed for batch tracking and for writing to the DCS. ``setpoint`` is the
reactor-temperature setpoint the DCS's loop is using now (the guard counts its rate limits from
it)."""

REQUIRED_SIGNALS = ("temp", "jacket_temp", "conc")
WRITE_SIGNALS = ("permissive", "remote_setpoint", "heartbeat")

ConcUnitName = Literal["kg/kg", "g/100g", "mass-fraction", "mole-fraction", "g/L"]
"""Concentration units a site file may name (``sensor.units.CONCENTRATION_UNIT_NAMES``)."""


@dataclass(frozen=True)
class SiteSection:
    name: str
    description: str = ""


@dataclass(frozen=True)
class CompoundConfig:
    name: str
    solvent: str
    crystal_density_kg_per_m3: float = field(metadata=check(positive))
    volume_shape_factor: float = field(metadata=check(positive))
    molar_mass_g_per_mol: float | None = field(default=None, metadata=check(positive))
    solvent_molar_mass_g_per_mol: float | None = field(default=None, metadata=check(positive))
    melting_temp_c: float | None = None
    enthalpy_of_fusion_kj_per_mol: float | None = field(default=None, metadata=check(positive))

    def __post_init__(self) -> None:
        if (self.molar_mass_g_per_mol is None) != (self.solvent_molar_mass_g_per_mol is None):
            key = (
                "molar_mass_g_per_mol"
                if self.molar_mass_g_per_mol is None
                else ("solvent_molar_mass_g_per_mol")
            )
            raise Invalid(key, "give both molar masses (solute and solvent) or neither")
        if self.volume_shape_factor > 0.5236:
            raise Invalid(
                "volume_shape_factor",
                f"cannot exceed pi/6 = 0.5236 (a sphere, size = diameter); got "
                f"{self.volume_shape_factor}",
            )


@dataclass(frozen=True)
class SolubilityConfig:
    data: Path
    conc_unit: ConcUnitName
    model: Literal["auto", "vant-hoff", "apelblat", "lambda-h", "polynomial"] = "auto"
    polynomial_degree: int = field(default=2, metadata=check(at_least(1)))
    extrapolation_margin_k: float = field(default=5.0, metadata=check(non_negative))

    def __post_init__(self) -> None:
        if self.polynomial_degree > 5:
            raise Invalid("polynomial_degree", f"must be 1 to 5; got {self.polynomial_degree}")


@dataclass(frozen=True)
class MetastableConfig:
    method: Literal["nyvlt", "fixed-width"]
    data: Path | None = None
    conc_unit: ConcUnitName | None = None
    fixed_width_k: float | None = field(default=None, metadata=check(positive))
    fixed_width_std_k: float = field(default=0.0, metadata=check(non_negative))

    def __post_init__(self) -> None:
        if self.method == "nyvlt":
            for key in ("data", "conc_unit"):
                if getattr(self, key) is None:
                    raise Invalid(key, "needed when method = 'nyvlt' (the cloud-point data)")
        if self.method == "fixed-width" and self.fixed_width_k is None:
            raise Invalid("fixed_width_k", "needed when method = 'fixed-width'")


@dataclass(frozen=True)
class ModelConfig:
    """Kinetics of the soft sensor's estimation model (moments model), with their stated
    uncertainty."""

    growth_rate_constant_m_per_s: float = field(metadata=check(positive))
    growth_order: float = field(metadata=check(at_least(1.0)))
    nucleation_rate_constant_per_kg_s: float = field(metadata=check(non_negative))
    nucleation_order: float = field(metadata=check(at_least(1.0)))
    nucleation_solids_exponent: float = field(default=1.0, metadata=check(non_negative))
    dissolution_rate_constant_m_per_s: float = field(default=0.0, metadata=check(non_negative))
    growth_rel_std: float = field(default=0.3, metadata=check(non_negative))
    nucleation_rel_std: float = field(default=0.5, metadata=check(non_negative))
    kinetics_error_time_s: float = field(default=60.0, metadata=check(positive))
    seed_rel_std: float = field(default=0.1, metadata=check(non_negative))
    estimate_growth_scale: bool = True
    max_step_s: float = field(default=1.0, metadata=check(positive))


@dataclass(frozen=True)
class FilterConfig:
    kind: Literal["ukf", "ekf"] = "ukf"
    gate_probability: float = field(default=0.999, metadata=check(open_fraction))
    max_consecutive_gated: int = field(default=5, metadata=check(at_least(1)))
    nis_window: int = field(default=30, metadata=check(at_least(2)))
    nis_probability: float = field(default=0.999, metadata=check(open_fraction))
    temp_process_std_k_per_sqrt_s: float = field(default=2e-3, metadata=check(positive))
    conc_process_std_per_sqrt_s: float = field(default=2e-6, metadata=check(positive))
    moment_process_std_per_sqrt_s: float = field(default=1e-8, metadata=check(positive))
    bias_random_walk_std_per_sqrt_s: float = field(default=3e-6, metadata=check(non_negative))
    growth_scale_random_walk_std_per_sqrt_s: float = field(
        default=1e-4, metadata=check(non_negative)
    )
    initial_temp_std_k: float = field(default=0.5, metadata=check(positive))
    initial_conc_rel_std: float = field(default=0.05, metadata=check(positive))
    initial_bias_std: float = field(default=0.005, metadata=check(positive))
    initial_moment_std: float = field(default=1e-6, metadata=check(positive))
    sigma_alpha: float = field(default=1.0, metadata=check(positive))
    sigma_beta: float = field(default=2.0, metadata=check(non_negative))
    sigma_kappa: float = field(default=0.0, metadata=check(non_negative))
    history_margin_s: float = field(default=60.0, metadata=check(non_negative))


@dataclass(frozen=True)
class ValidationConfig:
    stale_after_s: float = field(default=120.0, metadata=check(positive))
    frozen_after_s: float = field(default=300.0, metadata=check(positive))
    temp_range_c: tuple[float, float] = field(
        default=(-30.0, 150.0), metadata=check(ascending_pair)
    )
    max_temp_rate_k_per_min: float = field(default=10.0, metadata=check(positive))
    rate_window_s: float = field(default=60.0, metadata=check(positive))
    spike_threshold_std: float = field(default=6.0, metadata=check(positive))
    accept_uncertain: bool = False


@dataclass(frozen=True)
class ControllerConfig:
    """The cooling-rate advisor's law (``controller.law``)."""

    target_fraction_of_zone: float = field(default=0.5, metadata=check(open_fraction))
    target_zone_rate_k_per_min: float = field(default=0.3, metadata=check(positive))
    confidence_k: float = field(default=2.0, metadata=check(non_negative))
    horizon_s: float = field(default=1200.0, metadata=check(positive))
    update_interval_s: float = field(default=30.0, metadata=check(positive))
    dissolution_sigma: float = -0.05

    def __post_init__(self) -> None:
        if not -1.0 < self.dissolution_sigma < 0.0:
            raise Invalid(
                "dissolution_sigma",
                f"must be between -1 and 0 (an undersaturation); got {self.dissolution_sigma}",
            )

    def law_settings(self, zone_min_rate_k_per_s: float) -> LawSettings:
        """The law's settings in SI; ``zone_min_rate_k_per_s`` is the slowest rate the
        metastable zone was measured at [K/s]."""
        return LawSettings(
            target_fraction=self.target_fraction_of_zone,
            confidence_k=self.confidence_k,
            horizon_s=self.horizon_s,
            interval_s=self.update_interval_s,
            target_zone_rate_k_per_s=float(
                per_minute_to_per_second(self.target_zone_rate_k_per_min)
            ),
            zone_min_rate_k_per_s=zone_min_rate_k_per_s,
            dissolution_sigma=self.dissolution_sigma,
        )


@dataclass(frozen=True)
class GuardConfig:
    """The guard's limits (``controller.guard``)."""

    setpoint_range_c: tuple[float, float] = field(metadata=check(ascending_pair))
    final_temp_c: float
    max_cooling_rate_k_per_min: float = field(metadata=check(positive))
    max_heating_rate_k_per_min: float = field(default=0.0, metadata=check(non_negative))
    max_step_k: float = field(default=0.5, metadata=check(positive))
    proposal_phases: tuple[str, ...] = ("controlled-cooling",)
    heating_phases: tuple[str, ...] = ()
    heartbeat_period_s: float = field(default=10.0, metadata=check(positive))
    fallback: Literal["hold-rate", "recipe"] = "recipe"

    def __post_init__(self) -> None:
        lo, hi = self.setpoint_range_c
        if not lo <= self.final_temp_c <= hi:
            raise Invalid("final_temp_c", f"must lie inside setpoint_range_c {[lo, hi]}")
        for key in ("proposal_phases", "heating_phases"):
            for i, phase in enumerate(getattr(self, key)):
                if phase not in BATCH_PHASES:
                    raise Invalid(f"{key}[{i}]", f"unknown phase {phase!r}")
        for i, phase in enumerate(self.heating_phases):
            if phase not in self.proposal_phases:
                raise Invalid(f"heating_phases[{i}]", f"{phase!r} is not in proposal_phases")
        if self.heating_phases and self.max_heating_rate_k_per_min == 0.0:
            raise Invalid(
                "max_heating_rate_k_per_min", "must be positive when heating_phases are given"
            )

    def limits(self, interval_s: float) -> GuardLimits:
        """The guard's limits in SI, for updates every ``interval_s`` [s]."""
        lo, hi = celsius_to_kelvin(self.setpoint_range_c)
        return GuardLimits(
            setpoint_range_k=(float(lo), float(hi)),
            final_temp_k=float(celsius_to_kelvin(self.final_temp_c)),
            max_cooling_rate_k_per_s=float(
                per_minute_to_per_second(self.max_cooling_rate_k_per_min)
            ),
            max_step_k=self.max_step_k,
            interval_s=interval_s,
            proposal_phases=frozenset(self.proposal_phases),
            heartbeat_period_s=self.heartbeat_period_s,
            max_heating_rate_k_per_s=float(
                per_minute_to_per_second(self.max_heating_rate_k_per_min)
            ),
            heating_phases=frozenset(self.heating_phases),
            fallback=Fallback(self.fallback),
        )


@dataclass(frozen=True)
class AlarmsConfig:
    """The alarms' limits and timing (``controller.alarm_set``)."""

    sigma_high_fraction: float = field(default=0.8, metadata=check(open_fraction))
    undersaturated_fraction: float = field(default=0.1, metadata=check(open_fraction))
    on_delay_s: float = field(default=30.0, metadata=check(non_negative))
    off_delay_s: float = field(default=60.0, metadata=check(non_negative))
    deadband_fraction: float = field(default=0.05, metadata=check(open_fraction))
    shelve_max_s: float = field(default=8 * 3600.0, metadata=check(positive))
    tracking_error_k: float = field(default=2.0, metadata=check(positive))
    drift_limit_fraction: float = field(default=0.03, metadata=check(open_fraction))
    seed_window_fraction: tuple[float, float] = field(
        default=(0.3, 0.6), metadata=check(ascending_pair)
    )

    def __post_init__(self) -> None:
        low, high = self.seed_window_fraction
        if not (low > 0.0 and high < 1.0):
            raise Invalid("seed_window_fraction", f"must lie between 0 and 1; got {[low, high]}")

    def settings(self, heating_phases: tuple[str, ...] = ()) -> AlarmSettings:
        """The alarms' settings; ``heating_phases`` (``guard.heating_phases``) are the phases
        where undersaturation is intended."""
        return AlarmSettings(
            sigma_high_fraction=self.sigma_high_fraction,
            undersaturated_fraction=self.undersaturated_fraction,
            on_delay_s=self.on_delay_s,
            off_delay_s=self.off_delay_s,
            deadband_fraction=self.deadband_fraction,
            shelve_max_s=self.shelve_max_s,
            tracking_error_k=self.tracking_error_k,
            drift_limit_fraction=self.drift_limit_fraction,
            seed_window_fraction=self.seed_window_fraction,
            heating_phases=frozenset(heating_phases),
        )


SQL_SCHEMA_NAME = re.compile(r"[a-z_][a-z0-9_]{0,62}")
"""A PostgreSQL schema name the store accepts: plain, lower case, never quoted differently."""


@dataclass(frozen=True)
class StoreConfig:
    """Where and how the store writes (``sensor.shell.store``)."""

    url: str = "sqlite:///sigmatrack.db"
    schema: str | None = None
    batch_rows: int = field(default=1000, metadata=check(at_least(1)))
    flush_interval_s: float = field(default=1.0, metadata=check(positive))
    buffer_max_rows: int = field(default=200_000, metadata=check(at_least(1)))
    queue_dir: Path | None = None
    queue_max_rows: int = field(default=5_000_000, metadata=check(at_least(1)))
    retry_max_s: float = field(default=30.0, metadata=check(positive))

    def __post_init__(self) -> None:
        # Checked without SQLAlchemy (slow to import); sensor.shell.store parses it in full.
        scheme, sep, rest = self.url.partition("://")
        backend = scheme.partition("+")[0]
        if not sep or backend not in ("sqlite", "postgresql"):
            raise Invalid(
                "url",
                f"must be sqlite:///FILE or postgresql+psycopg://USER@HOST:PORT/DATABASE; "
                f"got {self.url!r}",
            )
        credentials = rest.rpartition("@")[0]
        if ":" in credentials:
            raise Invalid(
                "url",
                "secrets do not belong in the site file: leave the password out of the URL "
                "and give it to libpq as PGPASSWORD (environment) or in PGPASSFILE "
                "(a file readable only by the service account)",
            )
        if self.schema is not None:
            if backend != "postgresql":
                raise Invalid("schema", "only for PostgreSQL")
            if not SQL_SCHEMA_NAME.fullmatch(self.schema):
                raise Invalid("schema", f"must be a plain lower-case SQL name; got {self.schema!r}")
        if self.buffer_max_rows < self.batch_rows:
            raise Invalid(
                "buffer_max_rows",
                f"must be at least batch_rows ({self.batch_rows}); got {self.buffer_max_rows}",
            )


@dataclass(frozen=True)
class ServiceConfig:
    """How ``sigmatrack run`` steps its units."""

    tick_s: float = field(default=1.0, metadata=check(positive))
    checkpoint_interval_s: float = field(default=60.0, metadata=check(positive))

    def __post_init__(self) -> None:
        if self.checkpoint_interval_s < self.tick_s:
            raise Invalid(
                "checkpoint_interval_s",
                f"must be at least tick_s ({self.tick_s}); got {self.checkpoint_interval_s}",
            )


SecurityMode = Literal["none", "sign", "sign-and-encrypt"]
"""OPC UA message security modes (Part 4, MessageSecurityMode), as site files name them."""

APPLICATION_URI = re.compile(r"urn:[^\s]+")
"""An OPC UA ApplicationUri as sigmatrack accepts it: a URN without spaces."""


@dataclass(frozen=True)
class OpcUaServerConfig:
    """sigmatrack's own OPC UA server (``sensor.shell.opcua.advisor_server``).

    It uses the application instance certificate of ``[opcua]`` (``certificate``,
    ``private_key``); ``trust_dir`` holds the certificates of the clients it trusts.
    """

    endpoint: str = "opc.tcp://127.0.0.1:4841/sigmatrack"
    namespace_uri: str = "urn:sigmatrack:advisor"
    allow_anonymous_read: bool = True
    security_modes: tuple[SecurityMode, ...] = ("none",)
    trust_dir: Path | None = None
    users_file: Path | None = None

    def __post_init__(self) -> None:
        if not self.security_modes:
            raise Invalid("security_modes", "give at least one mode")
        if len(set(self.security_modes)) != len(self.security_modes):
            raise Invalid("security_modes", "a mode is listed twice")
        secure = self.secure_modes
        if secure and self.trust_dir is None:
            raise Invalid("trust_dir", "needed with a security mode other than 'none'")
        if self.users_file is not None and not secure:
            raise Invalid(
                "users_file",
                "user names and passwords need a signed or encrypted endpoint (add 'sign' or "
                "'sign-and-encrypt' to security_modes): a password never travels in clear",
            )
        if not self.allow_anonymous_read and self.users_file is None:
            raise Invalid(
                "allow_anonymous_read", "is false and there is no users_file: nobody could log in"
            )

    @property
    def secure_modes(self) -> tuple[SecurityMode, ...]:
        """The modes other than ``none``."""
        return tuple(mode for mode in self.security_modes if mode != "none")


@dataclass(frozen=True)
class OpcUaConfig:
    endpoint: str = "opc.tcp://127.0.0.1:4840/plant"
    node_id_format: str = "ns=2;s={tag}"
    security_policy: Literal["none", "Basic256Sha256"] = "none"
    security_mode: SecurityMode = "none"
    certificate: Path | None = None
    private_key: Path | None = None
    trust_dir: Path | None = None
    application_uri: str = "urn:sigmatrack:advisor"
    username: str | None = None
    password_env: str | None = None
    password_file: Path | None = None
    sampling_interval_ms: float = field(default=500.0, metadata=check(positive))
    publishing_interval_ms: float = field(default=100.0, metadata=check(positive))
    monitored_queue_size: int = field(default=10, metadata=check(at_least(1)))
    notification_queue_max: int = field(default=10_000, metadata=check(at_least(100)))
    request_timeout_s: float = field(default=4.0, metadata=check(positive))
    reconnect_initial_s: float = field(default=1.0, metadata=check(positive))
    reconnect_max_s: float = field(default=30.0, metadata=check(positive))
    future_tolerance_s: float = field(default=5.0, metadata=check(non_negative))
    write_to_dcs: bool = False
    server: OpcUaServerConfig = OpcUaServerConfig()

    def __post_init__(self) -> None:
        if "{tag}" not in self.node_id_format:
            raise Invalid("node_id_format", "must contain {tag}, where the tag name goes")
        if (self.security_policy == "none") != (self.security_mode == "none"):
            raise Invalid(
                "security_mode", "security_policy and security_mode are both 'none' or neither"
            )
        if self.security_policy != "none":
            for key in ("certificate", "private_key", "trust_dir"):
                if getattr(self, key) is None:
                    raise Invalid(key, f"needed with security_policy = {self.security_policy!r}")
        if self.server.secure_modes:
            for key in ("certificate", "private_key"):
                if getattr(self, key) is None:
                    raise Invalid(key, "needed by the server's security_modes (its certificate)")
        if self.password_env is not None and self.password_file is not None:
            raise Invalid("password_file", "give password_env or password_file, not both")
        if (self.password_env is not None or self.password_file is not None) and (
            self.username is None
        ):
            raise Invalid("username", "needed with password_env or password_file")
        if self.username is not None and self.security_policy == "none":
            raise Invalid(
                "username",
                "a user name and password need security_policy 'Basic256Sha256': a password "
                "never travels in clear",
            )
        if not APPLICATION_URI.fullmatch(self.application_uri):
            raise Invalid(
                "application_uri", f"must be a URN without spaces; got {self.application_uri!r}"
            )
        if self.reconnect_max_s < self.reconnect_initial_s:
            raise Invalid(
                "reconnect_max_s",
                f"must be at least reconnect_initial_s ({self.reconnect_initial_s}); got "
                f"{self.reconnect_max_s}",
            )


@dataclass(frozen=True)
class TagRef:
    """A plant tag: its name (the historian column) and its OPC UA node id.

    In the site file, either the tag name as a string (the node id follows from
    ``opcua.node_id_format``) or a table ``{ name = "...", node = "ns=3;i=1042" }``.
    """

    name: str
    node: str | None = None

    @classmethod
    def from_toml(cls, value: Any, key: str, file: Path) -> TagRef:
        if isinstance(value, str) and value:
            return cls(value)
        if isinstance(value, Mapping):
            return read_table(cls, value, file, key)
        raise SiteConfigError(file, key, "must be a tag name or a table {name = ..., node = ...}")

    def node_id(self, node_id_format: str) -> str:
        """The OPC UA node id string of this tag."""
        return self.node if self.node is not None else node_id_format.format(tag=self.name)


@dataclass(frozen=True)
class AnalyzerConfig:
    conc_unit: ConcUnitName
    noise_std: float = field(metadata=check(positive))
    delay_s: float = field(default=0.0, metadata=check(non_negative))
    sample_interval_s: float = field(default=10.0, metadata=check(positive))
    range: tuple[float, float] = field(default=(0.0, 1.0e9), metadata=check(ascending_pair))


@dataclass(frozen=True)
class UnitConfig:
    id: str
    solvent_mass_kg: float = field(metadata=check(positive))
    heat_transfer_w_per_k: float = field(metadata=check(positive))
    heat_capacity_j_per_k: float = field(metadata=check(positive))
    analyzer: AnalyzerConfig
    tags: dict[str, TagRef]
    temp_noise_std_k: float = field(default=0.05, metadata=check(positive))
    seed_mass_kg: float = field(default=0.0, metadata=check(non_negative))
    seed_mean_size_um: float = field(default=50.0, metadata=check(positive))
    seed_size_std_um: float = field(default=10.0, metadata=check(positive))
    phase_values: dict[str, int | str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for signal in self.tags:
            if signal not in SIGNALS:
                raise Invalid(f"tags.{signal}", f"unknown signal; known: {', '.join(SIGNALS)}")
        for signal in REQUIRED_SIGNALS:
            if signal not in self.tags:
                raise Invalid(f"tags.{signal}", "missing (this signal is required)")
        for phase in self.phase_values:
            if phase not in BATCH_PHASES:
                raise Invalid(
                    f"phase_values.{phase}", f"unknown phase; known: {', '.join(BATCH_PHASES)}"
                )
        values = list(self.phase_values.values())
        if len(set(values)) != len(values):
            raise Invalid("phase_values", "two phases share one DCS value")


def _in_range(lo: float, hi: float):
    def check(value: float) -> str | None:
        return None if lo <= value <= hi else f"must be between {lo} and {hi}; got {value}"

    return check


LOOPBACK_HOSTS = ("127.0.0.1", "::1", "localhost")
"""Hosts that only this machine can reach."""


@dataclass(frozen=True)
class LiveConfig:
    """The live trend page (``sensor.shell.live``): an HTTP server for people on the plant
    network. Off unless ``enabled``; on loopback unless ``host`` says otherwise.

    Logging in (``users_file``, the format of ``sensor.shell.opcua.users``) lets an operator
    acknowledge and shelve alarms. A password must never travel in clear: with a users file, a
    host other than loopback needs ``certificate`` and ``private_key`` (PEM; HTTPS).
    """

    enabled: bool = False
    host: str = "127.0.0.1"
    port: int = field(default=8730, metadata=check(_in_range(0, 65535)))
    trend_hours: float = field(default=4.0, metadata=check(_in_range(0.1, 24.0)))
    trend_points: int = field(default=720, metadata=check(_in_range(20, 5000)))
    stale_after_s: float = field(default=60.0, metadata=check(positive))
    session_minutes: float = field(default=480.0, metadata=check(_in_range(1.0, 1440.0)))
    users_file: Path | None = None
    certificate: Path | None = None
    private_key: Path | None = None

    def __post_init__(self) -> None:
        if not self.host.strip():
            raise Invalid("host", "must name an address to listen on, e.g. 127.0.0.1")
        if (self.certificate is None) != (self.private_key is None):
            raise Invalid("certificate", "certificate and private_key go together (HTTPS)")
        in_clear = self.users_file is not None and self.certificate is None
        if in_clear and self.host not in LOOPBACK_HOSTS:
            raise Invalid(
                "host",
                f"{self.host!r} is reachable from other machines and users_file lets people "
                "log in: give certificate and private_key (HTTPS) so that a password never "
                "travels in clear, or listen on 127.0.0.1",
            )


@dataclass(frozen=True)
class SiteConfig:
    """A whole site file, validated. ``path`` and ``sha256`` identify it in the audit trail."""

    site: SiteSection
    compound: CompoundConfig
    solubility: SolubilityConfig
    metastable: MetastableConfig
    model: ModelConfig
    guard: GuardConfig
    unit: tuple[UnitConfig, ...]
    filter: FilterConfig = FilterConfig()
    validation: ValidationConfig = ValidationConfig()
    controller: ControllerConfig = ControllerConfig()
    alarms: AlarmsConfig = AlarmsConfig()
    store: StoreConfig = StoreConfig()
    opcua: OpcUaConfig = OpcUaConfig()
    service: ServiceConfig = ServiceConfig()
    live: LiveConfig = LiveConfig()
    simulator: dict[str, Any] | None = None
    path: Path = field(default=Path(), init=False)
    sha256: str = field(default="", init=False)

    def __post_init__(self) -> None:
        if not self.unit:
            raise Invalid("unit", "at least one [[unit]] is needed")
        ids = [u.id for u in self.unit]
        for i, unit_id in enumerate(ids):
            if unit_id in ids[:i]:
                raise Invalid(f"unit[{i}].id", f"{unit_id!r} is used by two units")
        if self.opcua.write_to_dcs:
            for i, unit in enumerate(self.unit):
                for signal in WRITE_SIGNALS:
                    if signal not in unit.tags:
                        raise Invalid(
                            f"unit[{i}].tags.{signal}", "needed when opcua.write_to_dcs = true"
                        )

    def unit_by_id(self, unit_id: str) -> UnitConfig:
        for unit in self.unit:
            if unit.id == unit_id:
                return unit
        raise KeyError(unit_id)


_SECRET_KEYS = ("password", "secret", "private_key_password")


def _refuse_secrets(table: Mapping[str, Any], file: Path, prefix: str = "") -> None:
    for key, value in table.items():
        dotted = f"{prefix}.{key}" if prefix else key
        if key in _SECRET_KEYS:
            raise SiteConfigError(
                file,
                dotted,
                "secrets do not belong in the site file: use password_env (an environment "
                "variable) or password_file (a file readable only by the service account)",
            )
        if isinstance(value, Mapping):
            _refuse_secrets(value, file, dotted)


def parse_site(text: str, file: Path) -> SiteConfig:
    """Validate the text of a site file; ``file`` names it in messages and anchors paths."""
    try:
        table = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise SiteConfigError(file, "", f"not valid TOML: {error}") from None
    _refuse_secrets(table, file)
    site = read_table(SiteConfig, table, file)
    object.__setattr__(site, "path", file)
    object.__setattr__(site, "sha256", hashlib.sha256(text.encode()).hexdigest())
    return site


def load_site_file(path: Path | str) -> SiteConfig:
    """Read and validate a site file.

    Raises
    ------
    SiteConfigError
        If the file cannot be read, is not TOML, or breaks the schema; the message names the
        file and the key.
    """
    file = Path(path).resolve()
    try:
        text = file.read_text(encoding="utf-8")
    except OSError as error:
        raise SiteConfigError(file, "", f"cannot be read ({error.strerror})") from None
    except UnicodeDecodeError:
        raise SiteConfigError(file, "", "is not UTF-8 text") from None
    return parse_site(text, file)
