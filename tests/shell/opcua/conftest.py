"""Fixtures of the OPC UA shell's tests: real servers on free loopback ports, a site file
pointing at them, certificates made for the test, and bounded waits.

Every server listens on 127.0.0.1 only; every wait is bounded in count and time
(:func:`wait_until`); every test runs under :func:`run`, which gives up after a wall-clock
limit. Nothing of asyncua is mocked: faults are made for real (a server stopped and started
again, its client connections closed, the network cut with a loopback proxy).
"""

from __future__ import annotations

import asyncio
import dataclasses
import socket
from collections.abc import Awaitable, Callable
from pathlib import Path

import pytest

from sensor.shell.config import SiteConfig, load_site_file
from sensor.shell.opcua.security import create_application_certificate
from simulators.plant import PlantSimulation
from simulators.settings import read_simulator_settings
from tests.conftest import DEMO_SITE
from tests.simulators.conftest import shortened


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def loopback(path: str = "plant") -> str:
    """A fresh ``opc.tcp`` endpoint on a free loopback port."""
    return f"opc.tcp://127.0.0.1:{free_port()}/{path}"


def run(coroutine: Awaitable[object], timeout_s: float = 60.0) -> object:
    """Run one test's coroutine, giving up after ``timeout_s`` wall seconds."""

    async def bounded() -> object:
        return await asyncio.wait_for(coroutine, timeout_s)

    return asyncio.run(bounded())


async def wait_until(
    predicate: Callable[[], bool], timeout_s: float, what: str, step_s: float = 0.05
) -> None:
    """Poll ``predicate`` every ``step_s`` for at most ``timeout_s`` seconds."""
    for _ in range(max(1, int(timeout_s / step_s))):
        if predicate():
            return
        await asyncio.sleep(step_s)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


def with_opcua(site: SiteConfig, **changes: object) -> SiteConfig:
    """The site with ``[opcua]`` keys changed (``server=...`` for ``[opcua.server]``)."""
    return dataclasses.replace(site, opcua=dataclasses.replace(site.opcua, **changes))


def with_server(site: SiteConfig, **changes: object) -> SiteConfig:
    """The site with ``[opcua.server]`` keys changed."""
    return with_opcua(site, server=dataclasses.replace(site.opcua.server, **changes))


@pytest.fixture(scope="session")
def demo_site() -> SiteConfig:
    return load_site_file(DEMO_SITE)


@pytest.fixture(scope="session")
def short_settings(demo_site):
    return shortened(read_simulator_settings(demo_site))


def plant_at(site: SiteConfig, settings, phase: str, seed: int = 5, faults=()) -> PlantSimulation:
    """A simulated batch of the short recipe, advanced offline to the start of ``phase``. Its
    clock is the simulation's own: tests take their sample ticks from the plant server's
    clock (``PlantServer.clock``), as the demo does."""
    sim = PlantSimulation.from_site(site, seed=seed, settings=settings, faults=faults)
    for _ in range(20_000):  # the short recipe reaches controlled cooling in about 4,100 s
        if sim.phase == phase:
            return sim
        sim.step()
    raise AssertionError(f"phase {phase} never started")


@dataclasses.dataclass(frozen=True)
class Pki:
    """sigmatrack's certificate and key, a peer's, a stranger's and trust folders."""

    folder: Path
    advisor_cert: Path
    advisor_key: Path
    peer_cert: Path
    peer_key: Path
    stranger_cert: Path
    stranger_key: Path
    trusted_by_advisor: Path
    trusted_by_peer: Path


ADVISOR_URI = "urn:sigmatrack:test:advisor"
PEER_URI = "urn:sigmatrack:test:peer"


@pytest.fixture(scope="session")
def pki(tmp_path_factory) -> Pki:
    """Certificates made with ``create_application_certificate``: the advisor's, a peer's
    (a plant server or an HMI client, trusted both ways), and a stranger's that claims the
    peer's ApplicationUri with a key of its own (trusted by nobody)."""
    folder = tmp_path_factory.mktemp("pki")
    made = {}
    for name, uri in (("advisor", ADVISOR_URI), ("peer", PEER_URI), ("stranger", PEER_URI)):
        cert, key = folder / f"{name}-cert.der", folder / f"{name}-key.pem"
        create_application_certificate(cert, key, uri, ["localhost", "127.0.0.1"], days=30)
        made[name] = (cert, key)
    trusted_by_advisor = folder / "trusted-by-advisor"
    trusted_by_peer = folder / "trusted-by-peer"
    trusted_by_advisor.mkdir()
    trusted_by_peer.mkdir()
    (trusted_by_advisor / "peer.der").write_bytes(made["peer"][0].read_bytes())
    (trusted_by_peer / "advisor.der").write_bytes(made["advisor"][0].read_bytes())
    return Pki(
        folder,
        *made["advisor"],
        *made["peer"],
        *made["stranger"],
        trusted_by_advisor,
        trusted_by_peer,
    )
