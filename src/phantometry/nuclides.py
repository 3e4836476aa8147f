"""Radionuclides used in PET and their physical decay.

Every half-life below names the evaluation it was checked against (the table in the README
repeats them). Sources:

* **EP 5.7** -- European Pharmacopoeia 01/2008:50700, "Table of physical characteristics of
  radionuclides mentioned in the European Pharmacopoeia", whose values come from the NNDC
  (Brookhaven) NuDat evaluated nuclear data.
* **NUBASE2020** -- F.G. Kondev et al., "The NUBASE2020 evaluation of nuclear physics
  properties", Chinese Physics C 45 (2021) 030001, as tabulated in public nuclide tables.
* **DDEP** -- the Decay Data Evaluation Project (LNHB / BIPM-5 Table of Radionuclides);
  Ga-68: N.K. Kuzmenko, "Updated decay data evaluation for 68Ga", Appl. Radiat. Isot. 152
  (2019) 188-192 (67.83(20) min, confirmed by NPL's 2023 measurement 67.801(43) min).
* **Sc-44** -- PRISMAP radionuclide portfolio (4.042(25) h), after the measurement of
  Garcia-Torano et al. 2016 (4.042(7) h), which superseded the older 3.97(4) h.
* values marked **recalled** could not be read in a published table here.

Where evaluations differ, the value used is said beside it. F-18 keeps the EP value 109.77(5)
min, the value scanners write in Radionuclide Half Life (6586.2 s); NUBASE2020 gives
109.734(8) min and DDEP 1.8288(3) h = 109.728 min, 0.04 % shorter (0.001 % on a one-hour
decay correction).

**Ge-68 phantoms.** Ge-68 decays by electron capture only; the image shows its daughter Ga-68
(89 % positrons), which in a sealed source older than a day is in (transient) equilibrium:
``A_Ga = A_Ge * lambda_Ga / (lambda_Ga - lambda_Ge)`` (the Bateman solution long after
separation), 1.000174 times the Ge-68 activity. A fill record (or calibration certificate) of
nuclide Ge-68 states the Ge-68 activity; the imaged (Ga-68) concentration is that times
:attr:`Nuclide.imaged_activity_ratio`, and both decay with the Ge-68 half-life.
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
#: Longest time gap, in years, for any nuclide: a sealed phantom (Ge-68, Na-22) is replaced
#: long before (common practice), so a longer gap is a wrong date, whatever the half-life.
MAX_DECAY_YEARS = 30.0
_YEAR_S = 365.2422 * 86400.0
_DAY_S = 86400.0
_H = 3600.0
_MIN = 60.0

_EP = "EP 5.7 (01/2008; NNDC NuDat)"
_NUBASE = "NUBASE2020 (Kondev et al., Chin. Phys. C 45 (2021) 030001)"


class DecayGapError(InputError):
    """Two times are too far apart for decay correction to mean anything (wrong date)."""


@dataclass(frozen=True)
class Nuclide:
    """A positron-emitting radionuclide (or a parent imaged through its daughter).

    Attributes
    ----------
    name : str
        Canonical name, element symbol then mass number (``"F-18"``).
    half_life_s : float
        Physical half-life in seconds.
    source : str
        The evaluation the half-life was checked against (``recalled`` when not read).
    positron_fraction : float or None
        Fraction of decays emitting a positron (of the imaged daughter for a parent), where
        tabulated.
    daughter : str or None
        For a parent that emits no positrons itself (Ge-68): the positron-emitting daughter
        the image shows, in equilibrium with it.
    """

    name: str
    half_life_s: float
    source: str
    positron_fraction: float | None = None
    daughter: str | None = None

    @property
    def decay_constant_per_s(self) -> float:
        """lambda = ln 2 / T_half, in 1/s."""
        return math.log(2.0) / self.half_life_s

    @property
    def imaged_activity_ratio(self) -> float:
        """Activity the image shows per unit activity of this nuclide.

        1 for a positron emitter; for a parent imaged through its daughter in transient
        equilibrium, ``lambda_d / (lambda_d - lambda_p)`` (Bateman, long after separation).
        """
        if self.daughter is None:
            return 1.0
        lam_d = NUCLIDES[self.daughter].decay_constant_per_s
        return lam_d / (lam_d - self.decay_constant_per_s)


def _n(name: str, half_life_s: float, source: str, positron_fraction: float | None = None, daughter: str | None = None) -> Nuclide:
    return Nuclide(name, half_life_s, source, positron_fraction, daughter)


NUCLIDES: dict[str, Nuclide] = {
    n.name: n
    for n in (
        # EP keeps 109.77(5) min (see the module notes for NUBASE2020 / DDEP)
        _n("F-18", 109.77 * _MIN, _EP, 0.9686),
        # NUBASE2020 20.3402(53) min; EP 5.7 (NNDC 2008) had 20.385(20) min, 0.2 % longer
        _n("C-11", 20.3402 * _MIN, _NUBASE),
        _n("N-13", 9.965 * _MIN, _EP),
        _n("O-15", 122.24, _EP),
        # DDEP 2019 (Kuzmenko) 67.83(20) min; NNDC/EP listed 67.71 min
        _n("Ga-68", 67.83 * _MIN, "DDEP (Kuzmenko, Appl. Radiat. Isot. 152 (2019) 188)", 0.889),
        # NUBASE2020 270.95 d (the older DDEP table had 270.8 d); imaged through Ga-68
        _n("Ge-68", 270.95 * _DAY_S, _NUBASE, 0.889, daughter="Ga-68"),
        _n("Cu-64", 12.7004 * _H, _EP),
        _n("Zr-89", 78.41 * _H, _EP),
        _n("Rb-82", 1.2575 * _MIN, _EP),
        # public tables give 2.602 a; 2.6019 a (NUBASE2020) recalled
        _n("Na-22", 2.6019 * _YEAR_S, "NUBASE2020 (recalled; public tables 2.602 a)", 0.9026),
        # NUBASE2020 4.1760 d (DDEP evaluation: Zimmerman, NIST)
        _n("I-124", 4.1760 * _DAY_S, _NUBASE),
        # NUBASE2020 64.05 h; positron branch about 3.2e-5 per decay (recalled)
        _n("Y-90", 64.05 * _H, _NUBASE, 3.2e-5),
        _n("Sc-44", 4.042 * _H, "PRISMAP portfolio / Garcia-Torano et al. 2016", 0.9427),
        # recalled (public tables 5.59 d)
        _n("Mn-52", 5.591 * _DAY_S, "recalled (public tables 5.59 d)"),
        _n("Br-76", 16.2 * _H, "recalled"),
        _n("Cu-62", 9.673 * _MIN, "recalled"),
    )
}

#: element names (DICOM CID 4020 code meanings such as ``^68^Germanium``, BIDS
#: TracerRadionuclide) -> symbol
_ELEMENTS = {
    "FLUORINE": "F",
    "CARBON": "C",
    "NITROGEN": "N",
    "OXYGEN": "O",
    "GALLIUM": "GA",
    "GERMANIUM": "GE",
    "COPPER": "CU",
    "ZIRCONIUM": "ZR",
    "RUBIDIUM": "RB",
    "SODIUM": "NA",
    "IODINE": "I",
    "YTTRIUM": "Y",
    "SCANDIUM": "SC",
    "MANGANESE": "MN",
    "BROMINE": "BR",
}


def _parse(raw: str) -> tuple[str, str] | None:
    """(SYMBOL, mass) of a loose nuclide name, or None."""
    cleaned = re.sub(r"[\^\s_]", "", raw).upper()
    # a Ge-68/Ga-68 source (and "68Ge/68Ga") is named by its parent
    cleaned = cleaned.split("/")[0] if "/" in cleaned else cleaned
    m = re.fullmatch(r"([A-Z]+)-?(\d+)|(\d+)-?([A-Z]+)", cleaned)
    if not m:
        return None
    symbol, mass = (m.group(1), m.group(2)) if m.group(1) else (m.group(4), m.group(3))
    return _ELEMENTS.get(symbol, symbol), mass


def get_nuclide(name: str) -> Nuclide:
    """Look up a nuclide by a loose name.

    Accepts ``F-18``, ``F18``, ``18F``, ``^18^Fluorine`` (a DICOM CID 4020 code meaning),
    ``fluorine-18``, ``Ge-68/Ga-68`` (a source named by parent and daughter: the parent).

    Raises
    ------
    InputError
        If the name is not one of the tabulated PET nuclides.
    """
    raw = str(name).strip()
    parsed = _parse(raw)
    if parsed is not None:
        symbol, mass = parsed
        for nuc in NUCLIDES.values():
            sym, mass_number = nuc.name.split("-")
            if sym.upper() == symbol and mass_number == mass:
                return nuc
    raise InputError(f"unknown radionuclide {raw!r}; known: {', '.join(NUCLIDES)}")


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
        ``exp(-lambda * (to - from))`` with lambda = ln2 / T_half (physical decay law). The
        gap is counted in whole microseconds (:func:`seconds_between`), so decay over years
        (a Ge-68 phantom calibrated months before) is exact to double precision.
    """
    nuc = get_nuclide(nuclide) if isinstance(nuclide, str) else nuclide
    for t in (from_time, to_time):
        if t.tzinfo is None or t.utcoffset() is None:
            raise InputError(f"time {t.isoformat()} has no time zone; give an offset such as +01:00")
    dt_s = seconds_between(from_time, to_time)
    check_decay_gap(nuc, dt_s, from_time, to_time)
    return math.exp(-nuc.decay_constant_per_s * dt_s)


def frame_average_factor(nuclide: Nuclide | str, duration_s: float) -> float:
    """Mean activity over a frame of ``duration_s`` relative to the activity at its start.

    ``(1 - exp(-lambda T)) / (lambda T)`` (the integral of the decay law over the frame divided
    by its length; DICOM PS3.3 PET Image module, Decay Factor; QIBA). 1 for a zero duration.
    """
    nuc = get_nuclide(nuclide) if isinstance(nuclide, str) else nuclide
    x = nuc.decay_constant_per_s * float(duration_s)
    if x <= 0.0:
        return 1.0
    return -math.expm1(-x) / x


def frame_reference_offset_s(nuclide: Nuclide | str, duration_s: float) -> float:
    """Seconds after a frame's start at which the activity equals the frame's mean.

    ``-ln(frame_average_factor) / lambda``: a frame-mean image without decay correction shows
    the activity of this moment (a little before the frame's middle).
    """
    nuc = get_nuclide(nuclide) if isinstance(nuclide, str) else nuclide
    return -math.log(frame_average_factor(nuc, duration_s)) / nuc.decay_constant_per_s


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


def half_life_text(seconds: float) -> str:
    """A half-life in the unit a person would use (``109.77 min``, ``270.95 d``)."""
    for unit, size in (("a", _YEAR_S), ("d", _DAY_S), ("h", _H), ("min", _MIN)):
        if seconds >= 2 * size:
            return f"{seconds / size:.5g} {unit}"
    return f"{seconds:.5g} s"


def max_decay_gap_s(nuclide: Nuclide) -> float:
    """The longest gap decay-corrected: :data:`MAX_DECAY_HALF_LIVES` half-lives, at most
    :data:`MAX_DECAY_YEARS` years."""
    return min(MAX_DECAY_HALF_LIVES * nuclide.half_life_s, MAX_DECAY_YEARS * _YEAR_S)


def check_decay_gap(nuclide: Nuclide, seconds: float, from_time: datetime | None = None, to_time: datetime | None = None) -> None:
    """Refuse a gap longer than :func:`max_decay_gap_s` of ``nuclide``.

    Raises
    ------
    DecayGapError
        Naming the gap in days, the nuclide and its half-life (and the two times, if given).
    """
    if abs(seconds) <= max_decay_gap_s(nuclide):
        return
    times = f" ({from_time.isoformat()} to {to_time.isoformat()})" if from_time is not None and to_time is not None else ""
    if MAX_DECAY_HALF_LIVES * nuclide.half_life_s <= MAX_DECAY_YEARS * _YEAR_S:
        limit = f"more than {MAX_DECAY_HALF_LIVES:g} half-lives of {nuclide.name} (half-life {half_life_text(nuclide.half_life_s)}), so the correction is meaningless"
    else:
        limit = f"more than {MAX_DECAY_YEARS:g} years (longer than any {nuclide.name} source is kept)"
    raise DecayGapError(f"the decay-correction gap is {abs(seconds) / 86400.0:,.1f} days{times}, {limit}; check the dates")


def decay_correct(
    activity: float, nuclide: Nuclide | str, from_time: datetime, to_time: datetime
) -> float:
    """Activity (any unit) measured at ``from_time`` expressed at ``to_time``."""
    return activity * decay_factor(nuclide, from_time, to_time)
