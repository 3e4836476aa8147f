"""Tests of the NIfTI loader/writer (phantometry.io.nifti).

Geometry is checked against nibabel's own ``apply_affine`` (reference library), the scaling
against the NIfTI-1 rule value = stored x scl_slope + scl_inter (NIfTI-1 header standard),
the sidecar against the BIDS-PET key definitions (BIDS specification, PET modality). Scanner
names, sites and dates are invented.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta, timezone

import nibabel as nib
import numpy as np
import pytest

from phantometry.errors import InputError, UnitsError, UnsupportedSeries
from phantometry.io.nifti import SidecarTimeWarning, load_nifti, sidecar_path, write_nifti
from phantometry.volume import Reconstruction, Scanner, Volume

CET = timezone(timedelta(hours=1))
SCAN = datetime(2026, 11, 3, 10, 30, tzinfo=CET)
SHAPE_ZYX = (5, 6, 7)  # all different, so a wrong transpose cannot pass


def _oblique_affine() -> np.ndarray:
    """A rotated, anisotropic index -> world affine (columns: i, j, k voxel steps in mm)."""
    angle = np.deg2rad(20.0)
    rot = np.array([[np.cos(angle), -np.sin(angle), 0.0], [np.sin(angle), np.cos(angle), 0.0], [0.0, 0.0, 1.0]])
    a = np.eye(4)
    a[:3, :3] = rot @ np.diag([2.0, 2.5, 3.27])
    a[:3, 3] = [-101.5, 33.25, -40.0]
    return a


def _volume(frame: str = "LPS", **kw) -> Volume:
    rng = np.random.default_rng(7)
    data = rng.uniform(0.0, 30000.0, SHAPE_ZYX).astype(np.float32)
    defaults = dict(
        acquired_at=SCAN,
        nuclide="F-18",
        decay_correction="START",
        scanner=Scanner(manufacturer="Demo Imaging", model="DemoPET 600"),
        reconstruction=Reconstruction(method="OSEM", iterations=3, subsets=21, filter="Gaussian 5 mm"),
    )
    defaults.update(kw)
    return Volume(data=data, affine=_oblique_affine(), frame=frame, **defaults)


def _write_raw(tmp_path, data_ijk, affine, meta=None, name="raw.nii.gz", slope=None, inter=None):
    img = nib.Nifti1Image(data_ijk, affine)
    if slope is not None:
        img.header.set_slope_inter(slope, inter)
    path = tmp_path / name
    nib.save(img, str(path))
    if meta is not None:
        sidecar_path(path).write_text(json.dumps(meta), encoding="utf-8")
    return path


# ---------------------------------------------------------------------------- loading
def test_axes_scaling_and_affine_against_nibabel(tmp_path):
    ni, nj, nk = 7, 6, 5
    i, j, k = np.meshgrid(np.arange(ni), np.arange(nj), np.arange(nk), indexing="ij")
    stored = (i + 10 * j + 100 * k).astype(np.int16)  # value encodes its own (i, j, k)
    affine = _oblique_affine()
    path = _write_raw(tmp_path, stored, affine, {"Units": "Bq/mL"}, slope=2.5, inter=10.0)
    vol = load_nifti(path)
    assert vol.frame == "RAS" and vol.shape == (nk, nj, ni) and vol.data.dtype == np.float32
    # NIfTI-1: value = stored * scl_slope + scl_inter, at data[k, j, i]
    expected_kji = np.transpose(stored.astype(np.float64) * 2.5 + 10.0, (2, 1, 0))
    np.testing.assert_array_equal(vol.data, expected_kji.astype(np.float32))
    assert vol.data[4, 3, 2] == (2 + 30 + 400) * 2.5 + 10.0
    # world positions: our (k, j, i) order against nibabel.affines.apply_affine on (i, j, k)
    ijk = np.array([[0, 0, 0], [6, 5, 4], [2.5, 1.0, 3.75], [3, 0, 1]])
    np.testing.assert_allclose(vol.index_to_world(ijk[:, ::-1]), nib.affines.apply_affine(affine, ijk), atol=1e-9)
    np.testing.assert_allclose(vol.affine, affine, atol=1e-6)
    assert vol.reconstruction.matrix == (6, 7, 5)  # rows, columns, slices
    np.testing.assert_allclose(vol.reconstruction.voxel_size_mm, (2.0, 2.5, 3.27), rtol=1e-6)
    np.testing.assert_allclose(vol.spacing_mm, (3.27, 2.5, 2.0), rtol=1e-6)


@pytest.mark.parametrize("units, factor", [("Bq/mL", 1.0), ("kBq/mL", 1e3), ("MBq/mL", 1e6), ("BQML", 1.0), ("kbq/ml", 1e3)])
def test_activity_units_scaled_to_bq_ml(tmp_path, units, factor):
    stored = np.full((7, 6, 5), 5.3, dtype=np.float32)
    vol = load_nifti(_write_raw(tmp_path, stored, np.eye(4), {"Units": units}))
    np.testing.assert_allclose(vol.data, 5.3 * factor, rtol=1e-6)


def test_counts_need_a_calibration_factor(tmp_path):
    stored = np.full((7, 6, 5), 200.0, dtype=np.float32)
    path = _write_raw(tmp_path, stored, np.eye(4), {"Units": "counts"})
    np.testing.assert_allclose(load_nifti(path, calibration_factor=26.5).data, 5300.0, rtol=1e-6)
    with pytest.raises(UnitsError, match="calibration factor"):
        load_nifti(path)
    with pytest.raises(UnitsError, match="counts only"):
        load_nifti(path, units="Bq/mL", calibration_factor=26.5)


def test_missing_units_refused(tmp_path):
    stored = np.ones((7, 6, 5), dtype=np.float32)
    bare = _write_raw(tmp_path, stored, np.eye(4), None, name="bare.nii.gz")
    with pytest.raises(UnitsError) as info:
        load_nifti(bare)
    msg = str(info.value)
    assert str(bare) in msg and "--units" in msg and "Units" in msg and "bare.json" in msg
    no_units = _write_raw(tmp_path, stored, np.eye(4), {"TracerRadionuclide": "F18"}, name="no_units.nii")
    with pytest.raises(UnitsError, match="--units"):
        load_nifti(no_units)


@pytest.mark.parametrize("units", ["SUV", "g/ml", "Bq"])
def test_unknown_units_refused_by_name(tmp_path, units):
    path = _write_raw(tmp_path, np.ones((7, 6, 5), dtype=np.float32), np.eye(4), {"Units": units})
    with pytest.raises(UnitsError, match=f"Units '{units}' cannot be converted"):
        load_nifti(path)


def test_four_d_refused_single_frame_accepted(tmp_path):
    frames = np.ones((7, 6, 5, 3), dtype=np.float32)
    path = _write_raw(tmp_path, frames, np.eye(4), {"Units": "Bq/mL"}, name="dyn.nii.gz")
    with pytest.raises(UnsupportedSeries, match="3 frames"):
        load_nifti(path)
    one = np.arange(7 * 6 * 5, dtype=np.float32).reshape(7, 6, 5, 1)
    vol = load_nifti(_write_raw(tmp_path, one, np.eye(4), {"Units": "Bq/mL"}, name="one.nii.gz"))
    np.testing.assert_array_equal(vol.data, one[..., 0].transpose(2, 1, 0))


def test_flags_override_sidecar(tmp_path):
    meta = {
        "Units": "kBq/mL",
        "TracerRadionuclide": "Ga68",
        "AcquisitionDateTime": "2026-11-03T10:30:00+01:00",
        "ScanStart": 0,
        "TimeZero": "10:30:00",
    }
    stored = np.full((7, 6, 5), 4.0, dtype=np.float32)
    path = _write_raw(tmp_path, stored, np.eye(4), meta)
    from_sidecar = load_nifti(path)
    assert from_sidecar.nuclide == "Ga-68" and from_sidecar.acquired_at == SCAN
    np.testing.assert_allclose(from_sidecar.data, 4000.0)
    other_time = datetime(2026, 11, 4, 8, 0, tzinfo=timezone.utc)
    flagged = load_nifti(path, units="Bq/mL", nuclide="F-18", acquired_at=other_time)
    np.testing.assert_allclose(flagged.data, 4.0)
    assert flagged.nuclide == "F-18" and flagged.acquired_at == other_time and flagged.original_units == "Bq/mL"
    assert load_nifti(path, acquired_at="2026-11-04T09:00:00+01:00").acquired_at == other_time
    with pytest.raises(InputError, match="no time-zone offset"):
        load_nifti(path, acquired_at="2026-11-04T09:00:00")
    # an explicit sidecar replaces the one beside the image
    elsewhere = tmp_path / "other.json"
    elsewhere.write_text(json.dumps({"Units": "MBq/mL"}), encoding="utf-8")
    np.testing.assert_allclose(load_nifti(path, sidecar=elsewhere).data, 4.0e6)
    with pytest.raises(InputError, match="no such sidecar"):
        load_nifti(path, sidecar=tmp_path / "missing.json")


def test_reference_time_from_bids_times(tmp_path):
    # BIDS-PET: ScanStart, InjectionStart and ImageDecayCorrectionTime are seconds from TimeZero.
    # Scan started 10:00+01:00, one hour after TimeZero (injection); decay corrected to TimeZero.
    meta = {
        "Units": "Bq/mL",
        "TimeZero": "09:00:00",
        "ScanStart": 3600,
        "InjectionStart": 0,
        "ImageDecayCorrected": True,
        "ImageDecayCorrectionTime": 0,
        "AcquisitionDateTime": "2026-11-03T10:00:00+01:00",
    }
    stored = np.ones((7, 6, 5), dtype=np.float32)
    vol = load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="admin.nii.gz"))
    assert vol.acquired_at == datetime(2026, 11, 3, 9, 0, tzinfo=CET) and vol.decay_correction == "ADMIN"
    # corrected to the scan start
    meta.update(ImageDecayCorrectionTime=3600)
    vol = load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="start.nii.gz"))
    assert vol.acquired_at == datetime(2026, 11, 3, 10, 0, tzinfo=CET) and vol.decay_correction == "START"
    # not decay corrected: the values are the frame's mean, which is the activity of the frame
    # start plus Delta, exp(-lambda Delta) = (1 - exp(-lambda T)) / (lambda T) (DICOM / QIBA
    # frame-average semantics); F-18 (109.77 min, EP), T = 600 s
    meta.update(ImageDecayCorrected=False, ImageDecayCorrectionTime=0, FrameDuration=[600], TracerRadionuclide="F-18")
    vol = load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="none.nii.gz"))
    lam = math.log(2) / (109.77 * 60)
    delta = -math.log((1 - math.exp(-lam * 600)) / (lam * 600)) / lam
    assert abs((vol.acquired_at - datetime(2026, 11, 3, 10, 0, tzinfo=CET)).total_seconds() - delta) < 1e-3
    assert 290 < delta < 300 and vol.decay_correction == "NONE" and vol.frame_duration_s == 600
    # without FrameDuration the time the frame mean shows is unknown: refused
    del meta["FrameDuration"]
    with pytest.raises(InputError, match="FrameDuration is missing"):
        load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="none2.nii.gz"))
    meta["FrameDuration"] = 600
    # TimeZero inconsistent with AcquisitionDateTime - ScanStart: warned
    meta.update(TimeZero="08:00:00")
    with pytest.warns(SidecarTimeWarning, match="TimeZero 08:00:00"):
        load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="warn.nii.gz"))
    # a decay-correction time that cannot be placed
    meta = {"Units": "Bq/mL", "ImageDecayCorrected": True, "ImageDecayCorrectionTime": 0,
            "AcquisitionDateTime": "2026-11-03T10:00:00+01:00"}
    with pytest.raises(InputError, match="without ScanStart"):
        load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="noscan.nii.gz"))
    # an AcquisitionDateTime without an offset is the scanner's wall clock: unresolved without a
    # site zone, read in the site's zone with one (daylight-saving aware: +01:00 in November)
    meta = {"Units": "Bq/mL", "AcquisitionDateTime": "2026-11-03T10:00:00"}
    vol = load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="naive.nii.gz"))
    assert vol.time_basis == "unresolved" and vol.summary()["acquired_at"] == "2026-11-03T10:00:00"
    from zoneinfo import ZoneInfo

    from phantometry.sitetime import SiteClock

    clock = SiteClock(ZoneInfo("Europe/Berlin"), "given zone", "Europe/Berlin (--timezone)")
    vol = load_nifti(_write_raw(tmp_path, stored, np.eye(4), meta, name="naive2.nii.gz"), site_clock=clock)
    assert vol.time_basis == "given zone" and vol.acquired_at == datetime(2026, 11, 3, 10, 0, tzinfo=CET)


def test_reconstruction_and_scanner_from_bids_keys(tmp_path):
    meta = {
        "Units": "Bq/mL",
        "ReconMethodName": "3D-OSEM",
        "ReconMethodParameterLabels": ["subsets", "iterations"],
        "ReconMethodParameterUnits": ["none", "none"],
        "ReconMethodParameterValues": [21, 3],
        "ReconFilterType": "Gaussian",
        "ReconFilterSize": 4,
        "Manufacturer": "Demo Imaging",
        "ManufacturersModelName": "DemoPET 600",
        "InjectedRadioactivity": 51.4,
    }
    vol = load_nifti(_write_raw(tmp_path, np.ones((7, 6, 5), np.float32), np.eye(4), meta))
    assert (vol.reconstruction.method, vol.reconstruction.iterations, vol.reconstruction.subsets) == ("3D-OSEM", 3, 21)
    assert vol.reconstruction.filter == "Gaussian 4 mm"
    assert vol.scanner == Scanner(manufacturer="Demo Imaging", model="DemoPET 600")


def test_bad_sidecar_values_refused(tmp_path):
    stored = np.ones((7, 6, 5), np.float32)
    with pytest.raises(InputError, match="TracerRadionuclide: unknown radionuclide 'Tc99m'"):
        load_nifti(_write_raw(tmp_path, stored, np.eye(4), {"Units": "Bq/mL", "TracerRadionuclide": "Tc99m"}, name="a.nii"))
    with pytest.raises(InputError, match="ScanStart is '0', expected a number"):
        load_nifti(_write_raw(tmp_path, stored, np.eye(4), {"Units": "Bq/mL", "ScanStart": "0"}, name="b.nii"))
    path = _write_raw(tmp_path, stored, np.eye(4), None, name="c.nii")
    sidecar_path(path).write_text("{not json", encoding="utf-8")
    with pytest.raises(InputError, match=r"c\.json: not valid JSON"):
        load_nifti(path)
    with pytest.raises(InputError, match="no such NIfTI file"):
        load_nifti(tmp_path / "absent.nii.gz")


# ---------------------------------------------------------------------------- round trip
def test_round_trip_lps_volume(tmp_path):
    vol = _volume("LPS")
    path = write_nifti(vol, tmp_path / "phantom.nii.gz")
    assert path == tmp_path / "phantom.nii.gz" and sidecar_path(path).is_file()
    back = load_nifti(path)
    np.testing.assert_array_equal(back.data, vol.data)  # float32 written with slope 1: exact
    assert back.frame == "RAS"
    # the same voxel is at the same physical point: LPS (x, y, z) = RAS (-x, -y, z)
    idx = np.array([[0, 0, 0], [4, 5, 6], [1.5, 2.25, 3.0], [2, 0, 6]])
    np.testing.assert_allclose(back.index_to_world(idx), vol.index_to_world(idx) * [-1, -1, 1], atol=1e-4)
    np.testing.assert_allclose(back.affine, np.diag([-1.0, -1.0, 1.0, 1.0]) @ vol.affine, atol=1e-5)
    # a physical point maps to the same fractional voxel in both frames
    p_lps = np.array([[-95.0, 40.0, -35.0]])
    np.testing.assert_allclose(back.world_to_index(p_lps * [-1, -1, 1]), vol.world_to_index(p_lps), atol=1e-5)
    # metadata
    assert back.acquired_at == SCAN and back.acquired_at.utcoffset() == timedelta(hours=1)
    assert back.nuclide == "F-18" and back.decay_correction == "START" and back.original_units == "Bq/mL"
    assert back.scanner == vol.scanner
    rec = back.reconstruction
    assert (rec.method, rec.iterations, rec.subsets, rec.filter) == ("OSEM", 3, 21, "Gaussian 5 mm")
    assert rec.matrix == (6, 7, 5)
    np.testing.assert_allclose(rec.voxel_size_mm, (2.0, 2.5, 3.27), rtol=1e-6)
    meta = json.loads(sidecar_path(path).read_text())
    assert meta["Units"] == "Bq/mL" and meta["AcquisitionDateTime"] == "2026-11-03T10:30:00+01:00"
    assert meta["TimeZero"] == "10:30:00" and meta["ScanStart"] == 0 and meta["ImageDecayCorrected"] is True
    assert meta["ReconMethodParameterLabels"] == ["iterations", "subsets"] and meta["ReconMethodParameterValues"] == [3, 21]


def test_round_trip_ras_volume_and_header(tmp_path):
    vol = _volume("RAS", decay_correction="ADMIN")
    path = write_nifti(vol, tmp_path / "ras")  # suffix added
    assert path.name == "ras.nii.gz"
    back = load_nifti(path)
    np.testing.assert_allclose(back.affine, vol.affine, atol=1e-5)
    idx = np.array([[4, 5, 6], [0.5, 0.5, 0.5]])
    np.testing.assert_allclose(back.index_to_world(idx), vol.index_to_world(idx), atol=1e-4)
    assert back.decay_correction == "ADMIN" and back.acquired_at == SCAN
    hdr = nib.load(str(path)).header
    assert int(hdr["sform_code"]) == 1 and int(hdr["qform_code"]) == 1
    assert hdr.get_xyzt_units() == ("mm", "sec")


def test_round_trip_minimal_volume_without_sidecar(tmp_path):
    vol = Volume(data=np.zeros(SHAPE_ZYX, np.float32), affine=np.diag([2.0, 2.0, 3.0, 1.0]), frame="LPS")
    path = write_nifti(vol, tmp_path / "plain.nii", sidecar=False)
    assert not sidecar_path(path).exists()
    back = load_nifti(path, units="Bq/mL")
    assert back.acquired_at is None and back.nuclide is None and back.decay_correction is None
    np.testing.assert_allclose(back.affine, np.diag([-2.0, -2.0, 3.0, 1.0]))
    write_nifti(vol, tmp_path / "with_sidecar.nii.gz")
    assert json.loads(sidecar_path(tmp_path / "with_sidecar.nii.gz").read_text()) == {"Modality": "PT", "Units": "Bq/mL"}


# ---------------------------------------------------------------------------- header claims
# NIfTI-1 header layout (nifti1.h, NIfTI Data Format Working Group): dim[8] int16 at byte 40,
# pixdim[8] float32 at 76, vox_offset float32 at 108, srow_x float32[4] at 280.
def _raw_file(tmp_path, change, name="raw.nii.gz"):
    import gzip
    import struct

    path = _write_raw(tmp_path, np.ones((7, 6, 5), np.float32), _oblique_affine(), {"Units": "Bq/mL"}, name="src.nii")
    raw = bytearray(path.read_bytes())
    change(raw, struct)
    out = tmp_path / name
    out.write_bytes(gzip.compress(bytes(raw)) if name.endswith(".gz") else bytes(raw))
    sidecar_path(out).write_text(json.dumps({"Units": "Bq/mL"}), encoding="utf-8")
    return out


def test_gz_header_claiming_gigabytes_refused_without_allocating(tmp_path, monkeypatch):
    """A 352-byte header claiming 1000^3 float32 voxels (4 GB): the decompressed stream is
    counted in small reads, nothing of the claimed size is allocated."""
    import tracemalloc


    monkeypatch.setenv("PHANTOMETRY_MAX_VOXELS", str(2 * 10**9))

    def claim(raw, struct):
        struct.pack_into("<4h", raw, 40, 3, 1000, 1000, 1000)
        del raw[352:]

    path = _raw_file(tmp_path, claim)
    tracemalloc.start()
    try:
        with pytest.raises(InputError, match=r"\(4,000,000,352 bytes\) but the decompressed file holds 352"):
            load_nifti(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 20 * 2**20


@pytest.mark.parametrize(
    "change, needle",
    [
        (lambda raw, st: st.pack_into("<h", raw, 42, -5), "header dimension 1 is -5"),
        (lambda raw, st: st.pack_into("<h", raw, 44, 0), "header dimension 2 is 0"),
        (lambda raw, st: st.pack_into("<f", raw, 80, float("nan")), "header pixdim holds a voxel size that is not finite"),
        (lambda raw, st: st.pack_into("<f", raw, 280, float("nan")), "affine (sform/qform) holds a number that is not finite"),
        (lambda raw, st: st.pack_into("<f", raw, 108, 1e12), "vox_offset 999,999,995,904 lies beyond the end of the decompressed file"),
        (lambda raw, st: st.pack_into("<4h", raw, 40, 3, 30000, 30000, 30000), "30000 x 30000 x 30000 = 27,000,000,000,000 voxels"),
        (lambda raw, st: st.pack_into("<f", raw, 352 + 8, float("inf")), "1 voxel(s) hold no finite number"),
    ],
)
def test_damaged_headers_refused_in_one_line(tmp_path, change, needle):
    path = _raw_file(tmp_path, change)
    with pytest.raises(InputError) as info:
        load_nifti(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}: ") and needle in msg and "\n" not in msg


def test_truncated_and_corrupt_gzip_refused(tmp_path):
    good = _raw_file(tmp_path, lambda raw, st: None, name="good.nii.gz")
    data = good.read_bytes()
    cut = tmp_path / "cut.nii.gz"
    cut.write_bytes(data[:-6])  # the end of the deflate stream and the gzip trailer lost
    sidecar_path(cut).write_text(json.dumps({"Units": "Bq/mL"}), encoding="utf-8")
    with pytest.raises(InputError, match="the gzip stream is damaged"):
        load_nifti(cut)
    assert load_nifti(good).shape == (5, 6, 7)
