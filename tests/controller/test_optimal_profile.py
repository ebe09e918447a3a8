"""The offline optimised profile, on the toy crystallizer (tests/controller/toys.py).

A method check on a toy: for this toy (first-order growth on a growing crystal surface, no
nucleation) the shortest batch under a cap on sigma cools at the maximum rate until sigma
reaches the cap, then holds sigma exactly at the cap (the cap is the only active constraint and
a higher sigma only ever shortens the batch). That oracle is computed here independently, by
quadrature of the toy's balance along sigma = cap, and the optimiser must come close to it
from above. Its starting point, the shortest constant ramp under the cap, must be clearly
beaten.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.integrate import quad

from controller.errors import PlanError, SettingsError
from controller.optimal_profile import PlanSettings, minimum_time_profile
from tests.controller.toys import BETA_PER_K, ConstantForecast, ToyCrystallizer, ToySolubility

SOLUBILITY = ToySolubility()
START_K, FINAL_K = 323.15, 283.15
CAP = 0.05
SETTINGS = PlanSettings(
    sigma_max=CAP, max_cooling_rate_k_per_s=1.0 / 60.0, max_duration_s=24 * 3600.0
)


def _toy(**changes) -> ToyCrystallizer:
    toy = ToyCrystallizer(
        conc=float(SOLUBILITY.c_sat(START_K)) * 1.02,
        temp_k=START_K,
        growth_rel_std=0.0,
        std_floor=0.0,
    )
    return replace(toy, **changes)


def _oracle_s(toy: ToyCrystallizer) -> float:
    """Shortest batch under the cap for the toy: maximum rate, then sigma = cap."""
    rate = SETTINGS.max_cooling_rate_k_per_s
    fine = replace(toy, substep_s=1.0)
    times = np.arange(1.0, 3600.0)
    mean, _ = fine.predict_sigma(times, START_K - rate * times[None, :])
    first = int(np.argmax(mean[0] >= CAP))
    assert first > 0
    t1 = float(np.interp(CAP, mean[0, first - 1 : first + 1], times[first - 1 : first + 1]))
    temp1 = START_K - rate * t1
    conc1 = float(SOLUBILITY.c_sat(temp1)) * (1.0 + CAP)
    conc_final = float(SOLUBILITY.c_sat(FINAL_K)) * (1.0 + CAP)

    def area(conc):
        return ((toy.seed_mass + toy.conc_start - conc) / toy.seed_mass) ** (2.0 / 3.0)

    # On sigma = cap: dc/dt = -k_g A(c) c_sat cap, c_sat = c / (1 + cap).
    def dt_dc(conc):
        return 1.0 / (toy.growth_per_s * area(conc) * conc * CAP / (1.0 + CAP))

    t2, _ = quad(dt_dc, conc_final, conc1, epsabs=1e-6)
    # The arc is only feasible if it never needs cooling faster than the limit:
    # dT/dt = (dc/dt) / (beta c) on the arc.
    fastest = toy.growth_per_s * area(conc_final) * CAP / (1.0 + CAP) / BETA_PER_K
    assert fastest < rate
    return t1 + t2


@pytest.fixture(scope="module")
def plan():
    return minimum_time_profile(_toy(), START_K, FINAL_K, SETTINGS)


def test_the_optimised_profile_is_near_the_oracle_and_well_under_a_linear_ramp(plan):
    result = plan
    oracle = _oracle_s(_toy())
    profile = result.profile
    assert result.peak <= CAP
    assert profile.temp_k[0] == START_K
    assert profile.temp_k[-1] == pytest.approx(FINAL_K, abs=1e-9)
    assert np.all(profile.cooling_rate_k_per_s() <= SETTINGS.max_cooling_rate_k_per_s * 1.000001)
    # Eight straight segments cannot follow the oracle's curve exactly; 10 % is the allowance.
    assert 0.99 * oracle <= profile.duration_s <= 1.10 * oracle
    assert profile.duration_s <= 0.6 * result.linear_duration_s
    # Check the peak on a grid finer than the optimiser's own (its cap holds between points).
    times = np.linspace(0.0, 1.1 * profile.duration_s, 2000)[1:]
    mean, _ = _toy(substep_s=10.0).predict_sigma(times, profile.temp_at(times)[None, :])
    assert mean.max() <= CAP * 1.005


def test_a_plan_made_on_too_coarse_a_grid_is_caught_and_still_meets_the_cap():
    # Two forecast points per segment let SLSQP cross the cap between them (it finds a batch
    # shorter than the oracle's); the check on the fine grid must refuse that answer.
    coarse = replace(SETTINGS, segments=4, points_per_segment=2)
    result = minimum_time_profile(_toy(), START_K, FINAL_K, coarse)
    assert result.peak <= CAP
    assert result.profile.duration_s > _oracle_s(_toy())
    times = np.linspace(0.0, 1.1 * result.profile.duration_s, 2000)[1:]
    mean, _ = _toy(substep_s=10.0).predict_sigma(times, result.profile.temp_at(times)[None, :])
    assert mean.max() <= CAP * 1.005


def test_the_shortest_linear_ramp_just_meets_the_cap(plan):
    linear = plan.linear_duration_s
    times = np.linspace(0.0, 1.3 * linear, 1500)[1:]
    paths = START_K - (START_K - FINAL_K) * np.minimum(
        times[None, :] / np.array([[0.97 * linear], [linear]]), 1.0
    )
    peaks = _toy(substep_s=10.0).predict_sigma(times, paths)[0].max(axis=1)
    assert peaks[0] > CAP
    assert peaks[1] <= CAP * 1.002


def test_a_wider_band_with_k_above_zero_gives_a_longer_plan():
    # Coarser toy and fewer segments: only the two plans are compared.
    toy = _toy(growth_rel_std=0.3, substep_s=60.0)
    quick = replace(SETTINGS, segments=5)
    plain = minimum_time_profile(toy, START_K, FINAL_K, quick)
    careful = minimum_time_profile(toy, START_K, FINAL_K, replace(quick, confidence_k=2.0))
    assert careful.profile.duration_s > 1.1 * plain.profile.duration_s
    assert careful.peak <= CAP


def test_no_plan_when_even_the_slowest_ramp_crosses_the_cap():
    with pytest.raises(PlanError, match=r"not even a 24 h linear ramp keeps the forecast under"):
        minimum_time_profile(ConstantForecast(0.2), START_K, FINAL_K, SETTINGS)


def test_no_plan_when_the_drop_cannot_be_made_in_the_time_allowed():
    with pytest.raises(PlanError, match=r"takes longer than max_duration_s = 600 s"):
        minimum_time_profile(_toy(), START_K, FINAL_K, replace(SETTINGS, max_duration_s=600.0))


def test_a_forecast_that_is_not_a_number_stops_the_plan():
    with pytest.raises(PlanError, match=r"the forecast along a trial profile is not a number"):
        minimum_time_profile(ConstantForecast(math.nan), START_K, FINAL_K, SETTINGS)


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"sigma_max": 0.0}, r"PlanSettings\.sigma_max: must be positive; got 0\.0"),
        ({"segments": 1}, r"PlanSettings\.segments: must be at least 2"),
        ({"confidence_k": math.nan}, r"PlanSettings\.confidence_k: must be 0 or more; got nan"),
    ],
)
def test_impossible_plan_settings_are_refused_by_name(changes, message):
    with pytest.raises(SettingsError, match=message):
        replace(SETTINGS, **changes)


def test_the_final_temperature_must_be_below_the_start():
    with pytest.raises(SettingsError, match=r"minimum_time_profile\.final_temp_k: must be below"):
        minimum_time_profile(_toy(), START_K, START_K + 1.0, SETTINGS)
