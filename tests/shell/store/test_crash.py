"""A writer process killed with SIGKILL mid-stream, and mid-drain, then restarted: afterwards
every row is in the store exactly once, with its value.

The child (:mod:`tests.shell.store.writer_child`) reports after each chunk which rows are
durable; the restarted child resumes from the last report, as the service resumes from its
last stored state, so the rows between that report and the kill are sent twice: the keys must
absorb them. The kill lands while the child is still putting rows (or, mid-drain, while the
durable queue still holds rows, which the test checks after the kill).
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import pytest

from sensor.shell.store.durable_queue import DurableQueue
from tests.conftest import REPO
from tests.shell.store.conftest import Backend, sample_rows
from tests.shell.store.tcpproxy import TcpProxy, free_port
from tests.shell.store.test_writer import expected, stored

ROWS = 20_000
DRAIN_ROWS = {"sqlite": 20_000, "postgres": 6_000}
"""Queued in parcels of 10 rows for the mid-drain kill: 2,000 (600) transactions take about a
second (three, through the proxy) to drain here, while the kill follows the child's first report
of progress within milliseconds; the test checks afterwards that the queue was neither full nor
empty."""
WAIT_S = 60.0


class Child:
    """A running writer_child, read line by line (bounded)."""

    def __init__(self, backend: Backend, queue_dir: Path, *options: str) -> None:
        command = [
            sys.executable,
            "-m",
            "tests.shell.store.writer_child",
            "--url",
            backend.url,
            "--queue-dir",
            str(queue_dir),
            *(["--schema", backend.schema] if backend.schema else []),
            *options,
        ]
        self.process = subprocess.Popen(
            command, cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
        )
        self.lines: list[str] = []

    def read_until(self, stop: Callable[[str], bool]) -> str:
        """Lines until one satisfies ``stop`` (returned); fails if the child ends first."""
        deadline = time.monotonic() + WAIT_S
        assert self.process.stdout is not None
        while time.monotonic() < deadline:
            line = self.process.stdout.readline().strip()
            if not line:
                self.process.wait(WAIT_S)
                pytest.fail(f"child ended ({self.process.returncode}): {self._stderr()}")
            self.lines.append(line)
            if stop(line):
                return line
        pytest.fail(f"no line wanted from the child within {WAIT_S} s; last: {self.lines[-3:]}")

    def kill(self) -> None:
        self.process.send_signal(signal.SIGKILL)
        self.process.wait(WAIT_S)
        assert self.process.returncode == -signal.SIGKILL

    def finish(self) -> None:
        self.read_until(lambda line: line == "done")
        assert self.process.wait(WAIT_S) == 0, self._stderr()

    def close(self) -> None:
        if self.process.poll() is None:
            self.process.kill()
            self.process.wait(WAIT_S)
        for stream in (self.process.stdout, self.process.stderr):
            if stream is not None:
                stream.close()

    def _stderr(self) -> str:
        assert self.process.stderr is not None
        return self.process.stderr.read()[-2000:]

    @property
    def last_durable(self) -> int:
        reports = [int(line.split()[1]) for line in self.lines if line.startswith("durable ")]
        return reports[-1] if reports else 0


def _durable_at_least(count: int) -> Callable[[str], bool]:
    return lambda line: line.startswith("durable ") and int(line.split()[1]) >= count


class Reachability:
    """The database reachable or not, for real: for SQLite its folder exists or not yet; for
    PostgreSQL a loopback proxy in front of it is listening or not."""

    def __init__(self, backend: Backend, reachable: bool) -> None:
        if backend.name == "sqlite":
            self.folder = backend.folder / "volume"
            self.via = Backend("sqlite", f"sqlite:///{self.folder / 'store.db'}")
            self.proxy = None
        else:
            self.folder = None
            self.proxy = TcpProxy(backend.address, port=free_port())
            self.via = backend.via_port(self.proxy.port)
        self.direct = backend if backend.name == "postgres" else self.via
        if reachable:
            self.make_reachable()

    def make_reachable(self) -> None:
        if self.folder is not None:
            self.folder.mkdir(exist_ok=True)
        elif self.proxy is not None:
            self.proxy.start()

    def close(self) -> None:
        if self.proxy is not None:
            self.proxy.close()


@pytest.mark.parametrize("database", ["up", "away"])
def test_killed_mid_stream_and_restarted_every_row_is_stored_once(backend, database):
    reach = Reachability(backend, reachable=database == "up")
    queue_dir = backend.folder / "queue"
    first = Child(reach.via, queue_dir, "--first", "0", "--count", str(ROWS))
    try:
        first.read_until(_durable_at_least(ROWS // 3))
        first.kill()  # still putting rows: the last reports were at most a chunk ago
        assert first.last_durable < ROWS
        reach.make_reachable()
        resume = first.last_durable
        second = Child(
            reach.via, queue_dir, "--first", str(resume), "--count", str(ROWS - resume), "--watch"
        )
        try:
            second.finish()
        finally:
            second.close()
        assert stored(reach.direct) == expected(sample_rows(ROWS))
        with DurableQueue(queue_dir, 10) as queue:
            assert queue.rows == 0
    finally:
        first.close()
        reach.close()


def test_killed_while_draining_the_queue_and_restarted_every_row_is_stored_once(backend):
    rows = DRAIN_ROWS[backend.name]
    reach = Reachability(backend, reachable=False)
    queue_dir = backend.folder / "queue"
    try:
        filling = Child(
            reach.via, queue_dir, "--first", "0", "--count", str(rows), "--batch-rows", "10"
        )
        try:
            filling.finish()  # the database away: every row in the durable queue
        finally:
            filling.close()
        with DurableQueue(queue_dir, 10) as queue:
            assert queue.rows == rows
        reach.make_reachable()
        draining = Child(reach.via, queue_dir, "--first", "0", "--count", "0", "--watch")
        try:

            def mid_drain(line: str) -> bool:
                if not line.startswith("status "):
                    return False
                queued, written = map(int, line.split()[1:])
                return 0 < queued < rows and written > 0

            draining.read_until(mid_drain)
            draining.kill()
        finally:
            draining.close()
        with DurableQueue(queue_dir, 10) as queue:
            assert 0 < queue.rows < rows, "the kill should land mid-drain"
        again = Child(reach.via, queue_dir, "--first", "0", "--count", "0", "--watch")
        try:
            again.finish()
        finally:
            again.close()
        assert stored(reach.direct) == expected(sample_rows(rows))
    finally:
        reach.close()
