"""``sigmatrack check`` against real servers on loopback: a plant that is right, a plant with
a problem on every line, the simulator's own plant server, a server that is not there, and the
security commands (certificate, users)."""

from __future__ import annotations

import asyncio
import io
import re
from datetime import UTC, datetime, timedelta

import pytest
from asyncua import ua

from sensor.shell.cli import main
from sensor.shell.opcua.users import load_users, verify_password
from simulators.plant import PlantSimulation
from simulators.shell.server import PlantServer
from tests.conftest import DEMO_SITE
from tests.shell.opcua.conftest import free_port, loopback, run
from tests.shell.opcua.miniplant import MiniPlant

DEMO_TEXT = DEMO_SITE.read_text(encoding="utf-8")


def site_file(tmp_path, endpoint, *edits):
    """The demo site file, pointing at ``endpoint``, with ``(old, new)`` edits, on disk."""
    text = DEMO_TEXT.replace('"opc.tcp://127.0.0.1:4840/plant"', f'"{endpoint}"')
    for name in ("demo-solubility.csv", "demo-cloud-points.csv"):
        text = text.replace(f'"{name}"', f'"{DEMO_SITE.parent / name}"')
    for old, new in edits:
        assert text.count(old) == 1, old
        text = text.replace(old, new)
    path = tmp_path / "site.toml"
    path.write_text(text, encoding="utf-8")
    return path


async def _fill(plant, now, **overrides):
    """Good, recent values for every tag."""
    values = {
        "temp": 41.2,
        "jacket_temp": 35.0,
        "jacket_setpoint": 34.5,
        "conc": 11.3,
        "phase": 6,
        "batch_id": "CR-301-20260314-0600",
        "permissive": False,
        "remote_setpoint": 41.0,
        "heartbeat": 0,
    }
    for signal, value in values.items():
        value, source, status = overrides.get(signal, (value, now, ua.StatusCodes.Good))
        await plant.set(signal, value, source, status)


def _check(path, capsys):
    status = main(["check", "--config", str(path)])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def test_a_plant_that_fits_the_site_file(tmp_path, demo_site, capsys):
    endpoint = loopback()
    path = site_file(tmp_path, endpoint)

    async def exercise():
        async with MiniPlant(demo_site.unit[0], endpoint) as plant:
            await _fill(plant, datetime.now(UTC))
            result = await asyncio.to_thread(_check, path, capsys)
            return result, plant.writes

    (status, out, _err), writes = run(exercise())
    assert status == 0, out
    assert "No problems found." in out
    assert "(read-only: nothing is written)" in out
    assert writes == []  # read-only, for real
    assert re.search(
        r"temp\s+CR301\.TT3011\.PV\s+Double\s+°C\s+-20 to 120\s+Good\s+41\.2\s+ok", out
    )
    assert "opcua.write_to_dcs = false: nothing is written until it is set to true" in out
    assert "CR-301 remote_setpoint -> CR301.TIC3011.RSP (Double, °C)" in out
    assert "only while CR301.ADVISOR_PERMIT is true (it reads False now)" in out
    assert "inside the guard: 10 to 80 °C, cooling at most 1 K/min and 0.5 K per update" in out
    assert "set the DCS's watchdog to drop the permissive" in out
    assert "safety instrumented system keeps protection" in out


def test_one_line_per_problem(tmp_path, demo_site, capsys):
    endpoint = loopback()
    path = site_file(
        tmp_path,
        endpoint,
        ("write_to_dcs = false", "write_to_dcs = true"),
        ('jacket_setpoint = "CR301.TIC3012.SP"', 'jacket_setpoint = "CR301.NO_SUCH_TAG"'),
    )
    now = datetime.now(UTC)
    plant_kwargs = {
        "units": {"conc": "mg/L"},
        "ranges": {"jacket_temp": (250.0, 400.0)},  # kelvin, say
        "types": {"heartbeat": ua.VariantType.Double},
        "writable": ("permissive", "heartbeat"),
    }

    async def exercise():
        async with MiniPlant(demo_site.unit[0], endpoint, **plant_kwargs) as plant:
            await _fill(
                plant,
                now,
                temp=(41.2, now - timedelta(seconds=600), ua.StatusCodes.Good),
                jacket_temp=(35.0, now, ua.StatusCodes.BadSensorFailure),
                conc=(11.3, now + timedelta(seconds=120), ua.StatusCodes.Good),
                phase=(42, now, ua.StatusCodes.Good),
                heartbeat=(0.0, now, ua.StatusCodes.Good),
            )
            return await asyncio.to_thread(_check, path, capsys)

    status, out, _err = run(exercise())
    assert status == 1
    problems = out.split("problem(s):\n", 1)[1].splitlines()[:-1]
    expected = [
        r"CR-301 temp \(CR301\.TT3011\.PV\): source timestamp 60\d s old",
        r"CR-301 jacket_temp \(CR301\.TT3012\.PV\): EURange \[250, 400\] does not overlap "
        r"validation\.temp_range_c",
        r"CR-301 jacket_temp \(CR301\.TT3012\.PV\): current quality BadSensorFailure",
        r"CR-301 conc \(CR301\.AT3015\.PV\): EngineeringUnits 'mg/L', the site file expects g/100g",
        r"CR-301 conc \(CR301\.AT3015\.PV\): source timestamp 1[12]\d s ahead of this machine's",
        r"CR-301 jacket_setpoint \(CR301\.NO_SUCH_TAG\): no such node ns=2;s=CR301\.NO_SUCH_TAG",
        r"CR-301 phase \(CR301\.PHASE\): phase value 42 is not in the unit's phase_values",
        r"CR-301 remote_setpoint \(CR301\.TIC3011\.RSP\): not writable for sigmatrack's user",
        r"CR-301 heartbeat \(CR301\.ADVISOR_HEARTBEAT\): data type Double cannot hold this signal",
    ]
    assert len(problems) == len(expected), "\n".join(problems)
    for line, pattern in zip(problems, expected, strict=True):
        assert re.match(r"  " + pattern, line), line


def test_the_simulated_plant_server_passes(tmp_path, demo_site, capsys):
    # The simulator's own server (AnalogItemType variables, DataType Number): the check must
    # understand it. The batch started 59 s ago, so its clock is this machine's; the server
    # publishes from its next scans on (the analyzer reports every 10 s, 30 s late: at 60 s).
    endpoint = loopback()
    path = site_file(tmp_path, endpoint)
    start = datetime.now(UTC) - timedelta(seconds=59)
    sim = PlantSimulation.from_site(demo_site, seed=2, start=start)
    sim.advance_to(59.0)

    async def exercise():
        server = PlantServer(demo_site, [sim], endpoint=endpoint, speed=1.0)
        stop = asyncio.Event()
        async with server:
            runner = asyncio.create_task(server.run(stop))
            try:
                await asyncio.sleep(2.5)
                return await asyncio.to_thread(_check, path, capsys)
            finally:
                stop.set()
                await runner

    status, out, _err = run(exercise())
    assert status == 0, out
    assert "Number (Double)" in out


def test_no_server_is_one_line_and_status_2(tmp_path, capsys):
    path = site_file(tmp_path, f"opc.tcp://127.0.0.1:{free_port()}/plant")
    status, out, err = _check(path, capsys)
    assert status == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1
    assert re.match(r"sigmatrack: error: opc\.tcp://127\.0\.0\.1:\d+/plant: cannot connect", err)


def test_certificate_create_and_show(tmp_path, capsys):
    path = site_file(
        tmp_path,
        "opc.tcp://127.0.0.1:4840/plant",
        ('# certificate = "pki/sigmatrack-cert.der"', 'certificate = "pki/cert.der"'),
        ('# private_key = "pki/sigmatrack-key.pem"', 'private_key = "pki/key.pem"'),
    )
    status = main(["certificate", "create", "--config", str(path), "--host", "advisor01"])
    out = capsys.readouterr().out
    assert status == 0
    assert f"Made {tmp_path / 'pki' / 'cert.der'}" in out
    assert "URI          urn:sigmatrack:advisor" in out
    assert "hosts        advisor01" in out
    assert re.search(r"SHA-256      ([0-9A-F]{2}:){31}[0-9A-F]{2}", out)
    assert (tmp_path / "pki" / "key.pem").stat().st_mode & 0o777 == 0o600
    assert main(["certificate", "create", "--config", str(path)]) == 2
    assert "exists already: delete it first" in capsys.readouterr().err
    assert main(["certificate", "show", str(tmp_path / "pki" / "cert.der")]) == 0
    assert "URI          urn:sigmatrack:advisor" in capsys.readouterr().out


def test_certificate_create_needs_the_paths(tmp_path, capsys):
    path = site_file(tmp_path, "opc.tcp://127.0.0.1:4840/plant")
    assert main(["certificate", "create", "--config", str(path)]) == 2
    assert "opcua.certificate: not set" in capsys.readouterr().err


@pytest.fixture
def users_site(tmp_path):
    return site_file(
        tmp_path,
        "opc.tcp://127.0.0.1:4840/plant",
        ('security_modes = ["none"]', 'security_modes = ["sign-and-encrypt"]'),
        ('# trust_dir = "pki/trusted-clients"', 'trust_dir = "pki/trusted-clients"'),
        ('# users_file = "/etc/sigmatrack/users"', 'users_file = "users"'),
        ('# certificate = "pki/sigmatrack-cert.der"', 'certificate = "pki/cert.der"'),
        ('# private_key = "pki/sigmatrack-key.pem"', 'private_key = "pki/key.pem"'),
    )


def test_user_add_list_remove(users_site, tmp_path, capsys, monkeypatch):
    monkeypatch.setattr("sys.stdin", io.StringIO("a long operator password\n"))
    status = main(["user", "add", "shift-a", "--role", "operator", "--config", str(users_site),
                   "--password-stdin"])  # fmt: skip
    assert status == 0
    assert "shift-a is an operator" in capsys.readouterr().out
    users = load_users(tmp_path / "users")
    assert verify_password("a long operator password", users["shift-a"].password_hash)
    assert "a long operator password" not in (tmp_path / "users").read_text()
    monkeypatch.setattr("sys.stdin", io.StringIO("short\n"))
    status = main(["user", "add", "eng-b", "--role", "viewer", "--config", str(users_site),
                   "--password-stdin"])  # fmt: skip
    assert status == 2
    assert "at least 12 characters" in capsys.readouterr().err
    assert main(["user", "list", "--config", str(users_site)]) == 0
    assert capsys.readouterr().out.strip() == "shift-a  operator"
    assert main(["user", "remove", "shift-a", "--config", str(users_site)]) == 0
    assert main(["user", "remove", "shift-a", "--config", str(users_site)]) == 2
    assert "has no user 'shift-a'" in capsys.readouterr().err


@pytest.mark.parametrize("command", ["check", "certificate", "user"])
def test_help(command, capsys):
    with pytest.raises(SystemExit) as done:
        main([command, "--help"])
    assert done.value.code == 0
    assert "usage: sigmatrack" in capsys.readouterr().out
