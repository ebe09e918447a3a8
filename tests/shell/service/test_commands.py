"""``sigmatrack run`` and ``demo`` refuse what they cannot use with one line and exit status 2,
the live page's option turns the page on for one run, and the store at the start: away is no
reason not to start, another schema version is; the log leaves lost-link tracebacks out."""

from __future__ import annotations

import asyncio
import logging
from types import SimpleNamespace

import pytest

from sensor.shell.cli import main
from sensor.shell.config import load_site_file
from sensor.shell.demo_command import HICCUP_WALL_S, BatchWatch, demo_site, with_changes
from sensor.shell.run_command import ServiceStartError, configure_logging, with_live_port
from sensor.shell.service.service import Service
from sensor.shell.store import Store, StoreError
from tests.conftest import DEMO_SITE
from tests.shell.store.tcpproxy import free_port


def test_run_with_a_bad_site_file_says_where_and_exits_2(tmp_path, capsys):
    bad = tmp_path / "site.toml"
    bad.write_text(DEMO_SITE.read_text().replace("tick_s = 1.0", "tick_s = -1.0"))
    assert main(["run", "--config", str(bad)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert err[0].startswith("sigmatrack: error: ")
    assert "service.tick_s" in err[0]


def test_a_checkpoint_interval_shorter_than_the_tick_is_refused(tmp_path, capsys):
    bad = tmp_path / "site.toml"
    text = DEMO_SITE.read_text().replace(
        "checkpoint_interval_s = 60.0", "checkpoint_interval_s = 0.5"
    )
    bad.write_text(text)
    assert main(["run", "--config", str(bad)]) == 2
    assert "must be at least tick_s" in capsys.readouterr().err


def test_the_demo_bridges_a_pause_of_a_busy_machine_at_any_speed(tmp_path):
    site = load_site_file(DEMO_SITE)
    assert site.validation.stale_after_s == 120.0
    fast = demo_site(site, tmp_path, 200.0)
    assert fast.validation.stale_after_s == HICCUP_WALL_S * 200.0 > 120.0
    assert fast.validation.frozen_after_s == site.validation.frozen_after_s
    assert demo_site(site, tmp_path, 20.0).validation.stale_after_s == 120.0  # 6 s of wall time
    assert fast.path == site.path
    assert fast.sha256 == site.sha256


def test_the_demo_ends_after_its_last_phase_without_warning_of_the_lost_link(caplog):
    def step(phase: str, lost: bool = False) -> SimpleNamespace:
        sample = SimpleNamespace(phase=phase)
        return SimpleNamespace(
            batch_id="B1", snapshot=SimpleNamespace(sample=sample, communication_lost=lost)
        )

    link = logging.getLogger("sensor.shell.opcua.plant_client")
    watch = BatchWatch(asyncio.Event())
    assert watch.link_log is link
    try:
        watch(step("controlled-cooling", lost=True))  # a lost link mid-batch: warned, no stop
        assert not watch.stop.is_set()
        assert link.getEffectiveLevel() <= logging.WARNING
        watch(step("discharge"))
        with caplog.at_level(logging.WARNING):
            link.warning("plant link lost")
        assert "plant link lost" not in caplog.text
        watch(step("discharge", lost=True))
        assert watch.stop.is_set()
        assert watch.batch_id == "B1"
    finally:
        link.setLevel(logging.NOTSET)


def test_demo_refuses_a_speed_it_cannot_keep(capsys):
    assert main(["demo", "--speed", "5000"]) == 2
    assert "--speed must be 20 to 1000" in capsys.readouterr().err


def test_the_live_port_option_turns_the_page_on_for_one_run():
    site = load_site_file(DEMO_SITE)
    assert not site.live.enabled
    on = with_live_port(site, 0)
    assert on.live.enabled
    assert on.live.port == 0
    assert on.path == site.path  # still names its file, for the audit trail
    assert on.sha256 == site.sha256
    assert with_live_port(site, None) is site
    with pytest.raises(ServiceStartError, match="--live-port must be 0 to 65535"):
        with_live_port(site, 70000)


def test_a_database_away_at_the_start_is_no_reason_not_to_start(caplog):
    port = free_port()  # nothing listens there
    site = with_changes(
        load_site_file(DEMO_SITE),
        store={"url": f"postgresql+psycopg://postgres@127.0.0.1:{port}/test"},
    )
    service = Service(site)
    service._resume_units()
    assert "every unit starts afresh" in caplog.text
    assert not any(unit.resumed for unit in service.units)


def test_a_store_of_another_schema_version_stops_the_start(tmp_path):
    url = f"sqlite:///{tmp_path / 'old.db'}"
    with Store(url) as store:
        store.ensure_schema()
        with store.engine.begin() as conn:
            conn.exec_driver_sql("UPDATE store_meta SET value = '9' WHERE key = 'schema_version'")
    site = with_changes(load_site_file(DEMO_SITE), store={"url": url})
    with pytest.raises(StoreError, match="holds store schema version 9"):
        Service(site)._resume_units()


def test_asyncua_tracebacks_of_a_lost_link_are_left_to_the_plant_client(caplog):
    configure_logging("INFO")
    session = logging.getLogger("asyncua.client.ua_session.UaSession")
    for error in (ConnectionError("Connection is closed"), ValueError("a real fault")):
        try:
            raise error
        except Exception:
            session.exception("Publish iteration crashed; retrying in 1s")
    tracebacks = [r.exc_info[1] for r in caplog.records if r.name == session.name]
    assert [type(e) for e in tracebacks] == [ValueError]
