"""Time zones as a profile or a file's metadata writes them: "UTC", a zone name, or an offset.

``parse_zone`` turns such a text into a tzinfo (the reader localises stamps written without
an offset with it, the profile guess checks a metadata entry with it); ``zone_problem`` says
why a text is not one, for loading a profile's [time] zone (:mod:`pipeline.read.profile`).

Pure: a function of the text (and the machine's zone database).
"""

from __future__ import annotations

import datetime as dt
import re
import zoneinfo

ZONE_HINT = 'Give "UTC", a zone name such as "Europe/Berlin", or an offset such as "+02:00".'
_OFFSET = re.compile(r"^(?:UTC)?([+-])(\d{2}):?(\d{2})$")


def zone_problem(zone: str) -> str:
    """Why ``zone`` is not a zone formgate can use ('' when it is one)."""
    try:
        parse_zone(zone)
    except ValueError as exc:
        return str(exc)
    return ""


def parse_zone(zone: str) -> dt.tzinfo:
    """A zone as written in a profile or a file's metadata -> tzinfo; ValueError if not one.

    >>> parse_zone("+02:00"), parse_zone("UTC"), str(parse_zone("Europe/Berlin"))
    (datetime.timezone(datetime.timedelta(seconds=7200)), datetime.timezone.utc, 'Europe/Berlin')
    """
    text = zone.strip()
    if text.upper() in ("UTC", "Z", "GMT"):
        return dt.UTC
    found = _OFFSET.match(text)
    if found:
        hours, minutes = int(found[2]), int(found[3])
        if hours > 14 or minutes > 59:
            raise ValueError("is not a UTC offset (at most +14:00 and -14:00)")
        offset = dt.timedelta(hours=hours, minutes=minutes)
        return dt.timezone(-offset if found[1] == "-" else offset)
    if not text or len(text) > 64 or ".." in text or text.startswith("/"):
        raise ValueError("is not a time zone")
    try:
        return zoneinfo.ZoneInfo(text)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ValueError("is not a time zone this machine knows") from None
