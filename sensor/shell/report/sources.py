"""Batches for the report commands: historian files and stored batches, replayed into views.

Historian files are read as ``sigmatrack replay`` reads them; a stored batch
(``--batch ID``) is read from the store, laid out as the replay's input
(:func:`sensor.shell.storebatch.stored_batch`) and comes with the proposals and alarm events
the live service recorded. Every batch then goes through the one replay
(:class:`~sensor.shell.replay.Replay`), whose summaries the pages show.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import cache, partial

from sensor.errors import SigmatrackError
from sensor.metastable import MetastableZone
from sensor.shell.config import SiteConfig, load_site_file
from sensor.shell.historian import HistorianBatch, read_historian_csv
from sensor.shell.replay import Progress, Replay
from sensor.shell.report.build import ViewCollector, advisor_from_record
from sensor.shell.report.view import AdvisorTrack, BatchView
from sensor.shell.sitesensor import pipeline_setups, site_zone, unit_setup
from sensor.shell.store.database import Store
from sensor.shell.store.reader import read_batch
from sensor.shell.storebatch import stored_batch


@dataclass(frozen=True)
class Loaded:
    """What the report commands work on.

    Attributes
    ----------
    site, zone : the site file and its metastable zone (holding the solubility curve)
    views : one per batch, files first (in the order given, batches in file order), then the
        stored batches
    failed : inputs that could not be read (each already handed to ``on_error``)
    """

    site: SiteConfig
    zone: MetastableZone
    views: list[BatchView]
    failed: int


def load_views(
    config: str,
    files: Sequence[str],
    batch_ids: Sequence[str],
    *,
    on_error: Callable[[SigmatrackError], None],
    unit_id: str | None = None,
    store_url: str | None = None,
    threads: int = 1,
) -> Loaded:
    """Read, replay and view the batches of ``files`` and of the store's ``batch_ids``.

    Parameters
    ----------
    config : the site file
    files : historian CSV files
    batch_ids : batches to read from the store
    on_error : called with each input that cannot be read; the others go on
    unit_id : the unit the inputs belong to (default: from the files' columns, or the store)
    store_url : the store (default: the site file's ``store.url``)
    threads : threads for the replay kernel

    Raises
    ------
    SigmatrackError
        If the site file cannot be used (the inputs' errors go to ``on_error`` instead).
    """
    site = load_site_file(config)
    zone = site_zone(site)
    setups = cache(partial(unit_setup, site, zone=zone))
    batches: list[HistorianBatch] = []
    advisors: dict[int, AdvisorTrack] = {}
    sources: dict[int, str] = {}
    failed = 0
    for name in files:
        try:
            batches.extend(read_historian_csv(name, site, setups, unit_id))
        except SigmatrackError as error:
            on_error(error)
            failed += 1
    if batch_ids:
        with Store(store_url or site.store.url, schema=site.store.schema) as store:
            for batch_id in batch_ids:
                try:
                    record = read_batch(store, batch_id, unit_id)
                    batch = stored_batch(record, site, setups, store.url)
                except SigmatrackError as error:
                    on_error(error)
                    failed += 1
                    continue
                batches.append(batch)
                sources[id(batch)] = f"{store.url}, batch {batch_id}"
                track = advisor_from_record(record, float(batch.arrays.time_s[0]))
                if track is not None:
                    advisors[id(batch)] = track
    units = sorted({b.unit for b in batches})
    unit_ids = {i: site.unit[i].id for i in units}
    collector = ViewCollector(setups, unit_ids, advisors, sources)
    replay = Replay(
        {i: setups(i) for i in units},
        unit_ids,
        threads=max(1, threads),
        advisors=pipeline_setups(site, zone, units, setups),
    )
    summaries = replay.run(batches, sink=collector, progress=Progress())
    return Loaded(site, zone, collector.views(batches, summaries), failed)
