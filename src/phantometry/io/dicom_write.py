"""Write a :class:`~phantometry.volume.Volume` as a classic DICOM PET image series.

One PET Image Storage instance (SOP Class 1.2.840.10008.5.1.4.1.1.128) is written per slice,
with the modules of DICOM PS3.3 A.21 (Patient, General Study, General Series, PET Series,
PET Isotope, NM/PET Patient Orientation, Frame of Reference, General Equipment, General Image,
Image Plane, Image Pixel, PET Image, SOP Common). Pixel values are signed 16-bit integers with a
per-slice Rescale Slope chosen so that the largest magnitude of each slice maps near 32767,
as scanners commonly do (common practice).

The writer exists to make test and demonstration data; it never invents patient identity beyond
the placeholder ``patient_name`` it is given, and the loader (:mod:`phantometry.io.dicom`)
never keeps it.
"""

from __future__ import annotations

import copy
import math
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pydicom
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence
from pydicom.uid import (
    UID,
    ExplicitVRLittleEndian,
    PositronEmissionTomographyImageStorage,
    RLELossless,
    generate_uid,
)
from pydicom.valuerep import format_number_as_ds

from ..errors import GeometryError, InputError, UnitsError
from ..nuclides import Nuclide, get_nuclide, seconds_between
from ..volume import Volume

__all__ = ["write_dicom_series", "RADIONUCLIDE_CODES", "format_tz_offset"]

#: Radionuclide codes for the Radionuclide Code Sequence (DICOM PS3.16 CID 4020), as
#: (CodeValue, CodingSchemeDesignator, CodeMeaning). Only F-18 is listed (SNOMED CT code
#: recalled); other nuclides are written with an empty code sequence and are identified by
#: the loader from Radionuclide Half Life.
RADIONUCLIDE_CODES: dict[str, tuple[str, str, str]] = {
    "F-18": ("77004003", "SCT", "^18^Fluorine"),
}

_SUPPORTED_SYNTAXES = (ExplicitVRLittleEndian, RLELossless)
_UNITS = ("BQML", "GML", "CNTS")
_DECAY_CORRECTIONS = ("START", "ADMIN", "NONE")
_INT16_MAX = 32767


def _ds(value: float) -> str:
    """Decimal String of at most 16 characters keeping as many digits as fit."""
    value = float(value)
    if value == 0.0:
        return "0"
    return format_number_as_ds(value)


def format_tz_offset(moment: datetime) -> str:
    """DICOM Timezone Offset From UTC (``"+HHMM"``/``"-HHMM"``) of an aware datetime."""
    offset = moment.utcoffset()
    if offset is None:
        raise InputError(f"time {moment.isoformat()} has no time zone; give an aware datetime")
    minutes = int(round(offset.total_seconds() / 60.0))
    sign = "+" if minutes >= 0 else "-"
    minutes = abs(minutes)
    return f"{sign}{minutes // 60:02d}{minutes % 60:02d}"


def _da(moment: datetime) -> str:
    return moment.strftime("%Y%m%d")


def _tm(moment: datetime) -> str:
    return moment.strftime("%H%M%S.%f")


def _lps_affine(volume: Volume) -> np.ndarray:
    """The volume affine in DICOM LPS; a RAS affine is converted by negating x and y."""
    if volume.frame == "LPS":
        return np.array(volume.affine, dtype=float)
    if volume.frame == "RAS":
        return np.diag([-1.0, -1.0, 1.0, 1.0]) @ np.asarray(volume.affine, dtype=float)
    raise GeometryError(f"cannot write frame {volume.frame!r} as DICOM; use an LPS or RAS volume")


def _plane_geometry(affine: np.ndarray) -> tuple[np.ndarray, np.ndarray, float, float, float]:
    """Row/column direction cosines and spacings (dx, dy, dz) of an LPS index->world affine.

    Raises
    ------
    GeometryError
        If the in-plane axes are not orthogonal or the slice axis is not along their normal
        (DICOM image planes cannot express a sheared grid).
    """
    cols = affine[:3, :3]
    dx, dy, dz = (float(np.linalg.norm(cols[:, c])) for c in range(3))
    row_dir = cols[:, 0] / dx
    col_dir = cols[:, 1] / dy
    slice_dir = cols[:, 2] / dz
    if abs(float(row_dir @ col_dir)) > 1e-6:
        raise GeometryError("in-plane axes of the volume are not orthogonal; DICOM cannot store that grid")
    normal = np.cross(row_dir, col_dir)
    if abs(abs(float(normal @ slice_dir)) - 1.0) > 1e-6:
        raise GeometryError(
            "slice axis of the volume is not perpendicular to its image planes (sheared grid); "
            "resample the volume before writing DICOM"
        )
    return row_dir, col_dir, dx, dy, dz


def _quantise_slice(values: np.ndarray) -> tuple[np.ndarray, str]:
    """int16 pixels and the Rescale Slope string so that ``pixels * slope ~= values``.

    The largest magnitude of the slice maps to (about) 32767; an all-zero slice gets slope 1.
    The stored Decimal String is parsed back before quantising so that reader and writer use
    the very same slope.
    """
    peak = float(np.max(np.abs(values))) if values.size else 0.0
    if not math.isfinite(peak):
        raise InputError("volume contains NaN or infinite values; DICOM integer pixels cannot hold them")
    if peak == 0.0:
        return np.zeros(values.shape, dtype=np.int16), "1"
    slope_text = _ds(peak / _INT16_MAX)
    slope = float(slope_text)
    pixels = np.rint(values.astype(np.float64) / slope)
    np.clip(pixels, -_INT16_MAX - 1, _INT16_MAX, out=pixels)
    return pixels.astype(np.int16), slope_text


def _reconstruction_method(volume: Volume) -> str | None:
    rec = volume.reconstruction
    parts = [rec.method] if rec.method else []
    if rec.iterations or rec.subsets:
        parts.append(f"{rec.iterations or 0}i{rec.subsets or 0}s")
    return " ".join(parts) if parts else None


def _nuclide_of(volume: Volume) -> Nuclide:
    return get_nuclide(volume.nuclide or "F-18")


def _aware(moment: datetime, what: str) -> datetime:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise InputError(f"{what} {moment.isoformat()} has no time zone; give an aware datetime")
    return moment


def write_dicom_series(
    volume: Volume,
    out_dir: str | Path,
    *,
    units: str = "BQML",
    patient_name: str = "PHANTOM^QC",
    patient_id: str = "PHANTOM-QC",
    patient_weight_kg: float | None = None,
    injected_dose_bq: float | None = None,
    injection_time: datetime | None = None,
    decay_correction: str = "START",
    radiopharmaceutical: str = "Fluorodeoxyglucose",
    study_uid: str | None = None,
    series_uid: str | None = None,
    frame_of_reference_uid: str | None = None,
    series_number: int = 1,
    series_description: str | None = None,
    manufacturer: str | None = None,
    model: str | None = None,
    station: str | None = None,
    device_serial: str | None = None,
    software_version: str = "phantometry",
    frame_duration_s: float = 600.0,
    transfer_syntax: str = ExplicitVRLittleEndian,
    calibration_counts_per_bq_ml: float | None = None,
    file_prefix: str = "PT",
    image_type: tuple[str, ...] = ("ORIGINAL", "PRIMARY"),
    derivation_description: str | None = None,
    timezone_offset: bool = True,
) -> list[Path]:
    """Write ``volume`` as one classic PET Image Storage file per slice.

    Parameters
    ----------
    volume : Volume
        Activity concentration in Bq/mL. Its ``acquired_at`` becomes Series/Acquisition
        Date/Time (the decay-correction reference for ``START``), its ``nuclide`` (default
        F-18) the radionuclide, its ``scanner`` and ``reconstruction`` the equipment and
        reconstruction attributes unless overridden here. ``frame`` must be ``"LPS"`` or
        ``"RAS"`` (converted to LPS by negating x and y). Without ``acquired_at`` the current
        UTC time is written as series time (refused for ``GML``, whose dose decay needs it).
    out_dir : path
        Folder to write into (created if needed). Files are named ``<prefix>_<index>.dcm``.
    units : {"BQML", "GML", "CNTS"}
        Units (0054,1001) of the stored values. ``GML`` stores body-weight SUV computed as
        ``SUVbw = C[Bq/mL] * W[g] / D_decayed[Bq]`` (QIBA vendor-neutral SUV pseudo-code, the
        inverse of what the loader applies). ``CNTS`` stores ``C * calibration_counts_per_bq_ml``.
    patient_name, patient_id : str
        Placeholder identity written to the files (invented; the loader never keeps it).
    patient_weight_kg : float, optional
        Patient Weight (0010,1030) in kg; required for ``GML``.
    injected_dose_bq : float, optional
        Radionuclide Total Dose (0018,1074) in Bq at ``injection_time``; required for ``GML``.
    injection_time : datetime, optional
        Timezone-aware Radiopharmaceutical Start DateTime; required for ``GML``.
    decay_correction : {"START", "ADMIN", "NONE"}
        Decay Correction (0054,1102) label of the values (the values are written as given).
        For ``GML`` the dose is decayed to the series time for ``START`` and ``NONE`` and not
        decayed for ``ADMIN``.
    radiopharmaceutical : str
        Radiopharmaceutical (0018,0031).
    study_uid, series_uid, frame_of_reference_uid : str, optional
        UIDs to use; new ones are generated with :func:`pydicom.uid.generate_uid` otherwise.
    series_number : int
    series_description : str, optional
        Defaults to the volume's series description.
    manufacturer, model, station, device_serial : str, optional
        Equipment attributes; default to ``volume.scanner``.
    software_version : str
    frame_duration_s : float
        Actual Frame Duration in s, used for Decay Factor (0054,1321) of decay-corrected data.
    transfer_syntax : UID
        ``ExplicitVRLittleEndian`` (default) or ``RLELossless`` (encoded by pydicom's own RLE
        encoder, DICOM PS3.5 Annex G).
    calibration_counts_per_bq_ml : float, optional
        Counts per Bq/mL for ``CNTS``; required then.
    file_prefix : str
        Prefix of the file names.
    image_type : tuple of str
        Image Type (0008,0008) values; ``("DERIVED", "SECONDARY")`` for an image computed
        from another (e.g. a post-filtered copy).
    derivation_description : str, optional
        Derivation Description (0008,2111): how a derived image was made.
    timezone_offset : bool
        Write Timezone Offset From UTC (0008,0201). Without it the times are the local wall
        clock of ``volume.acquired_at``, as most scanners write them.

    Returns
    -------
    list of Path
        The written files in slice order (k = 0 first).

    Raises
    ------
    InputError, UnitsError, GeometryError
        On unsupported arguments, missing quantities for the chosen units, or a grid DICOM
        image planes cannot express.
    """
    units = units.upper()
    decay_correction = decay_correction.upper()
    if units not in _UNITS:
        raise UnitsError(f"cannot write Units {units!r}; choose one of {', '.join(_UNITS)}")
    if decay_correction not in _DECAY_CORRECTIONS:
        raise UnitsError(
            f"unknown DecayCorrection {decay_correction!r}; choose one of {', '.join(_DECAY_CORRECTIONS)}"
        )
    transfer_syntax = UID(str(transfer_syntax))
    if transfer_syntax not in _SUPPORTED_SYNTAXES:
        raise InputError(
            f"cannot write transfer syntax {transfer_syntax} ({transfer_syntax.name}); "
            "use ExplicitVRLittleEndian or RLELossless"
        )

    nuclide = _nuclide_of(volume)
    affine = _lps_affine(volume)
    row_dir, col_dir, dx, dy, dz = _plane_geometry(affine)
    n_slices, n_rows, n_cols = volume.shape

    if volume.acquired_at is not None:
        series_time = _aware(volume.acquired_at, "volume.acquired_at")
    elif units == "GML":
        raise UnitsError("cannot write SUV (GML) without volume.acquired_at: the dose decay needs the series time")
    else:
        series_time = datetime.now(timezone.utc).replace(microsecond=0)
    tz_text = format_tz_offset(series_time)
    if injection_time is not None:
        injection_time = _aware(injection_time, "injection_time").astimezone(series_time.tzinfo)

    # Bq/mL -> stored unit
    if units == "BQML":
        to_stored = 1.0
    elif units == "CNTS":
        if not calibration_counts_per_bq_ml or calibration_counts_per_bq_ml <= 0:
            raise UnitsError("Units CNTS needs calibration_counts_per_bq_ml > 0 (counts per Bq/mL)")
        to_stored = float(calibration_counts_per_bq_ml)
    else:
        missing = [
            name
            for name, value in (
                ("patient_weight_kg", patient_weight_kg),
                ("injected_dose_bq", injected_dose_bq),
                ("injection_time", injection_time),
            )
            if value is None
        ]
        if missing:
            raise UnitsError(f"writing SUV (GML) needs {', '.join(missing)}")
        if decay_correction == "ADMIN":
            decayed_dose_bq = float(injected_dose_bq)
        else:
            elapsed_s = seconds_between(injection_time, series_time)
            decayed_dose_bq = float(injected_dose_bq) * 2.0 ** (-elapsed_s / nuclide.half_life_s)
        # SUVbw = C[Bq/mL] * W[g] / D[Bq]  (QIBA vendor-neutral SUV pseudo-code)
        to_stored = float(patient_weight_kg) * 1000.0 / decayed_dose_bq

    study_uid = study_uid or generate_uid()
    series_uid = series_uid or generate_uid()
    frame_uid = frame_of_reference_uid or volume.frame_of_reference_uid or generate_uid()
    description = series_description if series_description is not None else volume.series_description
    scanner = volume.scanner
    recon_method = _reconstruction_method(volume)
    frame_duration_ms = float(frame_duration_s) * 1000.0
    # decay during the frame referred to its start (DICOM PS3.3 PET Image module, Decay Factor)
    lam_t = nuclide.decay_constant_per_s * float(frame_duration_s)
    decay_factor = lam_t / (1.0 - math.exp(-lam_t)) if lam_t > 0 else 1.0

    base = Dataset()
    base.SpecificCharacterSet = "ISO_IR 100"
    base.ImageType = [str(v) for v in image_type]
    if derivation_description:
        base.DerivationDescription = str(derivation_description)[:1024]  # ST: at most 1024 characters
    base.SOPClassUID = PositronEmissionTomographyImageStorage
    base.InstanceCreationDate = _da(series_time)
    base.InstanceCreationTime = _tm(series_time)
    if timezone_offset:
        base.TimezoneOffsetFromUTC = tz_text
    base.StudyDate = _da(series_time)
    base.SeriesDate = _da(series_time)
    base.AcquisitionDate = _da(series_time)
    base.ContentDate = _da(series_time)
    base.StudyTime = _tm(series_time)
    base.SeriesTime = _tm(series_time)
    base.AcquisitionTime = _tm(series_time)
    base.ContentTime = _tm(series_time)
    base.AccessionNumber = ""
    base.Modality = "PT"
    base.Manufacturer = manufacturer or scanner.manufacturer or "phantometry"
    base.ReferringPhysicianName = ""
    base.StationName = station or scanner.station or ""
    if series_description is not None or description:
        base.SeriesDescription = description or ""
    base.ManufacturerModelName = model or scanner.model or ""
    base.PatientName = patient_name
    base.PatientID = patient_id
    base.PatientBirthDate = ""
    base.PatientSex = "O"
    if patient_weight_kg is not None:
        base.PatientWeight = _ds(patient_weight_kg)
    base.SliceThickness = _ds(dz)
    base.DeviceSerialNumber = device_serial or scanner.serial or ""
    base.SoftwareVersions = software_version
    base.ActualFrameDuration = int(round(frame_duration_ms))
    base.PatientPosition = "HFS"
    base.StudyInstanceUID = study_uid
    base.SeriesInstanceUID = series_uid
    base.StudyID = "1"
    base.SeriesNumber = int(series_number)
    base.FrameOfReferenceUID = frame_uid
    base.PositionReferenceIndicator = ""
    base.ImageOrientationPatient = [_ds(v) for v in (*row_dir, *col_dir)]
    base.SamplesPerPixel = 1
    base.PhotometricInterpretation = "MONOCHROME2"
    base.Rows = n_rows
    base.Columns = n_cols
    base.PixelSpacing = [_ds(dy), _ds(dx)]
    base.BitsAllocated = 16
    base.BitsStored = 16
    base.HighBit = 15
    base.PixelRepresentation = 1
    base.RescaleIntercept = "0"

    item = Dataset()
    item.Radiopharmaceutical = radiopharmaceutical
    if injection_time is not None:
        item.RadiopharmaceuticalStartTime = _tm(injection_time)
        item.RadiopharmaceuticalStartDateTime = injection_time.strftime("%Y%m%d%H%M%S.%f")
    if injected_dose_bq is not None:
        item.RadionuclideTotalDose = _ds(injected_dose_bq)
    item.RadionuclideHalfLife = _ds(nuclide.half_life_s)
    if nuclide.positron_fraction is not None:
        item.RadionuclidePositronFraction = _ds(nuclide.positron_fraction)
    code = RADIONUCLIDE_CODES.get(nuclide.name)
    code_items = []
    if code is not None:
        code_item = Dataset()
        code_item.CodeValue, code_item.CodingSchemeDesignator, code_item.CodeMeaning = code
        code_items.append(code_item)
    item.RadionuclideCodeSequence = Sequence(code_items)
    base.RadiopharmaceuticalInformationSequence = Sequence([item])

    base.NumberOfSlices = n_slices
    base.PatientOrientationCodeSequence = Sequence()
    base.PatientGantryRelationshipCodeSequence = Sequence()
    base.SeriesType = ["STATIC", "IMAGE"]
    base.Units = units
    base.CountsSource = "EMISSION"
    corrected = ["ATTN", "SCAT", "RAN", "DTIM", "NORM"]
    if decay_correction != "NONE":
        corrected.insert(0, "DECY")
    base.CorrectedImage = corrected
    base.DecayCorrection = decay_correction
    if recon_method:
        base.ReconstructionMethod = recon_method
    if volume.reconstruction.filter:
        base.ConvolutionKernel = volume.reconstruction.filter[:16]  # SH: at most 16 characters
    base.CollimatorType = "NONE"
    base.FrameReferenceTime = "0"
    if decay_correction != "NONE":
        base.DecayFactor = _ds(decay_factor)

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    n_digits = max(4, len(str(n_slices)))
    paths: list[Path] = []
    data = volume.data
    for k in range(n_slices):
        pixels, slope_text = _quantise_slice(data[k] * np.float32(to_stored) if to_stored != 1.0 else data[k])
        ds = copy.deepcopy(base)
        sop_uid = generate_uid()
        ds.SOPInstanceUID = sop_uid
        ds.InstanceNumber = k + 1
        ds.ImageIndex = k + 1
        position = affine[:3, :3] @ np.array([0.0, 0.0, float(k)]) + affine[:3, 3]
        ds.ImagePositionPatient = [_ds(v) for v in position]
        ds.SliceLocation = _ds(float(position @ np.cross(row_dir, col_dir)))
        ds.RescaleSlope = slope_text
        ds.LargestImagePixelValue = int(pixels.max())
        ds.SmallestImagePixelValue = int(pixels.min())
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID = PositronEmissionTomographyImageStorage
        meta.MediaStorageSOPInstanceUID = sop_uid
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        meta.ImplementationClassUID = pydicom.uid.PYDICOM_IMPLEMENTATION_UID
        ds.file_meta = meta
        if transfer_syntax == RLELossless:
            ds.compress(RLELossless, pixels, encoding_plugin="pydicom", generate_instance_uid=False)
        else:
            ds.PixelData = pixels.astype("<i2", copy=False).tobytes()
        path = out_dir / f"{file_prefix}_{k + 1:0{n_digits}d}.dcm"
        pydicom.dcmwrite(path, ds, enforce_file_format=True)
        paths.append(path)
    return paths

