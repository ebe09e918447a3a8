"""``sigmatrack demo`` stopped by Ctrl-C (SIGINT) part-way through its batch: it says so,
keeps what it stored, ends its plant process and exits with status 130 (the shell's code for
SIGINT). A subprocess on loopback, the demo's own plant process under it."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import threading

from sensor.shell.demo_command import DB_NAME, EXIT_INTERRUPTED

STEPPING_S = 180.0
"""Longest wall time for the demo to compile, start its plant and show a first estimate (1.5 h
into the batch, 11 s of wall time at 500x) [s]."""
STOPPING_S = 300.0
"""Longest wall time from SIGINT to exit (the batch report is written; its kernel may compile
on a fresh install) [s]."""


def test_ctrl_c_stops_the_demo_cleanly_and_keeps_what_it_stored(tmp_path):
    demo = subprocess.Popen(
        [
            *(sys.executable, "-m", "sensor.shell.cli", "demo", "--out", str(tmp_path)),
            *("--live-port", "-1", "--speed", "500"),
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
        start_new_session=True,  # its own process group: the plant process can be looked for
    )
    lines: list[str] = []
    # a demo that hangs without a line would block the reading: killed at the deadline
    watchdog = threading.Timer(STEPPING_S, os.killpg, (demo.pid, signal.SIGKILL))
    watchdog.start()
    estimating = False
    try:
        assert demo.stdout is not None
        for line in demo.stdout:  # ends at the demo's end, or when the watchdog kills it
            lines.append(line)
            estimating = line.startswith("CR-301") and " sigma " in line
            if estimating:
                break
        watchdog.cancel()
        assert estimating, "".join(lines)  # the filter runs: its estimates are being stored
        demo.send_signal(signal.SIGINT)
        rest, _ = demo.communicate(timeout=STOPPING_S)
    finally:
        if demo.poll() is None:
            os.killpg(demo.pid, signal.SIGKILL)
            demo.wait(30.0)
    output = "".join(lines) + rest
    assert demo.returncode == EXIT_INTERRUPTED, output[-3000:]
    assert "stopped before the batch ended" in output
    assert "Traceback" not in output
    with sqlite3.connect(tmp_path / DB_NAME) as store:
        (samples,) = store.execute("SELECT count(*) FROM samples").fetchone()
        (estimates,) = store.execute("SELECT count(*) FROM estimates").fetchone()
    assert samples > 0
    assert estimates > 0
    try:  # nothing of the demo's process group is left: the plant process ended too
        os.killpg(demo.pid, 0)
    except ProcessLookupError:
        pass
    else:
        os.killpg(demo.pid, signal.SIGKILL)
        raise AssertionError("the demo left a process behind")
