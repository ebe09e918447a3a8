"""The ``[simulator]`` table of the site file: the plant's own numbers, which the estimator never
reads.

The site file keeps the table raw (``SiteConfig.simulator``); :func:`read_simulator_settings`
validates it here with the same typed reader as the rest of the site file, so a bad key is
refused naming the file and the dotted key (``simulator.recipe.seed_temp_c``). Every key is
documented with a comment in ``config/demo-site.toml``.

The plant's nominal growth, secondary nucleation and dissolution kinetics are the site file's
``[model]`` values (the mismatch option moves the plant away from them); what only the plant
has (primary nucleation, size-dependent growth, heat of crystallization, the recipe, the
temperature loops, the instruments' drift) is here.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Literal

from sensor.errors import SiteConfigError
from sensor.shell.config import SiteConfig
from sensor.shell.labdata import ProfileData, read_profile_csv
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
from simulators.faults import Fault


@dataclass(frozen=True)
class ChargeSettings:
    """What is in the vessel at the start: solvent (``unit.solvent_mass_kg``) and solute, partly
    undissolved, at ``start_temp_c``; the solution starts saturated, the rest is solid."""

    solute_kg_per_kg_solvent: float = field(metadata=check(positive))
    start_temp_c: float = 20.0
    solid_mean_size_um: float = field(default=150.0, metadata=check(positive))
    solid_size_std_um: float = field(default=40.0, metadata=check(positive))


@dataclass(frozen=True)
class GridSettings:
    """The size grid of the population balance."""

    size_classes: int = field(default=300, metadata=check(at_least(20)))
    max_size_um: float = field(default=1500.0, metadata=check(positive))
    courant_max: float = field(default=0.4, metadata=check(open_fraction))

    def __post_init__(self) -> None:
        if self.courant_max > 0.5:
            raise Invalid(
                "courant_max",
                f"must be at most 0.5 (the limiter's TVD bound); got {self.courant_max}",
            )


@dataclass(frozen=True)
class KineticsSettings:
    """Kinetics only the plant has, beyond the site file's ``[model]``."""

    primary_rate_at_limit_per_kg_s: float = field(default=1.0e8, metadata=check(non_negative))
    primary_exponent: float = field(default=30.0, metadata=check(at_least(2.0)))
    primary_reference_rate_k_per_min: float = field(default=0.1, metadata=check(positive))
    growth_size_exponent: float = field(default=0.0, metadata=check(non_negative))
    growth_size_scale_um: float = field(default=100.0, metadata=check(positive))
    heat_of_crystallization_j_per_kg: float = field(default=0.0, metadata=check(non_negative))

    def __post_init__(self) -> None:
        if self.growth_size_exponent >= 1.0:
            raise Invalid(
                "growth_size_exponent",
                f"must be below 1 (the Abegg-Stevens-Larson form); got {self.growth_size_exponent}",
            )


@dataclass(frozen=True)
class ThermalSettings:
    """The DCS's temperature loops: the reactor master (PI) and the jacket's response."""

    jacket_time_constant_s: float = field(default=120.0, metadata=check(positive))
    jacket_max_rate_k_per_min: float = field(default=3.0, metadata=check(positive))
    jacket_setpoint_range_c: tuple[float, float] = field(
        default=(-10.0, 95.0), metadata=check(ascending_pair)
    )
    controller_gain: float = field(default=4.0, metadata=check(positive))
    controller_integral_time_s: float = field(default=1800.0, metadata=check(positive))
    rate_feedforward: bool = True


DEFAULT_COOLING_DURATION_S = 21600.0
"""The recipe's own linear or cubic profile lasts this long unless the site file says [s]."""

_PROFILE_ENDS_TOLERANCE_K = 0.01
"""How far a profile file's first and last temperatures may be from the recipe's seed and final
temperatures [K]: the file's resolution, 0.01 °C."""


@dataclass(frozen=True)
class RecipeSettings:
    """The batch recipe, as the DCS runs it.

    With ``cooling_profile = "file"`` the recipe's own profile is the table in
    ``cooling_profile_file`` (a profile CSV, as ``sigmatrack plan --out`` writes it), read here
    into ``profile_table``; it must run from ``seed_temp_c`` to ``final_temp_c`` and end within
    ``cooling_max_s``, and ``cooling_duration_s`` (the file sets the duration) is refused.
    Otherwise ``cooling_duration_s`` defaults to :data:`DEFAULT_COOLING_DURATION_S`.
    """

    dissolve_temp_c: float
    seed_temp_c: float
    final_temp_c: float
    idle_s: float = field(default=300.0, metadata=check(non_negative))
    heat_rate_k_per_min: float = field(default=1.0, metadata=check(positive))
    dissolve_hold_s: float = field(default=1800.0, metadata=check(non_negative))
    cool_to_seed_rate_k_per_min: float = field(default=1.0, metadata=check(positive))
    seed_s: float = field(default=60.0, metadata=check(non_negative))
    seed_hold_s: float = field(default=1800.0, metadata=check(non_negative))
    cooling_profile: Literal["linear", "cubic", "file"] = "cubic"
    cooling_profile_file: Path | None = None
    cooling_duration_s: float | None = field(default=None, metadata=check(positive))
    cooling_max_s: float = field(default=32400.0, metadata=check(positive))
    final_hold_s: float = field(default=3600.0, metadata=check(non_negative))
    discharge_s: float = field(default=1800.0, metadata=check(non_negative))
    temp_tolerance_k: float = field(default=0.5, metadata=check(positive))
    max_cooling_rate_k_per_min: float = field(default=1.0, metadata=check(positive))
    max_heating_rate_k_per_min: float = field(default=0.2, metadata=check(non_negative))
    heartbeat_timeout_s: float = field(default=30.0, metadata=check(positive))
    permissive: bool = False
    profile_table: ProfileData | None = field(default=None, init=False, compare=False)

    def __post_init__(self) -> None:
        if not self.seed_temp_c < self.dissolve_temp_c:
            raise Invalid("seed_temp_c", "must be below dissolve_temp_c")
        if not self.final_temp_c < self.seed_temp_c:
            raise Invalid("final_temp_c", "must be below seed_temp_c (a cooling recipe)")
        if (self.cooling_profile == "file") != (self.cooling_profile_file is not None):
            raise Invalid(
                "cooling_profile_file", 'is needed with cooling_profile = "file", and only then'
            )
        if self.cooling_profile_file is not None:
            if self.cooling_duration_s is not None:
                raise Invalid(
                    "cooling_duration_s",
                    'is not used with cooling_profile = "file" (the profile file sets the '
                    "duration): remove it",
                )
            table = read_profile_csv(self.cooling_profile_file)
            self._check_table(table)
            object.__setattr__(self, "profile_table", table)
        else:
            if self.cooling_duration_s is None:
                object.__setattr__(self, "cooling_duration_s", DEFAULT_COOLING_DURATION_S)
            if self.cooling_max_s < self.cooling_duration_s:
                raise Invalid("cooling_max_s", "cannot be shorter than cooling_duration_s")

    def _check_table(self, table: ProfileData) -> None:
        """A profile file fits the recipe: from the seed to the final temperature, within
        ``cooling_max_s``."""
        rows = table.source
        ends = (
            (0, self.seed_temp_c, "starts", "seed_temp_c"),
            (len(table.temp_k) - 1, self.final_temp_c, "ends", "final_temp_c"),
        )
        for row, temp_c, verb, key in ends:
            got_c = float(rows.values["temp_c"][row])
            if abs(got_c - temp_c) > _PROFILE_ENDS_TOLERANCE_K:
                raise Invalid(
                    "cooling_profile_file",
                    f"{rows.file}, line {rows.line_of(row)}: the profile {verb} at {got_c:g} °C, "
                    f"the recipe's {key} is {temp_c:g} °C",
                )
        if self.cooling_max_s < table.time_s[-1]:
            raise Invalid(
                "cooling_max_s",
                f"cannot be shorter than the profile in {rows.file} "
                f"({table.time_s[-1]:g} s, line {rows.line_of(len(table.time_s) - 1)})",
            )


@dataclass(frozen=True)
class InstrumentSettings:
    """What the site file's ``[[unit]]`` does not say about the instruments."""

    temp_resolution_k: float = field(default=0.01, metadata=check(positive))
    temp_range_c: tuple[float, float] = field(
        default=(-20.0, 120.0), metadata=check(ascending_pair)
    )
    analyzer_resolution: float = field(default=0.001, metadata=check(positive))
    analyzer_initial_bias: float = 0.0
    analyzer_bias_random_walk_per_sqrt_s: float = field(
        default=1.0e-6, metadata=check(non_negative)
    )


@dataclass(frozen=True)
class MismatchSettings:
    """How far the plant is from the site file's kinetics and solubility (seeded draws)."""

    kinetics_fraction: float = field(default=0.0, metadata=check(non_negative))
    solubility_offset_k: float = field(default=0.0, metadata=check(non_negative))

    def __post_init__(self) -> None:
        if self.kinetics_fraction > 0.5:
            raise Invalid(
                "kinetics_fraction", f"at most 0.5 (+/-50 %); got {self.kinetics_fraction}"
            )
        if self.solubility_offset_k > 1.0:
            raise Invalid("solubility_offset_k", f"at most 1 K; got {self.solubility_offset_k}")


@dataclass(frozen=True)
class SimulatorSettings:
    """The whole ``[simulator]`` table, validated."""

    charge: ChargeSettings
    recipe: RecipeSettings
    sample_interval_s: float = field(default=1.0, metadata=check(positive))
    start_time: str = "2026-03-14T06:00:00Z"
    grid: GridSettings = GridSettings()
    kinetics: KineticsSettings = KineticsSettings()
    thermal: ThermalSettings = ThermalSettings()
    instruments: InstrumentSettings = InstrumentSettings()
    mismatch: MismatchSettings = MismatchSettings()
    faults: tuple[Fault, ...] = ()

    def __post_init__(self) -> None:
        try:
            parse_start_time(self.start_time)
        except ValueError as error:
            raise Invalid("start_time", str(error)) from None

    @property
    def start(self) -> datetime:
        """The batch's start as an aware UTC datetime."""
        return parse_start_time(self.start_time)


def parse_start_time(text: str) -> datetime:
    """An ISO 8601 time with an explicit offset (``Z`` or ``+01:00``) to aware UTC.

    Raises
    ------
    ValueError
        If it is not ISO 8601 or has no offset.
    """
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(f"not an ISO 8601 time: {text!r}") from None
    if moment.tzinfo is None:
        raise ValueError(f"needs an explicit UTC offset (Z or +00:00): {text!r}")
    return moment.astimezone(UTC)


def read_simulator_settings(site: SiteConfig) -> SimulatorSettings:
    """Validate the site file's ``[simulator]`` table.

    Raises
    ------
    SiteConfigError
        If the table is missing or breaks the schema; the message names the file and key.
    """
    if site.simulator is None:
        raise SiteConfigError(
            site.path,
            "simulator",
            "missing: the plant simulator needs a [simulator] table (see config/demo-site.toml)",
        )
    return read_table(SimulatorSettings, site.simulator, site.path, "simulator")
