"""The placed ROIs as a DICOM Segmentation object (binary), referencing the source PET series.

Any DICOM viewer that reads Segmentation Storage (DICOM PS3.3 A.51, Segmentation IOD) can then
show where phantometry measured, over the original images. The object is built with highdicom
(Herrmann et al., J Digit Imaging 2022;35:1719-1737); one segment per ROI kind:

the segments are the ROI kinds the analysis reports (:meth:`phantometry.phantoms.base.Analysis.roi_masks`;
for the body phantom: hot spheres, cold spheres, background ROIs, low-density insert, see
:meth:`phantometry.phantoms.body.BodyAnalysis.roi_masks`). Kinds whose analyses cannot be
exported say so before anything is measured (:func:`check_seg_request`).

Masks from the ROI weights
--------------------------
ROIs carry sub-voxel weights (the fraction of each voxel cell inside the ROI,
:mod:`phantometry.rois`). A binary segment cannot, so a voxel belongs to a segment when its
weight for at least one ROI of that kind is **>= 0.5**: half or more of the voxel cell lies
inside. For a sphere this keeps the mask volume close to the sphere volume (partial voxels
gained and lost roughly balance). Circles sampled on a plane are discs one slice thick (a
cylinder of the slice spacing along the phantom axis, centred on the plane), so their mask is
the slice (or, for an oblique axis, the slices) the circle was sampled from.

No patient identity is written: Patient Name, Patient ID and Patient Birth Date are left empty
(the SEG is tied to the images by Study, Series, SOP Instance and Frame of Reference UIDs).
"""

from __future__ import annotations

import copy
import os
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

from .errors import InputError
from .phantoms.base import Analysis, PhantomKind, RoiKindMask
from .templates import Template
from .volume import Volume


#: Identity attributes blanked in the source headers before highdicom copies the patient module.
_IDENTITY_KEYWORDS = ("PatientName", "PatientID", "PatientBirthDate", "OtherPatientIDs", "OtherPatientNames", "AccessionNumber")


def check_seg_source(volume: Volume, where: str | None = None) -> None:
    """Refuse a volume that has no DICOM source series to reference (e.g. NIfTI input).

    Raises
    ------
    InputError
        When the volume lacks SOP Instance, Series or Frame of Reference UIDs.
    """
    if not volume.sop_instance_uids or not volume.series_uid or not volume.frame_of_reference_uid:
        place = where or volume.source or "image"
        raise InputError(
            f"{place}: --seg needs a DICOM PET series to reference, and this input has no DICOM UIDs "
            "(NIfTI?); drop --seg or measure the DICOM series"
        )


def check_seg_request(volume: Volume, template: Template, kind: PhantomKind, where: str | None = None) -> None:
    """Refuse ``--seg`` early (before measuring) when it cannot be written.

    Raises
    ------
    InputError
        NIfTI input (see :func:`check_seg_source`), or an analysis kind whose ROIs are not
        exported (``PhantomKind.supports_seg``).
    """
    check_seg_source(volume, where)
    if not kind.supports_seg:
        raise InputError(
            f"{where or volume.source or 'image'}: --seg exports the ROIs of body image-quality templates; "
            f"template {template.name} is of kind {kind.name}; drop --seg"
        )


def _source_datasets(volume: Volume, source_paths: Sequence[str | os.PathLike] | None) -> list:
    """Headers of the source slices (no pixel data), in the volume's slice order."""
    import pydicom

    from .io.dicom import discover_series

    roots = [Path(p) for p in (source_paths or [volume.source or ""])]
    where = ", ".join(map(str, roots))
    infos = [i for i in discover_series(roots) if i.series_uid == volume.series_uid]
    if not infos:
        raise InputError(f"{where}: the source series {volume.series_uid} is not there any more; give the folder it was loaded from")
    by_uid = {}
    for path in infos[0].files:
        ds = pydicom.dcmread(path, stop_before_pixels=True)
        by_uid[str(ds.SOPInstanceUID)] = ds
    missing = [u for u in volume.sop_instance_uids if u not in by_uid]
    if missing:
        raise InputError(f"{where}: {len(missing)} source slices of series {volume.series_uid} are missing (e.g. {missing[0]}); give the complete series")
    out = []
    for uid in volume.sop_instance_uids:
        ds = copy.deepcopy(by_uid[uid])
        for kw in _IDENTITY_KEYWORDS:
            if kw in ds:
                setattr(ds, kw, "")
        out.append(ds)
    return out


def _segment_descriptions(kinds: Iterable[RoiKindMask], algorithm_type: str):
    import highdicom as hd
    from pydicom.sr.codedict import codes

    from . import __version__

    # Coded concepts from the DICOM content mapping resource (PS3.16): category "Physical
    # object" (SCT 260787004); types from the ROI kind: "Sphere" (DCM 122485), "Background"
    # (DCM 125040), "Phantom" (DCM 113681).
    algorithm = hd.AlgorithmIdentificationSequence(
        name="phantometry", version=__version__, family=codes.cid7162.HistogramAnalysis,
        source="phantometry ROI placement (template fit)",
    )
    out = []
    for number, k in enumerate(kinds, start=1):
        out.append(
            hd.seg.SegmentDescription(
                segment_number=number,
                segment_label=k.label,
                segmented_property_category=codes.SCT.PhysicalObject,
                segmented_property_type=getattr(codes.DCM, k.segment_type),
                algorithm_type=algorithm_type,
                algorithm_identification=algorithm,
                tracking_id=k.kind,
                tracking_uid=hd.UID(),
            )
        )
    return out


def write_seg(
    analysis: Analysis,
    path: str | os.PathLike,
    *,
    source_paths: Sequence[str | os.PathLike] | None = None,
) -> Path:
    """Write the placed ROIs as a binary DICOM Segmentation referencing the source series.

    Parameters
    ----------
    analysis : Analysis
        Result of :func:`phantometry.measure.measure_volume` on a DICOM-loaded volume, of a
        kind whose ROIs are exported (``roi_masks``).
    path : path
        Output file (``.dcm``).
    source_paths : list of paths, optional
        Files/folders holding the source series (default ``analysis.volume.source``); their
        headers are re-read for the references.

    Returns
    -------
    Path

    Raises
    ------
    InputError
        NIfTI input (no DICOM UIDs), or the source files can no longer be found.
    """
    import highdicom as hd

    from . import __version__

    volume = analysis.volume
    check_seg_source(volume)
    kinds = analysis.roi_masks()
    sources = _source_datasets(volume, source_paths)
    manual = any(f.source == "override" for f in analysis.placement.fits.values())
    pixels = np.stack([k.mask for k in kinds], axis=-1)  # (frames = slices, rows, cols, segments)
    scanner = volume.scanner
    seg = hd.seg.Segmentation(
        source_images=sources,
        pixel_array=pixels,
        segmentation_type=hd.seg.SegmentationTypeValues.BINARY,
        segment_descriptions=_segment_descriptions(kinds, "SEMIAUTOMATIC" if manual else "AUTOMATIC"),
        series_instance_uid=hd.UID(),
        series_number=int(volume.series_number or 0) + 9000,
        sop_instance_uid=hd.UID(),
        instance_number=1,
        manufacturer="phantometry",
        manufacturer_model_name="phantometry",
        software_versions=__version__,
        device_serial_number=scanner.serial or "none",
        content_description=f"phantometry ROIs, template {analysis.template.name}, voxel weight >= 0.5",
        content_label="PHANTOMROIS",
        series_description=f"phantometry ROIs ({analysis.template.name})",
    )
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    seg.save_as(out)
    return out


__all__ = ["RoiKindMask", "check_seg_source", "check_seg_request", "write_seg"]
