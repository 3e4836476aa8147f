"""ROI export as a DICOM Segmentation: read back with highdicom and pydicom, checked against truth."""

from __future__ import annotations

import math

import numpy as np
import pydicom
import pytest
from scipy import ndimage

from phantometry.cli import main
from phantometry.errors import InputError
from phantometry.io.nifti import write_nifti
from phantometry.measure import measure
from phantometry.rois import cylinder_weights, sphere_weights
from phantometry.phantoms.body import MASK_WEIGHT_THRESHOLD

# DICOM PS3.4 B.5: Segmentation Storage SOP Class UID (recalled; highdicom's SOP_CLASS_UIDS agrees)
SEGMENTATION_STORAGE = "1.2.840.10008.5.1.4.1.1.66.4"


@pytest.fixture(scope="module")
def seg_run(demo_scan, tmp_path_factory):
    out = tmp_path_factory.mktemp("seg") / "results"
    analysis = measure(demo_scan["image"], fill=demo_scan["fill"], out=out, seg=True)
    sources = {}
    for path in sorted(demo_scan["image"].iterdir()):
        ds = pydicom.dcmread(path, stop_before_pixels=True)
        sources[str(ds.SOPInstanceUID)] = ds
    return {"analysis": analysis, "path": out / "rois_seg.dcm", "sources": sources}


def _frames(seg_path):
    """(segment number, referenced SOP instance UID, IPP, frame pixels) of every stored frame, read with pydicom."""
    ds = pydicom.dcmread(seg_path)
    pixels = ds.pixel_array.reshape(int(ds.NumberOfFrames), ds.Rows, ds.Columns)
    out = []
    for n, item in enumerate(ds.PerFrameFunctionalGroupsSequence):
        seg_no = int(item.SegmentIdentificationSequence[0].ReferencedSegmentNumber)
        ref = str(item.DerivationImageSequence[0].SourceImageSequence[0].ReferencedSOPInstanceUID)
        ipp = [float(v) for v in item.PlanePositionSequence[0].ImagePositionPatient]
        out.append((seg_no, ref, ipp, pixels[n].astype(bool)))
    return ds, out


def test_one_segment_per_roi_kind_and_references(seg_run):
    import highdicom as hd

    a = seg_run["analysis"]
    seg = hd.seg.segread(seg_run["path"])
    assert str(seg.SOPClassUID) == SEGMENTATION_STORAGE
    assert seg.SegmentationType == "BINARY"
    labels = [str(s.SegmentLabel) for s in seg.SegmentSequence]
    # the demo scan has no cold spheres: hot spheres, background ROIs, low-density insert
    assert labels == ["hot spheres", "background ROIs", "low-density insert"]
    assert len(set(labels)) == len(labels)
    src = seg_run["sources"]
    any_src = next(iter(src.values()))
    # references: the very series, study and frame of reference of the source files
    assert seg.ReferencedSeriesSequence[0].SeriesInstanceUID == any_src.SeriesInstanceUID == a.volume.series_uid
    assert seg.StudyInstanceUID == any_src.StudyInstanceUID
    assert seg.FrameOfReferenceUID == any_src.FrameOfReferenceUID
    referenced = {str(i.ReferencedSOPInstanceUID) for i in seg.ReferencedSeriesSequence[0].ReferencedInstanceSequence}
    assert referenced and referenced <= set(src)
    _, frames = _frames(seg_run["path"])
    assert {f[1] for f in frames} <= referenced
    # each frame sits exactly on the slice it references (ImagePositionPatient of the source file)
    for _, ref, ipp, _ in frames:
        assert np.allclose(ipp, [float(v) for v in src[ref].ImagePositionPatient], atol=1e-3)
    # no patient identity written (project rule)
    assert str(seg.PatientName) == "" and str(seg.PatientID) == ""
    assert str(seg.get("PatientBirthDate", "")) == ""


def test_voxel_counts_match_roi_masks(seg_run):
    a = seg_run["analysis"]
    vol, pl, tpl = a.volume, a.placement, a.template
    # the ROI masks rebuilt here from the ROI weights (voxel weight >= 0.5)
    hot = np.zeros(vol.shape, bool)
    for s in tpl.spheres:
        hot |= sphere_weights(vol, pl.insert_centre(s.name), s.diameter_mm).to_full(vol.shape) >= 0.5
    bg = np.zeros(vol.shape, bool)
    d = max(tpl.background.diameters_mm)
    # the background ROIs where the analysis placed them (on the body found in the image), one
    # slice thick on the plane each was read on
    for plane, uvs in a.background_discs.values():
        for uv in uvs:
            bg |= cylinder_weights(vol, plane.uv_to_world(uv), plane.normal, d, float(vol.spacing_mm[0])).to_full(vol.shape) >= 0.5
    expected = {1: hot, 2: bg}
    _, frames = _frames(seg_run["path"])
    k_of = {uid: k for k, uid in enumerate(vol.sop_instance_uids)}
    rebuilt = {n: np.zeros(vol.shape, bool) for n in (1, 2, 3)}
    for seg_no, ref, _, pixels in frames:
        rebuilt[seg_no][k_of[ref]] |= pixels
    for n, mask in expected.items():
        assert int(rebuilt[n].sum()) == int(mask.sum()) > 0
        assert np.array_equal(rebuilt[n], mask)
    kinds = a.roi_masks()
    assert [k.voxel_count for k in kinds] == [int(rebuilt[n].sum()) for n in (1, 2, 3)]
    assert MASK_WEIGHT_THRESHOLD == 0.5
    # background discs: one slice thick, 12 centres x 5 offsets, each about pi r^2 / pixel area voxels
    px = float(vol.spacing_mm[1] * vol.spacing_mm[2])
    n_rois = len(tpl.background.centres_xy_mm) * len(tpl.background.slice_offsets_mm)
    assert rebuilt[2].sum() == pytest.approx(n_rois * math.pi * (d / 2) ** 2 / px, rel=0.08)


def test_sphere_segments_sit_on_the_true_spheres(seg_run, demo_scan):
    # Geometry read only from the SEG's own DICOM attributes (ImagePositionPatient per frame,
    # ImageOrientationPatient and PixelSpacing): each connected component of the hot-sphere
    # segment must lie at a true sphere centre (synthesizer truth) with about its volume
    # 4/3 pi r^3 (mathematics; the >= 0.5 rule keeps partial voxels roughly balanced).
    ds, frames = _frames(seg_run["path"])
    shared = ds.SharedFunctionalGroupsSequence[0]
    iop = np.array([float(v) for v in shared.PlaneOrientationSequence[0].ImageOrientationPatient])
    row_sp, col_sp = (float(v) for v in shared.PixelMeasuresSequence[0].PixelSpacing)
    thick = float(shared.PixelMeasuresSequence[0].SliceThickness)
    hot = [(ipp, px) for seg_no, _, ipp, px in frames if seg_no == 1]
    ipps = np.array([h[0] for h in hot])
    normal = np.cross(iop[:3], iop[3:])
    order = np.argsort(ipps @ normal)
    stack = np.stack([hot[i][1] for i in order])
    ipps = ipps[order]
    labels, n = ndimage.label(stack)
    truth = demo_scan["result"].truth["inserts"]
    spheres = {k: v for k, v in truth.items() if k.startswith("sphere_")}
    assert n == len(spheres)
    voxel_ml = row_sp * col_sp * thick / 1000.0
    for lab in range(1, n + 1):
        f, r, c = np.nonzero(labels == lab)
        world = ipps[f] + c[:, None] * col_sp * iop[:3] + r[:, None] * row_sp * iop[3:]
        centre = world.mean(axis=0)
        name = min(spheres, key=lambda s: np.linalg.norm(np.array(spheres[s]["centre_mm"]) - centre))
        assert np.linalg.norm(np.array(spheres[name]["centre_mm"]) - centre) < 1.5, name
        true_ml = math.pi / 6 * spheres[name]["diameter_mm"] ** 3 / 1000.0
        tol = 0.35 if spheres[name]["diameter_mm"] < 15 else 0.12
        assert f.size * voxel_ml == pytest.approx(true_ml, rel=tol), name


def test_cold_spheres_get_their_own_segment(tmp_path):
    from phantometry.synth import SynthSpec, synthesize, write_synthetic

    res = synthesize(SynthSpec(voxel_mm=(3.0,) * 3, psf_fwhm_mm=6.0, noise_cv=0.05, cold=["sphere_28mm", "sphere_37mm"], seed=2))
    paths = write_synthetic(res, tmp_path / "scan", "dicom")
    a = measure(paths["image"], fill=paths["fill"], out=tmp_path / "r", seg=True)
    import highdicom as hd

    seg = hd.seg.segread(tmp_path / "r" / "rois_seg.dcm")
    labels = [str(s.SegmentLabel) for s in seg.SegmentSequence]
    assert labels == ["hot spheres", "cold spheres", "background ROIs", "low-density insert"]
    kinds = {k.kind: k for k in a.roi_masks()}
    assert kinds["cold_spheres"].roi_names == ["sphere_28mm", "sphere_37mm"]
    # two cold spheres of 28 and 37 mm: about (pi/6)(28^3 + 37^3) mm^3 of 27 mm^3 voxels
    expected = math.pi / 6 * (28**3 + 37**3) / 27.0
    assert kinds["cold_spheres"].voxel_count == pytest.approx(expected, rel=0.1)


def test_seg_refused_for_nifti(demo_scan, tmp_path, capsys):
    nii = write_nifti(demo_scan["result"].volume, tmp_path / "scan.nii.gz")
    with pytest.raises(InputError, match="--seg needs a DICOM"):
        measure(nii, fill=demo_scan["fill"], out=tmp_path / "r", seg=True)
    assert not (tmp_path / "r").exists()
    code = main(["measure", str(nii), "--fill", str(demo_scan["fill"]), "--out", str(tmp_path / "r2"), "--seg"])
    err = capsys.readouterr().err
    assert code == 2 and "--seg" in err and "NIfTI" in err
    assert not (tmp_path / "r2").exists()
