"""rois_seg.dcm leaves the tool de-identified: DICOM PS3.15 Annex E Basic Application Level
Confidentiality Profile with the Retain UIDs Option, through the installed console script.

Sources of the checks: the profile's actions are those of PS3.15 Table E.1-1 (Basic Profile
column); the De-identification Method codes are DICOM PS3.16 CID 7050 (113100 "Basic
Application Confidentiality Profile", 113110 "Retain UIDs Option"), as carried by pydicom's
code dictionary (``pydicom.sr.codedict.codes.cid7050``). Scans are synthetic; every identifying
value is invented and unusual enough that finding its bytes anywhere in the file would mean it
was copied.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pydicom
import pytest
from pydicom.dataset import Dataset
from pydicom.datadict import keyword_dict

from phantometry.io.dicom_write import write_dicom_series
from phantometry.seg import BASIC_PROFILE, SOURCE_KEPT, deidentify
from phantometry.synth import SynthSpec, synthesize, write_synthetic

SCRIPT = Path(sys.executable).parent / "phantometry"

#: Invented identifying values written into every source slice (keyword -> value).
IDENTIFYING = {
    "PatientName": "QUILLFEATHER^HORATIA",
    "PatientID": "PID-7730419",
    "PatientBirthDate": "19470312",
    "PatientSex": "F",
    "PatientAge": "083Y",
    "PatientWeight": "73.913",
    "PatientSize": "1.6677",
    "PatientComments": "ZQX-PATIENT-COMMENT",
    "Occupation": "ZQX-LIGHTKEEPER",
    "AdditionalPatientHistory": "ZQX-HISTORY-OF-SOMETHING",
    "IssuerOfPatientID": "ZQX-ISSUER",
    "OtherPatientIDs": "ZQX-OTHER-ID",
    "EthnicGroup": "ZQX-ETHNIC",
    "ReferringPhysicianName": "ZQXREFERRER^ALMA",
    "NameOfPhysiciansReadingStudy": "ZQXREADER^BRUNO",
    "PerformingPhysicianName": "ZQXPERFORMER^CARLA",
    "OperatorsName": "ZQXOPERATOR^DINO",
    "StudyID": "ZQX-STUDY-77",
    "StudyDescription": "ZQX-STUDY-DESCRIPTION",
    "StudyDate": "19990401",
    "StudyTime": "081533",
    "AccessionNumber": "ZQX-ACC-55120",
    "InstitutionName": "ZQX-INSTITUTION",
    "InstitutionAddress": "ZQX-1-HARBOUR-ROAD",
    "InstitutionalDepartmentName": "ZQX-DEPARTMENT",
    "StationName": "ZQX-STATION",
    "DeviceSerialNumber": "ZQX-SERIAL-999",
    "ProtocolName": "ZQX-PROTOCOL",
}
#: Values that never appear in a file by chance (the short ones, "F", dates, are checked per element).
DISTINCTIVE = [v for k, v in IDENTIFYING.items() if k not in ("PatientSex",)] + ["QUILLFEATHER", "HORATIA"]


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="100")
    return subprocess.run([str(SCRIPT), *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=600)


def _identified_series(volume, folder: Path, *, with_sex: bool) -> list[Path]:
    files = write_dicom_series(volume, folder, manufacturer="Invented Medical", model="VX-1", station="ZQX-STATION",
                               device_serial="ZQX-SERIAL-999")
    for f in files:
        ds = pydicom.dcmread(f)
        for kw, value in IDENTIFYING.items():
            setattr(ds, kw, value)
        other = Dataset()  # a nested identifier too
        other.PatientID = "ZQX-NESTED-ID"
        other.IssuerOfPatientID = "ZQX-NESTED-ISSUER"
        ds.OtherPatientIDsSequence = [other]
        ds.add_new(0x00290010, "LO", "ZQX PRIVATE CREATOR")  # a private attribute
        ds.add_new(0x00291010, "LO", "ZQX-PRIVATE-VALUE")
        if not with_sex:
            del ds.PatientSex  # type 2, often absent from phantom scans
        ds.save_as(f)
    return files


@pytest.fixture(scope="module")
def identified(tmp_path_factory):
    base = tmp_path_factory.mktemp("seg_deid")
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=6.0, noise_cv=0.05, seed=11))
    paths = write_synthetic(res, base / "synthetic", "dicom")
    out = {"fill": paths["fill"], "base": base}
    for name, with_sex in (("with_sex", True), ("without_sex", False)):
        files = _identified_series(res.volume, base / name, with_sex=with_sex)
        check = pydicom.dcmread(files[0])  # the identity really is in the source headers
        assert str(check.PatientName) == IDENTIFYING["PatientName"] and check.Occupation == IDENTIFYING["Occupation"]
        assert ("PatientSex" in check) is with_sex
        before = {f: f.read_bytes() for f in files}
        r = run("measure", str(base / name), "--fill", str(paths["fill"]), "--out", str(base / f"results_{name}"), "--seg")
        out[name] = {"run": r, "files": files, "before": before, "seg": base / f"results_{name}" / "rois_seg.dcm", "source": check}
    return out


def _walk(ds, path=""):
    """(path, element) of every element at every depth, file meta included."""
    for elem in ds:
        here = f"{path}{elem.keyword or elem.tag}"
        yield here, elem
        if elem.VR == "SQ":
            for n, item in enumerate(elem.value):
                yield from _walk(item, f"{here}[{n}].")


@pytest.mark.parametrize("name", ["with_sex", "without_sex"])
def test_seg_written_and_sources_untouched(identified, name):
    case = identified[name]
    r = case["run"]
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stdout + r.stderr
    assert case["seg"].is_file()
    for f, data in case["before"].items():  # the inputs are read, never changed
        assert f.read_bytes() == data


@pytest.mark.parametrize("name", ["with_sex", "without_sex"])
def test_no_identifying_value_anywhere_in_the_seg(identified, name):
    seg_path = identified[name]["seg"]
    raw = seg_path.read_bytes()
    for value in DISTINCTIVE + ["ZQX"]:  # not in any element, nor anywhere in the bytes
        assert value.encode() not in raw, value
    ds = pydicom.dcmread(seg_path)
    elements = list(_walk(ds.file_meta)) + list(_walk(ds))
    assert len(elements) > 200  # the walk is real: every frame's functional groups
    identifying_values = {str(v) for v in IDENTIFYING.values()}
    for path, elem in elements:
        if elem.VR != "SQ" and elem.keyword != "PixelData":
            assert str(elem.value) not in identifying_values, (path, elem.value)
        assert not elem.tag.is_private, path
        # no attribute the profile removes (X) is present, at any depth
        assert BASIC_PROFILE.get(elem.keyword) != "X", path
    # the profile's Z attributes are present and empty (type 2)
    for kw in ("PatientName", "PatientID", "PatientBirthDate", "PatientSex", "StudyID", "StudyDate", "StudyTime",
               "AccessionNumber", "ReferringPhysicianName"):
        assert kw in ds and str(ds[kw].value or "") == "", kw
    for kw in ("PatientAge", "PatientWeight", "PatientSize", "PatientComments", "Occupation", "AdditionalPatientHistory",
               "IssuerOfPatientID", "NameOfPhysiciansReadingStudy", "StudyDescription", "InstitutionName", "StationName"):
        assert kw not in ds, kw
    for item in ds.ContributingEquipmentSequence:  # no institution, station or source device in any equipment item
        for kw in ("InstitutionName", "InstitutionAddress", "InstitutionalDepartmentName", "StationName", "DeviceSerialNumber"):
            assert kw not in item, kw


@pytest.mark.parametrize("name", ["with_sex", "without_sex"])
def test_deidentification_is_declared(identified, name):
    ds = pydicom.dcmread(identified[name]["seg"])
    assert ds.PatientIdentityRemoved == "YES"
    methods = list(ds.DeidentificationMethod) if ds["DeidentificationMethod"].VM > 1 else [ds.DeidentificationMethod]
    assert any("Basic Profile" in m for m in methods) and any("Retain UIDs" in m for m in methods)
    codes = {(c.CodeValue, c.CodingSchemeDesignator, c.CodeMeaning) for c in ds.DeidentificationMethodCodeSequence}
    # DICOM PS3.16 CID 7050 (pydicom.sr.codedict.codes.cid7050)
    assert codes == {("113100", "DCM", "Basic Application Confidentiality Profile"), ("113110", "DCM", "Retain UIDs Option")}
    assert ds.DeviceSerialNumber == "none"


@pytest.mark.parametrize("name", ["with_sex", "without_sex"])
def test_references_to_the_source_series_are_intact(identified, name):
    case = identified[name]
    ds = pydicom.dcmread(case["seg"])
    src = case["source"]
    sources = {str(pydicom.dcmread(f, stop_before_pixels=True).SOPInstanceUID) for f in case["files"]}
    assert ds.StudyInstanceUID == src.StudyInstanceUID
    assert ds.FrameOfReferenceUID == src.FrameOfReferenceUID
    assert ds.SeriesInstanceUID != src.SeriesInstanceUID  # the SEG is a new series of the same study
    [ref] = ds.ReferencedSeriesSequence
    assert ref.SeriesInstanceUID == src.SeriesInstanceUID
    referenced = {str(i.ReferencedSOPInstanceUID) for i in ref.ReferencedInstanceSequence}
    assert referenced and referenced <= sources
    per_frame = {str(f.DerivationImageSequence[0].SourceImageSequence[0].ReferencedSOPInstanceUID) for f in ds.PerFrameFunctionalGroupsSequence}
    assert per_frame and per_frame <= referenced


def test_profile_table_and_source_list_are_dicom_keywords():
    # every keyword is a DICOM attribute (pydicom's data dictionary, from DICOM PS3.6)
    assert [k for k in BASIC_PROFILE if k not in keyword_dict] == []
    assert [k for k in SOURCE_KEPT if k not in keyword_dict] == []
    assert set(BASIC_PROFILE.values()) == {"X", "Z"}
    # nothing that identifies a patient, physician, institution or device is handed to highdicom
    assert not set(SOURCE_KEPT) & set(BASIC_PROFILE)
    assert not set(SOURCE_KEPT) & {"DeviceSerialNumber", "Manufacturer", "StationName"}


def test_deidentify_applies_the_actions_at_every_depth():
    ds = Dataset()
    ds.PatientName = "A^B"
    ds.PatientAge = "050Y"
    ds.StudyInstanceUID = "1.2.3"
    inner = Dataset()
    inner.InstitutionName = "Somewhere"
    inner.Manufacturer = "Invented"
    deeper = Dataset()
    deeper.PersonName = "C^D"
    deeper.CodeValue = "1"
    inner.ContentSequence = [deeper]
    ds.ContributingEquipmentSequence = [inner]
    ds.add_new(0x00091001, "LO", "private")
    deidentify(ds)
    assert ds.PatientName == "" and "PatientAge" not in ds and ds.StudyInstanceUID == "1.2.3"
    item = ds.ContributingEquipmentSequence[0]
    assert "InstitutionName" not in item and item.Manufacturer == "Invented"
    assert "PersonName" not in item.ContentSequence[0] and item.ContentSequence[0].CodeValue == "1"
    assert not any(e.tag.is_private for e in ds)
    assert ds.PatientIdentityRemoved == "YES"
