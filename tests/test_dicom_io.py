"""DICOM PET writer and loader: round trips, unit conversions and refusals.

All data are invented (synthetic volumes, invented scanner and patient placeholder).
"""

from __future__ import annotations

import json
import math
import random
import shutil
import warnings
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.uid import (
    JPEGLSLossless,
    PositronEmissionTomographyImageStorage,
    RLELossless,
    UID,
)
from scipy.spatial.transform import Rotation

from phantometry.errors import (
    AmbiguousSeries,
    GeometryError,
    ImageTooLarge,
    InputError,
    NoPETSeries,
    UnitsError,
    UnsupportedSeries,
)
from phantometry.io.dicom import (
    TimeZoneAssumedWarning,
    discover_series,
    load_dicom,
    parse_iterations_subsets,
)
from phantometry.io.dicom_write import write_dicom_series
from phantometry.nuclides import NUCLIDES
from phantometry.volume import Reconstruction, Scanner, Volume, affine_from_axes

TZ = timezone(timedelta(hours=1))
SCAN_TIME = datetime(2031, 5, 14, 10, 15, 0, tzinfo=TZ)  # invented
F18_HALF_LIFE_S = NUCLIDES["F-18"].half_life_s  # 109.77 min, European Pharmacopoeia / NNDC
PATIENT_PLACEHOLDER = "Invented^Placeholder"
SHAPE = (20, 32, 32)


def _volume(affine: np.ndarray | None = None, seed: int = 0, **kw) -> Volume:
    rng = np.random.default_rng(seed)
    data = rng.uniform(0.0, 20000.0, SHAPE).astype(np.float32)
    data[:, 10:20, 10:20] += 30000.0  # a hot block so slices differ in range
    data[3] = 0.0  # an all-zero slice (slope 1)
    if affine is None:
        affine = affine_from_axes([-31.0, -41.5, -60.25], [1, 0, 0], [0, 1, 0], [0, 0, 1], (2.0, 2.5, 3.27))
    kw.setdefault("acquired_at", SCAN_TIME)
    kw.setdefault("nuclide", "F-18")
    return Volume(data=data, affine=affine, **kw)


def _oblique_affine() -> np.ndarray:
    rotation = Rotation.from_euler("zyx", [20.0, 10.0, 5.0], degrees=True).as_matrix()
    affine = np.eye(4)
    affine[:3, :3] = rotation @ np.diag([2.0, 2.5, 3.27])
    affine[:3, 3] = [12.5, -30.0, 101.0]
    return affine


def _edit(paths, change) -> None:
    """Rewrite files after ``change(dataset, index)``."""
    for k, path in enumerate(paths):
        ds = pydicom.dcmread(path)
        change(ds, k)
        ds.save_as(path)


def _assert_within_quantisation(loaded: Volume, volume: Volume) -> None:
    """Each slice within half an int16 step of its own range (max |value| maps to 32767),
    plus a few float32 rounding steps (1e-6 of the slice maximum)."""
    peak = np.abs(volume.data).reshape(volume.shape[0], -1).max(axis=1)
    error = np.abs(loaded.data - volume.data).reshape(volume.shape[0], -1).max(axis=1)
    assert np.all(error <= peak / 32767.0 * 0.5 + 1e-6 * peak + 1e-6)


def _slopes(paths) -> np.ndarray:
    return np.array([float(pydicom.dcmread(p, stop_before_pixels=True).RescaleSlope) for p in paths])


@pytest.fixture(scope="module")
def base_series(tmp_path_factory) -> tuple[Path, Volume, list[Path]]:
    """One BQML series written once; tests copy it before editing."""
    volume = _volume(
        scanner=Scanner("Invented Medical", "Model Z9", "STATION-7", "SN-0042"),
        reconstruction=Reconstruction(method="OSEM", iterations=3, subsets=21, filter="Gaussian 5 mm"),
        series_description="NEMA-like body phantom",
    )
    folder = tmp_path_factory.mktemp("base")
    paths = write_dicom_series(volume, folder, patient_name=PATIENT_PLACEHOLDER, series_number=4)
    return folder, volume, paths


@pytest.fixture
def series_copy(base_series, tmp_path) -> tuple[Path, Volume, list[Path]]:
    folder, volume, paths = base_series
    target = tmp_path / "series"
    shutil.copytree(folder, target)
    return target, volume, [target / p.name for p in paths]


# ----------------------------------------------------------------------------- round trips
def test_round_trip_values_geometry_and_metadata(base_series):
    folder, volume, paths = base_series
    loaded = load_dicom(folder)
    slopes = _slopes(paths)
    # values within half a quantisation step of each slice (int16 with per-slice Rescale Slope)
    _assert_within_quantisation(loaded, volume)
    assert np.all(loaded.data[3] == 0.0)
    # the slope is chosen so the slice maximum maps near 32767
    assert np.allclose(volume.data.reshape(SHAPE[0], -1).max(axis=1)[slopes != 1] / slopes[slopes != 1], 32767, atol=1)
    np.testing.assert_allclose(loaded.affine, volume.affine, atol=1e-9)
    assert loaded.frame == "LPS"
    assert loaded.acquired_at == SCAN_TIME
    assert loaded.acquired_at.utcoffset() == timedelta(hours=1)
    assert loaded.nuclide == "F-18"
    assert loaded.original_units == "BQML"
    assert loaded.decay_correction == "START"
    assert loaded.series_number == 4
    assert loaded.series_description == "NEMA-like body phantom"
    assert loaded.scanner == Scanner("Invented Medical", "Model Z9", "STATION-7", "SN-0042")
    rec = loaded.reconstruction
    assert (rec.method, rec.iterations, rec.subsets, rec.filter) == ("OSEM", 3, 21, "Gaussian 5 mm")
    assert rec.matrix == (32, 32, 20)
    assert rec.voxel_size_mm == pytest.approx((2.0, 2.5, 3.27))
    headers = [pydicom.dcmread(p, stop_before_pixels=True) for p in paths]
    assert loaded.sop_instance_uids == tuple(h.SOPInstanceUID for h in headers)
    assert loaded.frame_of_reference_uid == headers[0].FrameOfReferenceUID
    assert loaded.study_uid == headers[0].StudyInstanceUID
    assert loaded.series_uid == headers[0].SeriesInstanceUID


def test_no_patient_identity_survives(base_series):
    folder, _, paths = base_series
    assert str(pydicom.dcmread(paths[0]).PatientName) == PATIENT_PLACEHOLDER  # it is in the files
    loaded = load_dicom(folder)
    text = json.dumps(loaded.summary())
    assert "Invented^Placeholder" not in text and "Placeholder" not in text
    fields = {k: v for k, v in vars(loaded).items() if k != "data"}
    assert "Placeholder" not in repr(fields)
    assert "PHANTOM-QC" not in repr(fields)  # the patient ID placeholder


def test_every_file_is_valid_pet_image_storage(base_series):
    _, _, paths = base_series
    sop_uids = set()
    for k, path in enumerate(paths):
        ds = pydicom.dcmread(path)  # raises if not a DICOM Part 10 file
        assert ds.file_meta.MediaStorageSOPClassUID == PositronEmissionTomographyImageStorage
        assert ds.SOPClassUID == PositronEmissionTomographyImageStorage
        assert ds.Modality == "PT" and ds.Units == "BQML" and ds.DecayCorrection == "START"
        assert ds.pixel_array.shape == (32, 32) and ds.pixel_array.dtype == np.int16
        assert ds.ImageIndex == k + 1 and ds.NumberOfSlices == SHAPE[0]
        assert ds.TimezoneOffsetFromUTC == "+0100"
        item = ds.RadiopharmaceuticalInformationSequence[0]
        assert item.RadionuclideCodeSequence[0].CodeMeaning == "^18^Fluorine"
        assert float(item.RadionuclideHalfLife) == pytest.approx(F18_HALF_LIFE_S)
        for uid in (ds.SOPInstanceUID, ds.SeriesInstanceUID, ds.StudyInstanceUID, ds.FrameOfReferenceUID):
            assert UID(uid).is_valid
        sop_uids.add(ds.SOPInstanceUID)
    assert len(sop_uids) == len(paths)


def test_oblique_orientation_and_shuffled_files(tmp_path):
    volume = _volume(_oblique_affine())
    paths = write_dicom_series(volume, tmp_path / "written")
    shuffled = tmp_path / "shuffled"
    shuffled.mkdir()
    names = [f"x{n:03d}.dcm" for n in range(len(paths))]
    random.Random(3).shuffle(names)
    for path, name in zip(paths, names):
        shutil.copy(path, shuffled / name)
    loaded = load_dicom(shuffled)
    np.testing.assert_allclose(loaded.affine, volume.affine, atol=1e-9)
    _assert_within_quantisation(loaded, volume)
    # the first slice position is the written origin and every voxel lands where it was
    first = pydicom.dcmread(paths[0], stop_before_pixels=True)
    np.testing.assert_allclose(loaded.index_to_world([0, 0, 0]), [float(v) for v in first.ImagePositionPatient])
    np.testing.assert_allclose(loaded.index_to_world([7, 3, 5]), volume.index_to_world([7, 3, 5]), atol=1e-9)


def test_slices_written_against_the_normal_are_reordered(tmp_path):
    # slice index increasing towards -normal: the loader orders along +normal, so the stack flips
    affine = affine_from_axes([0.0, 0.0, 50.0], [1, 0, 0], [0, 1, 0], [0, 0, -1], (2.0, 2.0, 4.0))
    volume = _volume(affine)
    write_dicom_series(volume, tmp_path)
    loaded = load_dicom(tmp_path)
    assert np.allclose(loaded.affine[:3, 2], [0, 0, 4.0])
    assert loaded.index_to_world([0, 0, 0])[2] == pytest.approx(50.0 - 4.0 * 19)
    point = volume.index_to_world([2, 5, 6])
    k, j, i = np.rint(loaded.world_to_index(point)).astype(int)
    assert (k, j, i) == (17, 5, 6)
    assert loaded.data[k, j, i] == pytest.approx(volume.data[2, 5, 6], abs=2.0)


def test_ras_volume_is_written_in_lps(tmp_path):
    ras_affine = affine_from_axes([10.0, 20.0, -5.0], [1, 0, 0], [0, 1, 0], [0, 0, 1], (2.0, 2.0, 2.0))
    volume = _volume(ras_affine, frame="RAS")
    write_dicom_series(volume, tmp_path)
    loaded = load_dicom(tmp_path)
    # RAS -> LPS negates x and y (DICOM PS3.3 C.7.6.2 patient coordinates; NIfTI RAS+, common practice)
    np.testing.assert_allclose(loaded.affine, np.diag([-1.0, -1.0, 1.0, 1.0]) @ ras_affine, atol=1e-9)


def test_rle_compressed_round_trip(tmp_path, base_series):
    folder, volume, _ = base_series
    paths = write_dicom_series(volume, tmp_path, transfer_syntax=RLELossless)
    assert all(pydicom.dcmread(p).file_meta.TransferSyntaxUID == RLELossless for p in paths)
    compressed = load_dicom(tmp_path)
    plain = load_dicom(folder)
    np.testing.assert_array_equal(compressed.data, plain.data)  # RLE is lossless (PS3.5 Annex G)
    np.testing.assert_allclose(compressed.affine, plain.affine)


def test_missing_decoder_names_the_extra(series_copy, monkeypatch):
    from types import SimpleNamespace

    from pydicom.encaps import encapsulate
    from pydicom.pixels import get_decoder

    import phantometry.io.dicom as dicom_module

    if get_decoder(JPEGLSLossless).is_available:
        # a JPEG-LS plugin is installed in this environment: pretend it is not
        monkeypatch.setattr(dicom_module, "get_decoder", lambda ts: SimpleNamespace(is_available=False))
    folder, _, paths = series_copy

    def to_jpegls(ds, k):
        ds.PixelData = encapsulate([b"\xff\xd8not-really-jpeg-ls\xff\xd9"])
        ds["PixelData"].VR = "OB"
        ds.file_meta.TransferSyntaxUID = JPEGLSLossless

    _edit(paths, to_jpegls)
    with pytest.raises(UnsupportedSeries, match=r"pip install phantometry\[compressed\]"):
        load_dicom(folder)


# ----------------------------------------------------------------------------- units
def test_gml_round_trip(tmp_path, base_series):
    _, volume, _ = base_series
    injection = SCAN_TIME - timedelta(minutes=75)
    paths = write_dicom_series(
        volume, tmp_path, units="GML", patient_weight_kg=72.5, injected_dose_bq=3.1e8, injection_time=injection
    )
    # the stored SUV of one voxel: SUVbw = C * W[g] / (D * 2^(-dt/T)) (QIBA vendor-neutral SUV pseudo-code)
    ds = pydicom.dcmread(paths[5])
    stored_suv = ds.pixel_array[12, 14] * float(ds.RescaleSlope)
    decayed = 3.1e8 * 2.0 ** (-75 * 60 / F18_HALF_LIFE_S)
    assert stored_suv == pytest.approx(volume.data[5, 12, 14] * 72500.0 / decayed, rel=1e-4)
    loaded = load_dicom(tmp_path)
    assert loaded.original_units == "GML"
    _assert_within_quantisation(loaded, volume)


def _hand_worked_suv_files(folder: Path, paths, **edits) -> None:
    """Rewrite the series as SUVbw = 1.891891... everywhere with the header of the worked example."""
    suv = 5000.0 * 70000.0 / 185e6

    def change(ds, k):
        ds.Units = "GML"
        ds.PatientWeight = "70"
        item = ds.RadiopharmaceuticalInformationSequence[0]
        item.RadionuclideTotalDose = "370000000"
        item.RadionuclideHalfLife = "6586.2"
        injection = edits.get("injection", SCAN_TIME - timedelta(seconds=6586.2))
        item.RadiopharmaceuticalStartDateTime = injection.strftime("%Y%m%d%H%M%S.%f")
        item.RadiopharmaceuticalStartTime = injection.strftime("%H%M%S.%f")
        ds.PixelData = np.full((32, 32), 30000, dtype="<i2").tobytes()
        ds.RescaleSlope = pydicom.valuerep.format_number_as_ds(suv / 30000.0)
        for name, value in edits.items():
            if name == "injection":
                continue
            if value is None:
                if name in ds:
                    delattr(ds, name)
                elif name in item:
                    delattr(item, name)
            else:
                setattr(ds, name, value)

    _edit(paths, change)


def test_hand_worked_suv_example(series_copy):
    # Worked example (SUVbw = C[Bq/mL] x W[g] / decayed dose[Bq], QIBA vendor-neutral SUV
    # pseudo-code / common practice): 370 MBq of F-18 injected exactly one header half-life
    # (6586.2 s) before the series time decays to 370e6 x 2^-1 = 185e6 Bq; a 70 kg (70 000 g)
    # phantom "patient" with C = 5000 Bq/mL gives SUVbw = 5000 x 70000 / 185e6 = 1.891891...
    # Loading the SUV series must give back C = 1.891891 x 185e6 / 70000 = 5000 Bq/mL.
    folder, _, paths = series_copy
    _hand_worked_suv_files(folder, paths)
    loaded = load_dicom(folder)
    np.testing.assert_allclose(loaded.data, 5000.0, rtol=1e-9)
    assert loaded.acquired_at == SCAN_TIME


def test_suv_injection_before_midnight_uses_previous_day(tmp_path, base_series):
    # Series at 00:30; only Radiopharmaceutical Start Time 22:40:13.8 is given (one half-life
    # earlier, on the previous day). QIBA pseudo-code: start date assumed = series date, so a
    # start time later than the scan time means the injection was the day before.
    _, volume, _ = base_series
    night = datetime(2031, 5, 15, 0, 30, 0, tzinfo=TZ)
    folder = tmp_path / "night"
    paths = write_dicom_series(volume.with_data(volume.data), folder)
    _edit(paths, lambda ds, k: (setattr(ds, "SeriesDate", "20310515"), setattr(ds, "SeriesTime", "003000"),
                                setattr(ds, "AcquisitionDate", "20310515"), setattr(ds, "AcquisitionTime", "003000")))
    _hand_worked_suv_files(folder, paths, injection=night - timedelta(seconds=6586.2),
                           RadiopharmaceuticalStartDateTime=None)
    loaded = load_dicom(folder)
    np.testing.assert_allclose(loaded.data, 5000.0, rtol=1e-6)
    assert loaded.acquired_at == night


def test_suv_series_time_after_acquisition_uses_acquisition_time(series_copy):
    # QIBA pseudo-code: when Series Date/Time is after Acquisition Date/Time (series re-created
    # later), the earliest Acquisition Date/Time is the scan time. The series time is set one
    # hour late; the answer must still be the worked 5000 Bq/mL.
    folder, _, paths = series_copy
    _hand_worked_suv_files(folder, paths, SeriesTime="111500")
    loaded = load_dicom(folder)
    np.testing.assert_allclose(loaded.data, 5000.0, rtol=1e-6)
    assert loaded.acquired_at == SCAN_TIME


def test_suv_admin_decay_correction_does_not_decay_the_dose(series_copy):
    # DecayCorrection ADMIN: values refer to the injection time, so D is not decayed:
    # C = 1.891891 x 370e6 / 70000 = 10000 Bq/mL, and acquired_at is the injection time.
    folder, _, paths = series_copy
    _hand_worked_suv_files(folder, paths, DecayCorrection="ADMIN")
    loaded = load_dicom(folder)
    np.testing.assert_allclose(loaded.data, 10000.0, rtol=1e-9)
    assert loaded.acquired_at == SCAN_TIME - timedelta(seconds=6586.2)


def test_suv_not_decay_corrected_uses_each_slice_time(series_copy):
    # DecayCorrection NONE: each slice's SUV refers to its own Acquisition Time (frame start)
    # and is a frame average. Slice k is set k minutes after the series time, so its dose has
    # decayed one half-life plus 60k s more: its frame average is
    # C_k = 5000 x 2^(-60 k / 6586.2) Bq/mL (same worked numbers as above). Referred to
    # t_ref = t_0 + Delta (Delta: the moment whose activity equals the frame mean,
    # exp(-lambda Delta) = f = (1 - exp(-lambda T)) / (lambda T), T = ActualFrameDuration):
    # C_k x exp(-lambda (t_ref - t_k)) / f = 5000 x 2^(-60k/T_half) x 2^((60k - Delta)/T_half) / f
    # = 5000 for every slice, and acquired_at = t_ref.
    folder, _, paths = series_copy
    _hand_worked_suv_files(folder, paths, DecayCorrection="NONE")
    _edit(paths, lambda ds, k: setattr(ds, "AcquisitionTime", (SCAN_TIME + timedelta(minutes=k)).strftime("%H%M%S")))
    loaded = load_dicom(folder)
    np.testing.assert_allclose(loaded.data.mean(axis=(1, 2)), 5000.0, rtol=1e-6)
    lam = math.log(2) / 6586.2
    t_frame = float(pydicom.dcmread(paths[0]).ActualFrameDuration) / 1000.0
    f = (1 - math.exp(-lam * t_frame)) / (lam * t_frame)
    delta = -math.log(f) / lam
    assert abs((loaded.acquired_at - (SCAN_TIME + timedelta(seconds=delta))).total_seconds()) < 1e-3
    assert loaded.scan_start == SCAN_TIME and loaded.frame_duration_s == t_frame
    assert "frame-average" in loaded.decay_reference


@pytest.mark.parametrize(
    "removed, named",
    [
        ("PatientWeight", "PatientWeight"),
        ("RadionuclideTotalDose", "RadionuclideTotalDose"),
        ("RadiopharmaceuticalStartDateTime+Time", "RadiopharmaceuticalStartDateTime"),
        ("RadionuclideHalfLife+code", "RadionuclideHalfLife"),
    ],
)
def test_suv_without_needed_attribute_is_refused(series_copy, removed, named):
    folder, _, paths = series_copy
    edits = {}
    if removed == "RadiopharmaceuticalStartDateTime+Time":
        edits = {"RadiopharmaceuticalStartDateTime": None, "RadiopharmaceuticalStartTime": None}
    elif removed == "RadionuclideHalfLife+code":
        edits = {"RadionuclideHalfLife": None, "RadionuclideCodeSequence": None}
    else:
        edits = {removed: None}
    _hand_worked_suv_files(folder, paths, **edits)
    with pytest.raises(UnitsError, match=named):
        load_dicom(folder)


def test_suv_injection_after_scan_refused(series_copy):
    folder, _, paths = series_copy
    _hand_worked_suv_files(folder, paths, injection=SCAN_TIME + timedelta(minutes=5))
    with pytest.raises(UnitsError, match="is after the scan time"):
        load_dicom(folder)


def test_cnts_with_and_without_calibration_factor(tmp_path, base_series):
    _, volume, _ = base_series
    write_dicom_series(volume, tmp_path, units="CNTS", calibration_counts_per_bq_ml=2.5)
    with pytest.raises(UnitsError, match="calibration_factor"):
        load_dicom(tmp_path)
    loaded = load_dicom(tmp_path, calibration_factor=0.4)  # Bq/mL per count = 1 / 2.5
    _assert_within_quantisation(loaded, volume)
    assert loaded.original_units == "CNTS"


def test_calibration_factor_refused_for_bqml(base_series):
    with pytest.raises(UnitsError, match="CNTS series only"):
        load_dicom(base_series[0], calibration_factor=2.0)


def test_unknown_units_refused_by_name(series_copy):
    folder, _, paths = series_copy
    _edit(paths, lambda ds, k: setattr(ds, "Units", "PROPCNTS"))
    with pytest.raises(UnitsError, match="PROPCNTS"):
        load_dicom(folder)


def test_nuclide_from_half_life_when_no_code(tmp_path):
    volume = _volume(nuclide="Ga-68")
    paths = write_dicom_series(volume, tmp_path)
    assert len(pydicom.dcmread(paths[0]).RadiopharmaceuticalInformationSequence[0].RadionuclideCodeSequence) == 0
    assert load_dicom(tmp_path).nuclide == "Ga-68"


# ----------------------------------------------------------------------------- times
def test_timezone_offset_is_applied(tmp_path):
    eastern = timezone(timedelta(hours=-5))
    volume = _volume(acquired_at=datetime(2031, 1, 2, 8, 0, tzinfo=eastern))
    write_dicom_series(volume, tmp_path)
    loaded = load_dicom(tmp_path)
    assert loaded.acquired_at.utcoffset() == timedelta(hours=-5)
    assert loaded.acquired_at == datetime(2031, 1, 2, 13, 0, tzinfo=timezone.utc)


def test_missing_timezone_without_site_zone_is_unresolved_and_warns(series_copy):
    # no offset and no site zone: the scanner's wall clock, held (as UTC) until a zone is known,
    # shown without an offset and never called UTC
    folder, _, paths = series_copy
    _edit(paths, lambda ds, k: delattr(ds, "TimezoneOffsetFromUTC"))
    assert discover_series(folder)[0].time_zone_assumed
    with pytest.warns(TimeZoneAssumedWarning, match="wall clock"):
        loaded = load_dicom(folder)
    assert loaded.time_basis == "unresolved"
    assert loaded.acquired_at.replace(tzinfo=None) == SCAN_TIME.replace(tzinfo=None)
    assert loaded.summary()["acquired_at"] == SCAN_TIME.replace(tzinfo=None).isoformat()


def test_missing_timezone_read_in_the_site_zone(series_copy):
    # the same series read with a site zone: Europe/Berlin is +01:00 on the (invented) scan date
    from zoneinfo import ZoneInfo

    from phantometry.sitetime import SiteClock

    folder, _, paths = series_copy
    _edit(paths, lambda ds, k: delattr(ds, "TimezoneOffsetFromUTC"))
    clock = SiteClock(ZoneInfo("Europe/Berlin"), "given zone", "Europe/Berlin (--timezone)")
    loaded = load_dicom(folder, site_clock=clock)
    assert loaded.time_basis == "given zone" and loaded.time_zone == "Europe/Berlin (--timezone)"
    assert loaded.acquired_at.replace(tzinfo=None) == SCAN_TIME.replace(tzinfo=None)
    assert loaded.acquired_at.utcoffset() == ZoneInfo("Europe/Berlin").utcoffset(SCAN_TIME.replace(tzinfo=None))


def test_radiopharmaceutical_datetime_with_own_offset(series_copy):
    # A DT with its own &ZZXX suffix (PS3.5 DT) wins over Timezone Offset From UTC:
    # 09:15:00+0000 is 10:15:00+0100 = the series time, so there is no decay: C = SUV x D / W.
    folder, _, paths = series_copy
    _hand_worked_suv_files(folder, paths)
    _edit(paths, lambda ds, k: setattr(ds.RadiopharmaceuticalInformationSequence[0],
                                       "RadiopharmaceuticalStartDateTime", "20310514091500+0000"))
    loaded = load_dicom(folder)
    np.testing.assert_allclose(loaded.data, 10000.0, rtol=1e-9)


def test_parse_iterations_subsets():
    assert parse_iterations_subsets("OSEM 3i21s") == ("OSEM", 3, 21)
    assert parse_iterations_subsets("OSEM3D 4i16s PSF") == ("OSEM3D PSF", 4, 16)
    assert parse_iterations_subsets("3 iterations 21 subsets") == (None, 3, 21)
    assert parse_iterations_subsets("BLOB-OS-TF, 2 iterations, 8 subsets") == ("BLOB-OS-TF", 2, 8)
    assert parse_iterations_subsets("FBP") == ("FBP", None, None)
    assert parse_iterations_subsets(None) == (None, None, None)


# ----------------------------------------------------------------------------- series choice
def test_empty_folder_and_missing_path(tmp_path):
    with pytest.raises(NoPETSeries, match=str(tmp_path)):
        load_dicom(tmp_path)
    with pytest.raises(InputError, match="no such file"):
        load_dicom(tmp_path / "absent")


def test_non_dicom_files_are_skipped(series_copy):
    folder, volume, _ = series_copy
    (folder / "README.txt").write_text("invented notes")
    (folder / "junk.bin").write_bytes(bytes(range(256)) * 4)
    (folder / "sub").mkdir()
    (folder / "sub" / "empty").write_bytes(b"")
    assert load_dicom(folder).shape == volume.shape


def test_non_pet_series_refused(series_copy):
    folder, _, paths = series_copy
    _edit(paths, lambda ds, k: setattr(ds, "Modality", "CT"))
    with pytest.raises(NoPETSeries, match=r"1 CT"):
        load_dicom(folder)
    with pytest.raises(UnsupportedSeries, match=r"modality CT, not PET"):
        load_dicom(folder, series=4)


def test_several_series_need_a_choice(tmp_path, base_series):
    _, volume, _ = base_series
    write_dicom_series(volume, tmp_path / "a", series_uid="2.25.1111", series_number=3, series_description="first")
    write_dicom_series(volume.with_data(volume.data * 2), tmp_path / "b", series_uid="2.25.2222", series_number=7,
                       series_description="second")
    infos = discover_series(tmp_path)
    assert [(i.series_uid, i.series_number, i.series_description, i.modality, i.file_count) for i in infos] == [
        ("2.25.1111", 3, "first", "PT", 20),
        ("2.25.2222", 7, "second", "PT", 20),
    ]
    with pytest.raises(AmbiguousSeries) as err:
        load_dicom(tmp_path)
    for text in ("2.25.1111", "2.25.2222", "#3", "#7", "'first'", "'second'"):
        assert text in str(err.value)
    doubled = load_dicom(tmp_path, series=7)
    assert doubled.series_uid == "2.25.2222"
    assert load_dicom(tmp_path, series="3").series_uid == "2.25.1111"
    assert load_dicom(tmp_path, series="2.25.22").series_number == 7  # UID prefix
    assert load_dicom([tmp_path / "a", tmp_path / "b"], series="2.25.1111").series_number == 3
    with pytest.raises(AmbiguousSeries, match="2.25."):
        load_dicom(tmp_path, series="2.25.")
    with pytest.raises(NoPETSeries, match="no series matches"):
        load_dicom(tmp_path, series="9.9.9")
    with pytest.raises(NoPETSeries, match="no series matches '2'"):
        load_dicom(tmp_path, series=2)  # a number is never taken as a UID prefix


# ----------------------------------------------------------------------------- geometry refusals
def test_missing_middle_slice(series_copy):
    folder, _, paths = series_copy
    paths[9].unlink()
    with pytest.raises(GeometryError, match=r"1 slice\(s\) missing.*between positions -34\.090 and -27\.550"):
        load_dicom(folder)


def test_missing_end_slice_caught_by_number_of_slices(series_copy):
    folder, _, paths = series_copy
    paths[-1].unlink()
    with pytest.raises(GeometryError, match="NumberOfSlices is 20"):
        load_dicom(folder)


def test_duplicate_positions(series_copy):
    folder, _, paths = series_copy
    ds = pydicom.dcmread(paths[4])
    ds.SOPInstanceUID = pydicom.uid.generate_uid()
    ds.save_as(folder / "copy_of_slice_5.dcm")
    with pytest.raises(GeometryError, match=r"duplicated slice position.*-47\.170"):
        load_dicom(folder)


def test_non_uniform_spacing(series_copy):
    folder, _, paths = series_copy

    def shift(ds, k):
        if k >= 12:
            x, y, z = (float(v) for v in ds.ImagePositionPatient)
            ds.ImagePositionPatient = [x, y, z + 0.3]  # 9 % of the 3.27 mm spacing

    _edit(paths, shift)
    with pytest.raises(GeometryError, match=r"non-uniform slice spacing: 3\.5700 mm"):
        load_dicom(folder)


def test_truncated_pixel_data(series_copy):
    folder, _, paths = series_copy
    data = paths[6].read_bytes()
    paths[6].write_bytes(data[:-500])
    with pytest.raises(InputError, match=rf"{paths[6].name}.*truncated"):
        load_dicom(folder)


def test_truncated_header(series_copy):
    folder, _, paths = series_copy
    data = paths[6].read_bytes()
    paths[6].write_bytes(data[:700])
    with pytest.raises(InputError, match=rf"{paths[6].name}: damaged DICOM file"):
        load_dicom(folder)


def test_multiframe_refused(series_copy):
    folder, _, paths = series_copy
    _edit(paths, lambda ds, k: setattr(ds, "NumberOfFrames", 2))
    with pytest.raises(UnsupportedSeries, match="multi-frame"):
        load_dicom(folder)


def test_writer_refuses_gml_without_dose(tmp_path, base_series):
    with pytest.raises(UnitsError, match="injected_dose_bq"):
        write_dicom_series(base_series[1], tmp_path, units="GML", patient_weight_kg=70,
                           injection_time=SCAN_TIME - timedelta(hours=1))


def test_loader_warns_nothing_for_complete_series(base_series):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        load_dicom(base_series[0])


# ----------------------------------------------------------------------------- header claims and decay
def _set_half_life(value: str):
    def change(ds, k):
        ds.RadiopharmaceuticalInformationSequence[0].RadionuclideHalfLife = value

    return change


def test_half_life_differing_from_the_table_uses_the_table_and_warns(series_copy):
    folder, volume, paths = series_copy
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _edit(paths, _set_half_life(f"{F18_HALF_LIFE_S * 1.02:.1f}"))  # 2 % off the F-18 table value
    loaded = load_dicom(folder)
    assert loaded.nuclide == "F-18"
    assert len(loaded.warnings) == 1
    assert "differs from the F-18 half-life 6586.2 s" in loaded.warnings[0] and "by 2.0 %" in loaded.warnings[0]
    # within 1 % nothing is said
    _edit(paths, _set_half_life(f"{F18_HALF_LIFE_S * 1.005:.1f}"))
    assert load_dicom(folder).warnings == ()


@pytest.mark.parametrize("value", ["-6586.2", "0", "nan"])
def test_non_positive_or_non_finite_half_life_refused(series_copy, value):
    folder, volume, paths = series_copy
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _edit(paths, _set_half_life(value))
    with pytest.raises(InputError, match="RadionuclideHalfLife") as info:
        load_dicom(folder)
    assert str(paths[0].parent) in str(info.value)


@pytest.mark.parametrize("value", [None, "LATER"])
def test_bqml_series_must_state_its_decay_correction(series_copy, value):
    folder, volume, paths = series_copy

    def change(ds, k):
        if value is None:
            del ds.DecayCorrection
        else:
            ds.DecayCorrection = value

    _edit(paths, change)
    with pytest.raises(UnitsError) as info:
        load_dicom(folder)
    assert "DecayCorrection (0054,1102)" in str(info.value) and "NONE, START, ADMIN" in str(info.value)


def test_pixel_data_shorter_than_claimed_refused_before_allocating(series_copy, monkeypatch):
    """Rows x Columns of 16384 on every slice: refused from the file sizes, nothing large allocated."""
    import tracemalloc

    folder, volume, paths = series_copy
    monkeypatch.setenv("PHANTOMETRY_MAX_VOXELS", str(10**11))  # past the cap: the bytes present decide

    def change(ds, k):
        ds.Rows = ds.Columns = 16384

    _edit(paths, change)
    tracemalloc.start()
    try:
        with pytest.raises(InputError, match="claim 536,870,912 bytes of pixel data but the file holds 2,048"):
            load_dicom(folder)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 20 * 2**20  # 20 MB, against 5.4 GB claimed (20 x 16384^2 float32)


def test_voxel_limit_from_the_environment(series_copy, monkeypatch):
    folder, volume, paths = series_copy
    monkeypatch.setenv("PHANTOMETRY_MAX_VOXELS", "20000")  # the series is 32 x 32 x 20 = 20,480
    with pytest.raises(ImageTooLarge, match=r"32 x 32 x 20 = 20,480 voxels, more than the limit of 20,000"):
        load_dicom(folder)
    monkeypatch.setenv("PHANTOMETRY_MAX_VOXELS", "20480")
    assert load_dicom(folder).shape == SHAPE
    monkeypatch.setenv("PHANTOMETRY_MAX_VOXELS", "-1")
    with pytest.raises(InputError, match=r"\$PHANTOMETRY_MAX_VOXELS is '-1'"):
        load_dicom(folder)


@pytest.mark.parametrize(
    "keyword, value, needle",
    [
        ("ImagePositionPatient", ["nan", "0", "0"], "ImagePositionPatient [nan, 0, 0] holds a number that is not finite"),
        ("PixelSpacing", ["2.5", "inf"], "PixelSpacing [2.5, inf] holds a number that is not finite"),
        ("RescaleIntercept", "nan", "RescaleIntercept 'nan' is not a finite number"),
        ("RescaleSlope", "0", "RescaleSlope (0028,1053) is 0"),
    ],
)
def test_non_finite_geometry_and_scaling_refused(series_copy, keyword, value, needle):
    folder, volume, paths = series_copy
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _edit(paths[4:5], lambda ds, k: setattr(ds, keyword, value))
    with pytest.raises(InputError) as info:
        load_dicom(folder)
    assert needle in str(info.value) and str(paths[4]) in str(info.value)
    assert "np.float64" not in str(info.value)


def test_unknown_transfer_syntax_refused(series_copy):
    folder, volume, paths = series_copy
    _edit(paths[:1], lambda ds, k: setattr(ds.file_meta, "TransferSyntaxUID", "1.2.3.4.5"))
    with pytest.raises(UnsupportedSeries, match=r"Transfer Syntax UID '1\.2\.3\.4\.5' is not a standard DICOM transfer syntax"):
        load_dicom(folder)
