"""Find and load classic DICOM PET image series as :class:`~phantometry.volume.Volume` objects.

What the loader does, in order:

1. **Files.** ``paths`` is a file, a folder (searched recursively) or a list of them. Every file
   is parsed once with pixel data deferred (pydicom ``defer_size``); files without the DICOM
   ``DICM`` prefix are skipped silently, as are DICOMDIR index files. A DICOM file whose
   header is too damaged to tell its series is an error, because it may belong to the series
   asked for.
2. **Series.** Files are grouped by Series Instance UID. A series is chosen by Series Number
   (digits only), full UID or UID prefix; with none given, the single PET (``PT``) series is used, several
   raise :class:`~phantometry.errors.AmbiguousSeries`.
3. **Geometry.** Slices are ordered by Image Position (Patient) projected on the slice normal
   (cross product of the two Image Orientation (Patient) direction cosines, DICOM PS3.3
   C.7.6.2). Duplicated positions, missing slices (gaps that are whole multiples of the
   spacing, or fewer files than Number of Slices) and spacing varying by more than 1 % are
   refused with :class:`~phantometry.errors.GeometryError`. The affine maps (column, row,
   slice) indices to LPS mm and keeps oblique orientations.
4. **Units** (DICOM PS3.3 PET Series module, Units (0054,1001)):

   * ``BQML``: Bq/mL as stored (after Rescale Slope/Intercept, which may differ per slice).
   * ``CNTS``: multiplied by the ``calibration_factor`` the caller gives (Bq/mL per count);
     refused without one.
   * ``GML`` (body-weight SUV): converted back with
     ``C[Bq/mL] = SUVbw * D_decayed[Bq] / W[g]``, the inverse of
     ``SUVbw = C * W / D_decayed`` of the QIBA vendor-neutral SUV pseudo-code. ``D`` is
     Radionuclide Total Dose (0018,1074), Bq in the classic PET module; ``W`` is Patient Weight
     (0010,1030) in kg x 1000. The dose is decayed with Radionuclide Half Life (0018,1075)
     from the injection time (Radiopharmaceutical Start DateTime, else Radiopharmaceutical
     Start Time on the Series Date, moved back one day if that would be after the scan,
     i.e. the injection was before midnight) to the scan time:

     - ``DecayCorrection == START``: scan time = Series Date/Time when not after the earliest
       Acquisition Date/Time, else the earliest Acquisition Date/Time (QIBA pseudo-code).
     - ``ADMIN``: values refer to the administration time; the dose is not decayed.
     - ``NONE``: values are not decay corrected, so each slice's own Acquisition Date/Time
       (its frame start) is used for that slice.

     A missing dose, weight, time or half-life raises :class:`~phantometry.errors.UnitsError`
     naming the attribute, and so does an injection after the scan. (The pseudo-code also
     asks Corrected Image to hold DECY and ATTN before computing SUV; that is not checked
     here, since the loader only inverts an SUV the scanner already computed.)
   * Anything else is refused by name.

   ``BQML`` and ``GML`` series must state Decay Correction (``NONE``, ``START`` or ``ADMIN``);
   without it the time the values refer to is unknown. What the values are then referred to,
   alike for ``BQML`` and ``GML`` (and for every bed of a multi-bed series):

   - ``START``: the scan time above, for every slice (the scanner decay-corrected each bed to it);
   - ``ADMIN``: the administration time (refused when the header has none);
   - ``NONE``: the values are frame averages without decay correction (DICOM PS3.3 PET Image
     module; QIBA). Slice ``k`` with frame start ``t_k`` (its Acquisition Date/Time) and
     duration ``T_k`` (Actual Frame Duration, refused when missing) shows the activity of
     ``t_k + Delta(T_k)``, where ``exp(-lambda Delta) = (1 - exp(-lambda T)) / (lambda T)``
     (:func:`phantometry.nuclides.frame_reference_offset_s`). The loader refers every slice to
     one time, ``t_ref = t_1 + Delta(T_1)`` of the earliest frame, multiplying slice ``k`` by
     ``exp(-lambda (t_ref - t_k)) / f(T_k)`` with ``f`` the frame-average factor: a single-bed
     series keeps its values and gets ``acquired_at = t_ref``; later beds are decayed back.
     ``lambda`` is that of the header's half-life (or the coded nuclide's); without either
     the series is refused. A Radionuclide Half Life that is not a
   positive number is refused; one more than 1 % from the table value of the nuclide its code
   names (:mod:`phantometry.nuclides`) is replaced by the table value, with a warning on
   ``Volume.warnings``. A decay over more than 40 half-lives (a wrong date) is refused.

5. **Times.** All DA/TM/DT values are read in the zone of Timezone Offset From UTC
   (0008,0201) (a DT with its own ``+HHMM`` suffix keeps it); ``Volume.time_basis`` is then
   ``header offset``. Without that attribute the times are the scanner's local wall clock,
   read in the site's zone the caller gives (``site_clock``, :mod:`phantometry.sitetime`;
   a ZoneInfo zone is daylight-saving aware, every time difference is taken with
   :func:`phantometry.nuclides.seconds_between`). Without a zone either, the wall clock is
   held as if it were UTC with ``time_basis`` ``unresolved`` and a
   :class:`TimeZoneAssumedWarning`, until :func:`phantometry.sitetime.resolve_volume_time`
   gives it the site's zone; it never uses the machine's local zone.
   ``Volume.acquired_at`` is the reference time of the values (step 4);
   ``Volume.scan_start`` the scan time; ``Volume.frame_duration_s`` the Actual Frame Duration.

6. **Claims.** Before the voxel array is allocated, Rows x Columns x slices is checked against
   ``$PHANTOMETRY_MAX_VOXELS`` (:mod:`phantometry.io.limits`) and every uncompressed slice's
   Pixel Data length against Rows x Columns x Bits Allocated. Non-finite positions,
   orientations, spacings and rescale values, and transfer syntaxes that are not standard, are
   refused by file. pydicom's own warnings are silenced; damaged elements are refused by name.

Patient name, ID and birth date are never copied onto the Volume.
"""

from __future__ import annotations

import math
import os
import re
import warnings
from collections import Counter
from collections.abc import Iterable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone, tzinfo
from pathlib import Path
from typing import Any

import numpy as np
import pydicom
from pydicom.datadict import tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.errors import InvalidDicomError
from pydicom.multival import MultiValue
from pydicom.pixels import get_decoder
from pydicom.uid import (
    UID,
    EnhancedPETImageStorage,
    LegacyConvertedEnhancedPETImageStorage,
    MediaStorageDirectoryStorage,
    PositronEmissionTomographyImageStorage,
)

from ..errors import (
    AmbiguousSeries,
    GeometryError,
    InputError,
    NoPETSeries,
    UnitsError,
    UnsupportedSeries,
)
from ..nuclides import (
    NUCLIDES,
    DecayGapError,
    Nuclide,
    check_decay_gap,
    frame_average_factor,
    frame_reference_offset_s,
    get_nuclide,
    seconds_between,
)
from ..sitetime import BASIS_HEADER, BASIS_UNRESOLVED, SiteClock
from ..volume import Reconstruction, Scanner, Volume
from .dicom_listing import ListingHeader, first_int, read_listing_header
from .limits import check_voxel_count

__all__ = [
    "SeriesInfo",
    "TimeZoneAssumedWarning",
    "discover_series",
    "load_dicom",
    "parse_iterations_subsets",
]

_PIXEL_DATA = 0x7FE00010
_DEFER_BYTES = 4096
#: relative tolerance on slice spacing (the 1 % of the loader contract)
_SPACING_TOLERANCE = 0.01
#: largest voxel size and distance from the origin believed (mm); beyond, the header is damaged
_MAX_SPACING_MM = 1000.0
_MAX_POSITION_MM = 1.0e6
#: relative difference between RadionuclideHalfLife and the nuclide table that is reported
_HALF_LIFE_TOLERANCE = 0.01
_DECAY_CORRECTIONS = ("NONE", "START", "ADMIN")
_ENHANCED_PET = {EnhancedPETImageStorage, LegacyConvertedEnhancedPETImageStorage}
_CONVERTIBLE_UNITS = "BQML, CNTS (with a calibration factor) or GML (body-weight SUV)"


class TimeZoneAssumedWarning(UserWarning):
    """A series has no Timezone Offset From UTC and no site zone was given: its times are the
    scanner's wall clock, not yet placed in a zone."""


@dataclass(frozen=True)
class SeriesInfo:
    """One image series found on disk.

    Attributes
    ----------
    series_uid : str
        Series Instance UID.
    series_number : int or None
    series_description : str or None
    modality : str or None
        DICOM Modality (``"PT"`` for PET).
    file_count : int
        Number of files of the series.
    files : tuple of Path
        The files, in path order.
    study_uid : str or None
    time_zone_assumed : bool
        True when the series has no Timezone Offset From UTC, so its times are read as UTC.
    """

    series_uid: str
    series_number: int | None
    series_description: str | None
    modality: str | None
    file_count: int
    files: tuple[Path, ...] = ()
    study_uid: str | None = None
    time_zone_assumed: bool = False

    def label(self) -> str:
        """One-line description: number, description, modality, file count and UID."""
        number = f"#{self.series_number}" if self.series_number is not None else "#?"
        description = f" {self.series_description!r}" if self.series_description else ""
        return f"{number}{description} {self.modality or '?'} ({self.file_count} files) {self.series_uid}"


@dataclass
class _Entry:
    path: Path
    ds: pydicom.FileDataset


# ----------------------------------------------------------------------------- attribute access
# Slice headers are read on the hot path of a 400-file load, so plain ASCII attributes (CS, DS,
# IS, UI, DA, TM, DT) and US integers are taken straight from pydicom's raw elements; pydicom's
# own conversion is used whenever an element is not raw or has an unexpected form.
_TAG_CACHE: dict[str, int] = {}


def _tag(keyword: str) -> int:
    tag = _TAG_CACHE.get(keyword)
    if tag is None:
        tag = tag_for_keyword(keyword)
        if tag is None:
            raise KeyError(keyword)
        _TAG_CACHE[keyword] = tag
    return tag


class _Damaged(InputError):
    """An attribute of a sequence item cannot be read (the caller adds the file)."""

    def __init__(self, keyword: str, reason: str) -> None:
        super().__init__(f"{keyword} cannot be read ({reason})")
        self.keyword = keyword
        self.reason = reason


def _reason(exc: BaseException) -> str:
    """The first line of an exception's message (its class name if it has none)."""
    lines = str(exc).strip().splitlines()
    return lines[0] if lines else type(exc).__name__


def _value(ds: Any, keyword: str) -> Any:
    """``ds.get(keyword)``: the value converted by pydicom, None when absent.

    pydicom converts elements when first used; a damaged element raises whatever its
    converter raises, which becomes an :class:`InputError` naming the file and the attribute.
    """
    try:
        return ds.get(keyword)
    except Exception as exc:  # pydicom's converters raise many types on damaged values
        where = getattr(ds, "filename", None)
        if not where:  # an item of a sequence: the caller names the file
            raise _Damaged(keyword, _reason(exc)) from None
        raise InputError(f"{where}: {keyword} cannot be read ({_reason(exc)}); the file is damaged, copy it again") from None


def _meta_value(ds: Any, keyword: str) -> Any:
    """A file meta attribute of ``ds`` (None without file meta), like :func:`_value`."""
    meta = getattr(ds, "file_meta", None)
    if meta is None:
        return None
    try:
        return _value(meta, keyword)
    except _Damaged as exc:
        where = getattr(ds, "filename", None) or "a DICOM file"
        raise InputError(f"{where}: file meta {exc}; the file is damaged, copy it again") from None


def _ascii(ds: Any, keyword: str) -> str | None:
    """An ASCII-valued attribute (numbers, codes, UIDs, dates) as stripped text, None if absent/empty.

    Multiple values stay joined with a backslash, as in the file.
    """
    elem = ds.get_item(_tag(keyword), keep_deferred=True)
    if elem is None:
        return None
    if isinstance(elem, RawDataElement) and isinstance(elem.value, bytes) and elem.VR != "SQ":
        text = elem.value.decode("latin-1")
    else:
        value = _value(ds, keyword)
        if value is None:
            return None
        text = "\\".join(str(v) for v in value) if isinstance(value, (list, tuple, MultiValue)) else str(value)
    text = text.strip(" \x00")
    return text or None


def _ushort(ds: Any, keyword: str) -> int | None:
    """A US (unsigned 16-bit) attribute such as Rows, or None when absent."""
    elem = ds.get_item(_tag(keyword), keep_deferred=True)
    if elem is None:
        return None
    if isinstance(elem, RawDataElement) and isinstance(elem.value, bytes) and elem.VR in ("US", None):
        if len(elem.value) == 2:
            return int.from_bytes(elem.value, "little" if elem.is_little_endian else "big")
        if not elem.value:
            return None
    value = _value(ds, keyword)
    if value is None or value == "":
        return None
    try:
        return int(value)
    except (TypeError, ValueError):
        raise InputError(f"{getattr(ds, 'filename', None) or 'a DICOM file'}: {keyword} is not a number; the file is damaged") from None


def _numbers(ds: Any, keyword: str) -> list[float] | None:
    text = _ascii(ds, keyword)
    if text is None:
        return None
    return [float(v) for v in text.split("\\")]


def _text(ds: Any, keyword: str) -> str | None:
    """A free-text attribute (decoded by pydicom with the character set), stripped, or None."""
    value = _value(ds, keyword)
    if value is None:
        return None
    if isinstance(value, (list, tuple, MultiValue)):
        text = ", ".join(str(v).strip() for v in value if str(v).strip())
    else:
        text = str(value).strip()
    return text or None


def _int(ds: Any, keyword: str) -> int | None:
    return first_int(_ascii(ds, keyword))


def _float(ds: Any, keyword: str) -> float | None:
    text = _ascii(ds, keyword)
    if text is None:
        return None
    try:
        number = float(text.split("\\")[0])
    except ValueError:
        return None
    return number if math.isfinite(number) else None


def _strict_float(entry: _Entry | Any, keyword: str, path: Path, item: Any = None) -> float | None:
    """A DS/IS attribute's first value: None when absent, else a finite number or an InputError.

    ``item`` is the dataset to read (a sequence item); by default the entry's own dataset.
    """
    ds = item if item is not None else entry.ds
    text = _ascii(ds, keyword)
    if text is None:
        return None
    try:
        number = float(text.split("\\")[0])
    except ValueError:
        number = math.nan
    if not math.isfinite(number):
        raise InputError(f"{path}: {keyword} {text[:40]!r} is not a finite number; fix the header")
    return number


def _fmt_numbers(values: Iterable[float]) -> str:
    """Numbers as ``[1, 0, 0]`` (shortest form) for messages."""
    return "[" + ", ".join(f"{float(v):g}" for v in values) + "]"


def _parse_offset(text: str) -> timezone:
    m = re.fullmatch(r"([+-])(\d{2})(\d{2})", text.strip())
    if not m:
        raise ValueError(f"{text!r} is not +HHMM/-HHMM")
    minutes = int(m.group(2)) * 60 + int(m.group(3))
    if minutes >= 24 * 60 or int(m.group(3)) >= 60:
        raise ValueError(f"{text!r} is not an offset between -2359 and +2359")
    return timezone(timedelta(minutes=minutes if m.group(1) == "+" else -minutes))


def _parse_date(text: str) -> tuple[int, int, int]:
    digits = text.strip().replace(".", "")  # also accept the old YYYY.MM.DD form
    if not re.fullmatch(r"\d{8}", digits):
        raise ValueError(f"{text!r} is not a DICOM date YYYYMMDD")
    return int(digits[:4]), int(digits[4:6]), int(digits[6:8])


def _parse_time(text: str) -> tuple[int, int, int, int]:
    m = re.fullmatch(r"(\d{2}):?(\d{2})?:?(\d{2})?(?:\.(\d{1,6}))?", text.strip())
    if not m:
        raise ValueError(f"{text!r} is not a DICOM time HHMMSS.FFFFFF")
    hh, mm, ss = (int(g) if g else 0 for g in m.group(1, 2, 3))
    micro = int((m.group(4) or "0").ljust(6, "0"))
    return hh, mm, min(ss, 59), micro  # DICOM allows SS = 60 (leap second)


def _combine(date_text: str, time_text: str, tz: tzinfo) -> datetime:
    return datetime(*_parse_date(date_text), *_parse_time(time_text), tzinfo=tz)


def _parse_datetime(text: str, tz: tzinfo) -> datetime:
    """DICOM DT ``YYYYMMDDHHMMSS.FFFFFF&ZZXX``; its own offset wins over ``tz``."""
    m = re.fullmatch(r"(\d{8})(\d{2,6}(?:\.\d{1,6})?)?([+-]\d{4})?", text.strip())
    if not m:
        raise ValueError(f"{text!r} is not a DICOM date-time")
    zone = _parse_offset(m.group(3)) if m.group(3) else tz
    return _combine(m.group(1), m.group(2) or "00", zone)


def parse_iterations_subsets(method: str | None) -> tuple[str | None, int | None, int | None]:
    """Split iterations and subsets out of a Reconstruction Method string.

    Recognises ``"OSEM 3i21s"``, ``"3i 21s"``, ``"3 iterations 21 subsets"``, ``"3 it 21 sub"``
    (common vendor spellings; common practice).

    Parameters
    ----------
    method : str or None
        DICOM Reconstruction Method (0054,1103).

    Returns
    -------
    (method, iterations, subsets)
        The method with the iteration/subset token removed (None if nothing is left), and the
        two integers, or None each when the string does not state them.
    """
    if not method:
        return None, None, None
    pattern = re.compile(
        r"(?<![\w.])(\d+)\s*i(?:t(?:er(?:ations?)?)?)?[\s,;/x]*(\d+)\s*s(?:ub(?:sets?)?)?(?![a-z])",
        re.IGNORECASE,
    )
    m = pattern.search(method)
    if not m:
        return method.strip() or None, None, None
    rest = (method[: m.start()] + " " + method[m.end() :]).strip(" ,;-/")
    rest = re.sub(r"\s+", " ", rest).strip()
    return rest or None, int(m.group(1)), int(m.group(2))


# ----------------------------------------------------------------------------- files and series
def _as_path_list(paths: str | os.PathLike | Iterable[str | os.PathLike]) -> list[Path]:
    if isinstance(paths, (str, os.PathLike)):
        return [Path(paths)]
    return [Path(p) for p in paths]


def _describe(roots: Sequence[Path]) -> str:
    if len(roots) == 1:
        return str(roots[0])
    return f"{roots[0]} (+{len(roots) - 1} more paths)"


def _collect_files(roots: Sequence[Path]) -> list[Path]:
    files: list[Path] = []
    for root in roots:
        if root.is_dir():
            files.extend(p for p in root.rglob("*") if p.is_file())
        elif root.is_file():
            files.append(root)
        else:
            raise InputError(f"{root}: no such file or folder; give the folder holding the DICOM series")
    return sorted(set(files))


#: The attributes a listing needs (read by pydicom when the fast walk declines a file).
_LISTING_TAGS = ["SeriesInstanceUID", "SeriesNumber", "SeriesDescription", "Modality", "StudyInstanceUID", "TimezoneOffsetFromUTC"]


def _series_problem(sop_class: str | None, has_series_uid: bool) -> tuple[str, str | None] | None:
    """``("skip", None)``/``("broken", reason)`` for a file listing cannot use, else None."""
    if sop_class == MediaStorageDirectoryStorage:
        return "skip", None
    if not has_series_uid:
        if sop_class is not None and sop_class not in (
            PositronEmissionTomographyImageStorage,
            *_ENHANCED_PET,
        ):
            return "skip", None  # a complete non-PET object without series, e.g. a report
        return "broken", "no Series Instance UID could be read (truncated header?)"
    return None


def _dcmread(path: Path, **options: Any) -> tuple[str, Any]:
    """``("ok", dataset)``, ``("skip", None)`` for a non-DICOM file or ``("broken", reason)``."""
    try:
        return "ok", pydicom.dcmread(path, **options)
    except InvalidDicomError:
        return "skip", None
    except Exception as exc:  # pydicom raises many types on damaged files
        return "broken", _reason(exc)


def _read_header(path: Path) -> tuple[str, Any]:
    """Parse one file with pixel data deferred.

    Returns ``("ok", dataset)``, ``("skip", None)`` for non-DICOM/DICOMDIR files, or
    ``("broken", reason)`` for DICOM files whose series cannot be told.
    """
    status, ds = _dcmread(path, defer_size=_DEFER_BYTES)
    if status != "ok":
        return status, ds
    try:
        sop_class = _meta_value(ds, "MediaStorageSOPClassUID")
    except InputError as exc:
        return "broken", str(exc).removeprefix(f"{path}: ")
    problem = _series_problem(sop_class, "SeriesInstanceUID" in ds)
    return problem if problem is not None else ("ok", ds)


def _listing_header(path: Path) -> tuple[str, Any]:
    """Like :func:`_read_header` with a :class:`ListingHeader` in place of the dataset.

    The fast walk of :mod:`phantometry.io.dicom_listing` reads nearly every file; pydicom
    reads the rest (and tells non-DICOM and damaged files).
    """
    try:
        header = read_listing_header(path)
    except OSError as exc:
        return "broken", exc.strerror or _reason(exc)
    if header is None:
        status, ds = _dcmread(path, stop_before_pixels=True, specific_tags=_LISTING_TAGS)
        if status != "ok":
            return status, ds
        try:
            header = listing_header_of(ds)
        except InputError as exc:
            return "broken", str(exc).removeprefix(f"{path}: ")
    problem = _series_problem(header.sop_class_uid, header.series_uid is not None)
    return problem if problem is not None else ("ok", header)


def listing_header_of(ds: Any) -> ListingHeader:
    """The :class:`ListingHeader` of a dataset read by pydicom."""
    sop_class = _meta_value(ds, "MediaStorageSOPClassUID")
    return ListingHeader(
        sop_class_uid=(str(sop_class).strip(" \x00") or None) if sop_class is not None else None,
        series_uid=_ascii(ds, "SeriesInstanceUID") if "SeriesInstanceUID" in ds else None,
        series_number=_int(ds, "SeriesNumber"),
        series_description=_text(ds, "SeriesDescription"),
        modality=_ascii(ds, "Modality"),
        study_uid=_ascii(ds, "StudyInstanceUID"),
        timezone_offset=_ascii(ds, "TimezoneOffsetFromUTC"),
    )


def _scan(roots: Sequence[Path]) -> tuple[dict[str, list[_Entry]], list[tuple[Path, str]]]:
    groups: dict[str, list[_Entry]] = {}
    broken: list[tuple[Path, str]] = []
    for path in _collect_files(roots):
        status, payload = _read_header(path)
        if status == "ok":
            uid = _ascii(payload, "SeriesInstanceUID") or ""
            groups.setdefault(uid, []).append(_Entry(path, payload))
        elif status == "broken":
            broken.append((path, payload))
    return groups, broken


def _list(roots: Sequence[Path]) -> dict[str, list[tuple[Path, ListingHeader]]]:
    groups: dict[str, list[tuple[Path, ListingHeader]]] = {}
    for path in _collect_files(roots):
        status, header = _listing_header(path)
        if status == "ok":
            groups.setdefault(header.series_uid, []).append((path, header))
    return groups


def _series_info(uid: str, first: ListingHeader, files: Sequence[Path]) -> SeriesInfo:
    return SeriesInfo(
        series_uid=uid,
        series_number=first.series_number,
        series_description=first.series_description,
        modality=first.modality,
        file_count=len(files),
        files=tuple(files),
        study_uid=first.study_uid,
        time_zone_assumed=first.timezone_offset is None,
    )


def _sorted_infos(infos: list[SeriesInfo]) -> list[SeriesInfo]:
    big = 1 << 62
    return sorted(infos, key=lambda s: (s.series_number if s.series_number is not None else big, s.series_uid))


def discover_series(paths: str | os.PathLike | Iterable[str | os.PathLike]) -> list[SeriesInfo]:
    """List the DICOM series under ``paths`` (files and folders, searched recursively).

    Non-DICOM files are skipped, and so are DICOM files too damaged to tell their series
    (:func:`load_dicom` refuses those instead).

    Parameters
    ----------
    paths : path or list of paths

    Returns
    -------
    list of SeriesInfo
        Sorted by Series Number, then UID; empty when no DICOM series is found.

    Raises
    ------
    InputError
        If a path does not exist.
    """
    groups = _list(_as_path_list(paths))
    return _sorted_infos([_series_info(uid, listed[0][1], [path for path, _ in listed]) for uid, listed in groups.items()])


def _choices(infos: Iterable[SeriesInfo]) -> str:
    return "; ".join(info.label() for info in infos)


def _choose(infos: list[SeriesInfo], series: str | int | None, where: str) -> SeriesInfo:
    counts = Counter(i.modality or "unknown-modality" for i in infos)
    found = ", ".join(f"{count} {modality}" for modality, count in sorted(counts.items()))
    if series is None:
        pet = [i for i in infos if i.modality == "PT"]
        if not pet:
            raise NoPETSeries(
                f"{where}: no PET (PT) series; found {found} series ({_choices(infos)}); "
                "give a folder with a PET series"
            )
        if len(pet) > 1:
            raise AmbiguousSeries(
                f"{where}: {len(pet)} PET series; choose one by UID, UID prefix or number: {_choices(pet)}"
            )
        return pet[0]

    key = str(series).strip()
    if isinstance(series, int) or key.isdigit():  # a Series Number (UIDs always hold dots)
        chosen = [i for i in infos if i.series_number == int(key)]
    else:
        chosen = [i for i in infos if i.series_uid == key] or [i for i in infos if i.series_uid.startswith(key)]
    if not chosen:
        raise NoPETSeries(f"{where}: no series matches {key!r}; available: {_choices(infos)}")
    if len(chosen) > 1:
        raise AmbiguousSeries(f"{where}: {len(chosen)} series match {key!r}; give more of the UID: {_choices(chosen)}")
    info = chosen[0]
    if info.modality != "PT":
        raise UnsupportedSeries(
            f"{where}: series {info.label()} is modality {info.modality or 'unknown'}, not PET (PT); "
            "choose a PET series"
        )
    return info


# ----------------------------------------------------------------------------- geometry
@dataclass
class _Geometry:
    order: np.ndarray
    affine: np.ndarray
    spacing_mm: tuple[float, float, float]  # dx, dy, dz
    rows: int
    columns: int


def _vectors(entries: list[_Entry], keyword: str, size: int) -> np.ndarray:
    out = np.empty((len(entries), size))
    for n, entry in enumerate(entries):
        try:
            numbers = _numbers(entry.ds, keyword)
        except ValueError:
            raise GeometryError(f"{entry.path}: {keyword} {_ascii(entry.ds, keyword)!r} is not numeric") from None
        if numbers is None:
            raise GeometryError(f"{entry.path}: has no {keyword}; the file may be truncated or is not an image slice")
        if len(numbers) != size:
            raise GeometryError(f"{entry.path}: {keyword} needs {size} numbers, got {len(numbers)}")
        if not all(math.isfinite(v) for v in numbers):
            raise GeometryError(f"{entry.path}: {keyword} {_fmt_numbers(numbers)} holds a number that is not finite; fix the header")
        out[n] = numbers
    return out


def _sizes(entries: list[_Entry], keyword: str) -> np.ndarray:
    values = []
    for entry in entries:
        value = _ushort(entry.ds, keyword)
        if not value:
            raise GeometryError(f"{entry.path}: has no {keyword}; the file may be truncated or is not an image slice")
        values.append(value)
    return np.array(values)


def _geometry(entries: list[_Entry], where: str) -> _Geometry:
    paths = [e.path for e in entries]
    orientation = _vectors(entries, "ImageOrientationPatient", 6)
    positions = _vectors(entries, "ImagePositionPatient", 3)
    pixel_spacing = _vectors(entries, "PixelSpacing", 2)
    rows = _sizes(entries, "Rows")
    columns = _sizes(entries, "Columns")

    for values, name, tol in ((orientation, "ImageOrientationPatient", 1e-4), (pixel_spacing, "PixelSpacing", 1e-4)):
        bad = np.flatnonzero(np.any(np.abs(values - values[0]) > tol * np.maximum(1.0, np.abs(values[0])), axis=1))
        if bad.size:
            raise GeometryError(
                f"{paths[bad[0]]}: {name} {_fmt_numbers(values[bad[0]])} differs from {_fmt_numbers(values[0])} of "
                f"{paths[0].name} in the same series; one series must share one grid"
            )
    for values, name in ((rows, "Rows"), (columns, "Columns")):
        bad = np.flatnonzero(values != values[0])
        if bad.size:
            raise GeometryError(
                f"{paths[bad[0]]}: {name} {values[bad[0]]} differs from {values[0]} of {paths[0].name} in the same series; "
                "one series must share one grid"
            )

    row_dir, col_dir = orientation[0, :3], orientation[0, 3:]
    if not (0.99 < np.linalg.norm(row_dir) < 1.01 and 0.99 < np.linalg.norm(col_dir) < 1.01):
        raise GeometryError(f"{paths[0]}: ImageOrientationPatient {_fmt_numbers(orientation[0])} is not two unit vectors")
    row_dir = row_dir / np.linalg.norm(row_dir)
    col_dir = col_dir / np.linalg.norm(col_dir)
    if abs(float(row_dir @ col_dir)) > 1e-3:
        raise GeometryError(f"{paths[0]}: ImageOrientationPatient rows are not orthogonal ({_fmt_numbers(orientation[0])})")
    normal = np.cross(row_dir, col_dir)
    normal /= np.linalg.norm(normal)
    row_spacing, column_spacing = float(pixel_spacing[0, 0]), float(pixel_spacing[0, 1])
    if row_spacing <= 0 or column_spacing <= 0:
        raise GeometryError(f"{paths[0]}: PixelSpacing {_fmt_numbers(pixel_spacing[0])} must be positive")
    if max(row_spacing, column_spacing) > _MAX_SPACING_MM:
        raise GeometryError(
            f"{paths[0]}: PixelSpacing {_fmt_numbers(pixel_spacing[0])} mm is not a plausible voxel size "
            f"(over {_MAX_SPACING_MM:g} mm); fix the header"
        )
    far = np.flatnonzero(np.any(np.abs(positions) > _MAX_POSITION_MM, axis=1))
    if far.size:
        raise GeometryError(
            f"{paths[far[0]]}: ImagePositionPatient {_fmt_numbers(positions[far[0]])} mm lies more than "
            f"{_MAX_POSITION_MM:g} mm from the origin; fix the header"
        )

    along = positions @ normal
    order = np.argsort(along, kind="stable")
    along_sorted = along[order]
    n = len(entries)

    if n == 1:
        dz = _strict_float(entries[0], "SpacingBetweenSlices", paths[0]) or _strict_float(entries[0], "SliceThickness", paths[0])
        if not dz or dz <= 0 or dz > _MAX_SPACING_MM:
            raise GeometryError(f"{paths[0]}: a single slice without a plausible SliceThickness has no slice spacing")
    else:
        steps = np.diff(along_sorted)
        duplicate_tol = max(1e-3, _SPACING_TOLERANCE * float(steps.max()))  # mm
        dup = np.flatnonzero(steps <= duplicate_tol)
        if dup.size:
            a, b = order[dup[0]], order[dup[0] + 1]
            raise GeometryError(
                f"{where}: {dup.size} duplicated slice position(s), e.g. {paths[a].name} and {paths[b].name} both at "
                f"{along_sorted[dup[0]]:.3f} mm along the slice normal; keep one series/frame per folder"
            )
        unit = float(steps.min())
        ratios = steps / unit
        off = np.flatnonzero(np.abs(ratios - 1.0) > _SPACING_TOLERANCE)
        if off.size:
            multiples = np.rint(ratios[off])
            whole = (multiples >= 2) & (np.abs(ratios[off] - multiples) <= _SPACING_TOLERANCE * multiples)
            gaps = off[whole]
            if gaps.size == off.size:
                g = gaps[0]
                missing = int(sum(np.rint(ratios[gaps]) - 1))
                raise GeometryError(
                    f"{where}: {missing} slice(s) missing, e.g. between positions {along_sorted[g]:.3f} and "
                    f"{along_sorted[g + 1]:.3f} mm ({paths[order[g]].name}, {paths[order[g + 1]].name}); "
                    "copy the complete series"
                )
            g = off[0]
            raise GeometryError(
                f"{where}: non-uniform slice spacing: {steps[g]:.4f} mm between positions {along_sorted[g]:.3f} and "
                f"{along_sorted[g + 1]:.3f} mm vs {unit:.4f} mm elsewhere (more than 1 %); resample to a regular grid"
            )
        dz = float((along_sorted[-1] - along_sorted[0]) / (n - 1))
        in_plane = positions[order] - np.outer(along_sorted - along_sorted[0], normal)
        drift = float(np.max(np.linalg.norm(in_plane - in_plane[0], axis=1)))
        if drift > max(0.01, 0.01 * min(row_spacing, column_spacing)):
            raise GeometryError(
                f"{where}: slice positions drift {drift:.3f} mm across the image plane (tilted/sheared stack); "
                "resample to an orthogonal grid"
            )

    declared = _ushort(entries[0].ds, "NumberOfSlices")
    if declared is not None and declared > 0 and declared != n:
        raise GeometryError(
            f"{where}: {n} slice files but NumberOfSlices is {declared}; "
            + ("slices are missing, copy the complete series" if n < declared
               else "the series holds more than one stack")
        )

    affine = np.eye(4)
    affine[:3, 0] = row_dir * column_spacing
    affine[:3, 1] = col_dir * row_spacing
    affine[:3, 2] = normal * dz
    affine[:3, 3] = positions[order[0]]
    return _Geometry(order, affine, (column_spacing, row_spacing, float(dz)), int(rows[0]), int(columns[0]))


# ----------------------------------------------------------------------------- times and units
@dataclass
class _Clock:
    zone: tzinfo
    basis: str
    label: str | None = None

    @property
    def assumed(self) -> bool:
        return self.basis == BASIS_UNRESOLVED


def _clock(entry: _Entry, site: SiteClock | None = None) -> _Clock:
    """The header's offset, else the site's zone, else the wall clock held as UTC (unresolved)."""
    text = _ascii(entry.ds, "TimezoneOffsetFromUTC")
    if text is None:
        if site is not None:
            return _Clock(site.zone, site.basis, site.label)
        return _Clock(timezone.utc, BASIS_UNRESOLVED)
    try:
        zone = _parse_offset(text)
    except ValueError as exc:
        raise InputError(f"{entry.path}: TimezoneOffsetFromUTC {exc}; fix or remove the attribute") from None
    minutes = int(zone.utcoffset(None).total_seconds() // 60)
    label = f"{'+' if minutes >= 0 else '-'}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d} (TimezoneOffsetFromUTC)"
    return _Clock(zone, BASIS_HEADER, label)


def _datetime(
    entry: _Entry, date_kw: str, time_kw: str, clock: _Clock, fallback_date_kw: str | None = None
) -> datetime | None:
    date_text = _ascii(entry.ds, date_kw) or (_ascii(entry.ds, fallback_date_kw) if fallback_date_kw else None)
    time_text = _ascii(entry.ds, time_kw)
    if not date_text or not time_text:
        return None
    try:
        return _combine(date_text, time_text, clock.zone)
    except ValueError as exc:
        raise InputError(f"{entry.path}: {date_kw}/{time_kw} {exc}; fix the header") from None


@dataclass
class _Isotope:
    dose_bq: float | None
    half_life_s: float | None
    injection: datetime | None
    nuclide: Nuclide | None
    warnings: list[str] = field(default_factory=list)


def _isotope(entry: _Entry, clock: _Clock, scan: datetime | None) -> _Isotope:
    """Dose, half-life, injection time and nuclide of the first Radiopharmaceutical Information item.

    The nuclide comes from the Radionuclide Code Sequence meaning, else from a half-life within
    1 % of one tabulated nuclide. A non-positive half-life is refused; one that differs from
    the table value of the coded nuclide by more than 1 % is replaced by the table value, with
    a warning.
    """
    seq = _value(entry.ds, "RadiopharmaceuticalInformationSequence")
    try:
        item = seq[0] if seq else None
    except Exception:  # not a sequence: a damaged element
        item = None
    if item is None:
        return _Isotope(None, None, None, None)
    try:
        return _isotope_item(entry, item, clock, scan)
    except _Damaged as exc:
        raise InputError(
            f"{entry.path}: RadiopharmaceuticalInformationSequence: {exc.keyword} cannot be read ({exc.reason}); "
            "the file is damaged, copy it again"
        ) from None


def _isotope_item(entry: _Entry, item: Any, clock: _Clock, scan: datetime | None) -> _Isotope:
    """:func:`_isotope` for the Radiopharmaceutical Information ``item`` of ``entry``."""
    dose = _float(item, "RadionuclideTotalDose")
    half_life = _strict_float(entry, "RadionuclideHalfLife", entry.path, item=item)
    if half_life is not None and half_life <= 0:
        raise UnitsError(
            f"{entry.path}: RadionuclideHalfLife (0018,1075) is {half_life:g} s; a half-life must be positive, fix the header"
        )
    injection = None
    start_dt = _ascii(item, "RadiopharmaceuticalStartDateTime")
    start_tm = _ascii(item, "RadiopharmaceuticalStartTime")
    series_date = _ascii(entry.ds, "SeriesDate")
    try:
        if start_dt:
            injection = _parse_datetime(start_dt, clock.zone)
        elif start_tm and series_date:
            injection = _combine(series_date, start_tm, clock.zone)
            if scan is not None and seconds_between(scan, injection) > 0:
                injection -= timedelta(days=1)  # injected before midnight, scanned after
    except ValueError as exc:
        raise InputError(f"{entry.path}: radiopharmaceutical start time {exc}; fix the header") from None
    except OverflowError:
        raise InputError(f"{entry.path}: radiopharmaceutical start time lies outside the calendar; fix the header") from None

    nuclide = None
    codes = _value(item, "RadionuclideCodeSequence")
    try:
        meaning = _text(codes[0], "CodeMeaning") if codes else None
    except (TypeError, IndexError, KeyError):  # not a sequence of items: damaged
        raise _Damaged("RadionuclideCodeSequence", "not a sequence of items") from None
    if meaning:
        try:
            nuclide = get_nuclide(meaning)
        except InputError:
            nuclide = None
    notes = []
    if nuclide is None and half_life:
        matches = [n for n in NUCLIDES.values() if abs(n.half_life_s - half_life) <= _HALF_LIFE_TOLERANCE * n.half_life_s]
        nuclide = matches[0] if len(matches) == 1 else None
    elif nuclide is not None and half_life and abs(half_life - nuclide.half_life_s) > _HALF_LIFE_TOLERANCE * nuclide.half_life_s:
        notes.append(
            f"{entry.path}: RadionuclideHalfLife {half_life:g} s differs from the {nuclide.name} half-life "
            f"{nuclide.half_life_s:g} s ({nuclide.source}) by {100 * abs(half_life / nuclide.half_life_s - 1):.1f} %; "
            "the table value is used"
        )
        half_life = nuclide.half_life_s
    return _Isotope(dose, half_life, injection, nuclide, notes)


def _suv_to_bqml(
    entries: list[_Entry],
    decay_correction: str | None,
    scan: datetime | None,
    acquisitions: list[datetime | None],
    isotope: _Isotope,
) -> np.ndarray:
    """Bq/mL per SUVbw unit for each slice (inverse of the QIBA vendor-neutral SUV pseudo-code)."""
    first = entries[0]
    weight_kg = _float(first.ds, "PatientWeight")
    missing = []
    if weight_kg is None or weight_kg <= 0:
        missing.append("PatientWeight (0010,1030)")
    if isotope.dose_bq is None or isotope.dose_bq <= 0:
        missing.append("RadionuclideTotalDose (0018,1074)")
    needs_decay = decay_correction in ("START", "NONE")
    half_life = isotope.half_life_s or (isotope.nuclide.half_life_s if isotope.nuclide else None)
    if needs_decay:
        if isotope.injection is None:
            missing.append("RadiopharmaceuticalStartDateTime (0018,1078) or RadiopharmaceuticalStartTime (0018,1072)")
        if half_life is None:
            missing.append("RadionuclideHalfLife (0018,1075)")
        if decay_correction == "START" and scan is None:
            missing.append("SeriesDate/SeriesTime (0008,0021/0031)")
        if decay_correction == "NONE" and any(a is None for a in acquisitions) and scan is None:
            missing.append("AcquisitionDate/AcquisitionTime (0008,0022/0032)")
    if missing:
        raise UnitsError(
            f"{first.path}: SUV (Units GML) cannot be converted to Bq/mL without {', '.join(missing)}; "
            "export the series in BQML or fix the header"
        )
    weight_g = float(weight_kg) * 1000.0
    dose = float(isotope.dose_bq)
    if decay_correction == "ADMIN":
        return np.full(len(entries), dose / weight_g)
    if decay_correction == "START":
        times = [scan] * len(entries)
    else:
        times = [a if a is not None else scan for a in acquisitions]
    elapsed = np.array([seconds_between(isotope.injection, t) for t in times])
    if np.any(elapsed < 0):
        raise UnitsError(
            f"{first.path}: injection time {isotope.injection.isoformat()} is after the scan time "
            f"{min(times).isoformat()}; fix RadiopharmaceuticalStartDateTime or the series times"
        )
    nuclide = isotope.nuclide or Nuclide("the nuclide of RadionuclideHalfLife", float(half_life), "header")
    worst = int(np.argmax(elapsed))
    try:
        check_decay_gap(nuclide, float(elapsed[worst]), isotope.injection, times[worst])
    except DecayGapError as exc:
        raise UnitsError(f"{first.path}: injection to scan time: {exc}") from None
    decayed_dose = dose * np.power(2.0, -elapsed / float(half_life))
    return decayed_dose / weight_g


# ----------------------------------------------------------------------------- pixels
def _decoder_check(entry: _Entry, ts: UID) -> None:
    try:
        available = get_decoder(ts).is_available
    except (RuntimeError, ValueError, KeyError):  # unknown syntaxes raise a RuntimeError subclass
        available = False
    if not available:
        raise UnsupportedSeries(
            f"{entry.path}: pixel data is compressed as {ts.name} ({ts}) and no decoder is installed; "
            "run `pip install phantometry[compressed]`"
        )


def _native_pixels(entry: _Entry, ts: UID, rows: int, columns: int) -> np.ndarray | None:
    """Stored values of an uncompressed slice read straight from the file, or None to fall back."""
    ds = entry.ds
    bits = _ushort(ds, "BitsAllocated")
    if bits not in (8, 16, 32) or _ushort(ds, "BitsStored") != bits or (_ushort(ds, "SamplesPerPixel") or 1) != 1:
        return None
    if (_int(ds, "NumberOfFrames") or 1) != 1:
        return None
    elem = ds.get_item(_PIXEL_DATA, keep_deferred=True)
    count = rows * columns
    needed = count * bits // 8
    if isinstance(elem, RawDataElement) and elem.value is None:
        if elem.length == 0xFFFFFFFF:
            return None
        with open(entry.path, "rb") as fh:
            fh.seek(elem.value_tell)
            buffer = fh.read(min(elem.length, needed))
    else:
        buffer = elem.value
    if buffer is None or len(buffer) < needed:
        raise InputError(
            f"{entry.path}: pixel data holds {0 if buffer is None else len(buffer)} of {needed} bytes; "
            "the file is truncated, copy it again"
        )
    sign = "i" if _ushort(ds, "PixelRepresentation") == 1 else "u"
    order = "<" if ts.is_little_endian else ">"
    return np.frombuffer(buffer, dtype=np.dtype(f"{order}{sign}{bits // 8}"), count=count).reshape(rows, columns)


def _pixel_bytes_present(entry: _Entry) -> int | None:
    """Bytes of native pixel data the file holds, or None when unknown (undefined length)."""
    elem = entry.ds.get_item(_PIXEL_DATA, keep_deferred=True)
    if elem is None:
        return 0
    if isinstance(elem, RawDataElement) and elem.value is None:  # deferred: not read yet
        if elem.length == 0xFFFFFFFF:
            return None
        try:
            in_file = entry.path.stat().st_size - int(elem.value_tell)
        except OSError:
            return None
        return max(0, min(int(elem.length), in_file))
    value = elem.value
    return len(value) if isinstance(value, (bytes, bytearray)) else None


def _check_pixel_claims(entries: list[_Entry], geometry: "_Geometry") -> None:
    """Refuse, before allocating, a series larger than the voxel limit or a file whose native
    pixel data is shorter than Rows x Columns x Bits Allocated / 8 claims
    (:mod:`phantometry.io.limits`)."""
    first = entries[0]
    check_voxel_count((geometry.rows, geometry.columns, len(entries)), str(first.path), "Rows x Columns x slices")
    for entry in entries:
        ts = _transfer_syntax(entry.ds)
        if ts.is_compressed or ts.is_deflated:
            continue  # the decoded size is known only when decoding, one slice at a time
        bits = _ushort(entry.ds, "BitsAllocated") or 0
        samples = _ushort(entry.ds, "SamplesPerPixel") or 1
        needed = (geometry.rows * geometry.columns * samples * bits + 7) // 8
        present = _pixel_bytes_present(entry)
        if present is not None and present < needed:
            raise InputError(
                f"{entry.path}: Rows x Columns {geometry.rows} x {geometry.columns} at {bits} bits claim {needed:,} bytes "
                f"of pixel data but the file holds {present:,}; the file is truncated or its header damaged, copy it again"
            )


def _transfer_syntax(ds: Any) -> UID:
    return UID(str(_meta_value(ds, "TransferSyntaxUID") or ""))


def _slice_pixels(entry: _Entry, rows: int, columns: int) -> np.ndarray:
    ds = entry.ds
    ts = _transfer_syntax(ds)
    if ts and not ts.is_compressed and not ts.is_deflated:
        pixels = _native_pixels(entry, ts, rows, columns)
        if pixels is not None:
            return pixels
    if ts and ts.is_compressed:
        _decoder_check(entry, ts)
    try:
        source = pydicom.dcmread(entry.path) if ts and ts.is_deflated else ds
        pixels = source.pixel_array
    except Exception as exc:
        raise InputError(
            f"{entry.path}: pixel data cannot be decoded ({_reason(exc)}); "
            "the file may be truncated or corrupt"
        ) from None
    if pixels.shape != (rows, columns):
        raise UnsupportedSeries(
            f"{entry.path}: pixel data has shape {pixels.shape}, expected one {rows}x{columns} grey-scale frame"
        )
    return pixels


# ----------------------------------------------------------------------------- main entry point
@dataclass
class _Quantity:
    units: str
    decay_correction: str | None
    to_bqml: np.ndarray  # Bq/mL per rescaled stored value, per slice
    acquired_at: datetime | None
    nuclide: Nuclide | None
    clock: _Clock
    warnings: list[str] = field(default_factory=list)
    scan_start: datetime | None = None
    frame_duration_s: float | None = None
    decay_reference: str | None = None
    #: (Bq/mL per SUV) of a GML series, per slice, before the NONE frame correction
    suv_factor: np.ndarray | None = None

    @property
    def time_zone_assumed(self) -> bool:
        return self.clock.assumed


def _frame_durations(entries: list[_Entry]) -> list[float | None]:
    """Actual Frame Duration (0018,1242) of every slice, in s (None where absent)."""
    out: list[float | None] = []
    for entry in entries:
        ms = _strict_float(entry, "ActualFrameDuration", entry.path)
        if ms is not None and ms <= 0:
            raise UnitsError(f"{entry.path}: ActualFrameDuration (0018,1242) is {ms:g} ms; a frame lasts a positive time, fix the header")
        out.append(None if ms is None else ms / 1000.0)
    return out


def _none_correction(
    entries: list[_Entry], starts: list[datetime | None], scan: datetime | None, durations: list[float | None], isotope: "_Isotope"
) -> tuple[np.ndarray, datetime]:
    """Per-slice factors that refer a NONE series' frame averages to one time, and that time
    (module docstring, step 4)."""
    first = entries[0]
    missing = [e.path for e, d in zip(entries, durations) if d is None]
    if missing:
        raise UnitsError(
            f"{missing[0]}: DecayCorrection NONE: the values are frame averages without decay correction, and "
            "ActualFrameDuration (0018,1242) is missing, so the time they show is unknown; fix the header or export "
            "the series decay corrected (START)"
        )
    half_life = isotope.half_life_s or (isotope.nuclide.half_life_s if isotope.nuclide else None)
    if not half_life:
        raise UnitsError(
            f"{first.path}: DecayCorrection NONE: the frame averages cannot be referred to one time without "
            "RadionuclideHalfLife (0018,1075) or a Radionuclide Code Sequence; fix the header"
        )
    times = [t if t is not None else scan for t in starts]
    if any(t is None for t in times):
        raise UnitsError(
            f"{first.path}: DecayCorrection NONE needs each slice's AcquisitionDate/AcquisitionTime (0008,0022/0032) "
            "or the SeriesDate/SeriesTime; fix the header"
        )
    nuclide = isotope.nuclide if isotope.nuclide is not None and isotope.nuclide.half_life_s == half_life else \
        Nuclide("the nuclide of RadionuclideHalfLife", float(half_life), "header")
    order = min(range(len(times)), key=lambda k: seconds_between(times[0], times[k]))
    t_first = times[order]
    t_ref = t_first + timedelta(seconds=frame_reference_offset_s(nuclide, float(durations[order])))
    lam = nuclide.decay_constant_per_s
    factors = np.array([
        math.exp(-lam * seconds_between(t, t_ref)) / frame_average_factor(nuclide, float(d))
        for t, d in zip(times, durations)
    ])
    return factors, t_ref


def _quantity(entries: list[_Entry], where: str, calibration_factor: float | None, site: SiteClock | None = None) -> _Quantity:
    """Units, decay reference and conversion to Bq/mL of the slices (module docstring, step 4-5)."""
    first = entries[0]
    units_of = {}
    for entry in entries:
        unit = (_ascii(entry.ds, "Units") or "").upper()
        if not unit:
            raise UnitsError(f"{entry.path}: has no Units (0054,1001); cannot tell whether values are Bq/mL")
        units_of.setdefault(unit, entry.path)
    if len(units_of) > 1:
        listed = ", ".join(f"{unit} ({path.name})" for unit, path in units_of.items())
        raise UnitsError(f"{where}: slices disagree on Units: {listed}; load one consistent series")
    units = next(iter(units_of))
    if calibration_factor is not None and units != "CNTS":
        raise UnitsError(
            f"{where}: a calibration factor applies to CNTS series only, this series is in {units}; drop the factor"
        )

    decay_correction = (_ascii(first.ds, "DecayCorrection") or "").upper() or None
    if units in ("BQML", "GML") and decay_correction not in _DECAY_CORRECTIONS:
        stated = "is missing" if decay_correction is None else f"is {decay_correction!r}"
        raise UnitsError(
            f"{first.path}: DecayCorrection (0054,1102) {stated}; a {units} series must state it as one of "
            f"{', '.join(_DECAY_CORRECTIONS)} (the time its values refer to); fix the header"
        )
    clock = _clock(first, site)
    series_dt = _datetime(first, "SeriesDate", "SeriesTime", clock)
    acquisitions = [_datetime(e, "AcquisitionDate", "AcquisitionTime", clock, "SeriesDate") for e in entries]
    known = [a for a in acquisitions if a is not None]
    earliest = min(known, key=lambda t: seconds_between(known[0], t)) if known else None
    # QIBA pseudo-code: Series Date/Time unless it is after the (earliest) Acquisition Date/Time
    scan = series_dt if series_dt is not None and (earliest is None or seconds_between(series_dt, earliest) >= 0) else earliest
    isotope = _isotope(first, clock, scan)
    durations = _frame_durations(entries)
    known_durations = [d for d in durations if d is not None]
    frame_duration = float(np.median(known_durations)) if known_durations else None

    if units == "BQML":
        to_bqml = np.ones(len(entries))
    elif units == "CNTS":
        if calibration_factor is None or not 0 < calibration_factor < math.inf:
            raise UnitsError(
                f"{where}: values are in CNTS (counts); give calibration_factor (Bq/mL per count, a positive number) "
                "to convert them"
            )
        to_bqml = np.full(len(entries), float(calibration_factor))
    elif units == "GML":
        to_bqml = _suv_to_bqml(entries, decay_correction, scan, acquisitions, isotope)
    else:
        raise UnitsError(f"{where}: Units {units!r} cannot be converted to Bq/mL; supported: {_CONVERTIBLE_UNITS}")
    suv_factor = to_bqml.copy() if units == "GML" else None
    reference = None
    if decay_correction == "ADMIN":
        if isotope.injection is None and units in ("BQML", "GML"):
            raise UnitsError(
                f"{first.path}: DecayCorrection ADMIN: the values refer to the administration time, and the header has no "
                "RadiopharmaceuticalStartDateTime (0018,1078) or RadiopharmaceuticalStartTime (0018,1072); fix the header"
            )
        acquired_at = isotope.injection
        reference = "administration time (DecayCorrection ADMIN)"
    elif decay_correction == "NONE" and units in ("BQML", "GML"):
        factors, acquired_at = _none_correction(entries, acquisitions, scan, durations, isotope)
        to_bqml = to_bqml * factors
        reference = ("frame averages without decay correction (DecayCorrection NONE): each frame's start plus the "
                     "frame-average correction for its ActualFrameDuration, every slice referred to the first frame's")
    else:
        acquired_at = scan
        if decay_correction == "START":
            reference = "scan start (DecayCorrection START)"
    return _Quantity(units, decay_correction, to_bqml, acquired_at, isotope.nuclide, clock, isotope.warnings,
                     scan_start=scan, frame_duration_s=frame_duration, decay_reference=reference, suv_factor=suv_factor)


def _read_pixels(entries: list[_Entry], geometry: _Geometry, to_bqml: np.ndarray) -> np.ndarray:
    """Decode every slice into one float32 (slice, row, column) array in Bq/mL.

    Uncompressed slices are read straight from the files one after the other (pydicom parsing
    holds the GIL, so threads do not pay there); compressed ones are decoded by pydicom's
    pixel-data handlers in a thread pool, which helps the C decoders that release the GIL.
    """
    slopes = np.empty(len(entries))
    intercepts = np.empty(len(entries))
    for n, entry in enumerate(entries):
        slope = _strict_float(entry, "RescaleSlope", entry.path)
        if slope is None:
            raise UnitsError(f"{entry.path}: has no RescaleSlope (0028,1053); cannot scale the pixel values")
        if slope == 0:
            raise UnitsError(f"{entry.path}: RescaleSlope (0028,1053) is 0, which would erase the image; fix the header")
        slopes[n] = slope
        intercepts[n] = _strict_float(entry, "RescaleIntercept", entry.path) or 0.0
    with np.errstate(over="ignore", invalid="ignore"):
        gains = (slopes * to_bqml).astype(np.float32)
        offsets = (intercepts * to_bqml).astype(np.float32)
    bad = np.flatnonzero(~(np.isfinite(gains) & np.isfinite(offsets)))
    if bad.size:
        raise UnitsError(
            f"{entries[bad[0]].path}: RescaleSlope/RescaleIntercept give a scale beyond single precision; fix the header"
        )

    nz, ny, nx = len(entries), geometry.rows, geometry.columns
    data = np.empty((nz, ny, nx), dtype=np.float32)

    def fill(k: int) -> None:
        plane = data[k]
        plane[...] = _slice_pixels(entries[k], ny, nx)
        plane *= gains[k]
        if offsets[k] != 0:
            plane += offsets[k]

    if _transfer_syntax(entries[0].ds).is_compressed and nz > 1:
        with ThreadPoolExecutor(max_workers=min(4, os.cpu_count() or 1)) as pool:
            list(pool.map(fill, range(nz)))
    else:
        for k in range(nz):
            fill(k)
    return data


def _check_supported(entries: list[_Entry], info: SeriesInfo, where: str) -> None:
    first = entries[0]
    for entry in entries:
        if _PIXEL_DATA not in entry.ds:
            raise InputError(f"{entry.path}: has no pixel data; the file is truncated or not an image, copy it again")
        ts = _transfer_syntax(entry.ds)
        if not ts:
            raise UnsupportedSeries(f"{entry.path}: has no Transfer Syntax UID (0002,0010); the file meta is damaged")
        if not ts.is_transfer_syntax or ts.is_private:
            raise UnsupportedSeries(
                f"{entry.path}: Transfer Syntax UID {str(ts)[:64]!r} is not a standard DICOM transfer syntax; "
                "export the series with a standard one (e.g. Explicit VR Little Endian)"
            )
    sop_class = _ascii(first.ds, "SOPClassUID")
    frames = max((_int(e.ds, "NumberOfFrames") or 1) for e in entries)
    if sop_class in _ENHANCED_PET or frames > 1:
        kind = UID(sop_class).name if sop_class else "multi-frame"
        raise UnsupportedSeries(
            f"{first.path}: series {info.label()} is an enhanced/multi-frame PET object ({kind}, {frames} frames); "
            "only classic single-frame PET Image Storage is supported, export the series as classic PET images"
        )
    series_type = _value(first.ds, "SeriesType")
    kind = str(series_type[0]).upper() if series_type else ""
    time_slots = max(_ushort(first.ds, "NumberOfTimeSlots") or 1, _ushort(first.ds, "NumberOfTimeSlices") or 1)
    if kind in ("DYNAMIC", "GATED") or time_slots > 1:
        raise UnsupportedSeries(
            f"{where}: series {info.label()} is {kind.lower() or 'multi-frame'} ({time_slots} time frames/gates); "
            "export one static frame"
        )


def load_dicom(
    paths: str | os.PathLike | Iterable[str | os.PathLike],
    *,
    series: str | int | None = None,
    calibration_factor: float | None = None,
    site_clock: SiteClock | None = None,
) -> Volume:
    """Load one classic DICOM PET series as a volume in Bq/mL.

    The steps, the unit conversions (QIBA vendor-neutral SUV pseudo-code for ``GML``) and the
    time-zone rule are described in the module docstring.

    Parameters
    ----------
    paths : path or list of paths
        Files and/or folders (searched recursively).
    series : str or int, optional
        Series to load: a Series Number (an int or a string of digits only), else a full
        Series Instance UID or a unique UID prefix. Needed when several PET series are present.
    calibration_factor : float, optional
        Bq/mL per count; required for ``CNTS`` series and refused for other units.
    site_clock : SiteClock, optional
        The site's zone (:func:`phantometry.sitetime.site_clock`), in which times written
        without Timezone Offset From UTC are read.

    Returns
    -------
    Volume
        ``data`` float32 (slice, row, column) in Bq/mL ordered along the slice normal,
        ``affine`` in LPS mm, and the series/scanner/reconstruction metadata.

    Raises
    ------
    InputError
        Missing paths, damaged files (named), undecodable pixel data.
    NoPETSeries, AmbiguousSeries, UnsupportedSeries, GeometryError, UnitsError
        See the module docstring.

    Warns
    -----
    TimeZoneAssumedWarning
        When the series has no Timezone Offset From UTC and no ``site_clock`` was given.

    Notes
    -----
    pydicom's own warnings about values that break the standard are silenced: a value the
    loader needs is checked by the loader and refused by name.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=UserWarning, module=r"pydicom(\.|$)")
        return _load_dicom(paths, series, calibration_factor, site_clock)


def _load_dicom(
    paths: str | os.PathLike | Iterable[str | os.PathLike], series: str | int | None, calibration_factor: float | None,
    site_clock: SiteClock | None = None,
) -> Volume:
    roots = _as_path_list(paths)
    where = _describe(roots)
    groups, broken = _scan(roots)
    if broken:
        path, reason = broken[0]
        more = f" (and {len(broken) - 1} more)" if len(broken) > 1 else ""
        raise InputError(f"{path}: damaged DICOM file{more}: {reason}; remove it or copy it again")
    if not groups:
        raise NoPETSeries(f"{where}: no DICOM files found; give the folder holding the PET series")
    infos = [_series_info(uid, listing_header_of(entries[0].ds), [e.path for e in entries]) for uid, entries in groups.items()]
    info = _choose(_sorted_infos(infos), series, where)
    entries = groups[info.series_uid]
    _check_supported(entries, info, where)

    geometry = _geometry(entries, where)
    entries = [entries[i] for i in geometry.order]
    first = entries[0]
    frames = {_ascii(e.ds, "FrameOfReferenceUID") for e in entries}
    if len(frames) > 1:
        raise GeometryError(
            f"{where}: slices have {len(frames)} different FrameOfReferenceUIDs; load one consistent series"
        )

    quantity = _quantity(entries, where, calibration_factor, site_clock)
    if quantity.time_zone_assumed and quantity.acquired_at is not None:
        warnings.warn(
            TimeZoneAssumedWarning(
                f"{first.path}: no TimezoneOffsetFromUTC and no site time zone given; the times are the scanner's wall "
                "clock, not yet placed in a zone (give the site's zone, e.g. --timezone Europe/Berlin)"
            ),
            stacklevel=3,
        )
    _check_pixel_claims(entries, geometry)
    data = _read_pixels(entries, geometry, quantity.to_bqml)

    method, iterations, subsets = parse_iterations_subsets(_text(first.ds, "ReconstructionMethod"))
    reconstruction = Reconstruction(
        method=method,
        iterations=iterations,
        subsets=subsets,
        filter=_text(first.ds, "ConvolutionKernel"),
        matrix=(geometry.rows, geometry.columns, len(entries)),
        voxel_size_mm=geometry.spacing_mm,
    )
    scanner = Scanner(
        manufacturer=_text(first.ds, "Manufacturer"),
        model=_text(first.ds, "ManufacturerModelName"),
        station=_text(first.ds, "StationName"),
        serial=_text(first.ds, "DeviceSerialNumber"),
    )
    folders = {e.path.parent for e in entries}
    source = str(folders.pop()) if len(folders) == 1 else where
    return Volume(
        data=data,
        affine=geometry.affine,
        frame="LPS",
        acquired_at=quantity.acquired_at,
        nuclide=quantity.nuclide.name if quantity.nuclide else None,
        original_units=quantity.units,
        decay_correction=quantity.decay_correction,
        series_uid=info.series_uid,
        series_number=info.series_number,
        series_description=info.series_description,
        modality="PT",
        scanner=scanner,
        reconstruction=reconstruction,
        source=source,
        sop_instance_uids=tuple(_ascii(e.ds, "SOPInstanceUID") or "" for e in entries),
        frame_of_reference_uid=frames.pop(),
        study_uid=_ascii(first.ds, "StudyInstanceUID"),
        warnings=tuple(quantity.warnings),
        bq_ml_per_suv=tuple(float(f) for f in quantity.to_bqml) if quantity.units == "GML" else (),
        scan_start=quantity.scan_start,
        time_basis=quantity.clock.basis,
        time_zone=quantity.clock.label,
        frame_duration_s=quantity.frame_duration_s,
        decay_reference=quantity.decay_reference,
    )
