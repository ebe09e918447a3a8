"""``sigmatrack plan``: the offline minimum-time profile as a profile CSV, end to end on the
demo site file (the optimiser itself is tested in ``tests/controller/test_optimal_profile.py``).
"""

from __future__ import annotations

import csv

import numpy as np
import pytest

from sensor.shell.cli import main
from sensor.shell.labdata import PROFILE_COLUMNS
from tests.conftest import DEMO_SITE

ARGS = ["plan", "--config", str(DEMO_SITE), "--start-c", "53", "--saturation-c", "55.2"]


def _rows(path):
    with path.open(encoding="utf-8") as stream:
        lines = [line for line in stream if not line.startswith("#")]
    return list(csv.DictReader(lines))


def test_the_plan_is_a_profile_csv_under_the_guards_limits(tmp_path, capsys):
    out = tmp_path / "profile.csv"
    assert main([*ARGS, "--sigma-max", "0.09", "--out", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    assert "Advisory reference profile" in text
    rows = _rows(out)
    assert tuple(rows[0]) == PROFILE_COLUMNS
    time_min = np.array([float(r["time_min"]) for r in rows])
    temp_c = np.array([float(r["temp_c"]) for r in rows])
    rate = np.array([float(r["cooling_rate_k_per_min"]) for r in rows])
    assert time_min[0] == 0.0
    assert temp_c[0] == pytest.approx(53.0)
    assert temp_c[-1] == pytest.approx(10.0)  # guard.final_temp_c
    assert np.all(np.diff(time_min) > 0.0)
    assert np.all(np.diff(temp_c) <= 0.0)
    assert rate.max() <= 1.0 + 1e-4  # guard.max_cooling_rate_k_per_min, to the CSV's digits
    assert rate[-1] == 0.0
    # the rate column is the slope to the next row (to the CSV's rounding)
    slopes = -np.diff(temp_c) / np.diff(time_min)
    np.testing.assert_allclose(rate[:-1], slopes, atol=2e-3)
    assert "shortest linear ramp" in capsys.readouterr().err


def test_a_cap_below_the_seed_point_is_refused_on_one_line(tmp_path, capsys):
    assert main([*ARGS, "--sigma-max", "0.02", "--out", str(tmp_path / "p.csv")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("sigmatrack: error:")
    assert "no plan" in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "p.csv").exists()


def test_an_unknown_unit_is_refused(capsys):
    assert main([*ARGS, "--unit", "CR-999"]) == 2
    assert "no unit 'CR-999'" in capsys.readouterr().err


def test_help(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["plan", "--help"])
    assert stop.value.code == 0
    assert "--sigma-max" in capsys.readouterr().out
