"""A batch from the store: its raw samples replay exactly as the same batch's historian file,
and its report shows the proposals and alarm events the live service recorded."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest
from asyncua.ua.status_codes import StatusCodes

from sensor.shell.cli import main
from sensor.shell.report.sources import load_views
from sensor.shell.store import (
    AlarmEventRow,
    BatchRow,
    ProposalRow,
    SampleRow,
    Store,
    StoreError,
    read_batch,
)
from sensor.shell.storebatch import stored_batch
from tests.conftest import DEMO_SITE
from tests.shell.report.pages import external_references, parse
from tests.shell.report.test_report_command import assert_numbers_are_the_summary, replay_json
from tests.shell.store.test_database import write_rows
from tests.synthetic import demo_setup, demo_site_and_zone

ORIGIN_S = 1.7e9  # where tests.synthetic.write_historian_csv puts a batch's time 0


def _time(time_s: float) -> datetime:
    # milliseconds, as the historian file writes them
    return datetime.fromtimestamp(round((ORIGIN_S + time_s) * 1000) / 1000, UTC)


def _rows(batch_id: str, samples, phase_as_text: bool) -> list:
    site, _ = demo_site_and_zone()
    unit = site.unit[0]
    rows: list = [BatchRow(unit.id, batch_id, _time(samples[0].time_s), _time(samples[-1].time_s))]
    phase = None
    for s in samples:
        when = _time(s.time_s)
        for signal, reading in (("temp", s.temp), ("jacket_temp", s.jacket_temp), ("conc", s.conc)):
            if reading is None:
                continue
            value = reading.value * 100.0 if signal == "conc" else reading.value - 273.15
            rows.append(SampleRow(unit.id, signal, when, value, reading.status_code))
        if s.phase != phase:
            phase = s.phase
            if phase_as_text:
                rows.append(SampleRow(unit.id, "phase", when, None, 0, phase))
            else:
                rows.append(SampleRow(unit.id, "phase", when, float(unit.phase_values[phase])))
    return rows


def _store(folder, rows) -> str:
    url = f"sqlite:///{folder / 'plant.db'}"
    with Store(url) as store:
        store.ensure_schema()
        write_rows(store, rows)
    return url


@pytest.fixture(scope="module")
def text_phase_store_url(synthetic, tmp_path_factory):
    """B0, its phase stored as our phase names (the synthetic batches share their times, so
    each gets a store of its own)."""
    rows = _rows("B0", synthetic.samples["B0"], phase_as_text=True)
    return _store(tmp_path_factory.mktemp("store-b0"), rows)


@pytest.fixture(scope="module")
def store_url(synthetic, tmp_path_factory):
    """F, its phase stored as the DCS's values, with proposals and alarm events."""
    rows = _rows("F", synthetic.samples["F"], phase_as_text=False)
    start = _time(synthetic.samples["F"][0].time_s)
    rows += [
        ProposalRow("CR-301", start + timedelta(minutes=m), "advising", "", True, 320.0 - m / 10)
        for m in range(10, 60, 5)
    ]
    rows += [
        AlarmEventRow("CR-301", "sigma-high", start + timedelta(minutes=20), "raised",
                      "unacknowledged", "medium", "sigma high"),
        AlarmEventRow("CR-301", "sigma-high", start + timedelta(minutes=40), "cleared",
                      "normal", "medium", "sigma high"),
        AlarmEventRow("CR-301", "sigma-high-high", start + timedelta(minutes=30), "raised",
                      "unacknowledged", "high", "sigma at the limit"),
    ]  # fmt: skip
    return _store(tmp_path_factory.mktemp("store-f"), rows)


@pytest.mark.parametrize("batch_id", ["F", "B0"])  # phase stored as value, and as a name
def test_a_stored_batch_replays_as_its_historian_file(
    synthetic, store_url, text_phase_store_url, batch_id, capsys
):
    from_file = replay_json([synthetic.files[batch_id]], capsys)[batch_id]
    errors = []
    url = store_url if batch_id == "F" else text_phase_store_url
    loaded = load_views(str(DEMO_SITE), [], [batch_id], on_error=errors.append, store_url=url)
    assert errors == []
    (view,) = loaded.views
    from_store = view.summary.as_json()
    assert from_store.pop("file") == "store:" + batch_id
    from_file.pop("file")
    assert from_store == from_file  # exactly: the same replay of the same readings


def test_the_report_of_a_stored_batch_shows_what_was_recorded_live(
    synthetic, store_url, tmp_path, capsys
):
    out = tmp_path / "stored.html"
    status = main(
        ["report", "--batch", "F", "--store", store_url, "--config", str(DEMO_SITE),
         "--out", str(out)]
    )  # fmt: skip
    assert status == 0
    page = out.read_text(encoding="utf-8")
    assert external_references(page) == []
    values = parse(page).values
    assert values["alarms_raised.sigma-high"] == ["1"]
    assert values["alarms_raised.sigma-high-high"] == ["1"]
    assert "Alarm events recorded live" in page
    assert "▲ HIGH" in page and "◆ MEDIUM" in page  # noqa: PT018
    assert f"{store_url}, batch F" in page
    capsys.readouterr()
    summary = replay_json([synthetic.files["F"]], capsys)["F"]
    assert_numbers_are_the_summary(values, summary, shadow_alarms=False)


def test_an_unknown_stored_batch_is_one_line(store_url, tmp_path, capsys):
    status = main(
        ["report", "--batch", "B9", "--store", store_url, "--config", str(DEMO_SITE),
         "--out", str(tmp_path / "r.html")]
    )  # fmt: skip
    assert status == 2
    assert capsys.readouterr().err.strip() == f"sigmatrack: error: {store_url}: no batch 'B9'"


def test_a_stored_batch_of_a_unit_the_site_lacks_is_refused(tmp_path):
    url = f"sqlite:///{tmp_path / 'other.db'}"
    t0 = datetime(2026, 3, 14, 6, tzinfo=UTC)
    with Store(url) as store:
        store.ensure_schema()
        write_rows(store, [BatchRow("CR-999", "X1", t0), SampleRow("CR-999", "temp", t0, 50.0)])
        record = read_batch(store, "X1")
    site, _ = demo_site_and_zone()
    with pytest.raises(StoreError, match=r"batch 'X1' ran on unit 'CR-999', which the site file"):
        stored_batch(record, site, lambda _: demo_setup(), url)


def test_a_phase_the_unit_does_not_know_is_refused(tmp_path):
    url = f"sqlite:///{tmp_path / 'phase.db'}"
    t0 = datetime(2026, 3, 14, 6, tzinfo=UTC)
    rows = [
        BatchRow("CR-301", "X2", t0),
        SampleRow("CR-301", "temp", t0, 50.0, StatusCodes.Good),
        SampleRow("CR-301", "phase", t0, 42.0),
    ]
    with Store(url) as store:
        store.ensure_schema()
        write_rows(store, rows)
        record = read_batch(store, "X2")
    site, _ = demo_site_and_zone()
    with pytest.raises(StoreError, match=r"phase sample at 2026-03-14T06:00:00\+00:00: '42' is"):
        stored_batch(record, site, lambda _: demo_setup(), url)
