"""The historian CSV reader: plant units to ours once, and every unusable file refused with its
file and line."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from sensor.errors import DataFileError
from sensor.samples import Severity
from sensor.shell.historian import read_historian_csv, status_code
from tests.synthetic import demo_setup, demo_site_and_zone


def _setups(_index: int):
    return demo_setup()


HEADER = (
    "timestamp,CR301.TT3011.PV,CR301.TT3011.PV.quality,CR301.TT3012.PV,CR301.AT3015.PV,"
    "CR301.AT3015.PV.quality,CR301.PHASE,CR301.BATCH_ID"
)
ROWS = [
    "2026-03-14T06:00:00.000Z,55.0,Good,50.0,,,3,B-0001",
    "2026-03-14T06:00:01.000Z,54.99,Good,50.0,13.2,Good,3,",
    "2026-03-14T06:00:02.000+00:00,54.98,UncertainLastUsableValue,49.9,13.1,BadSensorFailure,4,",
]


def _write(tmp_path: Path, rows, header=HEADER, name="batch.csv") -> Path:
    path = tmp_path / name
    path.write_text("# seed 1\n" + "\n".join([header, *rows]) + "\n", encoding="utf-8")
    return path


def test_reads_units_quality_phase_and_batch(tmp_path):
    site, _ = demo_site_and_zone()
    (batch,) = read_historian_csv(_write(tmp_path, ROWS), site, _setups)
    assert batch.batch == "B-0001"
    assert batch.samples == 3
    assert batch.lines.tolist() == [3, 4, 5]
    arrays = batch.arrays
    np.testing.assert_allclose(arrays.values[0], [328.15, 328.14, 328.13])
    np.testing.assert_allclose(arrays.values[2, 1:], [0.132, 0.131])  # g/100g -> kg/kg
    assert arrays.present[2].tolist() == [False, True, True]
    assert arrays.severities[0].tolist() == [Severity.GOOD, Severity.GOOD, Severity.UNCERTAIN]
    assert arrays.severities[2, 2] == Severity.BAD
    assert batch.phases == ("cool-to-seed", "cool-to-seed", "seed")
    assert arrays.seeded_phase.tolist() == [1, 1, 2]  # unseeded, unseeded, seeded
    assert np.diff(arrays.time_s).tolist() == [1.0, 1.0]


def test_batch_id_change_splits_the_file(tmp_path):
    site, _ = demo_site_and_zone()
    rows = [*ROWS, "2026-03-14T08:00:00Z,20.0,Good,19.0,5.0,Good,0,B-0002"]
    batches = read_historian_csv(_write(tmp_path, rows), site, _setups)
    assert [b.batch for b in batches] == ["B-0001", "B-0002"]
    assert [b.samples for b in batches] == [3, 1]


@pytest.mark.parametrize(
    ("rows", "line", "message"),
    [
        (
            [ROWS[0], ROWS[0]],
            4,
            r"timestamp 2026-03-14T06:00:00.000Z repeats the one on line 3",
        ),
        ([ROWS[1], ROWS[0]], 4, "goes backwards from the one on line 3"),
        ([ROWS[0].replace(".000Z", "")], 3, "not ISO 8601 with a UTC offset"),
        ([ROWS[0].replace("55.0", "hot")], 3, r"'CR301.TT3011.PV': 'hot' is not a number"),
        ([ROWS[1].replace(",Good,3", ",Fine,3")], 3, "'Fine' is not an OPC UA StatusCode name"),
        ([ROWS[0].replace(",3,B", ",42,B")], 3, "phase value '42' is not in the unit's"),
    ],
)
def test_bad_rows_are_refused_with_file_and_line(tmp_path, rows, line, message):
    site, _ = demo_site_and_zone()
    path = _write(tmp_path, rows)
    with pytest.raises(DataFileError, match=message) as caught:
        read_historian_csv(path, site, _setups)
    assert caught.value.line == line
    assert str(caught.value).startswith(f"{path}, line {line}: ")


def test_missing_tag_column(tmp_path):
    site, _ = demo_site_and_zone()
    header = HEADER.replace("CR301.TT3012.PV,", "")
    with pytest.raises(DataFileError, match=r"line 2: no column 'CR301.TT3012.PV'"):
        read_historian_csv(_write(tmp_path, [], header=header), site, _setups)


def test_file_of_another_site(tmp_path):
    site, _ = demo_site_and_zone()
    with pytest.raises(DataFileError, match="holds no unit's temperature tag"):
        read_historian_csv(
            _write(tmp_path, ["2026-03-14T06:00:00Z,1"], header="timestamp,X"), site, _setups
        )


def test_negative_concentration_goes_to_validation_not_to_the_file(tmp_path):
    site, _ = demo_site_and_zone()
    rows = [ROWS[0], ROWS[1].replace("13.2", "-1.0")]
    (batch,) = read_historian_csv(_write(tmp_path, rows), site, _setups)
    assert np.isnan(batch.arrays.values[2, 1])
    assert batch.arrays.present[2, 1]


def test_status_codes_by_name_and_number():
    assert status_code("") == 0
    assert status_code("BadSensorFailure") == 0x808C0000
    assert status_code("0x40900000") == 0x40900000
    with pytest.raises(KeyError):
        status_code("Dreadful")
