"""End-to-end measurement of the body phantom against outside truth."""

import csv
import json

import numpy as np
import pytest
from scipy import stats

from phantometry.errors import InputError, PhantomNotFound
from phantometry.fill import FillRecord
from phantometry.measure import measure, measure_volume
from phantometry.rois import disc_weights
from phantometry.synth import FWHM_PER_SIGMA, SynthSpec, synthesize
from phantometry.templates import load_template

TPL = load_template("iec-body")


def _rows(analysis):
    return {(r.roi, r.metric): r.value for r in analysis.rows}


def test_rc_max_matches_maxwell_cdf_noise_free():
    # Reference library: the centre of a uniform ball of radius R blurred by an isotropic
    # Gaussian is scipy.stats.maxwell.cdf(R / sigma). The synthetic voxels are cell means, so
    # the effective sigma adds the voxel box variance d^2/12 (see phantometry.synth).
    # With the cold 1 mm wall and background b (linearity of the blur):
    # centre = c F(R/s) + b (1 - F((R + 1)/s)).
    vox, fwhm, ratio = 1.5, 8.0, 8.0
    res = synthesize(SynthSpec(voxel_mm=(vox,) * 3, psf_fwhm_mm=fwhm, noise_cv=0, sphere_ratio=ratio))
    analysis = measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))
    rows = _rows(analysis)
    sigma = np.sqrt((fwhm / FWHM_PER_SIGMA) ** 2 + vox**2 / 12)
    F = stats.maxwell.cdf
    for s in TPL.spheres:
        r = s.diameter_mm / 2
        expected = (ratio * F(r / sigma) + (1 - F((r + 1) / sigma))) / ratio
        assert rows[(s.name, "rc_max")] == pytest.approx(expected, rel=0.01), s.name


def test_background_variability_of_white_noise():
    # White noise of known SD sigma: the SD of K disc means is sigma / sqrt(N_eff) with
    # N_eff = (sum w)^2 / sum w^2 for partial-area weights w (mathematics: variance of a
    # weighted mean of independent samples). Pooled over 6 realisations (360 ROIs per size)
    # the sampling error of the SD is about 3.7 %, so 10 % is a fair bound.
    base = synthesize(SynthSpec(voxel_mm=(2.0,) * 3, matrix=(160, 160, 101), psf_fwhm_mm=6.0, noise_cv=0))
    fill = FillRecord.from_dict(base.fill_record)
    truth = {n: np.array(d["centre_mm"]) for n, d in base.truth["inserts"].items()}
    overrides = {n: truth[n] for n in ("sphere_37mm", "sphere_22mm", "sphere_13mm")}
    sigma = 600.0
    sds = {d: [] for d in TPL.background.diameters_mm}
    for seed in range(6):
        noisy = base.volume.data + np.random.default_rng(seed).normal(0, sigma, base.volume.shape).astype(np.float32)
        a = measure_volume(base.volume.with_data(noisy), TPL, fill, overrides=overrides)
        for d, means in a.background_roi_means.items():
            sds[d].append(means - means.mean())
    plane = a.planes[0.0]
    for d in TPL.background.diameters_mm:
        uv = plane.world_to_uv(a.placement.to_world([*TPL.background.centres_xy_mm[0], 0.0]))
        _, w = disc_weights(plane, uv, d)
        n_eff = w.sum() ** 2 / (w**2).sum()
        pooled = np.concatenate(sds[d])
        measured_sd = np.sqrt((pooled**2).sum() / (len(pooled) - 6))
        assert measured_sd == pytest.approx(sigma / np.sqrt(n_eff), rel=0.10), d


def test_measure_writes_outputs(demo_scan, tmp_path):
    out = tmp_path / "res"
    a = measure([demo_scan["image"]], template="iec-body", fill=demo_scan["fill"], out=out)
    rows = list(csv.DictReader(open(out / "measurements.csv")))
    assert {"series_uid", "acquired_at", "template", "roi", "metric", "value", "unit"} <= set(rows[0])
    metrics = {(r["roi"], r["metric"]) for r in rows}
    for s in TPL.spheres:
        for m in ("percent_contrast", "background_variability_pct", "rc_max", "rc_mean", "rc_peak", "centre_x_mm", "centre_y_mm", "centre_z_mm"):
            assert (s.name, m) in metrics
    assert ("lung_insert", "lung_residual_pct") in metrics
    assert ("background", "mean_bq_ml") in metrics and ("background", "activity_recovery") in metrics
    doc = json.loads((out / "measurements.json").read_text())
    assert len(doc["measurements"]) == len(rows)
    assert doc["series"]["series_uid"] == a.volume.series_uid
    assert "PHANTOM" not in json.dumps(doc["series"])  # no patient identity
    assert (out / "overlay.png").stat().st_size > 10_000
    # centres agree with the synthesizer's truth (world mm, LPS)
    truth = demo_scan["result"].truth["inserts"]
    for s in TPL.spheres:
        c = [float(next(r["value"] for r in rows if r["roi"] == s.name and r["metric"] == f"centre_{ax}_mm")) for ax in "xyz"]
        assert np.linalg.norm(np.array(c) - truth[s.name]["centre_mm"]) < 1.0
    # calibration check and contrast ordering that physics predicts (partial-volume effect)
    vals = _rows(a)
    assert vals[("background", "activity_recovery")] == pytest.approx(1.0, abs=0.03)
    contrasts = [vals[(s.name, "percent_contrast")] for s in TPL.spheres]
    assert contrasts == sorted(contrasts)


def test_background_far_from_fill_record_warns_loudly(demo_scan, tmp_path):
    import yaml

    fill = yaml.safe_load(open(demo_scan["fill"]))
    fill["background"]["concentration_kbq_ml"] *= 1.5
    p = tmp_path / "fill.yaml"
    p.write_text(yaml.safe_dump(fill))
    a = measure([demo_scan["image"]], template="iec-body", fill=p, out=tmp_path / "res")
    assert any("WARNING" in w and "background" in w for w in a.warnings)
    doc = json.loads((tmp_path / "res" / "measurements.json").read_text())
    assert doc["warnings"]
    row = next(r for r in doc["measurements"] if r["metric"] == "activity_recovery")
    assert row["value"] == pytest.approx(1 / 1.5, rel=0.03) and "WARNING" in row["note"]


def test_partly_outside_field_of_view_fails_cleanly(tmp_path):
    # the grid cuts through the background ROI slices: refuse, do not measure half a phantom
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, matrix=(90, 90, 14), psf_fwhm_mm=6, noise_cv=0.05, shift_mm=(0, 0, 20)))
    with pytest.raises(PhantomNotFound, match="field of view|outside"):
        measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))


def test_failed_run_leaves_no_output(tmp_path):
    from phantometry.volume import Volume
    from phantometry.io.dicom_write import write_dicom_series
    from phantometry.synth import DEMO_SCAN_TIME

    z, y, x = np.mgrid[0:40, 0:60, 0:60]
    data = (((x - 30) ** 2 + (y - 30) ** 2) < 15**2).astype(np.float32) * 5000
    vol = Volume(data, np.diag([2.0, 2.0, 2.0, 1.0]), acquired_at=DEMO_SCAN_TIME, nuclide="F-18")
    write_dicom_series(vol, tmp_path / "cyl")
    fill = tmp_path / "fill.yaml"
    fill.write_text("nuclide: F-18\nbackground:\n  concentration_kbq_ml: 5.0\n  measured_at: 2026-11-03T10:30:00+01:00\nspheres:\n  ratio_to_background: 4\n")
    out = tmp_path / "res"
    with pytest.raises(PhantomNotFound):
        measure([tmp_path / "cyl"], template="iec-body", fill=fill, out=out)
    assert not out.exists()
    assert (tmp_path / "res.failed.png").exists()  # diagnostic picture


def test_unknown_centre_name_is_refused(demo_scan, tmp_path):
    with pytest.raises(InputError, match="no insert 'sphere_99mm'.*sphere_10mm"):
        measure([demo_scan["image"]], fill=demo_scan["fill"], out=tmp_path / "r", centres=["sphere_99mm=1,2,3"])
    with pytest.raises(InputError, match="NAME=x,y,z"):
        measure([demo_scan["image"]], fill=demo_scan["fill"], out=tmp_path / "r", centres=["sphere_10mm=1,2"])
    assert not (tmp_path / "r").exists()
