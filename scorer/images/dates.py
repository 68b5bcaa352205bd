"""DICOM date and time values (DT, DA + TM) as ISO 8601 text.

References
----------
DICOM PS3.5 6.2 (DT, DA and TM value representations).
"""

from __future__ import annotations

import re

_DT_RE = re.compile(r"^(\d{4})(\d{2})?(\d{2})?(\d{2})?(\d{2})?(\d{2})?(\.\d{1,6})?([+-]\d{4})?$")


def normalise_tm(tm: str) -> str:
    """A TM value (HHMMSS.FFFFFF, or the old HH:MM:SS form) in the compact form."""
    return tm.strip().replace(":", "")


def dicom_datetime_to_iso(value: str) -> str | None:
    """DICOM DT (PS3.5 6.2: ``YYYYMMDDHHMMSS.FFFFFF&ZZXX``, trailing parts optional) as ISO 8601.

    Returns None when ``value`` is not a valid DT.  ``"20261130083000"`` →
    ``"2026-11-30T08:30:00"``; ``"20261130"`` → ``"2026-11-30"``.
    """
    m = _DT_RE.match(value.strip())
    if not m:
        return None
    year, month, day, hour, minute, second, frac, tz = m.groups()
    if month is None and day is not None:
        return None
    try:
        if month and not 1 <= int(month) <= 12 or day and not 1 <= int(day) <= 31:
            return None
        if hour and int(hour) > 23 or minute and int(minute) > 59 or second and int(second) > 60:
            return None
    except ValueError:
        return None
    out = year
    if month:
        out += f"-{month}"
    if day:
        out += f"-{day}"
    if hour:
        if not day:
            return None
        out += f"T{hour}"
        out += f":{minute or '00'}"
        if second:
            out += f":{second}"
            if frac:
                out += frac
    if tz:
        out += f"{tz[:3]}:{tz[3:]}"
    return out
