"""The setpoint law, alone, on toy callables (tests/controller/toys.py).

The toys are toys: these checks test the law's method (direct design, the chance-constrained
choice of rate, holds, the dissolution step, refusals), not crystallization. The direct-design
check is against the closed-form inverse of the toy's solubility curve; the closed-loop check at
the end runs the law against the toy plant that its forecast is made from (no mismatch: the
closed loop with mismatch is the next phase's, on the plant simulator).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.errors import ControllerError, SettingsError
from controller.guard import Fallback
from controller.law import (
    LawInputs,
    LawMode,
    LawSettings,
    SetpointLaw,
    direct_design_setpoint_k,
    forecast_margin,
    ramp_paths_k,
)
from tests.controller.toys import (
    BETA_PER_K,
    C_REF,
    LIMITS,
    PER_MIN,
    REF_TEMP_K,
    ConstantForecast,
    ToyCrystallizer,
    ToyRetrograde,
    ToySolubility,
    ToyZone,
)

SETTINGS = LawSettings(
    target_fraction=0.5,
    confidence_k=2.0,
    horizon_s=1200.0,
    interval_s=30.0,
    target_zone_rate_k_per_s=0.3 * PER_MIN,
    zone_min_rate_k_per_s=0.05 * PER_MIN,
)
SOLUBILITY = ToySolubility()
ZONE = ToyZone()
TARGET = 0.5 * float(ZONE.sigma_limit(320.0, 0.3 * PER_MIN))
HOLD_RATE = replace(LIMITS, fallback=Fallback.HOLD_RATE)
"""With ``hold-rate`` the check's paths are constant ramps over the whole horizon (the guard
may keep the rate that long): the toy's forecast binds on them."""


def _law(settings=SETTINGS, limits=LIMITS, solubility=SOLUBILITY) -> SetpointLaw:
    return SetpointLaw(settings, limits, solubility, ZONE)


def _inputs(predictor, *, temp_k=320.0, sigma=0.0, setpoint_k=None, **changes) -> LawInputs:
    conc = float(SOLUBILITY.c_sat(temp_k)) * (1.0 + sigma)
    base = LawInputs(
        time_s=0.0,
        phase="controlled-cooling",
        temp_k=temp_k,
        setpoint_k=temp_k if setpoint_k is None else setpoint_k,
        conc=conc,
        predictor=predictor,
    )
    return replace(base, **changes)


def test_direct_design_inverts_the_solubility_curve_at_c_over_1_plus_target():
    # The toy's inverse in closed form: T = T_r + ln(c / c_r) / beta.
    conc = np.array([0.10, 0.15, 0.20])
    target = np.array([0.02, 0.05, -0.05])
    expected = REF_TEMP_K + np.log(conc / (1.0 + target) / C_REF) / BETA_PER_K
    got = direct_design_setpoint_k(conc, target, SOLUBILITY)
    np.testing.assert_allclose(got, expected, rtol=0.0, atol=1e-10)


def test_tracking_proposes_the_direct_design_setpoint_when_it_is_within_reach():
    # Sigma a little below target, forecast far below the limit: the law goes straight to T_dd.
    inputs = _inputs(ConstantForecast(0.0), sigma=TARGET - 0.002)
    proposal = _law().propose(inputs)
    expected = float(direct_design_setpoint_k(inputs.conc, TARGET, SOLUBILITY))
    assert proposal.mode is LawMode.TRACKING
    assert proposal.sigma_target == pytest.approx(TARGET, rel=1e-12)
    assert proposal.direct_design_k == pytest.approx(expected, abs=1e-9)
    assert proposal.setpoint_k == pytest.approx(expected, abs=1e-9)
    assert 0.0 < proposal.cooling_rate_k_per_s < LIMITS.max_cooling_rate_k_per_s
    assert proposal.forecast_margin > 0.0


def test_far_below_target_it_cools_at_the_maximum_rate():
    proposal = _law().propose(_inputs(ConstantForecast(0.0), sigma=0.0))
    assert proposal.mode is LawMode.AT_MAX_RATE
    assert proposal.cooling_rate_k_per_s == pytest.approx(LIMITS.max_cooling_rate_k_per_s)
    assert proposal.setpoint_k == pytest.approx(320.0 - 0.5, abs=1e-9)


def test_at_or_above_target_it_holds_and_never_heats():
    proposal = _law().propose(_inputs(ConstantForecast(0.0), sigma=TARGET + 0.01))
    assert proposal.mode is LawMode.HOLD_ABOVE_TARGET
    assert proposal.setpoint_k == 320.0
    assert proposal.cooling_rate_k_per_s == 0.0
    assert proposal.direct_design_k > 320.0


def test_it_holds_when_not_even_a_hold_keeps_the_forecast_under_the_limit():
    too_high = 2.0 * float(ZONE.sigma_limit(320.0, LIMITS.max_cooling_rate_k_per_s))
    proposal = _law().propose(_inputs(ConstantForecast(too_high), sigma=0.0))
    assert proposal.mode is LawMode.HOLD_FORECAST
    assert proposal.setpoint_k == 320.0
    assert proposal.forecast_margin < 0.0


def _toy(sigma=0.02, temp_k=320.0, **changes) -> ToyCrystallizer:
    conc = float(SOLUBILITY.c_sat(temp_k)) * (1.0 + sigma)
    return ToyCrystallizer(conc=conc, temp_k=temp_k, **changes)


def test_ramps_stop_at_the_floor_and_are_judged_there_at_the_slowest_zone_rate():
    times = np.array([30.0, 60.0, 90.0])
    rates = np.array([0.0, 1.0 / 60.0])
    paths, point_rates = ramp_paths_k(284.0, 283.15, rates, times)
    np.testing.assert_allclose(paths, [[284.0] * 3, [283.5, 283.15, 283.15]], atol=1e-12)
    np.testing.assert_array_equal(point_rates, [[0.0] * 3, [1.0 / 60.0, 0.0, 0.0]])
    # Below the floor already: stays put (no heating), and counts as stopped.
    low, low_rates = ramp_paths_k(282.0, 283.15, rates, times)
    assert np.all(low == 282.0)
    assert np.all(low_rates == 0.0)
    # The margin: the zone at the point's rate, or at b_min where the ramp has stopped.
    margin = forecast_margin(
        ConstantForecast(0.01, 0.005),
        ZONE,
        times,
        paths,
        point_rates,
        confidence_k=2.0,
        zone_min_rate_k_per_s=SETTINGS.zone_min_rate_k_per_s,
    )
    at_min = float(ZONE.sigma_limit(283.15, SETTINGS.zone_min_rate_k_per_s))
    np.testing.assert_allclose(margin, [at_min - 0.02, at_min - 0.02], rtol=1e-12)


def test_ramps_kept_for_a_while_then_held():
    times = np.array([30.0, 60.0, 90.0])
    rates = np.array([0.0, 1.0 / 60.0])
    paths, point_rates = ramp_paths_k(300.0, 283.15, rates, times, ramp_s=60.0)
    np.testing.assert_allclose(paths, [[300.0] * 3, [299.5, 299.0, 299.0]], atol=1e-12)
    np.testing.assert_array_equal(point_rates, [[0.0] * 3, [1.0 / 60.0, 0.0, 0.0]])


def test_with_the_recipe_fallback_the_check_keeps_a_rate_one_interval_then_holds():
    # The law proposes again at the next update, a hold among its choices: only the next
    # interval is committed. The same toy binds a rate kept over the whole horizon.
    assert _law().ramp_s == SETTINGS.interval_s
    assert _law(limits=HOLD_RATE).ramp_s == math.inf
    toy = _toy()
    committed = _law().propose(_inputs(toy, sigma=toy.sigma))
    toy = _toy()
    kept = _law(limits=HOLD_RATE).propose(_inputs(toy, sigma=toy.sigma))
    assert kept.mode is LawMode.LIMITED_BY_FORECAST
    assert committed.mode is LawMode.AT_MAX_RATE
    assert committed.cooling_rate_k_per_s > kept.cooling_rate_k_per_s
    assert committed.forecast_margin >= 0.0


def test_the_chosen_rate_passes_and_a_faster_one_fails():
    toy = _toy()
    law = _law(limits=HOLD_RATE)
    proposal = law.propose(_inputs(toy, sigma=toy.sigma))
    assert proposal.mode is LawMode.LIMITED_BY_FORECAST
    assert proposal.forecast_margin >= 0.0
    # The grid is 8 steps of the maximum rate, refined once into 9: the resolution is
    # r_max / 8 / 9.
    resolution = LIMITS.max_cooling_rate_k_per_s / 8 / 9
    times = SETTINGS.interval_s * np.arange(1.0, 41.0)
    faster = np.array([proposal.cooling_rate_k_per_s + resolution])
    margin = forecast_margin(
        _toy(),
        ZONE,
        times,
        *ramp_paths_k(320.0, LIMITS.final_temp_k, faster, times),
        confidence_k=SETTINGS.confidence_k,
        zone_min_rate_k_per_s=SETTINGS.zone_min_rate_k_per_s,
    )
    assert margin[0] < 0.0
    assert toy.calls == 2


def test_a_wider_confidence_band_means_gentler_cooling():
    rates = [
        _law(limits=HOLD_RATE).propose(_inputs(toy, sigma=toy.sigma)).cooling_rate_k_per_s
        for toy in (_toy(growth_rel_std=d) for d in (0.0, 0.3, 0.9))
    ]
    assert rates[0] > rates[1] > rates[2] > 0.0
    # and so does a larger k, for the same band
    strict = _law(replace(SETTINGS, confidence_k=4.0), limits=HOLD_RATE)
    toy = _toy(growth_rel_std=0.3)
    assert strict.propose(_inputs(toy, sigma=toy.sigma)).cooling_rate_k_per_s < rates[1]


def test_a_lagging_reactor_is_forecast_from_the_lower_setpoint():
    # Conservative: the loop will pull the reactor down to the setpoint at least as fast as the
    # ramp, so the forecast starts there.
    paths = []

    class Recorder(ConstantForecast):
        def predict_sigma(self, times_s, temp_path_k):
            paths.append(np.array(temp_path_k))
            return super().predict_sigma(times_s, temp_path_k)

    _law(limits=HOLD_RATE).propose(_inputs(Recorder(0.0), temp_k=320.0, setpoint_k=319.0))
    first = paths[0]
    assert first[0, 0] == 319.0  # the hold path
    assert np.all(first <= 319.0)
    np.testing.assert_allclose(
        first[-1, :3], 319.0 - LIMITS.max_cooling_rate_k_per_s * np.array([30.0, 60.0, 90.0])
    )


def test_at_most_two_predictor_calls_per_proposal():
    for sigma in (0.0, 0.01, 0.02, 0.03, 0.05):
        toy = _toy(sigma=sigma)
        _law().propose(_inputs(toy, sigma=sigma))
        assert 1 <= toy.calls <= 2


def test_near_the_final_temperature_it_stops_there():
    near = LIMITS.final_temp_k + 0.2
    proposal = _law().propose(_inputs(ConstantForecast(0.0), temp_k=near, sigma=0.0))
    assert proposal.mode is LawMode.AT_FINAL_TEMPERATURE
    assert proposal.setpoint_k == LIMITS.final_temp_k
    below = _law().propose(_inputs(ConstantForecast(0.0), temp_k=282.0, sigma=0.0))
    assert below.mode is LawMode.AT_FINAL_TEMPERATURE
    assert below.setpoint_k == 282.0  # holds; never heats back up to the final temperature


def test_a_dissolution_step_heats_toward_a_small_undersaturation():
    law = _law()
    inputs = _inputs(ConstantForecast(0.0), sigma=0.03, phase="dissolve-fines")
    proposal = law.propose(inputs)
    target_k = float(direct_design_setpoint_k(inputs.conc, -0.05, SOLUBILITY))
    assert proposal.mode is LawMode.DISSOLVING
    assert proposal.sigma_target == -0.05
    assert proposal.direct_design_k == pytest.approx(target_k, abs=1e-9)
    # 30 s at 2 K/min is 1 K, and the target is further than that
    assert target_k > 321.0
    assert proposal.setpoint_k == pytest.approx(321.0, abs=1e-9)
    assert proposal.cooling_rate_k_per_s == pytest.approx(-2.0 * PER_MIN)
    # once above the target it holds (no cooling in a dissolution step)
    hot = law.propose(replace(inputs, setpoint_k=target_k + 1.0, temp_k=target_k + 1.0))
    assert hot.setpoint_k == target_k + 1.0


@pytest.mark.parametrize(
    ("changes", "solubility", "predictor", "reason"),
    [
        ({"conc": math.nan}, SOLUBILITY, ConstantForecast(0.0), "an input is not usable"),
        ({"temp_k": math.inf}, SOLUBILITY, ConstantForecast(0.0), "an input is not usable"),
        ({"conc": 5.0}, SOLUBILITY, ConstantForecast(0.0), "cannot place 5 kg/kg without"),
        ({}, ToyRetrograde(), ConstantForecast(0.0), "solubility falls with temperature"),
        ({}, SOLUBILITY, ConstantForecast(math.nan), "the forecast or the metastable limit"),
    ],
)
def test_no_proposal_when_it_cannot_be_trusted_and_it_says_why(
    changes, solubility, predictor, reason
):
    proposal = _law(solubility=solubility).propose(_inputs(predictor, **changes))
    assert proposal.mode is LawMode.UNAVAILABLE
    assert math.isnan(proposal.setpoint_k)
    assert reason in proposal.reason


def test_a_predictor_answering_the_wrong_shape_is_an_error():
    class Flat:
        def predict_sigma(self, times_s, temp_path_k):
            return np.zeros(len(times_s)), np.zeros(len(times_s))

    with pytest.raises(ControllerError, match=r"the predictor answered shapes \(40,\)"):
        _law().propose(_inputs(Flat()))


@pytest.mark.parametrize(
    ("field", "value", "message"),
    [
        ("target_fraction", 1.0, r"LawSettings\.target_fraction: must be in \(0, 1\); got 1\.0"),
        ("confidence_k", -1.0, r"LawSettings\.confidence_k: must be 0 or more"),
        ("horizon_s", math.nan, r"LawSettings\.horizon_s: must be positive; got nan"),
        ("dissolution_sigma", 0.05, r"LawSettings\.dissolution_sigma: must be in \(-1, 0\)"),
        ("rate_candidates", 1, r"LawSettings\.rate_candidates: must be at least 2"),
        ("zone_min_rate_k_per_s", 0.0, r"LawSettings\.zone_min_rate_k_per_s: must be positive"),
    ],
)
def test_impossible_settings_are_refused_by_name(field, value, message):
    with pytest.raises(SettingsError, match=message):
        replace(SETTINGS, **{field: value})


@settings(derandomize=True, database=None, max_examples=200, deadline=None)
@given(
    temp_k=st.floats(min_value=280.0, max_value=335.0),
    offset_k=st.floats(min_value=-3.0, max_value=3.0),
    sigma=st.floats(min_value=-0.1, max_value=0.2),
    mean=st.floats(min_value=-0.1, max_value=0.3),
    std=st.floats(min_value=0.0, max_value=0.1),
    phase=st.sampled_from(["controlled-cooling", "dissolve-fines", "seed-hold"]),
)
def test_the_law_heats_only_in_a_dissolution_step_and_keeps_to_the_rates(
    temp_k, offset_k, sigma, mean, std, phase
):
    inputs = _inputs(ConstantForecast(mean, std), temp_k=temp_k, sigma=sigma, phase=phase)
    inputs = replace(inputs, setpoint_k=temp_k + offset_k)
    proposal = _law().propose(inputs)
    if proposal.mode is LawMode.UNAVAILABLE:
        return
    rate = proposal.cooling_rate_k_per_s
    step = inputs.setpoint_k - proposal.setpoint_k
    assert step == pytest.approx(rate * SETTINGS.interval_s, abs=1e-9)
    if phase == "dissolve-fines":
        assert -LIMITS.max_heating_rate_k_per_s - 1e-12 <= rate <= 0.0
    else:
        assert 0.0 <= rate <= LIMITS.max_cooling_rate_k_per_s + 1e-12
        assert proposal.setpoint_k >= min(LIMITS.final_temp_k, inputs.setpoint_k)


def test_closed_loop_on_the_toy_stays_under_the_limit_and_beats_a_linear_ramp():
    # The law steers the toy plant that its own forecast is built from; the reactor follows
    # the setpoint exactly. A method check: the limit is kept (margin from k = 2) and the batch
    # is at least 30 % shorter than the constant ramp reaching the same peak sigma.
    plant = _toy(sigma=0.02, temp_k=323.15)
    start_conc, start_temp = plant.conc, plant.temp_k
    law = _law()
    setpoint, time_s, peak_ratio, peak_sigma = plant.temp_k, 0.0, 0.0, 0.0
    for _ in range(1000):
        if setpoint <= LIMITS.final_temp_k:
            break
        forecast = ToyCrystallizer(conc=plant.conc, temp_k=plant.temp_k, conc_start=start_conc)
        proposal = law.propose(
            LawInputs(time_s, "controlled-cooling", plant.temp_k, setpoint, plant.conc, forecast)
        )
        rate = proposal.cooling_rate_k_per_s
        setpoint = proposal.setpoint_k
        plant.advance(SETTINGS.interval_s, setpoint)
        time_s += SETTINGS.interval_s
        limit = float(ZONE.sigma_limit(plant.temp_k, max(rate, SETTINGS.zone_min_rate_k_per_s)))
        peak_ratio = max(peak_ratio, plant.sigma / limit)
        peak_sigma = max(peak_sigma, plant.sigma)
    assert setpoint == LIMITS.final_temp_k
    assert peak_ratio < 1.0
    # Constant ramps over 40 durations, one vectorised forecast (mean only), from the same start.
    ramp = ToyCrystallizer(conc=start_conc, temp_k=start_temp, growth_rel_std=0.0, std_floor=0.0)
    durations = np.linspace(time_s, 4.0 * time_s, 40)
    times = np.linspace(0.0, durations[-1], 400)[1:]
    paths = start_temp - (start_temp - LIMITS.final_temp_k) * np.minimum(
        times[None, :] / durations[:, None], 1.0
    )
    peaks = ramp.predict_sigma(times, paths)[0].max(axis=1)
    assert peaks[0] > peak_sigma > peaks[-1]
    same_peak_s = float(np.interp(peak_sigma, peaks[::-1], durations[::-1]))
    assert time_s <= 0.7 * same_peak_s
