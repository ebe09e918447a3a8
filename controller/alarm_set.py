"""The crystallizer's alarms: what each means, what to check, and the readings behind them.

:func:`crystallizer_alarms` defines the set; :func:`alarm_readings` turns one step's plain
inputs (:class:`AlarmInputs`: floats, flags and a phase name, filled by the integration from
the soft sensor's outputs) into the readings the :class:`~controller.alarms.AlarmEngine` steps
on. Supersaturation alarms read sigma as a fraction of the metastable limit at the current
temperature and cooling rate, so one deadband (a fraction of the limit) serves them all;
yes/no conditions read 1 or 0 against a limit of 0.5.

Priorities are this project's rationalization of the set (common practice: the consequence and
the time to respond decide the priority; a site's own alarm philosophy may change them).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from controller.alarms import AlarmDefinition, AlarmEngine, Direction, Priority
from controller.errors import SettingsError, check_fields

ADVISORY_NOTE = (
    "sigmatrack is advisory: it never drives a valve, a pump or the jacket. The DCS keeps the "
    "temperature loop and the recipe, and the safety instrumented system keeps protection. "
    "Respond by the site's operating procedures; where solvent, pressure or a fast-cooling "
    "jacket is involved, the plant's own alarms and trips come first."
)

PROCESS_PHASES = frozenset(
    {"cool-to-seed", "seed", "seed-hold", "controlled-cooling", "final-hold"}
)
"""Phases with a supersaturated solution to watch."""

GROWTH_PHASES = frozenset({"seed", "seed-hold", "controlled-cooling", "final-hold"})
"""Phases in which seed or product crystals are growing."""

BATCH_PHASES = frozenset({"heat", "dissolve"}) | PROCESS_PHASES
"""Phases in which the soft sensor is estimating (not idle, not discharging)."""

SEED_PHASES = frozenset({"cool-to-seed"})


@dataclass(frozen=True)
class AlarmSettings:
    """Limits and timing of the crystallizer's alarms.

    Parameters
    ----------
    sigma_high_fraction : "sigma high" at this fraction of the metastable limit [-]
    undersaturated_fraction : "undersaturated" when sigma is below minus this fraction of the
        metastable limit [-] (not at zero: near equilibrium, late in a batch, the estimate
        dithers about it, and a solution a few per cent of the zone undersaturated dissolves
        next to nothing)
    on_delay_s, off_delay_s : delays against chattering, for every alarm [s]
    deadband_fraction : hysteresis as a fraction of each alarm's limit [-] (for the sigma
        alarms, a fraction of the metastable limit)
    shelve_max_s : longest an operator may shelve an alarm [s]
    tracking_error_k : "temperature not following" beyond this difference from the advisor's
        setpoint [K]
    drift_limit_fraction : "analyzer drifting" when the estimated analyzer bias exceeds this
        fraction of the concentration [-]
    seed_window_fraction : sigma, as fractions of the metastable limit, between which the
        solution is ready for seed [-]
    heating_phases : dissolution phases, where undersaturation is intended
    """

    sigma_high_fraction: float = 0.8
    undersaturated_fraction: float = 0.1
    on_delay_s: float = 30.0
    off_delay_s: float = 60.0
    deadband_fraction: float = 0.05
    shelve_max_s: float = 8 * 3600.0
    tracking_error_k: float = 2.0
    drift_limit_fraction: float = 0.03
    seed_window_fraction: tuple[float, float] = (0.3, 0.6)
    heating_phases: frozenset[str] = frozenset()

    def __post_init__(self) -> None:
        fraction, positive = "must be in (0, 1)", "must be positive"
        check_fields(
            self,
            (
                ("sigma_high_fraction", 0.0 < self.sigma_high_fraction < 1.0, fraction),
                (
                    "undersaturated_fraction",
                    0.0 < self.undersaturated_fraction < 1.0,
                    fraction,
                ),
                ("deadband_fraction", 0.0 < self.deadband_fraction < 1.0, fraction),
                ("drift_limit_fraction", 0.0 < self.drift_limit_fraction < 1.0, fraction),
                ("on_delay_s", self.on_delay_s >= 0.0, "must be 0 or more"),
                ("off_delay_s", self.off_delay_s >= 0.0, "must be 0 or more"),
                ("shelve_max_s", self.shelve_max_s > 0.0, positive),
                ("tracking_error_k", self.tracking_error_k > 0.0, positive),
            ),
        )
        low, high = self.seed_window_fraction
        if not 0.0 < low < high < 1.0:
            raise SettingsError(
                type(self).__name__,
                "seed_window_fraction",
                f"must be 0 < low < high < 1; got {low, high}",
            )


@dataclass(frozen=True)
class AlarmInputs:
    """One step's inputs to the alarms, in SI.

    Parameters
    ----------
    phase : the batch phase (our phase name)
    sigma : estimated relative supersaturation [-]
    sigma_limit : relative supersaturation at the metastable limit at the current temperature
        and cooling rate [-]
    temp_k : reactor temperature [K]
    setpoint_k : the advisor's setpoint the DCS is using [K]; NaN when none is in use
    conc : estimated concentration [kg/kg solvent]
    analyzer_bias : the soft sensor's estimate of the analyzer's bias [kg/kg solvent]
    analyzer_stale, analyzer_frozen, analyzer_bad : the tag checks' verdicts on the analyzer
    estimate_inconsistent : the windowed NIS test fails
    solubility_extrapolated : the solubility curve is used outside its trusted range
    communication_lost : the link to the DCS is down
    """

    phase: str
    sigma: float
    sigma_limit: float
    temp_k: float
    setpoint_k: float
    conc: float
    analyzer_bias: float
    analyzer_stale: bool
    analyzer_frozen: bool
    analyzer_bad: bool
    estimate_inconsistent: bool
    solubility_extrapolated: bool
    communication_lost: bool


def crystallizer_alarms(settings: AlarmSettings) -> tuple[AlarmDefinition, ...]:
    """The alarm set, with its limits, delays, phases and help texts."""
    s = settings
    delays = {"on_delay_s": s.on_delay_s, "off_delay_s": s.off_delay_s}

    def high(limit: float, deadband: float) -> dict:
        return {"direction": Direction.HIGH, "limit": limit, "deadband": deadband, **delays}

    flag = high(0.5, 0.0)
    growth = GROWTH_PHASES - s.heating_phases
    return (
        AlarmDefinition(
            "sigma-high",
            Priority.MEDIUM,
            applies_in=PROCESS_PHASES,
            meaning=(
                f"Supersaturation is approaching the metastable limit (above "
                f"{s.sigma_high_fraction:.0%} of it). If it keeps rising, the solution may "
                "nucleate a shower of fine crystals."
            ),
            response=(
                "Check that the jacket follows the setpoint and that the analyzer reads "
                "plausibly. Slower cooling, or a hold, lets the crystals take up the excess: "
                "decide it in the DCS by the site's procedure."
            ),
            **high(s.sigma_high_fraction, s.deadband_fraction),
        ),
        AlarmDefinition(
            "sigma-high-high",
            Priority.HIGH,
            applies_in=PROCESS_PHASES,
            meaning=(
                "Supersaturation is at or beyond the metastable limit: nucleation is likely "
                "now (fines, encrustation on the cold walls, a wider size distribution)."
            ),
            response=(
                "Confirm with the analyzer and any particle or turbidity probe. Stop the "
                "cooling in the DCS as the recipe prescribes; check the jacket, the seed "
                "charge and the lab data behind the solubility curve and the zone."
            ),
            **high(1.0, s.deadband_fraction),
        ),
        AlarmDefinition(
            "undersaturated",
            Priority.MEDIUM,
            direction=Direction.LOW,
            limit=-s.undersaturated_fraction,
            deadband=s.deadband_fraction,
            applies_in=growth,
            meaning=(
                "The solution is estimated undersaturated while crystals should be growing "
                f"(sigma below -{s.undersaturated_fraction:.0%} of the metastable limit): "
                "the seed, or the product, is dissolving."
            ),
            response=(
                "Check the reactor temperature against the recipe (is the batch warmer than "
                "planned?), the analyzer and its calibration, and that the seed was charged."
            ),
            **delays,
        ),
        AlarmDefinition(
            "seed-window",
            Priority.LOW,
            applies_in=SEED_PHASES,
            meaning=(
                "A prompt, not a fault: supersaturation has entered the seeding window "
                f"({s.seed_window_fraction[0]:.0%} to {s.seed_window_fraction[1]:.0%} of the "
                "metastable limit); the solution is ready for the seed charge."
            ),
            response="Confirm with the recipe and the analyzer, then seed by the procedure.",
            **flag,
        ),
        AlarmDefinition(
            "analyzer-stale",
            Priority.MEDIUM,
            applies_in=BATCH_PHASES,
            meaning=(
                "No fresh concentration reading has come for longer than allowed: the "
                "supersaturation shown is a forecast, drifting away from the plant."
            ),
            response=(
                "Check the analyzer's status, its probe or sample line, and the path of its "
                "signal to the DCS."
            ),
            **flag,
        ),
        AlarmDefinition(
            "analyzer-frozen",
            Priority.MEDIUM,
            applies_in=BATCH_PHASES,
            meaning=(
                "The concentration reading has not moved for longer than allowed: the "
                "analyzer may be stuck, or holding its last value."
            ),
            response="Check whether the analyzer is in hold or maintenance mode, and its probe.",
            **flag,
        ),
        AlarmDefinition(
            "analyzer-bad",
            Priority.MEDIUM,
            applies_in=BATCH_PHASES,
            meaning=(
                "The analyzer reports bad quality, or a value outside its range: its readings "
                "are kept out of the estimate."
            ),
            response=(
                "Check the analyzer's diagnostics, the probe (fouling, bubbles, solids on the "
                "window) and the range of its calibration."
            ),
            **flag,
        ),
        AlarmDefinition(
            "analyzer-drift",
            Priority.LOW,
            applies_in=BATCH_PHASES,
            meaning=(
                "The soft sensor estimates that the analyzer reads off by more than "
                f"{s.drift_limit_fraction:.0%} of the concentration: a drifting calibration or "
                "a fouled probe."
            ),
            response="Compare with a lab sample; check the calibration model and the probe.",
            **high(s.drift_limit_fraction, s.deadband_fraction * s.drift_limit_fraction),
        ),
        AlarmDefinition(
            "estimate-inconsistent",
            Priority.MEDIUM,
            applies_in=BATCH_PHASES,
            meaning=(
                "The measurements disagree with the soft sensor's model by more than its own "
                "uncertainty allows (the NIS test fails): the estimate and the advice cannot "
                "be trusted now, and the advisor steps aside."
            ),
            response=(
                "Check the analyzer and the temperature transmitters; check whether this batch "
                "differs from the model (seed, solvent ratio, impurities)."
            ),
            **flag,
        ),
        AlarmDefinition(
            "temperature-not-following",
            Priority.MEDIUM,
            applies_in=BATCH_PHASES,
            meaning=(
                f"The reactor temperature is more than {s.tracking_error_k:g} K from the "
                "advisor's setpoint: the temperature loop is not following the proposal."
            ),
            response=(
                "Check the jacket (utility temperature and flow, valve position), the "
                "temperature controller's mode, and whether the DCS has taken the setpoint."
            ),
            **high(s.tracking_error_k, s.deadband_fraction * s.tracking_error_k),
        ),
        AlarmDefinition(
            "solubility-extrapolated",
            Priority.MEDIUM,
            applies_in=BATCH_PHASES,
            meaning=(
                "The solubility curve is used outside the temperatures its lab data cover: the "
                "supersaturation shown is uncertain, and the advisor stops proposing."
            ),
            response=(
                "Check that the batch is in its expected temperature range; if the process "
                "needs this range, extend the lab solubility data."
            ),
            **flag,
        ),
        AlarmDefinition(
            "communication-lost",
            Priority.HIGH,
            meaning=(
                "The link to the DCS is lost or not answering: sigmatrack can neither read the "
                "plant nor send its heartbeat and advice."
            ),
            response=(
                "Check the network, the OPC UA server and the sigmatrack service. The DCS "
                "should have dropped the permissive and gone back to its recipe: confirm it."
            ),
            **flag,
        ),
    )


def crystallizer_alarm_engine(settings: AlarmSettings) -> AlarmEngine:
    """An engine holding :func:`crystallizer_alarms`."""
    return AlarmEngine(crystallizer_alarms(settings), shelve_max_s=settings.shelve_max_s)


def help_text(definition: AlarmDefinition) -> str:
    """What an operator reads for an alarm: what it means, what to check, and the advisory
    nature of sigmatrack."""
    return f"{definition.meaning}\nWhat to check: {definition.response}\n{ADVISORY_NOTE}"


def alarm_readings(inputs: AlarmInputs, settings: AlarmSettings) -> dict[str, float]:
    """The reading of every alarm of :func:`crystallizer_alarms` for one step.

    Sigma is read as a fraction of the metastable limit; NaN (the condition left as it was)
    where the limit is not a positive number or sigma is not a number.
    """
    limit = inputs.sigma_limit
    ratio = inputs.sigma / limit if math.isfinite(limit) and limit > 0.0 else math.nan
    low, high = settings.seed_window_fraction
    in_window = float(low <= ratio <= high) if math.isfinite(ratio) else math.nan
    drift = math.nan
    if math.isfinite(inputs.conc) and inputs.conc > 0.0:
        drift = abs(inputs.analyzer_bias) / inputs.conc
    tracking = 0.0
    if math.isfinite(inputs.setpoint_k):
        tracking = abs(inputs.temp_k - inputs.setpoint_k)
    return {
        "sigma-high": ratio,
        "sigma-high-high": ratio,
        "undersaturated": ratio,
        "seed-window": in_window,
        "analyzer-stale": float(inputs.analyzer_stale),
        "analyzer-frozen": float(inputs.analyzer_frozen),
        "analyzer-bad": float(inputs.analyzer_bad),
        "analyzer-drift": drift,
        "estimate-inconsistent": float(inputs.estimate_inconsistent),
        "temperature-not-following": tracking,
        "solubility-extrapolated": float(inputs.solubility_extrapolated),
        "communication-lost": float(inputs.communication_lost),
    }
