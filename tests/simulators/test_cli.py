"""``sigmatrack simulate``: offline to CSV, errors on one line, and ``--serve`` as a process."""

from __future__ import annotations

import asyncio
import csv
import os
import signal
import subprocess
import sys

import pytest
from asyncua import Client

from sensor.shell.cli import main
from tests.conftest import CONFIG_DIR, DEMO_SITE
from tests.simulators.test_server import free_port


@pytest.fixture(scope="module")
def short_site(tmp_path_factory):
    """The demo site file with short holds and absolute data paths, in a temporary folder."""
    text = DEMO_SITE.read_text(encoding="utf-8")
    for name in ("demo-solubility.csv", "demo-cloud-points.csv"):
        text = text.replace(f'"{name}"', f'"{(CONFIG_DIR / name).as_posix()}"')
    for old, new in (
        ("dissolve_hold_s = 1800.0", "dissolve_hold_s = 600.0"),
        ("seed_hold_s = 1800.0", "seed_hold_s = 300.0"),
        ("cooling_duration_s = 21600.0", "cooling_duration_s = 3600.0"),
        ("final_hold_s = 3600.0", "final_hold_s = 600.0"),
    ):
        assert text.count(old) == 1
        text = text.replace(old, new)
    path = tmp_path_factory.mktemp("site") / "short-site.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_help(capsys):
    with pytest.raises(SystemExit) as done:
        main(["simulate", "--help"])
    assert done.value.code == 0
    out = capsys.readouterr().out
    for words in ("--faults SPEC", "--serve", "--mismatch F,K", "safety instrumented system"):
        assert words in out


def test_offline_batch_writes_historian_and_truth(short_site, tmp_path, capsys):
    out, truth = tmp_path / "batch.csv", tmp_path / "truth.csv"
    status = main(
        [
            "simulate",
            "--config",
            str(short_site),
            "--out",
            str(out),
            "--truth",
            str(truth),
            "--seed",
            "9",
            "--faults",
            "dropout@1h+5min",
            "--mismatch",
            "0.2,0.5",
            "--speed-test",
        ]
    )
    assert status == 0
    printed = capsys.readouterr().out
    for words in (
        "Simulated batch CR-301-20260314-0600",
        "solute balance closes",
        "x real time",
        "safety instrumented system",
    ):
        assert words in printed
    lines = out.read_text(encoding="utf-8").splitlines()
    comments = [line for line in lines if line.startswith("#")]
    assert "# seed: 9" in comments
    assert any(line.startswith("# site_sha256: ") for line in comments)
    assert "# faults: dropout/conc@3600s+300s" in comments
    rows = list(csv.DictReader(line for line in lines if not line.startswith("#")))
    assert list(rows[0])[:3] == ["timestamp", "CR301.TT3011.PV", "CR301.TT3011.PV.quality"]
    assert "CR301.AT3015.PV.quality" in rows[0]
    assert "CR301.ADVISOR_HEARTBEAT" in rows[0]
    assert rows[0]["timestamp"] == "2026-03-14T06:00:01.000Z"
    assert [r["CR301.AT3015.PV"] for r in rows[3599:3899]] == [""] * 300  # the dropout
    truth_rows = list(
        csv.DictReader(
            line
            for line in truth.read_text(encoding="utf-8").splitlines()
            if not line.startswith("#")
        )
    )
    assert len(truth_rows) == len(rows)
    for column in (
        "time_s",
        "timestamp",
        "temp_c",
        "conc",
        "conc_sat",
        "sigma",
        "solids_kg_per_kg_solvent",
        "mean_size_um",
        "phase",
        "analyzer_bias",
    ):
        assert column in truth_rows[0]
    assert truth_rows[-1]["phase"] == "discharge"


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--faults", "melt@1h+1h"], "sigmatrack: error: --faults 'melt@1h+1h': unknown fault"),
        (["--mismatch", "0.9,0.1"], "sigmatrack: error: --mismatch '0.9,0.1': F must be 0 to 0.5"),
        (["--unit", "CR-999"], "sigmatrack: error: no unit 'CR-999'"),
        (["--start", "yesterday"], "sigmatrack: error: --start: not an ISO 8601 time"),
    ],
)
def test_bad_options_give_one_line_and_exit_2(short_site, tmp_path, capsys, extra, message):
    args = ["simulate", "--config", str(short_site), "--out", str(tmp_path / "x.csv"), *extra]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.startswith(message)
    assert err.count("\n") == 1


def test_a_site_file_without_a_simulator_table_is_refused(tmp_path, capsys, short_site):
    text = short_site.read_text(encoding="utf-8")
    site = tmp_path / "site.toml"
    without = text[: text.index("[simulator]")] + text[text.index("[[unit]]") :]
    site.write_text(without, encoding="utf-8")
    assert main(["simulate", "--config", str(site), "--out", str(tmp_path / "x.csv")]) == 2
    assert "simulator: missing: the plant simulator needs a [simulator] table" in (
        capsys.readouterr().err
    )


def test_serve_refuses_an_endpoint_beyond_loopback(short_site, capsys):
    args = [
        "simulate",
        "--config",
        str(short_site),
        "--serve",
        "--endpoint",
        "opc.tcp://192.0.2.1:4840/plant",
    ]
    assert main(args) == 2
    assert "listens on 127.0.0.1 only" in capsys.readouterr().err


def test_serve_runs_as_a_process_and_stops_on_sigterm(short_site):
    endpoint = f"opc.tcp://127.0.0.1:{free_port()}/plant"
    process = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "sensor.shell.cli",
            "simulate",
            "--config",
            str(short_site),
            "--serve",
            "--endpoint",
            endpoint,
            "--speed",
            "1000",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=os.environ | {"PYTHONUNBUFFERED": "1"},
    )
    try:
        first = process.stdout.readline()  # blocks until the server is up (or the process dies)
        assert first.startswith(f"serving CR-301 at {endpoint}, 1000x"), (
            first + process.stderr.read()
        )

        async def read_temperature():
            async with Client(endpoint, timeout=10) as client:
                node = client.get_node("ns=2;s=CR301.TT3011.PV")
                for _ in range(100):  # at most 5 s for the first sample
                    value = await node.read_data_value(raise_on_bad_status=False)
                    if value.Value.Value is not None:
                        return value.Value.Value
                    await asyncio.sleep(0.05)
            raise AssertionError("no temperature served")

        assert 10.0 < asyncio.run(asyncio.wait_for(read_temperature(), 30.0)) < 80.0
        process.send_signal(signal.SIGTERM)
        out, _ = process.communicate(timeout=20)
        assert process.returncode == 0
        assert "stopped" in out
    finally:
        if process.poll() is None:
            process.kill()
            process.communicate(timeout=10)
