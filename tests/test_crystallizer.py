"""The estimation model: the solubility table, the moments equations, the Euler step and its
Jacobian, seeding."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from sensor.crystallizer import (
    CONC,
    MOMENT_SIZE_SCALE_M,
    TEMP,
    ZETA0,
    ZETA1,
    ZETA2,
    ZETA3,
    Kinetics,
    ModelError,
    build_model,
    c_sat_from_table,
    rates,
    seed_moments,
    step,
    step_jacobian,
)
from tests.synthetic import demo_setup, demo_site_and_zone


@pytest.fixture(scope="module")
def model():
    return demo_setup().model


def _state(model, temp_k=315.0, conc=0.13, zeta=(0.02, 0.012, 0.009, 0.008), theta=1.1):
    x = np.zeros(model.layout.size)
    x[TEMP], x[CONC] = temp_k, conc
    x[ZETA0 : ZETA3 + 1] = zeta
    x[6] = theta
    x[-1] = 0.003
    return x


def test_table_matches_the_curve_and_its_slope(model):
    # The Hermite table against the fitted curve itself (and its analytic slope), between nodes.
    _, zone = demo_site_and_zone()
    curve = zone.solubility
    lo, hi = curve.domain_k
    temps = np.linspace(lo, hi, 997)
    table = np.array([c_sat_from_table(t, model.params, model.table) for t in temps])
    np.testing.assert_allclose(table[:, 0], curve.c_sat(temps), rtol=1e-9)
    np.testing.assert_allclose(table[:, 1], curve.dc_sat_dtemp(temps), rtol=1e-5)


def test_moments_equations_conserve_solute(model):
    # Mass balance (common practice): what leaves the solution is what the crystals gain.
    derivative = np.empty(model.layout.size)
    for conc in (0.08, 0.13, 0.2):  # under- and supersaturated
        rates(_state(model, conc=conc), 300.0, model.params, model.table, derivative)
        assert derivative[CONC] == pytest.approx(-derivative[ZETA3], rel=1e-15, abs=1e-300)


def test_growth_moves_the_moments_as_the_method_of_moments_says(model):
    # Randolph & Larson (1988) eq. 3.4: dmu_k/dt = k G mu_{k-1} + B L0^k; scaled by L_r.
    x = _state(model)
    derivative = np.empty(model.layout.size)
    rates(x, 300.0, model.params, model.table, derivative)
    c_sat, _ = c_sat_from_table(x[TEMP], model.params, model.table)
    sigma = x[CONC] / c_sat - 1.0
    growth = x[6] * model.params[1] * sigma ** model.params[2]
    for k, row in ((1, ZETA1), (2, ZETA2), (3, ZETA3)):
        assert derivative[row] == pytest.approx(k * growth / MOMENT_SIZE_SCALE_M * x[row - 1])
    birth = model.params[4] * sigma ** model.params[5] * x[ZETA3]
    assert derivative[ZETA0] == pytest.approx(model.params[7] * birth)


def test_clear_solution_is_a_mass_balance(model):
    # Before seeding or nucleation nothing but the temperature may change.
    x = _state(model, conc=0.2, zeta=(0.0, 0.0, 0.0, 0.0))
    after = step(x, 600.0, 290.0, model.params, model.table)
    assert np.array_equal(after[1:], x[1:])
    a = model.params[0]
    # Euler on dT/dt = a (Tj - T): (1 - a h)^600 (T0 - Tj) + Tj, h = 1 s
    assert after[TEMP] == pytest.approx(290.0 + (1 - a) ** 600 * (x[TEMP] - 290.0), rel=1e-12)


def test_euler_step_follows_an_accurate_integration(model):
    # Against scipy's solve_ivp (RK45 at tight tolerance) over 20 min of growth and
    # nucleation: the first-order step at the default 1 s stays within 0.2 % of the change.
    x0 = _state(model, temp_k=318.0, conc=0.14)

    def rhs(_t, y):
        out = np.empty_like(y)
        rates(y, 305.0, model.params, model.table, out)
        return out

    ref = solve_ivp(rhs, (0.0, 1200.0), x0, rtol=1e-11, atol=1e-14).y[:, -1]
    ours = step(x0, 1200.0, 305.0, model.params, model.table)
    change = np.abs(ref - x0)
    moved = change > 1e-9
    assert np.all(np.abs(ours - ref)[moved] <= 2e-3 * change[moved])


def test_step_jacobian_matches_finite_differences(model):
    # Analytic Jacobian (EKF) against central differences of the step itself.
    x = _state(model)
    jac = step_jacobian(x, 5.0, 300.0, model.params, model.table)
    numeric = np.empty_like(jac)
    for j in range(x.size):
        h = 1e-4 * max(abs(x[j]), 1e-2)
        up, down = x.copy(), x.copy()
        up[j] += h
        down[j] -= h
        numeric[:, j] = (
            step(up, 5.0, 300.0, model.params, model.table)
            - step(down, 5.0, 300.0, model.params, model.table)
        ) / (2 * h)
    # central differences are good to ~h^2 and, for entries far below 1, to rounding / h
    np.testing.assert_allclose(jac, numeric, rtol=1e-4, atol=1e-9)


def test_seed_moments_of_a_normal_distribution():
    # Raw moments of N(mean, s^2): E[L^2] = mean^2 + s^2, E[L^3] = mean^3 + 3 mean s^2.
    mean, s = 60e-6, 15e-6
    zeta = seed_moments(3.0, 1600.0, mean, s)
    assert zeta[3] == pytest.approx(3.0 / 1600.0)
    l_r = MOMENT_SIZE_SCALE_M
    assert l_r * zeta[3] / zeta[2] == pytest.approx((mean**3 + 3 * mean * s**2) / (mean**2 + s**2))
    assert l_r * zeta[1] / zeta[0] == pytest.approx(mean)


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"growth_order": 0.5}, "orders must be at least 1"),
        ({"growth_rate_constant_m_per_s": float("nan")}, "growth_rate_constant_m_per_s must be"),
    ],
)
def test_kinetics_refuse_impossible_values(changes, message):
    values = {
        "growth_rate_constant_m_per_s": 1e-7,
        "growth_order": 1.5,
        "nucleation_rate_constant_per_kg_s": 1e9,
        "nucleation_order": 2.0,
    }
    values.update(changes)
    with pytest.raises(ModelError, match=message):
        Kinetics(**values)


def test_model_refuses_a_non_positive_heat_capacity():
    _, zone = demo_site_and_zone()
    kinetics = Kinetics(1e-7, 1.5, 1e9, 2.0)
    with pytest.raises(ModelError, match="heat_capacity_j_per_k must be a positive number"):
        build_model(
            zone.solubility,
            kinetics,
            heat_transfer_w_per_k=100.0,
            heat_capacity_j_per_k=0.0,
            crystal_density_kg_per_m3=1300.0,
            volume_shape_factor=0.5,
        )
