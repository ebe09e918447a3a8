"""A synthetic scene for the live page: a short seeded batch of the demo unit through the real
soft sensor, guard and alarm engine, as ``UnitOutputs`` the service would publish.

The batch comes from the estimation model itself (``tests.synthetic``) and the proposals are
made up (a setpoint half a kelvin below the estimate, "synthetic proposal"): this shows and
tests the page, not the estimate or the law. Invented data, for tests and demonstrations only.

Run it to look at the page without the service (Ctrl-C stops)::

    python -m tests.shell.live.scene --port 8730 [--login]

With ``--login`` it asks for a password (never shown or logged) and makes the users
``demo-operator`` (operator) and ``demo-viewer`` (viewer) with it, in a temporary users file.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import dataclasses
import getpass
import os
import tempfile
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from controller.alarm_set import (
    AlarmInputs,
    alarm_readings,
    crystallizer_alarm_engine,
    crystallizer_alarms,
)
from controller.alarms import AlarmDefinition, AlarmEngine, AlarmEvent
from controller.guard import Guard, GuardInputs
from controller.law import LawMode, Proposal
from sensor.shell.config import SiteConfig
from sensor.shell.live.server import LivePage, site_diagrams
from sensor.shell.opcua.advisor_server import OperatorAction, UnitOutputs
from sensor.shell.opcua.users import UserRecord, hash_password, write_users
from sensor.softsensor import SoftSensor
from sensor.units import ZERO_CELSIUS_K
from tests.synthetic import cooling_batch, demo_setup, demo_site_and_zone

UNIT = "CR-301"
START_S = datetime(2026, 3, 14, 6, 0, tzinfo=UTC).timestamp()
"""The scene's first step [s since the Unix epoch] (an invented morning)."""
PHASE = "controlled-cooling"
ALARM = "communication-lost"


@dataclass
class Scene:
    """The demo site, its alarms, and the steps of one unit; ``act`` is the operator handler."""

    site: SiteConfig
    definitions: tuple[AlarmDefinition, ...]
    engine: AlarmEngine
    outputs: list[UnitOutputs]
    actions: list[OperatorAction] = field(default_factory=list)

    @property
    def time_s(self) -> float:
        return self.outputs[-1].time_s

    async def act(self, action: OperatorAction) -> tuple[AlarmEvent, ...]:
        """Carry an operator's action out on the alarm engine, one second after the last step."""
        self.actions.append(action)
        when = self.time_s + len(self.actions)
        if action.action == "acknowledge":
            return self.engine.acknowledge(action.alarm, when, action.comment)
        if action.action == "shelve":
            return self.engine.shelve(action.alarm, when, action.duration_s, action.comment)
        return self.engine.unshelve(action.alarm, when, action.comment)

    def current(self) -> UnitOutputs:
        """The last step again, with the alarms as they stand now (after actions)."""
        statuses = tuple(self.engine.status(d.name) for d in self.definitions)
        return dataclasses.replace(self.outputs[-1], alarms=statuses, events=())

    def page(self, **live_changes: object) -> LivePage:
        """The live page of this scene (on a free loopback port unless ``port`` is given)."""
        live = dataclasses.replace(self.site.live, **{"port": 0, **live_changes})
        _site, zone = demo_site_and_zone()
        return LivePage(
            live, site_diagrams(self.site, zone), self.definitions, self.act, title="MB-417 demo"
        )


def demo_scene(
    hours: float = 0.5, every_s: int = 10, lost_from: float = 0.8, seed: int = 17
) -> Scene:
    """The scene: a ``hours`` batch stepped every second, published every ``every_s`` steps;
    from the share ``lost_from`` of the batch on the link to the plant is lost (so the
    ``communication-lost`` alarm raises after its on-delay)."""
    site, _zone = demo_site_and_zone()
    setup = demo_setup()
    batch = cooling_batch(
        setup, np.random.default_rng(seed), hours=hours, start_temp_c=51.0, seed_at_s=300.0
    )
    sensor = SoftSensor(setup)
    guard = Guard(site.guard.limits(site.controller.update_interval_s))
    settings = site.alarms.settings(site.guard.heating_phases)
    definitions = crystallizer_alarms(settings)
    engine = crystallizer_alarm_engine(settings)
    outputs = []
    lost_at = lost_from * len(batch.samples)
    for i, sample in enumerate(batch.samples):
        step = sensor.step(sample)
        if i % every_s or step.estimates is None:
            continue
        time_s = START_S + sample.time_s
        row = step.estimates.row(0)
        temp_k = row["temp_c"] + ZERO_CELSIUS_K
        proposal = Proposal(
            time_s, temp_k - 0.5, 0.3 / 60.0, LawMode.TRACKING, 0.04, temp_k - 0.5,
            row["margin_sigma"], "synthetic proposal (test scene)",
        )  # fmt: skip
        lost = i >= lost_at
        decision = guard.step(
            GuardInputs(
                time_s=time_s,
                phase=PHASE,
                active_setpoint_k=temp_k,
                permissive=False,
                health_good=not lost,
            ),
            proposal.setpoint_k,
        )
        inputs = AlarmInputs(
            phase=PHASE, sigma=row["sigma"], sigma_limit=row["sigma_limit"], temp_k=temp_k,
            setpoint_k=float("nan"), conc=row["conc"], analyzer_bias=row["analyzer_bias"],
            analyzer_stale=step.conc_stale, analyzer_frozen=False, analyzer_bad=False,
            estimate_inconsistent=False, solubility_extrapolated=bool(row["extrapolated"]),
            communication_lost=lost,
        )  # fmt: skip
        events = engine.update(time_s, PHASE, alarm_readings(inputs, settings))
        statuses = tuple(engine.status(d.name) for d in definitions)
        outputs.append(
            UnitOutputs(time_s, step, proposal, decision, statuses, events, not lost, lost)
        )
    return Scene(site, definitions, engine, outputs)


def users_file(folder: Path, password: str) -> Path:
    """A users file with ``demo-operator`` (operator) and ``demo-viewer`` (viewer)."""
    file = folder / "users"
    write_users(
        file,
        [
            UserRecord("demo-operator", "operator", hash_password(password, os.urandom(16))),
            UserRecord("demo-viewer", "viewer", hash_password(password, os.urandom(16))),
        ],
    )
    return file


async def _serve(port: int, login: bool) -> None:
    scene = demo_scene(hours=1.0)
    with tempfile.TemporaryDirectory() as folder:
        changes: dict[str, object] = {"port": port}
        if login:
            changes["users_file"] = users_file(Path(folder), getpass.getpass("demo password: "))
        async with scene.page(**changes) as page:
            print(f"serving the synthetic scene at {page.url} (Ctrl-C stops)")
            half = len(scene.outputs) // 2
            for outputs in scene.outputs[:half]:
                page.publish(UNIT, outputs)
            for outputs in scene.outputs[half:]:
                await asyncio.sleep(1.0)
                page.publish(UNIT, outputs)
            while True:
                await asyncio.sleep(1.0)
                page.publish(UNIT, dataclasses.replace(scene.current(), time_s=scene.time_s))


def main() -> None:
    parser = argparse.ArgumentParser(description="Serve the live page with a synthetic scene.")
    parser.add_argument("--port", type=int, default=8730)
    parser.add_argument("--login", action="store_true", help="make two demo users")
    options = parser.parse_args()
    with contextlib.suppress(KeyboardInterrupt):
        asyncio.run(_serve(options.port, options.login))


if __name__ == "__main__":
    main()
