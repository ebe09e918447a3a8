"""Tag validation: every reading is checked before it may reach the filter, and a rejected one is
reported with its reason.

Rules, in the order they are applied (the first that fails names the reason):

==================  ==========================================================================
reason              rule
==================  ==========================================================================
``not-finite``      the value is NaN or infinite
``bad-quality``     the OPC UA StatusCode's severity is Bad
``uncertain``       its severity is Uncertain (unless the site accepts Uncertain values)
``stale``           the sample's time minus the reading's source time exceeds ``stale_after_s``
``out-of-range``    the value is outside the configured range
``frozen``          the value has not changed (exactly) for ``frozen_after_s`` or longer: a
                    flat-lined transmitter or a held analyzer output
``rate-of-change``  the change since a reference reading is more than ``max_rate`` times the
                    time since then plus the noise allowance ``spike_delta``; the reference
                    moves to the latest accepted reading every ``rate_window_s`` (so noise on
                    fast samples cannot trip it, and a drift faster than ``max_rate`` does;
                    reactor temperature only)
``spike``           the value jumps from the last accepted one by more than ``spike_delta``; a
                    second value that agrees with the first (within ``spike_delta``) confirms a
                    real step and is accepted, so a step costs one sample and a spike is dropped
==================  ==========================================================================

(Common practice for soft-sensor input screening; the thresholds come from the site file.)

The rules keep a small state per signal (last value, when it last changed, last accepted value).
They are compiled with numba and called once per reading, by the live path and inside the replay
kernel alike, so both apply exactly the same screening.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import IntEnum

import numba
import numpy as np

from sensor.numerics import FloatArray


class Reason(IntEnum):
    """Why a reading, or an update, did not reach the filter (0: it did)."""

    ACCEPTED = 0
    NOT_FINITE = 1
    BAD_QUALITY = 2
    UNCERTAIN = 3
    STALE = 4
    OUT_OF_RANGE = 5
    FROZEN = 6
    RATE_OF_CHANGE = 7
    SPIKE = 8
    GATED = 9
    """the filter's innovation gate refused it (an outlier against the model)"""
    BEFORE_HISTORY = 10
    """an analyzer value drawn before the filter's history (or its start)"""
    MISSING = 11
    """nothing arrived for this tag at this instant"""

    @property
    def label(self) -> str:
        """The reason as written in outputs (``bad-quality``, ``spike``, ...)."""
        return self.name.lower().replace("_", "-")


REASON_LABELS = tuple(r.label for r in Reason)
"""Labels indexed by reason code."""

# Indices into a rule vector.
R_LOW, R_HIGH, R_MAX_RATE, R_SPIKE, R_STALE, R_FROZEN, R_ACCEPT_UNCERTAIN = range(7)
R_RATE_WINDOW = 7
N_RULES = 8
# Indices into a signal's state vector.
S_HAS_RAW, S_RAW, S_CHANGED_AT, S_HAS_ACCEPTED, S_ACCEPTED, S_ACCEPTED_AT = range(6)
S_PENDING, S_PENDING_VALUE, S_REFERENCE, S_REFERENCE_AT = 6, 7, 8, 9
N_STATE = 10


@dataclass(frozen=True)
class SignalRules:
    """Thresholds for one signal, in sigmatrack's units.

    Parameters
    ----------
    low, high : accepted range [K or kg/kg]
    max_rate_per_s : fastest accepted change [unit/s]; ``inf`` to skip the rule
    spike_delta : largest accepted jump between accepted values [unit], also the rate rule's
        noise allowance; ``inf`` to skip both rules
    rate_window_s : how often the rate rule's reference moves on [s]
    stale_after_s : oldest accepted source age [s]
    frozen_after_s : longest accepted run of identical values [s]
    accept_uncertain : let Uncertain StatusCodes through
    """

    low: float
    high: float
    max_rate_per_s: float = math.inf
    spike_delta: float = math.inf
    stale_after_s: float = 120.0
    frozen_after_s: float = 300.0
    accept_uncertain: bool = False
    rate_window_s: float = 60.0

    def __post_init__(self) -> None:
        if not self.low < self.high:
            raise ValueError(f"range must be low < high; got [{self.low}, {self.high}]")
        for name in (
            "max_rate_per_s",
            "spike_delta",
            "stale_after_s",
            "frozen_after_s",
            "rate_window_s",
        ):
            if not getattr(self, name) > 0.0:
                raise ValueError(f"{name} must be positive; got {getattr(self, name)}")

    def vector(self) -> FloatArray:
        """The packed rule vector the compiled :func:`check_reading` takes."""
        rules = np.zeros(N_RULES)
        rules[R_LOW] = self.low
        rules[R_HIGH] = self.high
        rules[R_MAX_RATE] = self.max_rate_per_s
        rules[R_SPIKE] = self.spike_delta
        rules[R_STALE] = self.stale_after_s
        rules[R_FROZEN] = self.frozen_after_s
        rules[R_ACCEPT_UNCERTAIN] = 1.0 if self.accept_uncertain else 0.0
        rules[R_RATE_WINDOW] = self.rate_window_s
        return rules


def new_signal_state() -> FloatArray:
    """A signal's validation state before its first reading."""
    return np.zeros(N_STATE)


@numba.njit(cache=True)
def check_reading(
    state: FloatArray,
    time_s: float,
    value: float,
    severity: int,
    source_time_s: float,
    rules: FloatArray,
) -> int:
    """Check one reading against ``rules``, update the signal's ``state``, return the
    :class:`Reason` code (0: accepted).

    Parameters
    ----------
    state : the signal's state (``new_signal_state()``), updated in place
    time_s : the sample's time [s]
    value : the reading [K or kg/kg]
    severity : its StatusCode's severity (0 Good, 1 Uncertain, 2 Bad)
    source_time_s : its source time [s] (NaN: unknown, taken as ``time_s``)
    rules : the packed :class:`SignalRules`
    """
    if not math.isfinite(value):
        return 1
    changed = state[S_HAS_RAW] < 0.5 or value != state[S_RAW]
    if changed:
        state[S_CHANGED_AT] = time_s
    state[S_HAS_RAW] = 1.0
    state[S_RAW] = value
    if severity >= 2:
        return 2
    if severity == 1 and rules[R_ACCEPT_UNCERTAIN] < 0.5:
        return 3
    if math.isfinite(source_time_s) and time_s - source_time_s > rules[R_STALE]:
        return 4
    if value < rules[R_LOW] or value > rules[R_HIGH]:
        return 5
    if time_s - state[S_CHANGED_AT] >= rules[R_FROZEN]:
        return 6
    if state[S_HAS_ACCEPTED] > 0.5:
        drift = abs(value - state[S_REFERENCE])
        allowed = rules[R_MAX_RATE] * (time_s - state[S_REFERENCE_AT]) + rules[R_SPIKE]
        if drift > allowed:
            return 7
        jump = abs(value - state[S_ACCEPTED])
        if jump > rules[R_SPIKE]:
            confirmed = (
                state[S_PENDING] > 0.5 and abs(value - state[S_PENDING_VALUE]) <= rules[R_SPIKE]
            )
            if not confirmed:
                state[S_PENDING] = 1.0
                state[S_PENDING_VALUE] = value
                return 8
    state[S_PENDING] = 0.0
    if state[S_HAS_ACCEPTED] < 0.5 or time_s - state[S_REFERENCE_AT] >= rules[R_RATE_WINDOW]:
        state[S_REFERENCE] = value
        state[S_REFERENCE_AT] = time_s
    state[S_HAS_ACCEPTED] = 1.0
    state[S_ACCEPTED] = value
    state[S_ACCEPTED_AT] = time_s
    return 0
