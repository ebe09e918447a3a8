"""The store's row types: checked and normalised when built, timestamps converted exactly."""

from __future__ import annotations

import calendar
import hashlib
from datetime import UTC, datetime, timedelta, timezone
from importlib.metadata import version

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from sensor.shell.config import load_site_file
from sensor.shell.store import (
    AlarmEventRow,
    AuditRow,
    BatchRow,
    ProposalRow,
    RowError,
    SampleRow,
    SiteFileRow,
    StoreError,
    audit_rows,
    site_file_row,
)
from sensor.shell.store.rows import ROW_PLANS, ROW_TYPES, epoch_us, from_epoch_us
from tests.conftest import DEMO_SITE
from tests.shell.store.conftest import T0, estimate_row

aware_datetimes = st.builds(
    lambda naive, minutes: naive.replace(tzinfo=timezone(timedelta(minutes=minutes))),
    st.datetimes(min_value=datetime(1900, 1, 2), max_value=datetime(2200, 1, 1)),
    st.integers(min_value=-23 * 60, max_value=23 * 60),
)


@given(aware_datetimes)
def test_epoch_microseconds_are_exact_against_the_standard_library(when):
    # Reference: calendar.timegm (Python standard library), whole seconds of Unix time, plus
    # the microseconds: an exact integer, no float involved.
    expected = calendar.timegm(when.utctimetuple()) * 1_000_000 + when.microsecond
    assert epoch_us(when) == expected
    back = from_epoch_us(epoch_us(when))
    assert back == when
    assert back.tzinfo is UTC


def test_every_row_type_has_a_key_of_its_fields():
    for row_type in ROW_TYPES:
        names = [p.name for p in ROW_PLANS[row_type]]
        assert set(row_type.KEY) <= set(names), row_type
        assert [p.name for p in ROW_PLANS[row_type] if p.key] == [
            n for n in names if n in row_type.KEY
        ]


def test_numpy_values_are_normalised_to_plain_python():
    row = SampleRow("CR-301", "temp", T0, np.float32(21.5), status_code=np.uint32(0x808C0000))
    assert type(row.value) is float
    assert row.value == 21.5
    assert type(row.status_code) is int
    assert row.status_code == 0x808C0000
    proposal = ProposalRow("CR-301", T0, "proposing", "", np.bool_(True), np.float64(300.0))
    assert proposal.written is True
    assert type(proposal.setpoint_temp_k) is float


def test_flags_become_a_tuple(rng):
    row = estimate_row(T0, rng)
    other = type(row)(**{**_fields(row), "flags": ["nis-high", "analyzer-stale"]})
    assert other.flags == ("nis-high", "analyzer-stale")


def _fields(row):
    return {p.name: getattr(row, p.name) for p in ROW_PLANS[type(row)]}


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (
            lambda: SampleRow("CR-301", "temp", datetime(2026, 3, 14, 6), 1.0),
            r"SampleRow\.time: must be a timezone-aware datetime",
        ),
        (lambda: SampleRow("", "temp", T0, 1.0), r"SampleRow\.unit_id: must not be empty"),
        (lambda: SampleRow("CR-301", "temp", T0, "21.5"), r"SampleRow\.value: must be a number"),
        (lambda: SampleRow("CR-301", "temp", T0, True), r"SampleRow\.value: must be a number"),
        (
            lambda: SampleRow("CR-301", "temp", T0, 1.0, status_code=2**32),
            r"SampleRow\.status_code: must fit in 32 bits unsigned",
        ),
        (
            lambda: SampleRow("CR-301", "temp", T0, 1.0, status_code=1.5),
            r"SampleRow\.status_code: must be an integer",
        ),
        (
            lambda: SampleRow("CR-301", "batch_id", T0, None, text="B-\x00"),
            r"SampleRow\.text: must not hold a NUL character",
        ),
        (
            lambda: BatchRow("CR-301", "B1", T0, T0 - timedelta(seconds=1)),
            r"BatchRow\.end: is before start",
        ),
        (lambda: BatchRow("CR-301", None, T0), r"BatchRow\.batch_id: is required; got None"),
        (
            lambda: ProposalRow("CR-301", T0, "proposing", "", 1),
            r"ProposalRow\.written: must be true or false; got 1",
        ),
        (
            lambda: AlarmEventRow(
                "CR-301",
                "sigma-high",
                T0,
                "shelved",
                "shelved",
                shelved_until=datetime(2026, 3, 14, 8),
            ),
            r"AlarmEventRow\.shelved_until: must be a timezone-aware datetime",
        ),
        (lambda: AuditRow(T0, "sigmatrack", 1), r"AuditRow\.version: must be a string; got int"),
        (
            lambda: SiteFileRow("0" * 64, "site.toml", "[site]\n"),
            r"SiteFileRow\.sha256: is not the SHA-256 of the text",
        ),
    ],
)
def test_bad_rows_are_refused_naming_the_field(build, message):
    with pytest.raises(RowError, match=message):
        build()


@pytest.mark.parametrize(
    ("flags", "message"),
    [("nis-high", "must be a sequence of non-empty names"), (("a,b",), "cannot hold a comma")],
)
def test_bad_flags_are_refused(rng, flags, message):
    row = estimate_row(T0, rng)
    with pytest.raises(RowError, match=rf"EstimateRow\.flags: .*{message}"):
        type(row)(**{**_fields(row), "flags": flags})


def test_site_file_row_is_the_loaded_file():
    site = load_site_file(DEMO_SITE)
    row = site_file_row(site)
    # The sha256 the site loader computed, and hashlib on the file's bytes, agree.
    assert row.sha256 == site.sha256 == hashlib.sha256(DEMO_SITE.read_bytes()).hexdigest()
    assert row.text == DEMO_SITE.read_text(encoding="utf-8")
    assert row.path == str(DEMO_SITE.resolve())


def test_site_file_changed_since_loaded_is_refused(tmp_path):
    copy = tmp_path / "site.toml"
    copy.write_text(DEMO_SITE.read_text(encoding="utf-8"), encoding="utf-8")
    site = load_site_file(copy)
    copy.write_text(copy.read_text(encoding="utf-8") + "\n# edited\n", encoding="utf-8")
    with pytest.raises(StoreError, match=r"site\.toml: changed since it was loaded"):
        site_file_row(site)


def test_audit_rows_name_the_site_file_sigmatrack_and_each_model():
    site = load_site_file(DEMO_SITE)
    rows = audit_rows(site, T0, {"solubility": "vant-hoff:3f2a", "metastable": "nyvlt:91c0"})
    site_row, *audits = rows
    assert isinstance(site_row, SiteFileRow)
    assert [(a.subject, a.version) for a in audits] == [
        ("sigmatrack", version("sigmatrack")),
        ("model:solubility", "vant-hoff:3f2a"),
        ("model:metastable", "nyvlt:91c0"),
    ]
    assert all(a.site_sha256 == site.sha256 and a.time == T0 for a in audits)
