"""``sigmatrack replay`` end to end on historian files written from synthetic batches: the JSON
summary, the estimates CSV, and a bad file that is reported while the others go on."""

from __future__ import annotations

import csv
import json
import subprocess
import sys

import numpy as np
import pytest

from sensor.shell.cli import main
from sensor.shell.replay import ESTIMATE_COLUMNS
from tests.conftest import DEMO_SITE
from tests.synthetic import cooling_batch, demo_setup, demo_site_and_zone, with_faults
from tests.synthetic import write_historian_csv as write_csv


@pytest.fixture(scope="module")
def batch_files(tmp_path_factory):
    rng = np.random.default_rng(7)
    site, _ = demo_site_and_zone()
    setup = demo_setup()
    folder = tmp_path_factory.mktemp("replay")
    files = []
    for i in range(2):
        batch = cooling_batch(setup, rng, hours=0.5, bias=0.002, start_temp_c=51.0, seed_at_s=300.0)
        path = folder / f"batch{i}.csv"
        write_csv(path, with_faults(batch.samples, rng), site.unit[0], batch_id=f"B{i}")
        files.append(path)
    return files


def test_json_summary_and_estimates(batch_files, tmp_path, capsys):
    out = tmp_path / "estimates.csv"
    status = main(
        ["replay", *map(str, batch_files), "--config", str(DEMO_SITE), "--json", "--estimates",
         str(out)]
    )  # fmt: skip
    assert status == 0
    summaries = json.loads(capsys.readouterr().out)
    assert [s["batch"] for s in summaries] == ["B0", "B1"]
    for s in summaries:
        for key in ("samples", "rejected", "peak_sigma", "time_above_limit_s", "final_yield"):
            assert key in s
        assert s["samples"] == 1800
        assert s["rejected"] > 10  # the faults
        assert s["rejected_by_reason"]["spike"] >= 1
        assert s["error"] is None
        assert 0.0 < s["peak_sigma"] < 0.5
    with out.open(encoding="utf-8") as stream:
        rows = list(csv.DictReader(stream))
    assert tuple(rows[0]) == ESTIMATE_COLUMNS
    assert len(rows) == 3600
    assert {r["batch"] for r in rows} == {"B0", "B1"}
    started = [r for r in rows if r["started"] == "1"]
    assert float(started[-1]["sigma_std"]) > 0.0
    assert {r["conc_reason"] for r in rows} >= {"accepted", "missing", "spike", "bad-quality"}


def test_bad_file_is_reported_and_the_others_go_on(batch_files, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    lines = batch_files[0].read_text(encoding="utf-8").splitlines()
    lines[10] = lines[9]  # a repeated timestamp
    bad.write_text("\n".join(lines) + "\n", encoding="utf-8")
    status = main(["replay", str(bad), str(batch_files[1]), "--config", str(DEMO_SITE), "--json"])
    captured = capsys.readouterr()
    assert status == 2
    assert f"sigmatrack: error: {bad}, line 11: timestamp" in captured.err
    assert "repeats the one on line 10" in captured.err
    assert [s["batch"] for s in json.loads(captured.out)] == ["B1"]


def test_table_output_says_it_only_advises(batch_files, capsys):
    assert main(["replay", str(batch_files[0]), "--config", str(DEMO_SITE)]) == 0
    out = capsys.readouterr().out
    assert "peak_sigma" in out
    assert "the DCS keeps control" in out


def test_help():
    done = subprocess.run(
        [sys.executable, "-m", "sensor.shell.cli", "replay", "--help"],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0
    assert "--estimates" in done.stdout
