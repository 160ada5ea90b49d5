"""RawTable: one record's columns as its file holds them, before units, signs and clocks.

Every reader of a layout (delimited text in :mod:`pipeline.read.cyclefile`, workbooks in
:mod:`pipeline.read.workbook`, Parquet in :mod:`pipeline.read.parquet`) ends in a RawTable:
the head (metadata as found, header fields), the metadata collected with the profile's
defaults and file-name pattern, the profile's columns found in the header, and a frame of
the raw values under their column numbers. What the values mean (seconds, date-time
stamps, time since the step began; a signed current or a magnitude and a mode; the
cycler's own counters) is applied by :mod:`pipeline.read.convert`, the same for every
layout, so that every layout is judged alike.

A reader says where each row stands (``places``: None for text, where row ``i`` is on line
``head.header_line + 1 + i``), so that every message names the line, or the sheet and row,
that a person opens the file at.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from pipeline.model import RowPlaces, SourceRef
from pipeline.read.cyclehead import Head


@dataclass(frozen=True)
class RawTable:
    """One record's raw columns; ``frame`` holds them under their 0-based column numbers."""

    name: str
    head: Head
    metadata: dict[str, str]
    columns: dict[str, int]  # quantity -> 0-based column number in head.fields
    frame: pd.DataFrame
    places: RowPlaces | None = None

    def at(self, row: int, index: int | None = None) -> SourceRef:
        """Where data row ``row`` (0-based) and column ``index`` (0-based) stand in the file."""
        column = None if index is None else index + 1
        if self.places is not None:
            return self.places.at(row, column)
        return SourceRef(self.name, self.head.header_line + 1 + row, column)

    def place(self, row: int) -> str:
        """Data row ``row`` as a reader finds it: 'line 12', or 'row 12 of sheet ...'
        (as :meth:`pipeline.model.Trace.place` words it once the record is read)."""
        if self.places is not None:
            return self.places.label(row)
        return f"line {self.first_data_line + row}"

    def header(self, index: int) -> str:
        return self.head.fields[index]

    @property
    def first_data_line(self) -> int:
        return self.head.header_line + 1

    def __len__(self) -> int:
        return len(self.frame)
