"""Load and write PET volumes as NIfTI-1 files with a BIDS-PET JSON sidecar.

Loading (:func:`load_nifti`):

* **Voxels.** Read with nibabel; ``get_fdata`` applies the header's ``scl_slope`` /
  ``scl_inter`` (NIfTI-1: value = stored x slope + inter). The nibabel array is indexed
  ``(i, j, k)``; it is transposed to the project's array order ``(k, j, i)`` = (z, y, x) and
  kept as float32. A 4-D image with one frame is used as 3-D; more frames are refused with
  :class:`~phantometry.errors.UnsupportedSeries`.
* **Checks before reading voxels.** Every dimension at least 1, finite pixdim and affine, at
  most ``$PHANTOMETRY_MAX_VOXELS`` voxels (:mod:`phantometry.io.limits`), and at least
  vox_offset + voxels x bytes per voxel present in the file (a ``.nii.gz`` is decompressed as a
  stream to count them, nothing of the claimed size allocated). Voxels that are NaN or infinite
  are refused after reading. nibabel's log lines about header fixes are kept off the terminal.
* **Geometry.** The affine is nibabel's (sform when its code is set, else qform), which maps
  ``(i, j, k, 1)`` to NIfTI scanner/world mm, so the volume's frame is ``"RAS"``.
* **Sidecar.** The JSON beside the image (``.nii``/``.nii.gz`` replaced by ``.json``) or the
  one given. BIDS-PET keys used when present: ``Units``, ``TracerRadionuclide``, ``TimeZero``,
  ``ScanStart``, ``InjectionStart``, ``ImageDecayCorrected``, ``ImageDecayCorrectionTime``,
  ``ReconMethodName``, ``ReconMethodParameterLabels``/``ReconMethodParameterValues``
  (labels containing "iteration"/"subset"), ``ReconFilterType``/``ReconFilterSize`` (mm),
  ``Manufacturer``, ``ManufacturersModelName``. ``InjectedRadioactivity`` (MBq) is checked to
  be a number but not kept: a :class:`~phantometry.volume.Volume` has no field for it.
* **Units.** ``Bq/mL``, ``kBq/mL``, ``MBq/mL`` (case-insensitive; DICOM ``BQML`` too) are
  scaled to Bq/mL. ``counts`` (or ``CNTS``) needs ``calibration_factor`` (Bq/mL per count);
  a calibration factor with any other unit is refused. Other units are refused by name. The
  ``units=`` argument overrides the sidecar; with neither, :class:`~phantometry.errors.UnitsError`.
* **Reference time.** BIDS gives ``TimeZero`` only as a clock time, with ``ScanStart`` and
  ``ImageDecayCorrectionTime`` in seconds relative to it. Phantometry's own extension key
  ``AcquisitionDateTime`` (ISO 8601 with a UTC offset, e.g. ``2026-11-03T10:30:00+01:00``)
  gives the date-time of the scan start (``TimeZero + ScanStart``). The reference time of
  the values (``Volume.acquired_at``) is then::

      AcquisitionDateTime + (ImageDecayCorrectionTime - ScanStart)   if ImageDecayCorrected
      AcquisitionDateTime                                            otherwise

  ``acquired_at=`` overrides this and is taken as the reference time itself (time basis
  ``given time``). An ``AcquisitionDateTime`` without an offset is the scanner's wall clock,
  read in the site's zone (``site_clock``; :mod:`phantometry.sitetime`), like DICOM times
  without Timezone Offset From UTC; with an offset its basis is ``header offset``.

  Not decay corrected (``ImageDecayCorrected`` false): the values are the frame's average
  (DICOM/QIBA semantics), so they show the activity of the frame start plus
  :func:`phantometry.nuclides.frame_reference_offset_s` of ``FrameDuration`` (BIDS, s; the
  frame starts ``FrameTimesStart - ScanStart`` after ``AcquisitionDateTime``, at it when
  ``FrameTimesStart`` is absent). Refused without ``FrameDuration`` or a nuclide.
  ``Volume.decay_correction`` is ``NONE`` when ``ImageDecayCorrected`` is false, ``ADMIN``
  when the correction time equals ``InjectionStart``, ``START`` when it equals ``ScanStart``.
  When ``TimeZero`` disagrees with ``AcquisitionDateTime - ScanStart`` (clock time, offset
  of AcquisitionDateTime) by more than 1 s a :class:`SidecarTimeWarning` is issued.

Writing (:func:`write_nifti`): the volume is written as float32 ``(i, j, k)`` with
``scl_slope`` 1, sform and qform code 1 (scanner). NIfTI world coordinates are RAS, so an
``"LPS"`` volume's affine is converted by negating its first two world rows,
``A_RAS = diag(-1, -1, 1, 1) A_LPS``: every voxel keeps its physical position, the x and y
coordinates just change sign (LPS x = -RAS x, LPS y = -RAS y). The sidecar states the keys
above; since a Volume keeps only the reference time, that time is written as
``AcquisitionDateTime`` and ``TimeZero`` with ``ScanStart = 0`` (and
``ImageDecayCorrectionTime = 0`` when decay corrected, ``InjectionStart = 0`` for ``ADMIN``). A
volume loaded from a series without decay correction holds values referred to its
``acquired_at`` (above), so it is written as decay corrected to it.
"""

from __future__ import annotations

import contextlib
import gzip
import json
import logging
import math
import os
import re
import zlib
import warnings
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any, Iterator

import nibabel as nib
import numpy as np

from ..errors import ImageTooLarge, InputError, UnitsError, UnsupportedSeries
from .limits import check_voxel_count
from ..nuclides import Nuclide, frame_reference_offset_s, get_nuclide
from ..timeutil import parse_aware_time
from ..sitetime import BASIS_GIVEN_TIME, BASIS_HEADER, BASIS_UNRESOLVED, SiteClock
from ..volume import Reconstruction, Scanner, Volume

__all__ = ["SidecarTimeWarning", "load_nifti", "sidecar_path", "write_nifti"]

#: activity units accepted, normalised (lower case, no spaces) -> (name, factor to Bq/mL)
_ACTIVITY_UNITS = {
    "bq/ml": ("Bq/mL", 1.0),
    "bqml": ("Bq/mL", 1.0),
    "kbq/ml": ("kBq/mL", 1.0e3),
    "mbq/ml": ("MBq/mL", 1.0e6),
}
_COUNT_UNITS = ("counts", "cnts")
#: largest sidecar read; BIDS sidecars are a few kilobytes
_MAX_SIDECAR_BYTES = 4 * 1024 * 1024
#: largest time offset in a sidecar (s): ten years
_MAX_SECONDS = 10 * 366 * 86400.0

#: RAS <- LPS (and back): x and y change sign
_LPS_TO_RAS = np.diag([-1.0, -1.0, 1.0, 1.0])


class SidecarTimeWarning(UserWarning):
    """The sidecar's times disagree with each other; the reference time may be wrong."""


def sidecar_path(image_path: str | os.PathLike) -> Path:
    """The BIDS sidecar of an image: ``.nii.gz`` or ``.nii`` replaced by ``.json``."""
    p = Path(image_path)
    name = p.name
    for ext in (".nii.gz", ".nii"):
        if name.lower().endswith(ext):
            return p.with_name(name[: -len(ext)] + ".json")
    return p.with_name(name + ".json")


# ---------------------------------------------------------------------------- sidecar reading
def _read_sidecar(path: Path) -> dict[str, Any]:
    try:
        with open(path, "rb") as fh:
            raw = fh.read(_MAX_SIDECAR_BYTES + 1)
    except OSError as exc:
        raise InputError(f"{path}: cannot read the JSON sidecar ({exc.strerror})") from None
    if len(raw) > _MAX_SIDECAR_BYTES:
        raise InputError(f"{path}: larger than {_MAX_SIDECAR_BYTES // (1024 * 1024)} MB; a sidecar is a small JSON file, check the path")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: the JSON sidecar is not UTF-8 text (byte 0x{raw[exc.start]:02X} at offset {exc.start}); save it as UTF-8") from None
    try:
        meta = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}); fix the sidecar") from None
    except RecursionError:
        raise InputError(f"{path}: the JSON is nested too deeply; a sidecar is a flat object of BIDS keys") from None
    if not isinstance(meta, dict):
        raise InputError(f"{path}: the sidecar must be a JSON object of BIDS keys")
    return meta


def _get(meta: dict[str, Any], key: str, kind: type | tuple[type, ...], where: Path | None) -> Any:
    """``meta[key]`` if present (None otherwise), refusing a value of the wrong JSON type."""
    value = meta.get(key)
    if value is None:
        return None
    kinds = kind if isinstance(kind, tuple) else (kind,)
    if not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
        expected = "number" if float in kinds else kinds[0].__name__
        raise InputError(f"{where}: {key} is {value!r}, expected a {expected}; fix the sidecar")
    return value


def _seconds(meta: dict[str, Any], key: str, where: Path | None) -> float | None:
    value = _get(meta, key, (int, float), where)
    if value is None:
        return None
    if not (math.isfinite(value) and abs(value) <= _MAX_SECONDS):
        raise InputError(f"{where}: {key} is {value!r} s, not a time offset within ten years; fix the sidecar")
    return float(value)


def _parse_aware(text: Any, what: str) -> datetime:
    return parse_aware_time(text, what)


def _units_factor(units: str, calibration_factor: float | None, what: str) -> tuple[str, float]:
    key = re.sub(r"\s+", "", units).lower()
    if key in _COUNT_UNITS:
        if calibration_factor is None or not 0 < calibration_factor < math.inf:
            raise UnitsError(f"{what}: values are in {units} (counts); give a positive calibration factor (Bq/mL per count)")
        return "counts", float(calibration_factor)
    if key not in _ACTIVITY_UNITS:
        raise UnitsError(
            f"{what}: Units {units!r} cannot be converted to Bq/mL; supported: Bq/mL, kBq/mL, MBq/mL "
            "(counts with a calibration factor); pass --units if the sidecar is wrong"
        )
    if calibration_factor is not None:
        raise UnitsError(f"{what}: a calibration factor applies to counts only, these values are in {units}; drop the factor")
    return _ACTIVITY_UNITS[key]


def _reconstruction(meta: dict[str, Any], where: Path | None, shape_zyx: tuple[int, ...], spacing_xyz: tuple[float, ...]) -> Reconstruction:
    iterations = subsets = None
    labels = meta.get("ReconMethodParameterLabels") or []
    values = meta.get("ReconMethodParameterValues") or []
    if not isinstance(labels, list) or not isinstance(values, list) or len(labels) != len(values):
        raise InputError(
            f"{where}: ReconMethodParameterLabels and ReconMethodParameterValues must be lists of equal length; fix the sidecar"
        )
    for label, value in zip(labels, values):
        name = str(label).lower()
        if "iteration" in name or "subset" in name:
            if isinstance(value, bool) or not isinstance(value, (int, float)) or value != int(value):
                raise InputError(f"{where}: ReconMethodParameterValues for {label!r} is {value!r}, expected a whole number")
            if "iteration" in name:
                iterations = int(value)
            else:
                subsets = int(value)
    filt = _get(meta, "ReconFilterType", str, where)
    size = meta.get("ReconFilterSize")
    if isinstance(size, list) and len(size) == 1:
        size = size[0]
    if filt and filt.strip().lower() == "none":
        filt = "none"
    elif filt and isinstance(size, (int, float)) and not isinstance(size, bool) and size > 0:
        filt = f"{filt} {size:g} mm"
    nz, ny, nx = shape_zyx
    return Reconstruction(
        method=_get(meta, "ReconMethodName", str, where),
        iterations=iterations,
        subsets=subsets,
        filter=filt,
        matrix=(ny, nx, nz),
        voxel_size_mm=tuple(float(s) for s in spacing_xyz),  # type: ignore[arg-type]
    )


def _frame(meta: dict[str, Any], where: Path | None, scan_start: float | None) -> tuple[float | None, float]:
    """(FrameDuration in s or None, frame start in s after the scan start) of a one-frame image."""
    def first(key: str) -> float | None:
        value = meta.get(key)
        if isinstance(value, list):
            if len(value) != 1:
                raise InputError(f"{where}: {key} lists {len(value)} frames; a static image has one, fix the sidecar")
            value = value[0]
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or abs(value) > _MAX_SECONDS:
            raise InputError(f"{where}: {key} is {value!r}, expected seconds (a number); fix the sidecar")
        return float(value)

    duration = first("FrameDuration")
    if duration is not None and duration <= 0:
        raise InputError(f"{where}: FrameDuration is {duration:g} s; a frame lasts a positive time, fix the sidecar")
    start = first("FrameTimesStart")
    return duration, (start - (scan_start or 0.0)) if start is not None else 0.0


def _reference_time(
    meta: dict[str, Any], where: Path | None, site: SiteClock | None = None, nuclide: Nuclide | None = None
) -> tuple[datetime | None, str | None, str | None, datetime | None, float | None]:
    """Reference time, DICOM-style decay-correction term, time basis, scan start and frame
    duration from the sidecar (module docstring)."""
    corrected = _get(meta, "ImageDecayCorrected", bool, where)
    scan_start = _seconds(meta, "ScanStart", where)
    injection_start = _seconds(meta, "InjectionStart", where)
    correction_time = _seconds(meta, "ImageDecayCorrectionTime", where)
    _get(meta, "InjectedRadioactivity", (int, float), where)

    decay_correction = None
    if corrected is False:
        decay_correction = "NONE"
    elif corrected and correction_time is not None:
        if injection_start is not None and correction_time == injection_start:
            decay_correction = "ADMIN"
        elif scan_start is not None and correction_time == scan_start:
            decay_correction = "START"

    duration, frame_offset = _frame(meta, where, scan_start)
    raw = meta.get("AcquisitionDateTime")
    if raw is None:
        return None, decay_correction, None, None, duration
    start, basis = _parse_scanner_time(raw, f"{where}: AcquisitionDateTime", site)
    zero = _get(meta, "TimeZero", str, where)
    if zero is not None and scan_start is not None:
        m = re.fullmatch(r"(\d{1,2}):(\d{2})(?::(\d{2}(?:\.\d*)?))?", zero.strip())
        if not m:
            raise InputError(f"{where}: TimeZero {zero!r} is not a clock time hh:mm:ss; fix the sidecar")
        zero_s = int(m.group(1)) * 3600 + int(m.group(2)) * 60 + float(m.group(3) or 0)
        t0 = start - timedelta(seconds=scan_start)
        t0_s = t0.hour * 3600 + t0.minute * 60 + t0.second + t0.microsecond / 1e6
        gap = abs(zero_s - t0_s) % 86400.0
        if min(gap, 86400.0 - gap) > 1.0:
            warnings.warn(
                SidecarTimeWarning(
                    f"{where}: TimeZero {zero} differs from AcquisitionDateTime - ScanStart ({t0.time().isoformat()}); "
                    "AcquisitionDateTime is the scan start, check it or pass --acquired-at"
                ),
                stacklevel=3,
            )
    if corrected and correction_time is not None:
        if scan_start is None:
            raise InputError(
                f"{where}: ImageDecayCorrectionTime is given without ScanStart, so the decay reference cannot be placed; "
                "add ScanStart or pass --acquired-at"
            )
        return start + timedelta(seconds=correction_time - scan_start), decay_correction, basis, start, duration
    if corrected is False:
        if duration is None:
            raise InputError(
                f"{where}: ImageDecayCorrected is false, so the values are frame averages, and FrameDuration is missing: "
                "the time they show is unknown; add FrameDuration (s) or pass --acquired-at"
            )
        if nuclide is None:
            raise InputError(
                f"{where}: ImageDecayCorrected is false: the frame average is referred to a time with the nuclide's "
                "half-life, and TracerRadionuclide is missing; add it or pass --nuclide"
            )
        ref = start + timedelta(seconds=frame_offset + frame_reference_offset_s(nuclide, duration))
        return ref, decay_correction, basis, start, duration
    return start, decay_correction, basis, start, duration


def _parse_scanner_time(text: Any, what: str, site: SiteClock | None) -> tuple[datetime, str]:
    """A sidecar date-time and its basis: its own offset, else the site's zone, else unresolved."""
    try:
        t = text if isinstance(text, datetime) else datetime.fromisoformat(str(text).strip())
    except ValueError:
        raise InputError(f"{what} {text!r} is not ISO 8601; write e.g. 2026-11-03T10:30:00+01:00") from None
    if t.tzinfo is not None and t.utcoffset() is not None:
        return t, BASIS_HEADER
    if site is not None:
        return t.replace(tzinfo=site.zone), site.basis
    from datetime import timezone as _tz

    return t.replace(tzinfo=_tz.utc), BASIS_UNRESOLVED


# ---------------------------------------------------------------------------- header checks
@contextlib.contextmanager
def _quiet_nibabel() -> Iterator[None]:
    """Keep nibabel's header-fix log lines ("pixdim should be positive ...") off the terminal.

    The loader's own checks refuse what matters, with one line naming the file. Done by raising
    the level of nibabel's logger for the duration (logging's public API).
    """
    logger = logging.getLogger("nibabel.global")
    level = logger.level
    logger.setLevel(logging.CRITICAL + 1)
    try:
        yield
    finally:
        logger.setLevel(level)


def _reason(exc: BaseException) -> str:
    """First line of an exception message, for a one-line error."""
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _check_header(img: Any, p: Path) -> None:
    """Refuse dimensions below 1, non-finite voxel sizes or affine, and more voxels than the limit."""
    dims = [int(v) for v in img.header["dim"][1 : 1 + len(img.shape)]]
    bad = [(axis, n) for axis, n in enumerate(dims, start=1) if n < 1]
    if bad:
        axis, n = bad[0]
        raise InputError(f"{p}: header dimension {axis} is {n}; every dimension must be at least 1, the header is damaged")
    pixdim = np.asarray(img.header["pixdim"][1 : 1 + min(3, len(dims))], dtype=float)
    if not np.all(np.isfinite(pixdim)):
        raise InputError(f"{p}: header pixdim holds a voxel size that is not finite; the header is damaged")
    try:
        affine = np.asarray(img.affine, dtype=float)
    except Exception as exc:  # a damaged qform/sform nibabel cannot build
        raise InputError(f"{p}: the voxel-to-world affine cannot be built ({_reason(exc)}); the header is damaged") from None
    if not np.all(np.isfinite(affine)):
        raise InputError(f"{p}: the voxel-to-world affine (sform/qform) holds a number that is not finite; the header is damaged")
    if abs(np.linalg.det(affine[:3, :3])) < 1e-9 or np.abs(affine).max() > 1e9:
        raise InputError(f"{p}: the voxel-to-world affine (sform/qform) is degenerate or absurdly large; the header is damaged")
    check_voxel_count(dims, str(p), "dimensions")


def _check_data_present(img: Any, p: Path) -> None:
    """Refuse, before allocating, a file holding fewer voxel bytes than its header claims.

    A ``.nii`` file must be at least vox_offset + voxels x bytes per voxel long. A ``.nii.gz``
    is decompressed as a stream into a small buffer (nothing of the claimed size is allocated)
    until that many bytes have come out, or the stream ends or breaks.
    """
    try:
        offset = int(img.dataobj.offset)
        itemsize = np.dtype(img.get_data_dtype()).itemsize
    except Exception as exc:
        raise InputError(f"{p}: the header cannot be used ({_reason(exc)}); the file may be damaged") from None
    needed = offset + math.prod(int(n) for n in img.shape) * itemsize
    if p.name.lower().endswith(".gz"):
        present = _gzip_length(p, needed)
    else:
        present = p.stat().st_size
    packed = "decompressed " if p.name.lower().endswith(".gz") else ""
    if offset > present:
        raise InputError(f"{p}: vox_offset {offset:,} lies beyond the end of the {packed}file ({present:,} bytes); the header is damaged")
    if present < needed:
        raise InputError(
            f"{p}: the header claims {'x'.join(map(str, img.shape))} voxels of {itemsize} bytes from offset {offset:,} "
            f"({needed:,} bytes) but the {packed}file holds "
            f"{present:,}; the file is truncated or its header damaged, copy it again"
        )


def _gzip_length(p: Path, limit: int, chunk: int = 1 << 20) -> int:
    """Decompressed length of a gzip file, counted up to ``limit`` bytes in ``chunk`` reads.

    Reading goes on up to one ``chunk`` past ``limit``, so that a file ending there has its
    checksum verified by :mod:`gzip` (a corrupt stream is refused).
    """
    total = 0
    try:
        with gzip.open(p, "rb") as fh:
            while total < limit + chunk:
                block = fh.read(chunk)
                if not block:
                    break
                total += len(block)
    except (OSError, EOFError, zlib.error) as exc:
        reason = "its checksum does not match" if "CRC" in str(exc) else _reason(exc)
        raise InputError(f"{p}: the gzip stream is damaged after {total:,} bytes ({reason}); copy the file again") from None
    return total


# ---------------------------------------------------------------------------- loading
def load_nifti(
    path: str | os.PathLike,
    *,
    sidecar: str | os.PathLike | None = None,
    units: str | None = None,
    acquired_at: datetime | str | None = None,
    nuclide: str | None = None,
    calibration_factor: float | None = None,
    site_clock: SiteClock | None = None,
) -> Volume:
    """Load a NIfTI-1/2 PET image (and its BIDS-PET sidecar) as a volume in Bq/mL.

    The rules (axes, affine, units, reference time) are in the module docstring.

    Parameters
    ----------
    path : str or path
        ``.nii`` or ``.nii.gz`` file.
    sidecar : str or path, optional
        JSON sidecar; default the image path with ``.json``, used if it exists.
    units : str, optional
        Pixel units, overriding the sidecar's ``Units`` (``Bq/mL``, ``kBq/mL``, ``MBq/mL``,
        ``counts``).
    acquired_at : datetime or ISO 8601 str, optional
        Timezone-aware reference time of the values, overriding the sidecar.
    nuclide : str, optional
        Radionuclide, overriding ``TracerRadionuclide``.
    calibration_factor : float, optional
        Bq/mL per count, for ``counts`` images only.
    site_clock : SiteClock, optional
        The site's zone, for a sidecar ``AcquisitionDateTime`` without an offset.

    Returns
    -------
    Volume
        float32 data (z, y, x) in Bq/mL, nibabel's affine, frame ``"RAS"``.

    Raises
    ------
    InputError, UnitsError, UnsupportedSeries
    """
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: no such NIfTI file")
    if sidecar is not None:
        side: Path | None = Path(sidecar)
        if not side.is_file():
            raise InputError(f"{side}: no such sidecar file; give the BIDS JSON of {p.name} or leave the option out")
    else:
        side = sidecar_path(p) if sidecar_path(p).is_file() else None
    meta = _read_sidecar(side) if side is not None else {}

    unit_text = units if units is not None else _get(meta, "Units", str, side)
    if unit_text is None:
        raise UnitsError(
            f"{p}: the activity units are unknown (no sidecar Units); pass --units Bq/mL (or kBq/mL, MBq/mL) "
            f"or add \"Units\": \"Bq/mL\" to {side or sidecar_path(p)}"
        )
    unit_name, to_bq_ml = _units_factor(unit_text, calibration_factor, "--units" if units is not None else f"{side}")

    # nibabel logs the header fixes it makes (e.g. "pixdim should be positive"); the checks
    # below refuse what matters, so its log lines are kept off the terminal
    with _quiet_nibabel():
        try:
            img = nib.load(str(p))
        except Exception as exc:  # nibabel raises several types for damaged or foreign files
            raise InputError(f"{p}: cannot be read as NIfTI ({_reason(exc)}); check the file") from None
    shape = img.shape
    _check_header(img, p)
    if len(shape) > 3:
        frames = int(np.prod(shape[3:]))
        if frames > 1:
            raise UnsupportedSeries(
                f"{p}: a {len(shape)}-D image with {frames} frames ({'x'.join(map(str, shape))}); "
                "extract one 3-D frame (a static image) and give that"
            )
    elif len(shape) < 3:
        raise UnsupportedSeries(f"{p}: a {len(shape)}-D image; a 3-D volume is needed")

    _check_data_present(img, p)
    try:
        with _quiet_nibabel():
            data_ijk = np.asarray(img.get_fdata(dtype=np.float32)).reshape(shape[:3])
    except MemoryError:
        raise ImageTooLarge(f"{p}: not enough memory for {'x'.join(map(str, shape))} voxels") from None
    except Exception as exc:  # nibabel and its readers raise several types on damaged data
        raise InputError(f"{p}: the voxel data cannot be read ({_reason(exc)}); the file may be damaged, copy it again") from None
    data_kji = np.ascontiguousarray(np.transpose(data_ijk, (2, 1, 0)))
    if to_bq_ml != 1.0:
        data_kji *= np.float32(to_bq_ml)
    finite = np.isfinite(data_kji)
    if not finite.all():
        bad = int(finite.size - np.count_nonzero(finite))
        raise InputError(
            f"{p}: {bad:,} voxel(s) hold no finite number (NaN or infinity{', or too large for Bq/mL' if to_bq_ml != 1.0 else ''}); "
            "replace them (e.g. by 0 outside the field of view) before measuring"
        )
    affine = np.asarray(img.affine, dtype=float)

    nuclide_text = nuclide if nuclide is not None else _get(meta, "TracerRadionuclide", str, side)
    nuclide_obj = None
    if nuclide_text is not None:
        try:
            nuclide_obj = get_nuclide(nuclide_text)
        except InputError as exc:
            origin = "--nuclide" if nuclide is not None else f"{side}: TracerRadionuclide"
            raise InputError(f"{origin}: {exc}") from None
    nuclide_name = nuclide_obj.name if nuclide_obj is not None else None

    try:
        if acquired_at is not None:  # the time itself is given; the sidecar's terms are kept
            without_time = {k: v for k, v in meta.items() if k != "AcquisitionDateTime"}
            _, decay_correction, _, _, duration = _reference_time(without_time, side, site_clock, nuclide_obj)
            ref_time, basis, scan_start = _parse_aware(acquired_at, "--acquired-at"), BASIS_GIVEN_TIME, None
        else:
            ref_time, decay_correction, basis, scan_start, duration = _reference_time(meta, side, site_clock, nuclide_obj)
    except OverflowError:
        raise InputError(f"{side}: AcquisitionDateTime with the sidecar's time offsets falls outside the calendar; fix the sidecar") from None
    zone_label = None
    if basis == BASIS_HEADER and ref_time is not None:
        from ..sitetime import offset_text

        zone_label = f"{offset_text(ref_time)} (sidecar)"
    elif site_clock is not None and basis == site_clock.basis:
        zone_label = site_clock.label

    spacing_xyz = tuple(np.linalg.norm(affine[:3, :3], axis=0))
    return Volume(
        data=data_kji,
        affine=affine,
        frame="RAS",
        acquired_at=ref_time,
        nuclide=nuclide_name,
        original_units=unit_name,
        decay_correction=decay_correction,
        modality="PT",
        scanner=Scanner(
            manufacturer=_get(meta, "Manufacturer", str, side),
            model=_get(meta, "ManufacturersModelName", str, side),
        ),
        reconstruction=_reconstruction(meta, side, data_kji.shape, spacing_xyz),
        source=str(p),
        scan_start=scan_start,
        time_basis=basis,
        time_zone=zone_label,
        frame_duration_s=duration,
        decay_reference=("frame average without decay correction: the frame start plus the frame-average correction "
                         "for FrameDuration" if decay_correction == "NONE" and acquired_at is None else None),
    )


# ---------------------------------------------------------------------------- writing
def _sidecar_dict(volume: Volume, local_times: bool = False) -> dict[str, Any]:
    meta: dict[str, Any] = {"Modality": "PT", "Units": "Bq/mL"}
    if volume.nuclide:
        meta["TracerRadionuclide"] = volume.nuclide
    if volume.acquired_at is not None:
        meta["TimeZero"] = volume.acquired_at.strftime("%H:%M:%S")
        meta["ScanStart"] = 0
        moment = volume.acquired_at.replace(tzinfo=None) if local_times else volume.acquired_at
        meta["AcquisitionDateTime"] = moment.isoformat()
    if volume.decay_correction in ("START", "ADMIN", "NONE"):
        # a Volume's values show the activity of acquired_at (a NONE series' frame averages
        # were referred to it when loaded), so they are written as decay corrected to it
        meta["ImageDecayCorrected"] = True
        meta["ImageDecayCorrectionTime"] = 0
        if volume.decay_correction == "ADMIN":
            meta["InjectionStart"] = 0
    rec = volume.reconstruction
    if rec.method:
        meta["ReconMethodName"] = rec.method
    params = [(k, v) for k, v in (("iterations", rec.iterations), ("subsets", rec.subsets)) if v is not None]
    if params:
        meta["ReconMethodParameterLabels"] = [k for k, _ in params]
        meta["ReconMethodParameterUnits"] = ["none"] * len(params)
        meta["ReconMethodParameterValues"] = [v for _, v in params]
    if rec.filter:
        m = re.fullmatch(r"(.*\S)\s+(\d+(?:\.\d*)?)\s*mm", rec.filter.strip())
        if m:
            meta["ReconFilterType"], meta["ReconFilterSize"] = m.group(1), float(m.group(2))
        else:
            meta["ReconFilterType"] = rec.filter
    if volume.scanner.manufacturer:
        meta["Manufacturer"] = volume.scanner.manufacturer
    if volume.scanner.model:
        meta["ManufacturersModelName"] = volume.scanner.model
    return meta


def write_nifti(volume: Volume, path: str | os.PathLike, *, sidecar: bool = True, local_times: bool = False) -> Path:
    """Write a volume as NIfTI-1 (float32, Bq/mL) and, by default, a BIDS-PET JSON sidecar.

    Parameters
    ----------
    volume : Volume
    path : str or path
        Output file; ``.nii.gz`` is appended unless the name ends in ``.nii`` or ``.nii.gz``.
    sidecar : bool
        Also write the ``.json`` sidecar (keys in the module docstring).
    local_times : bool
        Write ``AcquisitionDateTime`` as the local wall clock without a UTC offset.

    Returns
    -------
    Path
        The image file written.

    Notes
    -----
    An ``"LPS"`` affine is converted to RAS, ``A_RAS = diag(-1, -1, 1, 1) A_LPS``, so every
    voxel keeps its physical position (its x and y coordinates change sign with the frame).
    """
    p = Path(path)
    if not p.name.lower().endswith((".nii", ".nii.gz")):
        p = p.with_name(p.name + ".nii.gz")
    affine = _LPS_TO_RAS @ volume.affine if volume.frame == "LPS" else volume.affine.copy()
    data_ijk = np.asarray(np.transpose(volume.data, (2, 1, 0)), dtype=np.float32)
    img = nib.Nifti1Image(data_ijk, affine)
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_sform(affine, code="scanner")
    img.header.set_qform(affine, code="scanner")
    img.header.set_slope_inter(1.0, 0.0)
    p.parent.mkdir(parents=True, exist_ok=True)
    nib.save(img, str(p))
    if sidecar:
        sidecar_path(p).write_text(json.dumps(_sidecar_dict(volume, local_times), indent=2) + "\n", encoding="utf-8")
    return p
