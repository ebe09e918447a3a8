"""Lab and recipe data files: what is read and written, and how each kind of bad file is
reported."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pytest

from sensor.errors import DataFileError
from sensor.shell.labdata import (
    PROFILE_CAUTION,
    PROFILE_COLUMNS,
    read_cloud_points_csv,
    read_profile_csv,
    read_solubility_csv,
    write_profile_csv,
)
from sensor.units import concentration_unit

G100 = concentration_unit("g/100g")


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "data.csv"
    path.write_text(text, encoding="utf-8")
    return path


def test_reads_with_comments_blank_lines_bom_and_extra_columns(tmp_path):
    path = tmp_path / "data.csv"
    path.write_bytes(
        "\ufeff# a comment\n\ntemp_c, conc ,who\n10,5.0,A\n"
        "# mid comment\n20,6.5,B\n20,6.5,C\n".encode()
    )
    data = read_solubility_csv(path, G100)
    np.testing.assert_allclose(data.temp_k, [283.15, 293.15, 293.15])
    np.testing.assert_allclose(data.conc, [0.05, 0.065, 0.065])
    assert data.source.lines == (4, 6, 7)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("temp_c,concentration\n10,5\n", r"data\.csv, line 1: no column 'conc'"),
        ("temp_c,conc\n10,5\n20,abc\n", r"data\.csv, line 3: column 'conc': 'abc' is not a number"),
        ("temp_c,conc\n10,5\n20,nan\n", r"data\.csv, line 3: column 'conc': 'nan' is not finite"),
        ("temp_c,conc\n10,\n", r"data\.csv, line 2: column 'conc' is empty"),
        (
            "temp_c,conc\n10,5\n# c\n10,6\n",
            r"data\.csv, line 4: temp_c 10 is already on line 2 with conc 5 \(here 6\)",
        ),
        (
            "temp_c,conc\n10,-5\n",
            r"data\.csv, line 2: column 'conc': a concentration in g/100g cannot be negative",
        ),
        ("temp_c,conc\n10,0\n", r"data\.csv, line 2: conc must be positive"),
        ("temp_c,conc\n", r"data\.csv: holds a header but no data rows"),
        ("# nothing\n", r"data\.csv: holds no header and no data"),
    ],
)
def test_bad_solubility_files(tmp_path, text, message):
    with pytest.raises(DataFileError, match=message):
        read_solubility_csv(_write(tmp_path, text), G100)


def test_mass_fraction_of_one_is_refused_with_line(tmp_path):
    path = _write(tmp_path, "temp_c,conc\n10,0.2\n20,1.0\n")
    with pytest.raises(
        DataFileError, match=r"line 3: column 'conc': a mass fraction must be below 1"
    ):
        read_solubility_csv(path, concentration_unit("mass-fraction"))


def test_cloud_points(tmp_path):
    path = _write(tmp_path, "conc,rate_k_per_min,cloud_temp_c\n10,0.5,40\n10,0,38\n")
    with pytest.raises(DataFileError, match=r"line 3: rate_k_per_min must be positive"):
        read_cloud_points_csv(path, G100)
    path.write_text("conc,rate_k_per_min,cloud_temp_c\n10,0.5,40\n", encoding="utf-8")
    data = read_cloud_points_csv(path, G100)
    np.testing.assert_allclose(data.rate_k_per_s, [0.5 / 60])
    np.testing.assert_allclose(data.cloud_temp_k, [313.15])


def test_missing_file(tmp_path):
    with pytest.raises(DataFileError, match=r"nope\.csv: cannot be read"):
        read_solubility_csv(tmp_path / "nope.csv", G100)


def _profile_text(time_s=(0.0, 3600.0, 7200.0), temp_k=(323.15, 303.15, 283.15)) -> str:
    stream = io.StringIO()
    write_profile_csv(
        stream, "linear", np.array(time_s), np.array(temp_k), comments=["site: demo", "a test"]
    )
    return stream.getvalue()


def test_write_profile_csv_documents_itself():
    lines = _profile_text().splitlines()
    comments = [line for line in lines if line.startswith("#")]
    assert comments[0] == "# sigmatrack reference cooling profile: linear"
    assert "# site: demo" in comments
    assert comments[-1] == f"# {PROFILE_CAUTION}"
    rows = list(csv.DictReader(line for line in lines if not line.startswith("#")))
    assert tuple(rows[0]) == PROFILE_COLUMNS
    assert [r["time_min"] for r in rows] == ["0.00", "60.00", "120.00"]
    assert [r["temp_c"] for r in rows] == ["50.00", "30.00", "10.00"]
    assert [r["cooling_rate_k_per_min"] for r in rows] == ["0.3333", "0.3333", "0.0000"]


def test_a_written_profile_reads_back_to_its_digits(tmp_path):
    time_s = np.array([0.0, 1234.5, 5000.0, 9000.0])
    temp_k = np.array([326.15, 320.004, 300.0, 283.15])
    data = read_profile_csv(_write(tmp_path, _profile_text(time_s, temp_k)))
    np.testing.assert_allclose(data.time_s, time_s, atol=0.3)  # 0.01 min
    np.testing.assert_allclose(data.temp_k, temp_k, atol=0.005)  # 0.01 °C
    assert data.source.line_of(0) == 6  # after the name, two comments, the caution, the header


@pytest.mark.parametrize(
    ("body", "where"),
    [
        ("time_min,temp_c\n", r"data\.csv: holds a header but no data rows"),
        ("time_min,temp_c\n0,50\n", r"data\.csv: a profile needs at least two rows"),
        ("time_min,temp_c\n1,50\n2,40\n", r"data\.csv, line 2: time_min must start at 0"),
        ("time_min,temp_c\n0,50\n9,40\n9,30\n", r"line 4: time_min 9 is not after 9 on line 3"),
        ("time_min,temp_c\n0,50\n9,40\n12,41\n", r"line 4: temp_c 41 is above 40 .* never rises"),
        ("time_min,temp_c\n0,50\n9,forty\n", r"line 3: column 'temp_c': 'forty' is not a number"),
        ("minutes,temp_c\n0,50\n9,40\n", r"line 1: no column 'time_min'"),
    ],
)
def test_a_bad_profile_is_refused_naming_file_and_line(tmp_path, body, where):
    with pytest.raises(DataFileError, match=where):
        read_profile_csv(_write(tmp_path, body))
