"""A toy seeded cooling crystallizer, written for the controller's tests, and the guard limits
the tests share.

It is a toy: invented numbers, first-order growth, no nucleation, one lump of crystals. It is
not the soft sensor's model and not the plant simulator; it only gives the controller's
protocols something with the right shape to answer (a rising solubility curve, a zone that widens
with the cooling rate, a forecast whose band widens with the growth constant's uncertainty).
Checks built on it test the controller's methods, not the science of crystallization.

Per kg of solvent: solubility :math:`c_{sat}(T) = c_r e^{\\beta (T - T_r)}`, crystal mass
:math:`M = M_s + c_0 - c`, growth :math:`dc/dt = -k_g (M/M_s)^{2/3} c_{sat} \\sigma`, metastable
limit :math:`\\sigma_{lim} = \\sigma_r (b/b_r)^{0.3}`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from controller.guard import GuardLimits

PER_MIN = 1.0 / 60.0

LIMITS = GuardLimits(
    setpoint_range_k=(273.15, 353.15),
    final_temp_k=283.15,
    max_cooling_rate_k_per_s=1.0 * PER_MIN,
    max_step_k=0.5,
    interval_s=30.0,
    proposal_phases=frozenset({"controlled-cooling", "dissolve-fines"}),
    heartbeat_period_s=10.0,
    max_heating_rate_k_per_s=2.0 * PER_MIN,
    heating_phases=frozenset({"dissolve-fines"}),
)
"""Guard limits shared by the guard's and the law's tests (a made-up heating phase,
``dissolve-fines``, stands for a fines-dissolution step)."""

REF_TEMP_K = 298.15
C_REF = 0.08  # kg/kg at REF_TEMP_K
BETA_PER_K = 0.035
DOMAIN_K = (270.0, 340.0)


@dataclass(frozen=True)
class ToySolubility:
    """Rising exponential solubility with an analytic inverse; NaN outside its domain."""

    c_ref: float = C_REF
    beta_per_k: float = BETA_PER_K
    domain_k: tuple[float, float] = DOMAIN_K

    def c_sat(self, temp_k):
        return self.c_ref * np.exp(self.beta_per_k * (np.asarray(temp_k, dtype=float) - REF_TEMP_K))

    def temp_sat(self, conc):
        conc = np.asarray(conc, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            temp = REF_TEMP_K + np.log(conc / self.c_ref) / self.beta_per_k
        lo, hi = self.domain_k
        return np.where((temp >= lo) & (temp <= hi), temp, np.nan)


@dataclass(frozen=True)
class ToyRetrograde(ToySolubility):
    """Falling solubility (retrograde), for the law's refusal."""

    beta_per_k: float = -BETA_PER_K


@dataclass(frozen=True)
class ToyZone:
    """Metastable limit that widens with the cooling rate (a Nývlt-like power law)."""

    sigma_ref: float = 0.12
    rate_ref_k_per_s: float = 0.5 / 60.0
    exponent: float = 0.3

    def sigma_limit(self, temp_k, rate_k_per_s):
        temp, rate = np.broadcast_arrays(
            np.asarray(temp_k, dtype=float), np.asarray(rate_k_per_s, dtype=float)
        )
        return self.sigma_ref * (rate / self.rate_ref_k_per_s) ** self.exponent + 0.0 * temp


@dataclass
class ToyCrystallizer:
    """State and kinetics of the toy; also a :class:`SigmaPredictor` bound to its state.

    ``growth_rel_std`` spreads the growth constant to make the forecast's band (three runs at
    ``k_g (1 - d), k_g, k_g (1 + d)``); ``std_floor`` adds a fixed part.
    """

    conc: float
    temp_k: float
    seed_mass: float = 0.01
    conc_start: float | None = None
    growth_per_s: float = 5e-4
    growth_rel_std: float = 0.3
    std_floor: float = 0.004
    substep_s: float = 30.0
    solubility: ToySolubility = field(default_factory=ToySolubility)
    calls: int = 0

    def __post_init__(self) -> None:
        if self.conc_start is None:
            self.conc_start = self.conc

    @property
    def sigma(self) -> float:
        return float(self.conc / self.solubility.c_sat(self.temp_k) - 1.0)

    def _rate(self, conc, temp_k, growth):
        c_sat = self.solubility.c_sat(temp_k)
        mass = np.maximum(self.seed_mass + self.conc_start - conc, 1e-9)
        return -growth * (mass / self.seed_mass) ** (2.0 / 3.0) * (conc - c_sat)

    def _integrate(self, times_s, temp_path_k, growth):
        """Concentration at ``times_s`` along each path (explicit midpoint rule, sub-steps of
        at most ``substep_s`` between consecutive output times)."""
        paths = np.atleast_2d(temp_path_k)
        knots = np.concatenate([[0.0], times_s])
        temps = np.column_stack([np.full(len(paths), self.temp_k), paths])
        counts = np.maximum(1, np.ceil(np.diff(knots) / self.substep_s - 1e-9).astype(int))
        # sub-step starts, and which output each sub-step ends on
        pieces = zip(knots[:-1], knots[1:], counts, strict=True)
        starts = np.concatenate([k0 + (k1 - k0) * np.arange(n) / n for k0, k1, n in pieces])
        ends = np.append(starts[1:], knots[-1])
        last_of_output = np.cumsum(counts) - 1
        # all paths share the knots: one set of interpolation weights for every row
        temp_start = _interp_columns(starts, knots, temps)
        temp_mid = _interp_columns(0.5 * (starts + ends), knots, temps)
        growth = np.asarray(growth, dtype=float).reshape(-1, 1)
        conc = np.full((growth.shape[0], len(paths)), self.conc)
        out = np.empty((growth.shape[0], len(paths), len(times_s)))
        output = 0
        for i, h in enumerate(ends - starts):
            k1 = self._rate(conc, temp_start[:, i], growth)
            conc = conc + h * self._rate(conc + 0.5 * h * k1, temp_mid[:, i], growth)
            if i == last_of_output[output]:
                out[:, :, output] = conc
                output += 1
        return out

    def predict_sigma(self, times_s, temp_path_k):
        self.calls += 1
        times_s = np.asarray(times_s, dtype=float)
        temp_path_k = np.asarray(temp_path_k, dtype=float)
        d = self.growth_rel_std
        growth = self.growth_per_s * np.array([1.0 - d, 1.0, 1.0 + d])
        conc = self._integrate(times_s, temp_path_k, growth)
        sigma = conc / self.solubility.c_sat(temp_path_k)[None] - 1.0
        mean = sigma[1]
        std = 0.5 * np.abs(sigma[0] - sigma[2]) + self.std_floor
        return mean, std

    def advance(self, duration_s: float, temp_end_k: float) -> None:
        """Move the toy plant: the reactor goes linearly to ``temp_end_k`` in ``duration_s``."""
        conc = self._integrate(np.array([duration_s]), np.array([[temp_end_k]]), self.growth_per_s)
        self.conc = float(conc[0, 0, 0])
        self.temp_k = temp_end_k


def _interp_columns(t, knots, rows):
    """Linear interpolation of each row of ``rows`` (given at ``knots``) at the times ``t``."""
    j = np.clip(np.searchsorted(knots, t, side="right") - 1, 0, len(knots) - 2)
    w = (t - knots[j]) / (knots[j + 1] - knots[j])
    return (1.0 - w) * rows[:, j] + w * rows[:, j + 1]


@dataclass
class ConstantForecast:
    """A predictor that forecasts the same sigma and std everywhere (for unit checks)."""

    mean: float
    std: float = 0.0
    calls: int = 0

    def predict_sigma(self, times_s, temp_path_k):
        self.calls += 1
        shape = np.shape(temp_path_k)
        return np.full(shape, self.mean), np.full(shape, self.std)
