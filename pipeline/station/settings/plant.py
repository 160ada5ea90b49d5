"""The [plant] table of station.toml: the plant database a station forwards its ledger to.

Checks the values that passed the schema and builds PlantSettings (records.py). Reading the
password file and starting the feed is pipeline/station/plantfeed.py's job; forwarding,
pipeline.plant's.
"""

from __future__ import annotations

from pathlib import Path
from typing import cast

from pipeline.plant.connect import url_problem
from pipeline.rulebook.tables import Collector, Values
from pipeline.station.settings.folders import shown
from pipeline.station.settings.records import PlantSettings


def check_plant(out: Collector, plant: Values) -> None:
    """The [plant] database address: a postgresql:// URL without a password."""
    url = plant.get("database")
    if isinstance(url, str) and (problem := url_problem(url)) is not None:
        # a URL with a password in it is not shown: that would print the password
        what = "" if problem == "it holds a password" else f" = {shown(url)}"
        out.add(
            f"[plant] database{what} cannot be used: {problem}",
            ("plant",),
            "database",
            'Write it as "postgresql://ROLE@HOST:PORT/DATABASE", and put the password in the '
            "file that password_file names.",
        )


def plant_settings(
    plant: Values, password_file: Path | None, station_name: str
) -> PlantSettings | None:
    """The [plant] record from checked values; None without a database (no feed)."""
    if plant.get("database") is None:
        return None
    return PlantSettings(
        database=str(plant["database"]),
        station_id=str(plant.get("station_id", station_name)),
        password_file=password_file,
        batch_rows=cast(int, plant["batch_rows"]),
        connect_timeout_s=cast(float, plant["connect_timeout_s"]),
        statement_timeout_s=cast(float, plant["statement_timeout_s"]),
        retry_max_s=cast(float, plant["retry_max_s"]),
        alert_after_s=cast(float, plant["alert_after_s"]),
    )
