"""Reference profiles: linear and Mullin-Nývlt (their CSV: tests/shell/test_labdata.py).

Outside reference: the controlled-cooling profile of J. W. Mullin and J. Nývlt, "Programmed
cooling of batch crystallizers", Chem. Eng. Sci. 26 (1971) 369-377, in the form given by J. W.
Mullin, Crystallization, 4th ed., 2001: T = T0 - (T0 - Tf) (t/tau)^3 for small seeds, and for
seeds of size Ls grown to Lp, (T0 - T)/(T0 - Tf) = [(1 + a t/tau)^3 - 1] / [(1 + a)^3 - 1] with
a = (Lp - Ls)/Ls. Both forms are quoted from memory. The growth check below tests the
implementation against the assumptions the profile is derived from (a method check on invented
numbers, not published data).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from controller.errors import SettingsError
from controller.profiles import (
    CoolingProfile,
    linear_profile,
    mullin_nyvlt_fraction,
    mullin_nyvlt_profile,
)

T0_K, TF_K, TAU_S = 323.15, 283.15, 4 * 3600.0


def test_linear_profile_cools_at_one_rate():
    profile = linear_profile(T0_K, TF_K, TAU_S, points=9)
    assert profile.temp_k[0] == T0_K
    assert profile.temp_k[-1] == pytest.approx(TF_K, abs=1e-12)
    np.testing.assert_allclose(profile.cooling_rate_k_per_s(), 40.0 / TAU_S, rtol=1e-12)


def test_mullin_nyvlt_cubic_against_the_published_formula():
    x = np.linspace(0.0, 1.0, 101)
    published = x**3  # T = T0 - (T0 - Tf)(t/tau)^3, small seeds
    np.testing.assert_allclose(mullin_nyvlt_fraction(x, 0.0), published, rtol=0.0, atol=1e-15)
    profile = mullin_nyvlt_profile(T0_K, TF_K, TAU_S, points=101)
    np.testing.assert_allclose(
        profile.temp_k, T0_K - (T0_K - TF_K) * (profile.time_s / TAU_S) ** 3, atol=1e-10
    )


@pytest.mark.parametrize("size_ratio", [1.2, 2.0, 2.571, 5.0, 20.0])
def test_mullin_nyvlt_seeded_against_the_published_formula(size_ratio):
    seed_m = 100e-6
    product_m = size_ratio * seed_m
    a = (product_m - seed_m) / seed_m
    profile = mullin_nyvlt_profile(
        T0_K, TF_K, TAU_S, seed_size_m=seed_m, product_size_m=product_m, points=41
    )
    x = profile.time_s / TAU_S
    published = ((1.0 + a * x) ** 3 - 1.0) / ((1.0 + a) ** 3 - 1.0)
    np.testing.assert_allclose((T0_K - profile.temp_k) / (T0_K - TF_K), published, atol=1e-12)


def test_the_profile_starts_slowly_and_cools_faster_as_the_crystals_grow():
    profile = mullin_nyvlt_profile(
        T0_K, TF_K, TAU_S, seed_size_m=100e-6, product_size_m=257e-6, points=21
    )
    rates = profile.cooling_rate_k_per_s()
    assert np.all(np.diff(rates) > 0.0)
    assert rates[-1] > 3.0 * rates[0]


def _supersaturation_along(temp_of_time):
    """Seeded growth, no nucleation: dL/dt = k_g dc, dc = c(L) - c_sat(T(t)), with a linear
    solubility and the solute balance c(L) = c_start - M_s ((L/L_s)^3 - 1). Invented numbers:
    1 % seed of 100 um, 0.16 kg/kg crystallised over 40 K in 4 h."""
    seed_m, seed_mass, k_g = 100e-6, 0.01, 1e-6

    def c_sat(temp_k):
        return 0.05 + 0.004 * (temp_k - TF_K)

    product_m = seed_m * (1.0 + 0.16 / seed_mass) ** (1.0 / 3.0)
    dc0 = (product_m - seed_m) / TAU_S / k_g
    c_start = c_sat(T0_K) + dc0

    def dc(t, size):
        return c_start - seed_mass * ((size / seed_m) ** 3 - 1.0) - c_sat(temp_of_time(t))

    times = np.linspace(0.0, TAU_S, 200)
    solution = solve_ivp(
        lambda t, y: [k_g * dc(t, y[0])],
        (0.0, TAU_S),
        [seed_m],
        t_eval=times,
        rtol=1e-11,
        atol=1e-15,
    )
    return np.array([dc(t, y) for t, y in zip(times, solution.y[0], strict=True)]) / dc0, (
        seed_m,
        product_m,
    )


def test_mullin_nyvlt_keeps_supersaturation_constant_where_its_assumptions_hold():
    _, (seed_m, product_m) = _supersaturation_along(lambda t: T0_K)
    ratio = seed_m / (product_m - seed_m)

    def programmed(t):
        return T0_K - (T0_K - TF_K) * float(mullin_nyvlt_fraction(t / TAU_S, ratio))

    def linear(t):
        return T0_K - (T0_K - TF_K) * t / TAU_S

    held, _ = _supersaturation_along(programmed)
    np.testing.assert_allclose(held, 1.0, atol=1e-6)
    ramped, _ = _supersaturation_along(linear)
    assert ramped.max() - ramped.min() > 1.0  # a linear ramp swings it by more than its mean


@pytest.mark.parametrize(
    ("time", "temp", "message"),
    [
        ([0.0, 10.0], [300.0, 301.0], r"CoolingProfile\.temp_k: a cooling profile never rises"),
        ([5.0, 10.0], [300.0, 299.0], r"CoolingProfile\.time_s: must start at 0"),
        ([0.0, 0.0], [300.0, 299.0], r"CoolingProfile\.time_s: must start at 0 and increase"),
        ([0.0], [300.0], r"CoolingProfile\.time_s: times and temperatures must be 1-D"),
        ([0.0, math.nan], [300.0, 299.0], r"CoolingProfile\.time_s: .* must be finite"),
    ],
)
def test_a_profile_that_is_not_a_cooling_table_is_refused(time, temp, message):
    with pytest.raises(SettingsError, match=message):
        CoolingProfile("test", np.array(time), np.array(temp))


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: linear_profile(T0_K, T0_K, TAU_S), r"linear_profile\.final_temp_k: must be"),
        (lambda: linear_profile(T0_K, TF_K, 0.0), r"linear_profile\.duration_s: must be"),
        (
            lambda: mullin_nyvlt_profile(T0_K, TF_K, TAU_S, seed_size_m=1e-4),
            r"mullin_nyvlt_profile\.product_size_m: must exceed the seed size",
        ),
        (
            lambda: mullin_nyvlt_profile(T0_K, TF_K, TAU_S, points=2),
            r"mullin_nyvlt_profile\.points: a curve needs at least 3",
        ),
        (lambda: mullin_nyvlt_fraction(0.5, -1.0), r"mullin_nyvlt_fraction\.seed_ratio"),
    ],
)
def test_impossible_profile_requests_are_refused_by_name(call, message):
    with pytest.raises(SettingsError, match=message):
        call()
