"""A writer process for the crash tests (run by them, not by pytest).

    python -m tests.shell.store.writer_child --url URL [--schema S] --queue-dir DIR
        --first N --count M [--chunk C] [--batch-rows B] [--watch]

Puts samples ``first`` .. ``first + count - 1`` (``tests.shell.store.conftest.sample_rows``) in
chunks; after each chunk, waits until it is durable and prints ``durable <n>``: every row before
``n`` is committed or in the durable queue, so a restarted producer may resume from ``n``. With
``--watch`` it then prints ``status <queued> <written>`` every 20 ms until the durable queue is
empty. Prints ``done`` after a clean close. Every loop is bounded (60 s).
"""

from __future__ import annotations

import argparse
import sys
import time

from sensor.shell.store import Store, StoreWriter
from sensor.shell.store.durable_queue import DurableQueue
from tests.shell.store.conftest import sample_rows

BOUND_S = 60.0


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--url", required=True)
    parser.add_argument("--schema")
    parser.add_argument("--queue-dir", required=True)
    parser.add_argument("--first", type=int, required=True)
    parser.add_argument("--count", type=int, required=True)
    parser.add_argument("--chunk", type=int, default=500)
    parser.add_argument("--batch-rows", type=int, default=100)
    parser.add_argument("--watch", action="store_true")
    args = parser.parse_args()

    writer = StoreWriter(
        Store(args.url, schema=args.schema),
        DurableQueue(args.queue_dir, 10**7),
        batch_rows=args.batch_rows,
        flush_interval_s=0.02,
        retry_max_s=0.1,
    ).start()
    end = args.first + args.count
    for start in range(args.first, end, args.chunk):
        rows = sample_rows(min(args.chunk, end - start), first=start)
        if writer.put_many(rows) != len(rows) or not writer.flush(BOUND_S):
            print("stuck", flush=True)
            return 1
        print(f"durable {start + len(rows)}", flush=True)
    deadline = time.monotonic() + BOUND_S
    while args.watch and time.monotonic() < deadline:
        status = writer.status()
        print(f"status {status.queued_rows} {status.written_rows}", flush=True)
        if not status.queued_rows:
            break
        time.sleep(0.02)
    if not writer.close(BOUND_S):
        print("not closed", flush=True)
        return 1
    print("done", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
