"""``sigmatrack fit ...`` end to end: output, JSON, bad input, exit status, --help everywhere."""

from __future__ import annotations

import argparse
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from sensor.shell.cli import build_parser, main
from tests.conftest import CONFIG_DIR

SOLUBILITY = str(CONFIG_DIR / "demo-solubility.csv")
CLOUD_POINTS = str(CONFIG_DIR / "demo-cloud-points.csv")


def _json(capsys, argv):
    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)


def test_fit_solubility_json(capsys):
    out = _json(
        capsys,
        ["fit", "solubility", SOLUBILITY, "--conc-unit", "g/100g", "--at", "10,40,80", "--json"],
    )
    for key in ("model", "params", "rmse", "aicc", "temp_range_c", "at", "candidates"):
        assert key in out
    assert out["temp_range_c"] == [5.0, 70.0]
    assert out["model"] in ("vant-hoff", "apelblat", "polynomial")
    assert out["skipped"]["lambda-h"].startswith("needs the solute's melting point")
    at = {row["temp_c"]: row for row in out["at"]}
    assert set(at) == {10.0, 40.0, 80.0}
    for row in out["at"]:
        assert row["lo"] < row["conc"] < row["hi"]
    assert at[80.0]["extrapolated"]
    assert not at[40.0]["extrapolated"]
    # In the input unit: g/100g. The demo data have about 1.5 % scatter around 3-20 g/100g.
    assert 0.05 < out["rmse"] < 0.5
    assert at[40.0]["conc"] == pytest.approx(9.43, rel=0.03)


def test_fit_solubility_explicit_model_in_mole_fraction(capsys):
    out = _json(
        capsys,
        [
            "fit",
            "solubility",
            SOLUBILITY,
            "--conc-unit",
            "g/100g",
            "--model",
            "lambda-h",
            "--molar-masses",
            "286.3,31.40",
            "--melting-temp-c",
            "168",
            "--json",
        ],
    )
    assert out["model"] == "lambda-h"
    assert out["basis"] == "mole-fraction"
    assert set(out["params"]) == {"lambda", "h"}


def test_fit_solubility_table_output(capsys):
    assert main(["fit", "solubility", SOLUBILITY, "--conc-unit", "g/100g", "--at", "25"]) == 0
    out = capsys.readouterr().out
    for text in ("(chosen)", "AICc", "95 % confidence band"):
        assert text in out


def test_fit_msz_json(capsys):
    out = _json(
        capsys,
        ["fit", "msz", CLOUD_POINTS, "--solubility", SOLUBILITY, "--conc-unit", "g/100g", "--json"],
    )
    assert out["method"] == "nyvlt"
    assert out["n_points"] == 16
    assert 1.5 < out["params"]["m"] < 4.0
    rates = sorted({w["rate_k_per_min"] for w in out["widths"]})
    assert rates == [0.1, 0.2, 0.5, 1.0]
    widths = [
        w["width_k"] for w in out["widths"] if w["temp_sat_c"] == out["widths"][0]["temp_sat_c"]
    ]
    assert np.all(np.diff(widths) > 0)  # wider at faster cooling
    assert out["rmse_k"] < 1.0


def test_fit_msz_custom_rates_and_temps(capsys):
    out = _json(
        capsys,
        [
            "fit",
            "msz",
            CLOUD_POINTS,
            "--solubility",
            SOLUBILITY,
            "--conc-unit",
            "g/100g",
            "--rates",
            "0.3,2",
            "--temps",
            "50",
            "--json",
        ],
    )
    assert [(w["temp_sat_c"], w["rate_k_per_min"]) for w in out["widths"]] == [
        (50.0, 0.3),
        (50.0, 2.0),
    ]
    assert [w["extrapolated"] for w in out["widths"]] == [False, True]


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("temp_c,conc\n10,4\n20,x\n", r"bad\.csv, line 3: column 'conc': 'x' is not a number"),
        ("temp,conc\n10,4\n", r"bad\.csv, line 1: no column 'temp_c'"),
        ("temp_c,conc\n10,4\n20,5\n30,6\n", r"bad\.csv: no solubility model could be fitted"),
        (
            "temp_c,conc\n10,4\n10,5\n30,6\n40,7\n",
            r"bad\.csv, line 3: temp_c 10 is already on line 2",
        ),
    ],
)
def test_bad_input_one_line_exit_2(tmp_path, capsys, content, message):
    bad = tmp_path / "bad.csv"
    bad.write_text(content, encoding="utf-8")
    assert main(["fit", "solubility", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert err.startswith("sigmatrack: error: ")
    assert re.search(message, err)


def test_msz_point_problem_names_the_line(tmp_path, capsys):
    bad = tmp_path / "cloud.csv"
    bad.write_text(
        "conc,rate_k_per_min,cloud_temp_c\n# c\n"
        "8.26,0.1,30.7\n8.26,0.5,45\n10.78,0.1,41.5\n10.78,1,36.4\n"
    )
    assert main(["fit", "msz", str(bad), "--solubility", SOLUBILITY, "--conc-unit", "g/100g"]) == 2
    assert (
        "cloud.csv, line 4: cloud point 45.00 °C is not beyond the saturation"
        in capsys.readouterr().err
    )


def _all_command_paths(parser: argparse.ArgumentParser, prefix=()):
    yield prefix
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from _all_command_paths(sub, (*prefix, name))


@pytest.mark.parametrize("path", list(_all_command_paths(build_parser())), ids=" ".join)
def test_every_command_has_help(path, capsys):
    with pytest.raises(SystemExit) as caught:
        main([*path, "--help"])
    assert caught.value.code == 0
    assert "usage: sigmatrack" in capsys.readouterr().out


def test_console_script_exit_status_and_no_traceback(tmp_path):
    # The console script that `pip install` puts beside the interpreter.
    exe = shutil.which("sigmatrack", path=str(Path(sys.executable).parent))
    assert exe, "install the project (pip install -e .) before running the tests"
    bad = tmp_path / "bad.csv"
    bad.write_text("temp_c,conc\n10,nan\n", encoding="utf-8")
    done = subprocess.run(
        [exe, "fit", "solubility", str(bad)], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert "bad.csv, line 2" in done.stderr
    ok = subprocess.run(
        [
            sys.executable,
            "-m",
            "sensor.shell.cli",
            "fit",
            "solubility",
            SOLUBILITY,
            "--conc-unit",
            "g/100g",
        ],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert ok.returncode == 0, ok.stderr
