"""Site time: which clock the scanner's times were written on, and checks of fill against scan.

Most scanners write DICOM times without Timezone Offset From UTC (0008,0201): they are the
scanner's local wall clock. Phantometry reads them in the **site's zone**, chosen in this order:

1. ``--timezone ZONE`` (an IANA name such as ``Europe/Berlin``; daylight-saving aware through
   :mod:`zoneinfo`, with the ``tzdata`` package where the system has no zone database);
2. ``timezone:`` in the fill record;
3. the fill record's own UTC offset (the same site, the same wall clock): the offset of its
   latest time. This is an inference, so a warning says so (and names the offsets when the
   record's times carry several, e.g. a certificate written in another zone).

Times that carry their own offset (the DICOM attribute, a DT with ``+HHMM``, a sidecar time
with an offset) keep it. The basis is recorded on the volume (``Volume.time_basis``):

* ``header offset`` -- the image's own offset;
* ``given zone`` -- ``--timezone`` or the fill record's ``timezone:``;
* ``fill record offset`` -- inferred from the fill record (warned);
* ``given time`` -- ``--acquired-at`` with its offset (NIfTI);
* ``unresolved`` -- loaded without a zone (library use): the wall clock is held as if it were
  UTC until :func:`resolve_volume_time` gives it the site's zone; never reported as UTC.

Checks of the fill against the scan (:func:`check_fill_against_scan`): a fill-record time after
the scan start is refused (the activity cannot have been measured after it was imaged; the
usual cause is a wrong zone or date), and a gap of more than a day for a nuclide whose
half-life is under a day is warned about.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone, tzinfo
from typing import TYPE_CHECKING

from .errors import FillRecordError
from .nuclides import seconds_between
from .timeutil import zone_from_name

if TYPE_CHECKING:  # pragma: no cover
    from .fill import FillRecord
    from .volume import Volume

__all__ = [
    "BASIS_FILL_OFFSET",
    "BASIS_GIVEN_TIME",
    "BASIS_GIVEN_ZONE",
    "BASIS_HEADER",
    "BASIS_UNRESOLVED",
    "SiteClock",
    "check_fill_against_scan",
    "offset_text",
    "resolve_volume_time",
    "site_clock",
]

BASIS_HEADER = "header offset"
BASIS_GIVEN_ZONE = "given zone"
BASIS_FILL_OFFSET = "fill record offset"
BASIS_GIVEN_TIME = "given time"
BASIS_UNRESOLVED = "unresolved"

#: Gap between fill and scan beyond which a short-lived nuclide (half-life under a day) warns.
LONG_GAP_S = 86400.0


@dataclass(frozen=True)
class SiteClock:
    """The zone in which times written without an offset are read.

    Attributes
    ----------
    zone : tzinfo (a ZoneInfo zone or a fixed offset).
    basis : :data:`BASIS_GIVEN_ZONE` or :data:`BASIS_FILL_OFFSET`.
    label : the zone as a person reads it (``Europe/Berlin (--timezone)``, ``+01:00 (fill record)``).
    note : why an inferred zone was chosen, for the warning (None for a given zone).
    """

    zone: tzinfo
    basis: str
    label: str
    note: str | None = None

    @property
    def inferred(self) -> bool:
        return self.basis == BASIS_FILL_OFFSET


def offset_text(moment: datetime) -> str:
    """The UTC offset of an aware datetime as ``+01:00``."""
    off = moment.utcoffset() or timedelta(0)
    minutes = int(off.total_seconds() // 60)
    sign = "+" if minutes >= 0 else "-"
    minutes = abs(minutes)
    return f"{sign}{minutes // 60:02d}:{minutes % 60:02d}"


def site_clock(fill: "FillRecord", timezone_name: str | None = None) -> SiteClock:
    """The site's zone: ``timezone_name`` (``--timezone``), else the fill record's
    ``timezone:``, else the fill record's own offset (module docstring)."""
    if timezone_name is not None:
        return SiteClock(zone_from_name(timezone_name), BASIS_GIVEN_ZONE, f"{timezone_name.strip()} (--timezone)")
    if fill.timezone is not None:
        return SiteClock(zone_from_name(fill.timezone, f"{fill.source}: timezone"), BASIS_GIVEN_ZONE,
                         f"{fill.timezone} (fill record timezone)")
    times = fill.times()
    key, latest = max(times, key=lambda kt: seconds_between(times[0][1], kt[1]))  # no conversion: no calendar overflow
    offsets = sorted({offset_text(t) for _, t in times})
    zone = timezone(latest.utcoffset() or timedelta(0))
    note = f"the scanner's times carry no UTC offset; read in the fill record's offset {offset_text(latest)} ({key})"
    if len(offsets) > 1:
        note += f"; the fill record's times carry several offsets ({', '.join(offsets)})"
    note += "; if the scanner's clock keeps another zone, give --timezone (e.g. Europe/Berlin) or timezone: in the fill record"
    return SiteClock(zone, BASIS_FILL_OFFSET, f"{offset_text(latest)} (fill record)", note)


def _in_zone(moment: datetime | None, zone: tzinfo) -> datetime | None:
    """The wall clock of ``moment`` (held as UTC while unresolved) read in ``zone``."""
    return None if moment is None else moment.replace(tzinfo=zone)


def resolve_volume_time(volume: "Volume", clock: SiteClock) -> "Volume":
    """A volume whose wall-clock times (basis ``unresolved``) are read in ``clock``'s zone.

    Volumes with any other basis are returned unchanged. The loader's own differences between
    times (injection to scan, slice to slice) were wall-clock differences; with a zone that
    changes its offset between two of them (daylight saving) they are exact only when the zone
    was given to the loader (:func:`phantometry.measure.measure` does so).
    """
    if volume.time_basis != BASIS_UNRESOLVED:
        return volume
    return dataclasses.replace(
        volume,
        acquired_at=_in_zone(volume.acquired_at, clock.zone),
        scan_start=_in_zone(volume.scan_start, clock.zone),
        time_basis=clock.basis,
        time_zone=clock.label,
    )


def check_fill_against_scan(fill: "FillRecord", volume: "Volume", where: str) -> list[str]:
    """Refuse fill-record times after the scan start; warn of a long gap for short-lived nuclides.

    Returns
    -------
    list of str
        Warnings (the long gap), for the analysis's warnings.

    Raises
    ------
    FillRecordError
        A fill-record time after the scan start, naming the field, both times and the time basis.
    """
    scan = volume.scan_start or volume.acquired_at
    if scan is None or volume.time_basis == BASIS_UNRESOLVED:
        return []
    times = fill.times()
    late = [(key, t) for key, t in times if seconds_between(scan, t) > 0]
    if late:
        key, t = max(late, key=lambda kt: seconds_between(scan, kt[1]))
        minutes = seconds_between(scan, t) / 60.0
        basis = volume.time_basis or "the image's times"
        zone = f" in {volume.time_zone}" if volume.time_zone else ""
        raise FillRecordError(
            f"{fill.source}: {key} {t.isoformat()} is {minutes:,.0f} min after the scan start {scan.isoformat()} "
            f"({where}; scanner times read by {basis}{zone}); activity cannot be measured after it was imaged: "
            "check the dates and the time zone (--timezone or timezone: in the fill record)"
        )
    warnings: list[str] = []
    nuclide = fill.nuclide
    if nuclide.half_life_s < LONG_GAP_S and times:
        key, earliest = min(times, key=lambda kt: seconds_between(scan, kt[1]))
        gap = seconds_between(earliest, scan)
        if gap > LONG_GAP_S:
            warnings.append(
                f"the fill record's {key} ({earliest.isoformat()}) is {gap / 3600.0:,.1f} h before the scan start "
                f"({scan.isoformat()}), more than a day for {nuclide.name} (half-life {nuclide.half_life_s / 60.0:.4g} min); "
                "check the dates"
            )
    return warnings
