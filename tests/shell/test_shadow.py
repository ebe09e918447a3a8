"""Shadow mode in replay: the advisor run on the replayed estimates through the pipeline's own
``Advisor``, its proposals and alarms in ``--estimates`` and in the summary.

On a synthetic batch made with the estimation model (these check the plumbing, not the
science), in controlled cooling from 1,200 s.
"""

from __future__ import annotations

import csv
import json
from collections import Counter
from dataclasses import replace

import numpy as np
import pytest

from sensor.pipeline import DcsInputs, UnitPipeline
from sensor.shell.cli import main
from sensor.shell.replay import ESTIMATE_COLUMNS
from sensor.shell.shadow import SHADOW_COLUMNS
from sensor.shell.sitesensor import pipeline_setup
from tests.conftest import DEMO_SITE
from tests.synthetic import cooling_batch, demo_site_and_zone, write_historian_csv

CONTROLLED_FROM_S = 1200.0


@pytest.fixture(scope="module")
def shadow_batch(tmp_path_factory):
    site, zone = demo_site_and_zone()
    setup = pipeline_setup(site, 0, zone)
    batch = cooling_batch(setup.sensor, np.random.default_rng(5), hours=1.0, seed_at_s=600.0)
    samples = [
        replace(s, phase="controlled-cooling") if s.time_s >= CONTROLLED_FROM_S else s
        for s in batch.samples
    ]
    path = tmp_path_factory.mktemp("shadow") / "batch.csv"
    write_historian_csv(path, samples, site.unit[0], batch_id="S1")
    return setup, samples, path


@pytest.fixture(scope="module")
def replayed(shadow_batch, tmp_path_factory):
    _setup, _samples, path = shadow_batch
    out = tmp_path_factory.mktemp("shadow-out") / "estimates.csv"
    return path, out


def _run(path, out, capsys, *extra):
    status = main(
        ["replay", str(path), "--config", str(DEMO_SITE), "--json", "--estimates", str(out),
         *extra]
    )  # fmt: skip
    assert status == 0
    (summary,) = json.loads(capsys.readouterr().out)
    with out.open(encoding="utf-8") as stream:
        rows = list(csv.DictReader(stream))
    return summary, rows


def test_the_estimates_carry_what_the_advisor_would_have_done(replayed, capsys):
    path, out = replayed
    summary, rows = _run(path, out, capsys)
    assert tuple(rows[0]) == ESTIMATE_COLUMNS
    assert ESTIMATE_COLUMNS[-len(SHADOW_COLUMNS) :] == SHADOW_COLUMNS
    before = [r for r in rows if float(r["time_s"]) < CONTROLLED_FROM_S]
    cooling = [r for r in rows if float(r["time_s"]) >= CONTROLLED_FROM_S]
    assert all(r["proposal_setpoint_c"] == "" and r["guard_mode"] == "standby" for r in before)
    assert all(r["proposal_setpoint_c"] != "" for r in cooling)
    written = [r for r in cooling if r["guard_write"] == "1"]
    assert len(written) > 0.9 * len(cooling)
    assert summary["advised_s"] == pytest.approx(len(written), abs=2)  # 1 s samples
    assert summary["proposals"] == pytest.approx(len(cooling) / 30.0, abs=1)
    # the summary counts the raised events of the CSV
    raised = Counter(
        e.split(":")[0] for r in rows for e in r["alarm_events"].split(";") if e.endswith(":raised")
    )
    assert summary["alarms_raised"] == dict(sorted(raised.items()))


def test_the_shadow_run_is_the_live_advisor_on_the_kernels_estimates(
    shadow_batch, replayed, capsys
):
    """The live pipeline on the same samples (the working setpoint unknown, permissive on, as
    shadow mode assumes) proposes nearly the same setpoints: the only difference is the
    forecast's starting covariance (variances and the T-c covariance only in replay)."""
    setup, samples, _path = shadow_batch
    path, out = replayed
    _summary, rows = _run(path, out, capsys)
    pipeline = UnitPipeline(setup)
    live = [pipeline.step(s, DcsInputs(permissive=True)) for s in samples]
    shadow = np.array([float(r["proposal_setpoint_c"] or "nan") for r in rows])
    live_c = np.array(
        [np.nan if r.proposal is None else r.proposal.setpoint_k - 273.15 for r in live]
    )
    np.testing.assert_array_equal(np.isnan(shadow), np.isnan(live_c))
    assert np.nanmax(np.abs(shadow - live_c)) < 0.05
    assert [r["guard_mode"] for r in rows] == [r.decision.mode.value for r in live]


def test_no_advisor_leaves_the_shadow_columns_blank(replayed, capsys):
    path, out = replayed
    summary, rows = _run(path, out, capsys, "--no-advisor")
    assert all(r[c] == "" for r in rows for c in SHADOW_COLUMNS)
    assert summary["alarms_raised"] is None
    assert summary["advised_s"] is None
