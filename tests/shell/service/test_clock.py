"""The service's clock for a simulated plant: it follows the plant's source timestamps,
carries on through an outage, never goes back, and follows a plant that paused."""

from __future__ import annotations

import pytest

from sensor.shell.service.clock import PlantClock, WallClock

SPEED = 50.0
T0 = 1.7e9


class FakePlant:
    """The plant's newest source timestamp and the wall's monotonic clock, set by the test."""

    def __init__(self) -> None:
        self.newest: float | None = None
        self.wall = 100.0

    def clock(self, **options: float) -> PlantClock:
        return PlantClock(lambda: self.newest, SPEED, lambda: self.wall, **options)


def started(**options: float) -> tuple[FakePlant, PlantClock]:
    """A plant and its clock, which has read the plant's first value, ``T0``."""
    plant = FakePlant()
    clock = plant.clock(**options)
    plant.newest = T0
    clock.now_s()
    return plant, clock


def test_no_time_before_the_first_value_then_the_plants_time():
    plant = FakePlant()
    clock = plant.clock()
    assert clock.now_s() is None
    plant.newest = T0
    assert clock.now_s() == T0


def test_it_carries_on_at_speed_through_an_outage():
    plant, clock = started()
    plant.wall += 10.0  # nothing arrives for 10 s of wall time
    assert clock.now_s() == pytest.approx(T0 + 10.0 * SPEED)


def test_a_late_value_does_not_move_it_back_or_hold_it():
    plant, clock = started()
    plant.wall += 1.0
    plant.newest = T0 + 0.5 * SPEED  # delivered half a wall second late
    assert clock.now_s() == pytest.approx(T0 + SPEED)
    plant.wall += 0.1
    assert clock.now_s() == pytest.approx(T0 + 1.1 * SPEED)


def test_a_plant_ahead_moves_it_forward():
    plant, clock = started()
    plant.newest = T0 + 30.0
    assert clock.now_s() == T0 + 30.0


def test_a_plant_that_paused_is_followed_back_and_the_clock_holds_until_it_passes():
    plant, clock = started(resync_after_s=2.0)
    # the plant's server is down for 5 s of wall time and its batch waits where it stood
    plant.wall += 5.0
    held = clock.now_s()
    assert held == pytest.approx(T0 + 5.0 * SPEED)
    # back: values from where it stood
    plant.wall += 0.2
    plant.newest = T0 + 0.2 * SPEED
    assert clock.now_s() == held  # never back: it holds at its last tick
    plant.wall += 4.0
    plant.newest = T0 + 4.2 * SPEED
    assert clock.now_s() == held  # still behind it
    plant.wall += 1.0
    plant.newest = T0 + 5.2 * SPEED
    assert clock.now_s() == pytest.approx(T0 + 5.2 * SPEED)  # the plant's time again
    plant.wall += 0.5
    assert clock.now_s() == pytest.approx(T0 + 5.7 * SPEED)


def test_without_the_resync_the_clock_would_run_ahead_of_a_paused_plant():
    """The same pause with a resync longer than it: the clock stays ahead (what the resync is
    for)."""
    plant, clock = started(resync_after_s=60.0)
    plant.wall += 5.0
    clock.now_s()
    plant.wall += 1.0
    plant.newest = T0 + 1.0 * SPEED
    assert clock.now_s() == pytest.approx(T0 + 6.0 * SPEED)


@pytest.mark.parametrize("options", [{"resync_after_s": 0.0}, {"resync_after_s": -1.0}])
def test_a_resync_that_is_not_positive_is_refused(options):
    with pytest.raises(ValueError, match="resync_after_s"):
        FakePlant().clock(**options)


def test_the_wall_clock_never_goes_back():
    readings = iter([10.0, 12.0, 11.0, 13.0])
    clock = WallClock(lambda: next(readings))
    assert [clock.now_s() for _ in range(4)] == [10.0, 12.0, 12.0, 13.0]
