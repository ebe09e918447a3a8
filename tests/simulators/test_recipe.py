"""The recipe: its phases, its own profiles, and when it follows the advisor's setpoint."""

from __future__ import annotations

import math
from itertools import pairwise

import pytest

from sensor.shell.config import BATCH_PHASES
from simulators.recipe import DcsInputs, Recipe, cooling_profile_k, cooling_profile_time_s

K0 = 273.15


def _run(recipe, seconds, inputs_at=lambda t: DcsInputs()):
    """Step the recipe once a second from where it is, the reactor at its setpoint; the
    outputs."""
    out = []
    start = recipe.time_s
    for k in range(1, int(seconds) + 1):
        t = start + k
        decided = recipe.update(t, 1.0, recipe.setpoint_k, inputs_at(t))
        out.append(decided)
        if decided.finished:
            break
    return out


def _to_cooling(recipe):
    """Run the recipe until controlled cooling starts (within 20,000 s for the short recipe)."""
    for _ in range(20000):
        recipe.update(recipe.time_s + 1.0, 1.0, recipe.setpoint_k, DcsInputs())
        if recipe.phase == "controlled-cooling":
            return
    raise AssertionError("controlled cooling never started")


def test_mullin_nyvlt_cubic_and_linear_profiles():
    # Mullin & Nyvlt, Chem. Eng. Sci. 26 (1971) 369: T = T0 - (T0 - Tf) (t/tau)^3.
    assert cooling_profile_k(1800.0, 326.15, 283.15, 3600.0, "cubic") == pytest.approx(
        326.15 - 43.0 * 0.125
    )
    assert cooling_profile_k(1800.0, 326.15, 283.15, 3600.0, "linear") == pytest.approx(304.65)
    assert cooling_profile_k(9999.0, 326.15, 283.15, 3600.0, "cubic") == 283.15
    for shape in ("cubic", "linear"):
        temp = cooling_profile_k(1234.0, 326.15, 283.15, 3600.0, shape)
        assert cooling_profile_time_s(temp, 326.15, 283.15, 3600.0, shape) == pytest.approx(1234.0)


def test_phases_run_in_recipe_order_and_seed_once(short_settings):
    recipe = Recipe(short_settings.recipe, 20.0 + K0)
    outs = _run(recipe, 100000)
    phases = list(dict.fromkeys(o.phase for o in outs))
    assert phases == list(BATCH_PHASES)
    assert outs[-1].finished
    assert sum(o.charge_seed for o in outs) == 1
    assert not any(o.remote_active for o in outs)
    cooling = [o for o in outs if o.phase == "controlled-cooling"]
    assert cooling[0].setpoint_k == pytest.approx(short_settings.recipe.seed_temp_c + K0, abs=0.01)
    hold = next(o for o in outs if o.phase == "final-hold")
    assert hold.setpoint_k == short_settings.recipe.final_temp_c + K0


def test_a_phase_waiting_for_temperature_waits_on_a_bad_measurement(short_settings):
    recipe = Recipe(short_settings.recipe, 20.0 + K0)
    for k in range(1, 20000):
        recipe.update(float(k), 1.0, None, DcsInputs())
    assert recipe.phase == "heat"


def _beating(permissive=True, setpoint_c=40.0, stop_at=math.inf):
    return lambda t: DcsInputs(permissive, setpoint_c, int(min(t, stop_at) // 10))


def test_follows_the_remote_setpoint_only_with_permissive_and_heartbeat(short_settings):
    r = short_settings.recipe
    recipe = Recipe(r, 20.0 + K0)
    _to_cooling(recipe)
    # the heartbeat has not changed since the recipe first saw it: its own profile
    out = _run(recipe, 5, lambda t: DcsInputs(True, 40.0, 0))
    assert not any(o.remote_active for o in out)
    # a beating heartbeat and the permissive: the setpoint goes to 40 °C at the recipe's own
    # cooling-rate limit (1 K/min), whatever was asked
    out = _run(recipe, 900, _beating())
    assert all(o.remote_active for o in out[15:])
    steps = [b.setpoint_k - a.setpoint_k for a, b in pairwise(out)]
    assert min(steps) >= -r.max_cooling_rate_k_per_min / 60.0 - 1e-12
    assert out[-1].setpoint_k == pytest.approx(40.0 + K0)


def test_refuses_setpoints_outside_its_limits(short_settings):
    r = short_settings.recipe
    recipe = Recipe(r, 20.0 + K0)
    _to_cooling(recipe)
    out = _run(recipe, 60, _beating(setpoint_c=95.0))
    assert max(o.setpoint_k for o in out) <= r.seed_temp_c + K0  # never above the seed point
    _run(recipe, 2000, _beating(setpoint_c=30.0))
    out = _run(recipe, 600, _beating(setpoint_c=95.0))
    rise = out[-1].setpoint_k - out[0].setpoint_k
    assert rise == pytest.approx(r.max_heating_rate_k_per_min / 60.0 * 599, rel=1e-6)
    out = _run(recipe, 20, _beating(setpoint_c=math.nan))
    assert not any(o.remote_active for o in out)
    out = _run(recipe, 4000, _beating(setpoint_c=-50.0))
    assert min(o.setpoint_k for o in out) == r.final_temp_c + K0  # never below the final
    assert "final-hold" in {o.phase for o in out}


def test_falls_back_bumplessly_when_the_heartbeat_stops(short_settings):
    r = short_settings.recipe
    recipe = Recipe(r, 20.0 + K0)
    _to_cooling(recipe)
    start = recipe.phase_start_s
    # the advisor has cooled 3 K ahead of the recipe's profile (only 0.2 K down by then)
    hold = r.seed_temp_c - 3.0
    out = _run(recipe, 1200, _beating(setpoint_c=hold, stop_at=start + 600.0))
    active = [o.remote_active for o in out]
    # the heartbeat last changed at start + 600 s (counter every 10 s): the watchdog lets go
    # within heartbeat_timeout_s after that
    last_active = max(i for i, a in enumerate(active) if a)
    assert 600 <= last_active <= 600 + r.heartbeat_timeout_s + 10
    # no bump: the recipe resumes its profile from the setpoint it held, never heating back
    after = out[last_active + 1 :]
    assert abs(after[0].setpoint_k - out[last_active].setpoint_k) < 0.01
    assert all(b.setpoint_k <= a.setpoint_k + 1e-12 for a, b in pairwise(after))


def test_permissive_off_hands_back_at_once(short_settings):
    recipe = Recipe(short_settings.recipe, 20.0 + K0)
    _to_cooling(recipe)
    _run(recipe, 60, _beating())
    out = _run(recipe, 5, _beating(permissive=False))
    assert not any(o.remote_active for o in out)
