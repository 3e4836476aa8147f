"""Time in phantometry: timezone-aware everywhere. One parser of an aware time and one lookup of
a time zone by name, used by the fill record, the loaders, the ledger and the command line.
"""

from __future__ import annotations

from datetime import date, datetime, tzinfo
from typing import Any

from .errors import InputError, PhantometryError

#: The example every message about a time shows.
EXAMPLE_TIME = "2026-11-03T10:30:00+01:00"


def parse_aware_time(value: Any, what: str, error: type[Exception] = InputError) -> datetime:
    """An ISO 8601 date-time with a time-zone offset, from a string or a datetime.

    Parameters
    ----------
    value : str (ISO 8601) or datetime (a YAML timestamp, a value already parsed).
    what : how messages name the value (``--acquired-at``, ``background.measured_at``); empty
        where the caller names it (a pydantic validator's field).
    error : the exception raised (a :class:`PhantometryError` subclass, or ``ValueError`` inside a
        pydantic validator, which names the field itself).

    Raises
    ------
    error
        Not ISO 8601, a date without a time, or a time without an offset (naive times are never
        taken as UTC: the message says how to write the offset).
    """
    lead = f"{what} " if what else ""
    if isinstance(value, str):
        try:
            value = datetime.fromisoformat(value.strip())
        except ValueError:
            raise error(f"{lead}{value!r} is not an ISO 8601 date-time; write e.g. {EXAMPLE_TIME}") from None
    if not isinstance(value, datetime):
        if isinstance(value, date):
            raise error(f"{lead}{value} is a date without a time; write e.g. {value}T10:30:00+01:00")
        raise error(f"{what + ': ' if what else ''}expected a date-time such as {EXAMPLE_TIME}, got {value!r}")
    if value.tzinfo is None or value.utcoffset() is None:
        raise error(f"{lead}{value.isoformat()} has no time-zone offset; write it as {value.isoformat()}+01:00 (your offset)")
    return value


def zone_from_name(name: str, what: str = "--timezone") -> tzinfo:
    """The IANA zone ``name`` (``Europe/Berlin``); ``UTC`` too.

    Raises
    ------
    InputError
        ``what: 'X' is not a time zone ...`` naming examples.
    """
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    text = str(name).strip()
    try:
        if not text or text.startswith(("/", ".")) or ".." in text:
            raise ValueError
        return ZoneInfo(text)
    except (ZoneInfoNotFoundError, ValueError, OSError):
        raise InputError(
            f"{what}: {text!r} is not a time zone of the IANA database; give a name such as Europe/Berlin, "
            "America/New_York or UTC"
        ) from None


__all__ = ["EXAMPLE_TIME", "parse_aware_time", "zone_from_name", "PhantometryError"]
