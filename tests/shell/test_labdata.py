"""Lab data files: what is read, and how each kind of bad file is reported."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from sensor.errors import DataFileError
from sensor.shell.labdata import read_cloud_points_csv, read_solubility_csv
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
