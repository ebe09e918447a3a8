"""Reactor and jacket temperatures against the analytic first-order responses.

Source: D. E. Seborg, T. F. Edgar, D. A. Mellichamp, F. J. Doyle III, Process Dynamics and
Control, 4th ed. (2016), ch. 5: the step response of a first-order process, y = K M (1 -
exp(-t/tau)), and of two first-order lags in series (overdamped second order).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from simulators.thermal import ReactorTemperatureController, ThermalModel

UA, MCP = 2200.0, 6.0e6  # the demo unit CR-301 [W/K], [J/K]: tau = 2727 s


def _run(model, temp, jacket, jacket_sp, seconds, dt=1.0, heat_w=0.0):
    temps, jackets = [], []
    for _ in range(int(seconds / dt)):
        temp, jacket = model.step(temp, jacket, jacket_sp, heat_w, dt)
        temps.append(temp)
        jackets.append(jacket)
    return np.array(temps), np.array(jackets)


def test_jacket_follows_a_setpoint_step_as_a_first_order_lag():
    model = ThermalModel(UA, MCP, jacket_time_constant_s=120.0, jacket_max_rate_k_per_s=10.0)
    _, jackets = _run(model, 320.0, 320.0, 310.0, 600)
    t = np.arange(1, 601)
    np.testing.assert_allclose(jackets, 310.0 + 10.0 * np.exp(-t / 120.0), rtol=0, atol=1e-9)


def test_jacket_rate_limit_then_lag():
    # With a rate limit r, the jacket ramps at r until (sp - Tj)/tau = r, then follows the lag.
    model = ThermalModel(UA, MCP, 120.0, 3.0 / 60.0)
    _, jackets = _run(model, 330.0, 330.0, 300.0, 1200)
    t = np.arange(1, 1201, dtype=float)
    switch = (30.0 - 120.0 * 0.05) / 0.05  # ramp until 6 K from the setpoint: 480 s
    expected = np.where(t <= switch, 330.0 - 0.05 * t, 300.0 + 6.0 * np.exp(-(t - switch) / 120.0))
    # RK4 across the kink of the clip loses a little accuracy in the one step that holds it.
    np.testing.assert_allclose(jackets, expected, rtol=0, atol=1e-4)


def test_reactor_follows_a_jacket_step_as_two_lags_in_series():
    # Tj(t) = sp + (T0 - sp) e^(-t/tj); the reactor, T' = (Tj - T)/tr, from rest at T0:
    # T(t) = sp + (T0 - sp) (tr e^(-t/tr) - tj e^(-t/tj)) / (tr - tj).
    model = ThermalModel(UA, MCP, 120.0, 10.0)
    tr, tj = MCP / UA, 120.0
    temps, _ = _run(model, 330.0, 330.0, 300.0, 7200)
    t = np.arange(1, 7201)
    expected = 300.0 + 30.0 * (tr * np.exp(-t / tr) - tj * np.exp(-t / tj)) / (tr - tj)
    np.testing.assert_allclose(temps, expected, rtol=0, atol=1e-8)
    # one reactor time constant after the jacket has settled: 63 % of the way (first order)
    assert model.reactor_time_constant_s == pytest.approx(2727.27, abs=0.01)


def test_heat_of_crystallization_warms_the_contents():
    # At steady state UA (T - Tj) = Q: the contents sit Q/UA above the jacket.
    model = ThermalModel(UA, MCP, 120.0, 10.0)
    temps, _ = _run(model, 300.0, 300.0, 300.0, 40000, dt=5.0, heat_w=1100.0)
    assert temps[-1] == pytest.approx(300.0 + 1100.0 / UA, abs=1e-4)


def test_pi_with_rate_feedforward_tracks_a_cooling_ramp():
    # Without feed-forward a PI on a first-order process lags a ramp by rate * Ti / Kc (for
    # these numbers about 3 K at 0.3 K/min); with it the error stays well under 0.1 K.
    model = ThermalModel(UA, MCP, 120.0, 3.0 / 60.0)
    pi = ReactorTemperatureController(4.0, 1800.0, (263.15, 368.15), model.reactor_time_constant_s)
    temp = jacket = jacket_sp = 330.0
    rate = -0.3 / 60.0
    errors = []
    for k in range(1, 7201):
        temp, jacket = model.step(temp, jacket, jacket_sp, 0.0, 1.0)
        setpoint = 330.0 + rate * k
        jacket_sp = pi.update(setpoint, rate, temp, 1.0)
        if k > 3600:
            errors.append(setpoint - temp)
    assert max(abs(e) for e in errors) < 0.1


def test_pi_holds_its_output_without_a_measurement_and_respects_its_limits():
    pi = ReactorTemperatureController(4.0, 1800.0, (263.15, 368.15), 0.0)
    assert pi.update(330.0, 0.0, None, 1.0) is None
    assert pi.update(330.0, 0.0, 250.0, 1.0) == 368.15
    integral = pi.integral_k_s
    pi.update(330.0, 0.0, 250.0, 1.0)
    assert pi.integral_k_s == integral  # no windup while saturated
    assert not math.isnan(pi.update(330.0, 0.0, 330.0, 1.0))
