"""The recipe following a profile CSV: ``sigmatrack plan`` writes it, the simulated recipe
follows it as its own profile and resumes it bumplessly when the advisor lets go, and a file
it cannot use is refused naming the file and the line.

The expected setpoints are computed here from the CSV rows read with the standard library's
``csv`` module and ``numpy.interp`` (linear interpolation between rows, the format's definition
in DEVELOPERS.md, "Profile CSV"), not with the reader under test.
"""

from __future__ import annotations

import csv
from dataclasses import replace
from itertools import pairwise

import numpy as np
import pytest

from sensor.errors import DataFileError, SiteConfigError
from sensor.shell.cli import main
from sensor.shell.config import parse_site
from simulators.plant import PlantSimulation
from simulators.recipe import Recipe
from simulators.settings import read_simulator_settings
from tests.conftest import DEMO_SITE
from tests.simulators.conftest import shortened
from tests.simulators.test_recipe import K0, _beating, _run, _to_cooling
from tests.simulators.test_settings import _site

PLAN = ["plan", "--config", str(DEMO_SITE), "--start-c", "53", "--saturation-c", "55.2"]


@pytest.fixture(scope="module")
def planned(tmp_path_factory):
    """The demo's plan under a cap of 0.09 (about 3.5 h), and its rows: time [s], temp [K]."""
    path = tmp_path_factory.mktemp("plan") / "profile.csv"
    assert main([*PLAN, "--sigma-max", "0.09", "--out", str(path)]) == 0
    with path.open(encoding="utf-8") as stream:
        rows = list(csv.DictReader(line for line in stream if not line.startswith("#")))
    time_s = np.array([float(r["time_min"]) * 60.0 for r in rows])
    temp_k = np.array([float(r["temp_c"]) + K0 for r in rows])
    return path, time_s, temp_k


@pytest.fixture(scope="module")
def file_settings(demo_settings, planned):
    path, time_s, _ = planned
    return shortened(
        demo_settings,
        cooling_profile="file",
        cooling_profile_file=path,
        cooling_duration_s=None,  # the file sets it
        cooling_max_s=time_s[-1] + 1800.0,
    )


def test_the_simulated_recipe_follows_the_plan(demo_site, file_settings, planned):
    _, time_s, temp_k = planned
    sim = PlantSimulation.from_site(demo_site, seed=4, settings=file_settings)
    start = None
    lag = []
    for _ in range(40000):  # about 5.5 h of batch at 1 s a scan
        sim.step()
        truth = sim.truth()
        if sim.phase == "controlled-cooling":
            start = sim.recipe.phase_start_s if start is None else start
            expected = np.interp(truth.time_s - start, time_s, temp_k)
            lag.append(truth.setpoint_c + K0 - expected)
        if sim.phase == "final-hold":
            break
    assert sim.phase == "final-hold"
    # the cooling phase lasted the table's duration, and then until the reactor was within
    # 0.5 K of the final temperature (it lags the plan's last, fastest steps by minutes)
    assert time_s[-1] <= len(lag) <= time_s[-1] + 1800.0
    # and the setpoint was the table: one scan of clock offset at the fastest rate, 1 K/min
    assert np.max(np.abs(lag)) < 1.0 / 60.0 + 1e-6


def test_the_fallback_resumes_the_plan_where_it_stands(file_settings, planned):
    _, time_s, temp_k = planned
    r = file_settings.recipe
    recipe = Recipe(r, 20.0 + K0)
    _to_cooling(recipe)
    drop_s = recipe.phase_start_s + 600.0
    # the advisor holds 3 K below the seed point, ahead of the plan (0.5 K down at 10 min),
    # until the operator takes the permissive back; its heartbeat goes on
    hold_c = r.seed_temp_c - 3.0
    beating = _beating(setpoint_c=hold_c)
    out = _run(recipe, 1200, lambda t: replace(beating(t), permissive=t < drop_s))
    last_active = max(i for i, o in enumerate(out) if o.remote_active)
    assert recipe.time_s - 1200 + last_active + 1 == drop_s - 1  # handed back at once
    after = out[last_active + 1 :]
    assert abs(after[0].setpoint_k - (hold_c + K0)) < 0.01  # no bump
    assert all(b.setpoint_k <= a.setpoint_k + 1e-12 for a, b in pairwise(after))  # no reheat
    # it carries on from the table's point at that temperature, at the table's rate there
    resume_s = float(np.interp(-(hold_c + K0), -temp_k, time_s))
    for k, o in enumerate(after):
        expected = np.interp(resume_s + k, time_s, temp_k)
        assert o.setpoint_k == pytest.approx(expected, abs=1e-3)


def _site_beside(tmp_path, profile_text, **keys):
    """The demo site file as if it sat in ``tmp_path``, its recipe following ``profile.csv``
    there (holding ``profile_text``), with the recipe ``keys`` changed."""
    (tmp_path / "profile.csv").write_text(profile_text, encoding="utf-8")
    text = DEMO_SITE.read_text(encoding="utf-8")
    for key, value in keys.items():
        old = next(line for line in text.splitlines() if line.startswith(f"{key} ="))
        text = text.replace(old, f"{key} = {value}")
    text = text.replace(
        'cooling_profile = "cubic"',
        'cooling_profile = "file"\ncooling_profile_file = "profile.csv"\n#',
    )
    if "cooling_duration_s" not in keys:  # the file sets the duration
        text = text.replace("\ncooling_duration_s =", "\n# cooling_duration_s =")
    return parse_site(text, tmp_path / "site.toml")


GOOD = "time_min,temp_c\n0,53\n100,30\n200,10\n"


def test_a_relative_profile_path_is_read_against_the_site_file(tmp_path):
    site = _site_beside(tmp_path, GOOD)
    table = read_simulator_settings(site).recipe.profile_table
    np.testing.assert_allclose(table.time_s, [0.0, 6000.0, 12000.0])
    np.testing.assert_allclose(table.temp_k, [53.0 + K0, 30.0 + K0, 10.0 + K0])


@pytest.mark.parametrize(
    ("text", "keys", "error", "message"),
    [
        (
            "time_min,temp_c\n0,53\n100,30\n90,10\n",
            {},
            DataFileError,
            r"profile\.csv, line 4: time_min 90 is not after 100",
        ),
        (
            "time_min,temp_c\n0,53\n100,30\n200,31\n",
            {},
            DataFileError,
            r"profile\.csv, line 4: temp_c 31 is above 30",
        ),
        (
            "time_min,temp_c\n0,50\n100,30\n200,10\n",
            {},
            SiteConfigError,
            r"simulator\.recipe\.cooling_profile_file: .*profile\.csv, line 2: the profile starts "
            r"at 50 °C, the recipe's seed_temp_c is 53 °C",
        ),
        (
            "time_min,temp_c\n0,53\n100,30\n200,12\n",
            {},
            SiteConfigError,
            r"profile\.csv, line 4: the profile ends at 12 °C, the recipe's final_temp_c is 10",
        ),
        (
            GOOD,
            {"cooling_duration_s": 21600.0},
            SiteConfigError,
            r'simulator\.recipe\.cooling_duration_s: is not used with cooling_profile = "file" '
            r"\(the profile file sets the duration\): remove it",
        ),
        (
            GOOD,
            {"cooling_max_s": 3600.0},
            SiteConfigError,
            r"simulator\.recipe\.cooling_max_s: cannot be shorter than the profile .*12000 s",
        ),
    ],
)
def test_a_profile_the_recipe_cannot_follow_is_refused(tmp_path, text, keys, error, message):
    site = _site_beside(tmp_path, text, **keys)
    with pytest.raises(error, match=message):
        read_simulator_settings(site)


def test_file_and_its_key_go_together():
    site = _site('cooling_profile = "cubic"', 'cooling_profile = "file"\n#')
    with pytest.raises(
        SiteConfigError, match=r"simulator\.recipe\.cooling_profile_file: is needed with"
    ):
        read_simulator_settings(site)
