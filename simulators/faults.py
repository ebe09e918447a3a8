r"""Faults: what can go wrong with a transmitter, the analyzer or the jacket, and when.

An instrument fault acts on one measured signal (``temp``, ``jacket_temp`` or ``conc``) from
``start_s`` for ``duration_s`` of batch time. The kinds, and how a historian shows them:

=============  ==========================================================  =====================
kind           what the instrument does                                    in the historian CSV
=============  ==========================================================  =====================
``spikes``     some samples jump by ``size_std`` noise std, either sign;   a value far off,
               on average one every ``every_s`` seconds                    quality ``Good``
``dropout``    reports nothing                                             blank cells
``frozen``     repeats the last value it reported before the fault         one value repeated,
                                                                           quality ``Good``
``bad``        reports its measurement flagged ``BadSensorFailure``        the value, ``Bad...``
``uncertain``  reports its measurement flagged ``UncertainSensorNotAccurate``  ``Uncertain...``
``drift``      its calibration offset grows at ``rate_per_h`` (kg/kg       a slow offset,
               solvent per hour for ``conc``, K per hour for temperatures)  ``Good``
               and keeps what it gained after the fault ends
``nan``        reports not-a-number with quality ``Good`` (an analyzer     ``nan``, ``Good``
               whose calibration model could not predict)
``stuck-       keeps reporting its live value, but with the source         not visible: the CSV
timestamp``    timestamp of its last report before the fault (a gateway    has one timestamp
               or historian buffer that hangs)                             per row
``clock-       reports its live value with a source timestamp ``lag_s``    not visible, as
behind``       seconds behind (a gateway whose clock was set back)         above
=============  ==========================================================  =====================

When faults overlap on one signal, ``dropout`` wins over ``bad``, ``bad`` over ``nan``, ``nan``
over ``frozen``, and ``frozen`` over the rest. The two timestamp faults act only on the source
timestamp the OPC UA plant server publishes (:mod:`simulators.shell.server`), whatever the
value; ``stuck-timestamp`` wins over ``clock-behind``.

A process fault acts on the plant itself, its instruments reading true. There is one:

- ``cooling-open``: the jacket's cooling valve fails open. The jacket runs towards the coldest
  utility (the low end of ``thermal.jacket_setpoint_range_c``) whatever the temperature loop
  asks, through its own lag and rate limit; the loop keeps asking (its jacket setpoint is
  still what the DCS shows) and is obeyed again when the fault ends. Its signal is the jacket
  (``jacket_temp``, the default for it; no other is accepted).

On the command line (``sigmatrack simulate --faults SPEC``) faults are written

.. code-block:: text

    SPEC     = "none" | FAULT { ";" FAULT }
    FAULT    = KIND [ "/" SIGNAL ] "@" START "+" DURATION [ ":" OPTION { "," OPTION } ]
    START, DURATION = a number with a unit: 90s, 20min, 2.5h (a bare number is seconds)
    OPTION   = every_s=NUMBER | size_std=NUMBER | rate_per_h=NUMBER | lag_s=NUMBER

for example ``dropout@5h+10min; spikes@3h+1h:every_s=120; frozen/temp@6h+20min;
cooling-open@7h+30min``. The signal defaults to ``conc`` (for a process fault, to its part).
"""

from __future__ import annotations

import math
import re
import typing
from dataclasses import dataclass, field
from typing import Literal

from sensor.shell.tomlschema import Invalid, check, non_negative, positive
from simulators.errors import SimulatorError

FaultKind = Literal[
    "spikes",
    "dropout",
    "frozen",
    "bad",
    "uncertain",
    "drift",
    "nan",
    "stuck-timestamp",
    "clock-behind",
    "cooling-open",
]
FAULT_KINDS: tuple[str, ...] = typing.get_args(FaultKind)
PROCESS_FAULT_SIGNALS = {"cooling-open": "jacket_temp"}
"""The process faults, and the part of the plant each acts on (named by its measured signal)."""
FaultSignal = Literal["temp", "jacket_temp", "conc"]
FAULT_SIGNALS: tuple[str, ...] = ("temp", "jacket_temp", "conc")

_OPTIONS_OF_KIND = {
    "spikes": ("every_s", "size_std"),
    "drift": ("rate_per_h",),
    "clock-behind": ("lag_s",),
}
OPTIONS: tuple[str, ...] = ("every_s", "size_std", "rate_per_h", "lag_s")


@dataclass(frozen=True)
class Fault:
    """One fault of one instrument, in batch time.

    Parameters
    ----------
    kind : what goes wrong (see the module's table)
    start_s : when it starts, from the start of the batch [s]
    duration_s : how long it lasts [s]
    signal : the instrument: ``temp``, ``jacket_temp`` or ``conc`` (the analyzer; the
        default); for a process fault, the part it acts on (the default, the only one allowed)
    every_s : ``spikes`` only: mean time between spikes [s]
    size_std : ``spikes`` only: spike height in noise standard deviations [-]
    rate_per_h : ``drift`` only: growth of the calibration offset [kg/kg solvent per h] for
        ``conc``, [K/h] for temperatures; either sign
    lag_s : ``clock-behind`` only: how far the source timestamps lag [s]
    """

    kind: FaultKind
    start_s: float = field(metadata=check(non_negative))
    duration_s: float = field(metadata=check(positive))
    signal: FaultSignal | None = None
    every_s: float | None = field(default=None, metadata=check(positive))
    size_std: float | None = field(default=None, metadata=check(positive))
    rate_per_h: float | None = None
    lag_s: float | None = field(default=None, metadata=check(positive))

    def __post_init__(self) -> None:
        part = PROCESS_FAULT_SIGNALS.get(self.kind)
        if self.signal is None:
            object.__setattr__(self, "signal", part or "conc")
        elif part is not None and self.signal != part:
            raise Invalid("signal", f"a {self.kind!r} fault acts on {part!r} only")
        allowed = _OPTIONS_OF_KIND.get(self.kind, ())
        for option in OPTIONS:
            if getattr(self, option) is not None and option not in allowed:
                raise Invalid(option, f"does not apply to a {self.kind!r} fault")
        if self.kind == "drift" and self.rate_per_h is None:
            raise Invalid("rate_per_h", "needed by a 'drift' fault")
        if self.kind == "clock-behind" and self.lag_s is None:
            raise Invalid("lag_s", "needed by a 'clock-behind' fault")
        if self.kind == "spikes":
            object.__setattr__(self, "every_s", 60.0 if self.every_s is None else self.every_s)
            object.__setattr__(self, "size_std", 8.0 if self.size_std is None else self.size_std)

    @property
    def end_s(self) -> float:
        """When the fault ends [s] (exclusive)."""
        return self.start_s + self.duration_s

    def active(self, time_s: float) -> bool:
        """Whether the fault acts at ``time_s`` [s]: ``start_s <= time_s < end_s``."""
        return self.start_s <= time_s < self.end_s


_TIME_UNITS_S = {"s": 1.0, "min": 60.0, "h": 3600.0, "": 1.0}
_TIME = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*(s|min|h|)\s*$")
_FAULT = re.compile(
    r"^\s*(?P<kind>[a-z]+(?:-[a-z]+)*)(?:/(?P<signal>[a-z_]+))?\s*@(?P<start>[^+]+)\+(?P<duration>[^:]+)"
    r"(?::(?P<options>.*))?$"
)


def parse_duration_s(text: str, what: str) -> float:
    """``"90s"``, ``"20min"``, ``"2.5h"`` or a bare number of seconds, to seconds [s]."""
    match = _TIME.match(text)
    if match is None:
        raise SimulatorError(
            f"{what}: {text.strip()!r} is not a time; write a number with s, min or h (e.g. 90s, "
            "20min, 2.5h)"
        )
    return float(match.group(1)) * _TIME_UNITS_S[match.group(2)]


def _parse_one(text: str) -> Fault:
    match = _FAULT.match(text)
    where = f"--faults {text.strip()!r}"
    if match is None:
        raise SimulatorError(f"{where}: expected KIND[/SIGNAL]@START+DURATION[:OPTION=VALUE,...]")
    kind, signal = match.group("kind"), match.group("signal")
    if kind not in FAULT_KINDS:
        raise SimulatorError(
            f"{where}: unknown fault kind {kind!r}; known: {', '.join(FAULT_KINDS)}"
        )
    if signal is not None and signal not in FAULT_SIGNALS:
        raise SimulatorError(
            f"{where}: unknown signal {signal!r}; known: {', '.join(FAULT_SIGNALS)}"
        )
    options: dict[str, float] = {}
    for item in filter(None, (part.strip() for part in (match.group("options") or "").split(","))):
        name, _, value = item.partition("=")
        name = name.strip()
        if name not in OPTIONS:
            raise SimulatorError(f"{where}: unknown option {name!r}")
        try:
            number = float(value)
        except ValueError:
            raise SimulatorError(f"{where}: option {name} needs a number; got {value!r}") from None
        if not math.isfinite(number):
            raise SimulatorError(f"{where}: option {name} must be finite; got {value!r}")
        options[name] = number
    start = parse_duration_s(match.group("start"), f"{where}: start")
    duration = parse_duration_s(match.group("duration"), f"{where}: duration")
    if duration <= 0.0:
        raise SimulatorError(f"{where}: duration must be positive")
    for name in ("every_s", "size_std", "lag_s"):
        if name in options and options[name] <= 0.0:
            raise SimulatorError(f"{where}: option {name} must be positive")
    try:
        return Fault(kind, start, duration, signal, **options)  # type: ignore[arg-type]
    except Invalid as error:
        raise SimulatorError(f"{where}: {error.key}: {error.problem}") from None


def parse_fault_spec(text: str) -> tuple[Fault, ...]:
    """Parse a ``--faults`` text (the module's syntax); ``"none"`` or ``""`` gives no faults.

    Raises
    ------
    SimulatorError
        On any part that does not follow the syntax; the message quotes the part.

    Examples
    --------
    >>> [f.kind for f in parse_fault_spec("dropout@5h+10min; spikes/temp@3h+1h:every_s=120")]
    ['dropout', 'spikes']
    >>> parse_fault_spec("frozen@90s+20min")[0].end_s
    1290.0
    """
    if text.strip().lower() in ("", "none"):
        return ()
    return tuple(_parse_one(part) for part in text.split(";") if part.strip())


@dataclass(frozen=True)
class SignalFaults:
    """The faults of one signal, answering what acts at a given time."""

    faults: tuple[Fault, ...]

    def kinds_at(self, time_s: float) -> frozenset[str]:
        """The kinds of fault acting at ``time_s`` [s]."""
        return frozenset(f.kind for f in self.faults if f.active(time_s))

    def active(self, kind: str, time_s: float) -> tuple[Fault, ...]:
        """The faults of ``kind`` acting at ``time_s`` [s]."""
        return tuple(f for f in self.faults if f.kind == kind and f.active(time_s))


def faults_of(faults: tuple[Fault, ...], signal: str) -> SignalFaults:
    """The instrument faults that act on ``signal``."""
    return SignalFaults(
        tuple(f for f in faults if f.signal == signal and f.kind not in PROCESS_FAULT_SIGNALS)
    )


def process_faults(faults: tuple[Fault, ...], kind: str) -> SignalFaults:
    """The process faults of ``kind``."""
    return SignalFaults(tuple(f for f in faults if f.kind == kind))
