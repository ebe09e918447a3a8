"""The durable queue: first in, first out, exact, bounded, one process at a time, and still
there after the process that filled it is killed."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap

import pytest

from sensor.shell.store import StoreError
from sensor.shell.store.durable_queue import DurableQueue
from tests.conftest import REPO

COLUMNS = ("unit_id", "time_us", "value", "ok", "text")
AWKWARD = [
    ("CR-301", 2**62, 0.1 + 0.2, True, "µ-ethanol 70:30 \u2013 ok"),
    ("CR-301", -(2**62), 1e-300, False, ""),
    ("CR-301", 0, float("inf"), None, None),
    ("CR-301", 1, -0.0, True, 'line\nbreak, "quoted"'),
]
"""Values that a sloppy encoding would change: exact floats, 63-bit integers, text."""


def test_parcels_come_back_first_in_first_out_and_exact(tmp_path):
    with DurableQueue(tmp_path / "q", 100) as queue:
        assert queue.push("samples", COLUMNS, AWKWARD[:2])
        assert queue.push("estimates", COLUMNS, AWKWARD[2:])
        assert (queue.rows, len(queue)) == (4, 2)
        first = queue.peek()
        assert first is not None
        assert (first.table_name, first.columns, first.values) == ("samples", COLUMNS, AWKWARD[:2])
        queue.remove_through(first)
        second = queue.peek()
        assert second is not None
        assert second.values == AWKWARD[2:]
        assert str(second.values[1][2]) == "-0.0"
        queue.remove_through(second)
        assert queue.peek() is None
        assert queue.rows == 0


def test_what_is_queued_is_there_after_reopening(tmp_path):
    with DurableQueue(tmp_path / "q", 100) as queue:
        queue.push("samples", COLUMNS, AWKWARD)
    with DurableQueue(tmp_path / "q", 100) as queue:
        assert queue.rows == len(AWKWARD)
        parcel = queue.peek()
        assert parcel is not None
        assert parcel.values == AWKWARD


def test_a_parcel_that_would_pass_the_bound_is_refused_and_nothing_is_dropped(tmp_path):
    with DurableQueue(tmp_path / "q", 5) as queue:
        assert queue.push("samples", COLUMNS, AWKWARD)
        assert not queue.push("samples", COLUMNS, AWKWARD[:2])
        assert queue.push("samples", COLUMNS, AWKWARD[:1])
        assert (queue.rows, len(queue)) == (5, 2)


def test_parcels_are_pushed_together_up_to_the_bound_and_removed_together(tmp_path):
    with DurableQueue(tmp_path / "q", 6) as queue:
        parcels = [("samples", COLUMNS, AWKWARD[:2])] * 4
        assert queue.push_many(parcels) == 3  # the fourth would pass 6 rows
        first = queue.peek()
        assert first is not None
        second = queue.peek(after=first.id)
        assert second is not None
        assert second.id > first.id
        queue.remove_through(second)  # and the older one with it
        assert (queue.rows, len(queue)) == (2, 1)
    with DurableQueue(tmp_path / "q", 6) as queue:
        assert queue.rows == 2


def test_a_parcel_can_shrink_in_its_place(tmp_path):
    with DurableQueue(tmp_path / "q", 100) as queue:
        queue.push("samples", COLUMNS, AWKWARD)
        queue.push("samples", COLUMNS, AWKWARD[:1])
        parcel = queue.peek()
        assert parcel is not None
        queue.keep_only(parcel, AWKWARD[3:])
        assert queue.rows == 2
        again = queue.peek()
        assert again is not None
        assert (again.id, again.values) == (parcel.id, AWKWARD[3:])


def test_refused_rows_are_set_aside_with_their_error(tmp_path):
    with DurableQueue(tmp_path / "q", 100) as queue:
        queue.reject("samples", COLUMNS, AWKWARD[0], "CHECK constraint failed")
    with DurableQueue(tmp_path / "q", 100) as queue:
        (row,) = queue.rejected()
        assert (row.table_name, row.columns, row.values, row.error) == (
            "samples",
            COLUMNS,
            AWKWARD[0],
            "CHECK constraint failed",
        )
        assert queue.rows == 0  # set aside, not waiting


def test_a_folder_in_use_is_refused(tmp_path):
    with (
        DurableQueue(tmp_path / "q", 100),
        pytest.raises(
            StoreError,
            match=rf"q: the durable queue is in use by another process \(pid {os.getpid()}\)",
        ),
    ):
        DurableQueue(tmp_path / "q", 100)
    DurableQueue(tmp_path / "q", 100).close()  # released on close


def test_a_file_in_the_way_is_refused(tmp_path):
    (tmp_path / "q").write_text("not a folder", encoding="utf-8")
    with pytest.raises(StoreError, match=r"q: cannot open the durable queue here"):
        DurableQueue(tmp_path / "q", 100)


def test_the_folder_is_released_when_its_process_is_killed(tmp_path):
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            textwrap.dedent(
                f"""
                import sys, time
                from sensor.shell.store.durable_queue import DurableQueue
                queue = DurableQueue({str(tmp_path / "q")!r}, 100)
                queue.push("samples", ["a"], [["queued by the killed process"]])
                print("holding", flush=True)
                time.sleep(60)
                """
            ),
        ],
        cwd=REPO,
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout is not None
        assert holder.stdout.readline().strip() == "holding"
        with pytest.raises(StoreError, match=rf"in use by another process \(pid {holder.pid}\)"):
            DurableQueue(tmp_path / "q", 100)
        holder.send_signal(signal.SIGKILL)
        holder.wait(10)
    finally:
        holder.kill()
        holder.wait(10)
        holder.stdout.close()
    with DurableQueue(tmp_path / "q", 100) as queue:
        parcel = queue.peek()
        assert parcel is not None
        assert parcel.values == [("queued by the killed process",)]
