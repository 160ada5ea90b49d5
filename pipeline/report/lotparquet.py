"""The lot export as Parquet: the CSV's rows and columns, typed, for plant and analysis systems.

Pure: bytes out of a :class:`pipeline.report.lotreport.LotReportInput`. The rows and columns
are the CSV's (:func:`pipeline.report.lotreport.export_table`), so the two files always
agree: text columns are strings as data gives them (no spreadsheet guard: Parquet is never
run as a formula), metric columns are float64 rounded to each metric's resolution with a
value not measured as null, ``decided_at`` is the ISO 8601 text the CSV holds. The same input
gives the same bytes (no creation time is written; pyarrow's writer names itself in the
footer, so a pyarrow upgrade may change the bytes, never the values).
"""

from __future__ import annotations

import io

import pyarrow as pa
import pyarrow.parquet as pq

from pipeline.report.lotreport import EXPORT_FIRST, EXPORT_LAST, LotReportInput, export_table


def lot_export_table(data: LotReportInput) -> pa.Table:
    """The export as an Arrow table: strings for text columns, float64 for every metric."""
    header, rows = export_table(data)
    text = set(EXPORT_FIRST) | set(EXPORT_LAST)
    columns = []
    fields = []
    for index, name in enumerate(header):
        values = [row[index] for row in rows]
        kind = pa.string() if name in text else pa.float64()
        columns.append(pa.array(values, type=kind))
        fields.append(pa.field(name, kind, nullable=name not in text))
    return pa.Table.from_arrays(columns, schema=pa.schema(fields))


def lot_export_parquet(data: LotReportInput) -> bytes:
    """The lot export as Parquet bytes (one row group, no dictionary surprises in pandas)."""
    out = io.BytesIO()
    pq.write_table(lot_export_table(data), out, compression="zstd", use_dictionary=False,
                   write_statistics=False)
    return out.getvalue()


__all__ = ["lot_export_parquet", "lot_export_table"]
