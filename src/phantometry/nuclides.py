"""Radionuclides used in PET and their physical decay.

Half-lives are those tabulated in the European Pharmacopoeia table of physical characteristics
of radionuclides and the NNDC (Brookhaven) NuDat evaluated nuclear data; where evaluations
differ the value used is stated below.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from datetime import datetime, timedelta

from .errors import InputError

#: Longest time gap, in half-lives, over which activity is decay-corrected. Past it the factor
#: (2^-40 ~ 1e-12) says only that the dates are wrong; a phantom is scanned within hours of
#: filling (common practice).
MAX_DECAY_HALF_LIVES = 40.0


class DecayGapError(InputError):
    """Two times are too far apart for decay correction to mean anything (wrong date)."""


@dataclass(frozen=True)
class Nuclide:
    """A positron-emitting radionuclide.

    Attributes
    ----------
    name : str
        Canonical name, element symbol then mass number (``"F-18"``).
    half_life_s : float
        Physical half-life in seconds.
    source : str
        Nuclear-data table the half-life comes from.
    positron_fraction : float or None
        Fraction of decays emitting a positron, where tabulated.
    """

    name: str
    half_life_s: float
    source: str
    positron_fraction: float | None = None

    @property
    def decay_constant_per_s(self) -> float:
        """lambda = ln 2 / T_half, in 1/s."""
        return math.log(2.0) / self.half_life_s


_SRC = "European Pharmacopoeia / NNDC NuDat"
NUCLIDES: dict[str, Nuclide] = {
    n.name: n
    for n in (
        Nuclide("F-18", 109.77 * 60, _SRC, 0.9686),
        Nuclide("C-11", 20.385 * 60, _SRC),
        Nuclide("N-13", 9.965 * 60, _SRC),
        Nuclide("O-15", 122.24, _SRC),
        # evaluations range 67.71-67.83 min; the lower tabulated value is used
        Nuclide("Ga-68", 67.71 * 60, _SRC),
        Nuclide("Cu-64", 12.7004 * 3600, _SRC),
        Nuclide("Zr-89", 78.41 * 3600, _SRC),
        Nuclide("Rb-82", 1.2575 * 60, _SRC),
    )
}

# names found in DICOM CodeMeaning / BIDS TracerRadionuclide, mapped to the canonical form
_ALIASES = {
    "FLUORINE": "F-18",
    "CARBON": "C-11",
    "NITROGEN": "N-13",
    "OXYGEN": "O-15",
    "GALLIUM": "Ga-68",
    "COPPER": "Cu-64",
    "ZIRCONIUM": "Zr-89",
    "RUBIDIUM": "Rb-82",
}


def get_nuclide(name: str) -> Nuclide:
    """Look up a nuclide by a loose name.

    Accepts ``F-18``, ``F18``, ``18F``, ``^18^Fluorine`` (DICOM code meaning), ``fluorine-18``.

    Raises
    ------
    InputError
        If the name is not one of the tabulated PET nuclides.
    """
    raw = str(name).strip()
    cleaned = re.sub(r"[\^\s_]", "", raw).upper()
    m = re.fullmatch(r"([A-Z]+)-?(\d+)|(\d+)-?([A-Z]+)", cleaned)
    if m:
        symbol, mass = (m.group(1), m.group(2)) if m.group(1) else (m.group(4), m.group(3))
        if symbol in _ALIASES:
            symbol = _ALIASES[symbol].split("-")[0].upper()
        for nuc in NUCLIDES.values():
            sym, mass_number = nuc.name.split("-")
            if sym.upper() == symbol and mass_number == mass:
                return nuc
    raise InputError(
        f"unknown radionuclide {raw!r}; known: {', '.join(NUCLIDES)}"
    )


def decay_factor(nuclide: Nuclide | str, from_time: datetime, to_time: datetime) -> float:
    """Fraction of activity remaining from ``from_time`` to ``to_time``.

    ``A(to) = A(from) * decay_factor``; greater than 1 when ``to_time`` is earlier.

    Parameters
    ----------
    nuclide : Nuclide or str
    from_time, to_time : datetime
        Timezone-aware times.

    Returns
    -------
    float
        ``exp(-lambda * (to - from))`` with lambda = ln2 / T_half (physical decay law).
    """
    nuc = get_nuclide(nuclide) if isinstance(nuclide, str) else nuclide
    for t in (from_time, to_time):
        if t.tzinfo is None or t.utcoffset() is None:
            raise InputError(f"time {t.isoformat()} has no time zone; give an offset such as +01:00")
    dt_s = seconds_between(from_time, to_time)
    check_decay_gap(nuc, dt_s, from_time, to_time)
    return math.exp(-nuc.decay_constant_per_s * dt_s)


def seconds_between(from_time: datetime, to_time: datetime) -> float:
    """Seconds from ``from_time`` to ``to_time`` (aware datetimes), negative when earlier.

    Wall-clock difference corrected by the two UTC offsets: with one shared tzinfo (a ZoneInfo
    zone) plain subtraction of aware datetimes ignores a daylight-saving change in between, and
    converting to UTC first overflows for times near year 1 or 9999. Only timedeltas are
    computed here, whose range covers any pair of datetimes.
    """
    wall = to_time.replace(tzinfo=None) - from_time.replace(tzinfo=None)
    offsets = (to_time.utcoffset() or timedelta(0)) - (from_time.utcoffset() or timedelta(0))
    return (wall - offsets).total_seconds()


def _half_life_text(seconds: float) -> str:
    for unit, size in (("h", 3600.0), ("min", 60.0)):
        if seconds >= 2 * size:
            return f"{seconds / size:.5g} {unit}"
    return f"{seconds:.5g} s"


def check_decay_gap(nuclide: Nuclide, seconds: float, from_time: datetime | None = None, to_time: datetime | None = None) -> None:
    """Refuse a gap longer than :data:`MAX_DECAY_HALF_LIVES` half-lives of ``nuclide``.

    Raises
    ------
    DecayGapError
        Naming the gap in days, the nuclide and its half-life (and the two times, if given).
    """
    if abs(seconds) <= MAX_DECAY_HALF_LIVES * nuclide.half_life_s:
        return
    times = f" ({from_time.isoformat()} to {to_time.isoformat()})" if from_time is not None and to_time is not None else ""
    raise DecayGapError(
        f"the decay-correction gap is {abs(seconds) / 86400.0:,.1f} days{times}, more than {MAX_DECAY_HALF_LIVES:g} "
        f"half-lives of {nuclide.name} (half-life {_half_life_text(nuclide.half_life_s)}), so the correction is "
        "meaningless; check the dates"
    )


def decay_correct(
    activity: float, nuclide: Nuclide | str, from_time: datetime, to_time: datetime
) -> float:
    """Activity (any unit) measured at ``from_time`` expressed at ``to_time``."""
    return activity * decay_factor(nuclide, from_time, to_time)
