"""The lot export: values at their metric's resolution, where each cell was tested, CSV and Parquet alike.

Invented lot: cell type "NX-20 test cell", lot "L-TEST-0042", channels "R1-C01".., station "bench-3".
"""

from __future__ import annotations

import csv
import dataclasses
import io

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.report.exportvalues import export_decimals, round_to_resolution
from pipeline.report.lotparquet import lot_export_parquet
from pipeline.report.lotreport import LotReportInput, lot_export_csv
from tests.test_lot_report import CAP, DCIR, DRIFT, invented_lot


def _placed(data: LotReportInput) -> LotReportInput:
    """The invented lot with a cell type and each cell's channel and station, as a station gives them."""
    cells = tuple(
        dataclasses.replace(c, cell_type="NX-20 test cell",
                            places=((f"R1-C{i % 8:02d}", "bench-3"), (f"R2-C{i % 5:02d}", "bench-3")))
        for i, c in enumerate(data.cells)
    )
    return dataclasses.replace(data, cells=cells)


def _csv_rows(data: LotReportInput) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(lot_export_csv(data).decode("utf-8"), newline="")))


def test_export_values_carry_no_float_noise() -> None:
    """Values as the judge's arithmetic leaves them print at their resolution, not with 16 digits."""
    base = invented_lot(n=60)
    first = dataclasses.replace(base.cells[0], values={CAP: 19.999999999999996, DCIR: 1.799999999999987,
                                                       DRIFT: -0.30000000000000004,
                                                       "grading_cv_duration_s": 974.2000000000007})
    row = _csv_rows(dataclasses.replace(base, cells=(first, *base.cells[1:])))[0]
    assert (row[CAP], row[DCIR], row[DRIFT], row["grading_cv_duration_s"]) == ("20.0", "1.8", "-0.3", "974.2")


def test_export_names_cell_type_stage_channel_and_station() -> None:
    rows = _csv_rows(_placed(invented_lot(n=60)))
    assert list(rows[0])[:6] == ["lot", "cell_id", "cell_type", "stage", "channel", "station"]
    first = rows[0]
    assert (first["cell_type"], first["stage"], first["channel"], first["station"]) == (
        "NX-20 test cell", "formation;grading", "R1-C00;R2-C00", "bench-3")


def test_the_parquet_export_reads_back_with_pandas_to_the_csv_values() -> None:
    data = _placed(invented_lot(n=60))
    from_csv = pd.read_csv(io.BytesIO(lot_export_csv(data)), dtype=str, keep_default_na=False)
    from_parquet = pd.read_parquet(io.BytesIO(lot_export_parquet(data)))
    assert list(from_parquet.columns) == list(from_csv.columns)
    assert len(from_parquet) == len(from_csv) == 60
    for column in from_csv.columns:
        if column in (CAP, DCIR, DRIFT) or column.endswith("_U"):
            csv_values = pd.to_numeric(from_csv[column].replace("", np.nan)).to_numpy()
            np.testing.assert_array_equal(from_parquet[column].to_numpy(), csv_values)
        else:  # no text of this lot starts like a formula, so the CSV holds it unguarded
            assert from_parquet[column].tolist() == from_csv[column].tolist(), column
    assert from_parquet[DCIR].isna().sum() == 1


def test_the_parquet_export_is_the_same_bytes_for_the_same_lot() -> None:
    data = _placed(invented_lot(n=60))
    assert lot_export_parquet(data) == lot_export_parquet(data)


@settings(max_examples=300, deadline=None)
@given(metric=st.sampled_from([CAP, DCIR, DRIFT, "grading_coulombic_efficiency", "max_temperature_C",
                               "cycle_count", "grading_cv_duration_s", "not_a_known_metric"]),
       value=st.floats(min_value=-1e9, max_value=1e9) | st.sampled_from([float("nan"), float("inf")]))
def test_a_rounded_value_is_within_half_its_resolution_and_reads_back_from_its_repr(metric: str, value: float) -> None:
    rounded = round_to_resolution(metric, value)
    if not np.isfinite(value):
        assert rounded is None
        return
    assert rounded is not None
    assert abs(rounded - value) <= 0.5 * 10.0 ** -export_decimals(metric) * (1 + 1e-9) + abs(value) * 1e-15
    assert float(repr(rounded)) == rounded and round_to_resolution(metric, rounded) == rounded
