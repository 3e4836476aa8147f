"""Uniform cylinder (analysis kind ``uniform_cylinder``): geometry, calibration and uniformity
against the synthesizer's known truth, the noise model against Monte Carlo realisations, and
refusals of scans that are not a uniform cylinder.

Closed forms of the imposed imperfections (mathematics; derived in the module docstring of
phantometry.phantoms.uniform_cylinder): a gain k gives activity_recovery = k; one slice of N
with gain 1 + a gives max_deviation_pct = 100 a (1 - 1/N) / (1 + a/N); a radial gain
1 + c (r/R)^2 gives radial_nonuniformity_pct = -100 (2/3) c rho^2 / (1 + c rho^2 / 2) with
rho = R_a / R (area means of r^2 over a disc and a ring).
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import re
import subprocess
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
import yaml

from phantometry.bands import band_set_from_dict, check_band_set
from phantometry.cli import main
from phantometry.errors import InputError, PhantomNotFound, TemplateError
from phantometry.fill import FillRecord
from phantometry.io.dicom import load_dicom
from phantometry.io.dicom_write import write_dicom_series
from phantometry.ledger import Ledger
from phantometry.measure import judge, measure_volume
from phantometry.phantoms import check_template, kind_of, known_metrics, load_band_set, load_template, suggest_template
from phantometry.synth import SynthSpec, synthesize, write_synthetic
from phantometry.templates import template_from_dict

TPL = load_template("uniform-cylinder")
SCRIPT = Path(sys.executable).parent / "phantometry"
README = Path(__file__).resolve().parents[1] / "README.md"
#: analysis-volume margins of the shipped template (common practice), mm
MARGIN = 20.0


def _spec(**kw) -> SynthSpec:
    base = dict(phantom="uniform-cylinder", voxel_mm=(3.0,) * 3, psf_fwhm_mm=6.0, noise_cv=0.0)
    base.update(kw)
    return SynthSpec(**base)


def _measure(res, **kw):
    return measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record), **kw)


def _vals(analysis) -> dict[tuple[str, str], float]:
    return {(r.roi, r.metric): r.value for r in analysis.rows}


def _slice_offsets(res) -> np.ndarray:
    """Offsets (mm) of the image's slice centres from the cylinder centre along the slice axis."""
    vol = res.volume
    nz = vol.shape[0]
    z = vol.index_to_world(np.c_[np.arange(nz), np.zeros((nz, 2))]) @ vol.axes_world[0]
    return z - np.asarray(res.truth["body"]["centre_mm"]) @ vol.axes_world[0]


# ============================================================================ the template
def test_template_is_sound_and_lists_its_rows():
    assert check_template(TPL) == []
    a = kind_of(TPL).options(TPL)
    assert a.diameter_range_mm == (100, 350) and a.length_range_mm == (100, 300)
    assert a.wall_margin_mm == MARGIN and a.end_margin_mm == MARGIN and a.sectors == 8
    assert known_metrics(TPL) == {
        "uniform_volume": ("mean_bq_ml", "activity_recovery", "calibration_error_pct", "voxel_cv_pct", "diameter_mm", "length_mm", "mean_suv"),
        "axial_profile": ("max_deviation_pct", "slice_mean_cv_pct"),
        "transverse": ("radial_nonuniformity_pct", "sector_max_deviation_pct"),
    }


def _template_dict(**analysis) -> dict:
    doc = yaml.safe_load((Path(TPL.source_path)).read_text(encoding="utf-8"))
    doc["analysis"].update(analysis)
    return doc


def test_template_checks_name_each_problem():
    bad = template_from_dict(_template_dict(wall_margin_mm=60, end_margin_mm=55), "bad.yaml")
    problems = check_template(bad)
    assert any(p.startswith("analysis.wall_margin_mm") for p in problems)
    assert any(p.startswith("analysis.end_margin_mm") for p in problems)
    doc = _template_dict()
    doc["inserts"] = [{"name": "rod", "shape": "cylinder", "role": "rod", "diameter_mm": 20, "length_mm": 50, "centre_mm": [0, 0, 0],
                       "axis": [0, 0, 1], "fill": "background"}]
    assert any(p.startswith("inserts:") for p in check_template(template_from_dict(doc, "ins.yaml")))
    with pytest.raises(TemplateError, match=r"ranges.yaml.*diameter_range_mm"):
        kind_of(template_from_dict(_template_dict(diameter_range_mm=[300, 100]), "ranges.yaml"))
    doc = _template_dict()
    doc["body"] = {"shape": "d_shape", "arc_radius_mm": 147, "flat_width_mm": 140, "corner_radius_mm": 77, "centre_xy_mm": [0, -35],
                   "z_range_mm": [-110, 70]}
    with pytest.raises(TemplateError, match="body.shape: cylinder"):
        check_template(template_from_dict(doc, "dshape.yaml"))


# ============================================================================ noise-free truth
GEOMETRY_CASES = [
    # diameter, length, rotation (deg), shift (mm), voxel (mm), calibration factor
    (110.0, 110.0, (0.0, 0.0, 0.0), (0.0, 0.0, 0.0), 2.0, 1.00),
    (200.0, 200.0, (5.0, -3.0, 0.0), (12.0, -8.0, 6.0), 3.0, 1.07),
    (330.0, 290.0, (0.0, 4.0, 0.0), (-20.0, 10.0, -5.0), 4.0, 0.93),
    (160.0, 250.0, (-6.0, 0.0, 30.0), (0.0, 25.0, 0.0), 3.0, 1.00),
    (300.0, 100.0, (0.0, 20.0, 0.0), (0.0, 0.0, 0.0), 3.0, 1.00),  # at the length range's lower limit, 20 degrees tilt
    (200.0, 173.0, (45.0, 0.0, 0.0), (5.0, 5.0, 5.0), 3.0, 1.00),  # any tilt; L = 0.87 D: equal principal spreads
]


@pytest.mark.parametrize("diameter,length,rotation,shift,voxel,factor", GEOMETRY_CASES)
def test_noise_free_geometry_and_calibration(diameter, length, rotation, shift, voxel, factor):
    res = synthesize(_spec(diameter_mm=diameter, length_mm=length, rotation_deg=rotation, shift_mm=shift, voxel_mm=(voxel,) * 3,
                           calibration_factor=factor))
    a = _measure(res)
    v = _vals(a)
    assert abs(v[("uniform_volume", "diameter_mm")] - diameter) < 1.0
    assert abs(v[("uniform_volume", "length_mm")] - length) < 1.0
    # activity recovery = the imposed calibration factor within 0.2 % (the tolerance)
    assert v[("uniform_volume", "activity_recovery")] == pytest.approx(factor, rel=2e-3)
    assert v[("uniform_volume", "calibration_error_pct")] == pytest.approx(100 * (factor - 1), abs=0.2)
    # a uniform image: no non-uniformity, no voxel noise
    for key in (("axial_profile", "max_deviation_pct"), ("transverse", "radial_nonuniformity_pct"),
                ("transverse", "sector_max_deviation_pct"), ("uniform_volume", "voxel_cv_pct")):
        assert abs(v[key]) < 0.05, key
    cyl = a.cylinder
    assert np.linalg.norm(cyl.centre_mm - np.array(res.truth["body"]["centre_mm"])) < 1.0
    tilt_error = math.degrees(math.acos(min(1.0, abs(float(cyl.axis @ np.array(res.truth["body"]["axis"]))))))
    assert tilt_error < 0.3
    assert ("uniform_volume", "mean_suv") not in v  # a BQML series: no SUV row
    assert not a.warnings


@pytest.mark.parametrize("gain_pct,offset_mm", [(6.0, 12.0), (-4.0, -31.0)])
def test_axial_slice_artefact_matches_closed_form(gain_pct, offset_mm):
    res = synthesize(_spec(shift_mm=(7.3, -4.1, 2.6), slice_artefact=(offset_mm, gain_pct)))
    v = _vals(_measure(res))
    # N: the image slices whose centre lies in the analysis volume (true length - 2 margins)
    n = int(np.sum(np.abs(_slice_offsets(res)) <= (200.0 - 2 * MARGIN) / 2))
    a = gain_pct / 100
    expected = 100 * abs(a) * (1 - 1 / n) / (1 + a / n)
    assert v[("axial_profile", "max_deviation_pct")] == pytest.approx(expected, abs=0.3)
    assert abs(v[("transverse", "radial_nonuniformity_pct")]) < 0.05


def test_axial_slope_matches_closed_form():
    slope = 4.0  # % per 100 mm along the slice axis
    res = synthesize(_spec(diameter_mm=180, length_mm=240, shift_mm=(0.0, 0.0, 4.4), axial_slope_pct_per_100mm=slope))
    v = _vals(_measure(res))
    z = _slice_offsets(res)
    z = z[np.abs(z) <= (240.0 - 2 * MARGIN) / 2]
    g = 1 + slope / 100 * z / 100
    assert v[("axial_profile", "max_deviation_pct")] == pytest.approx(100 * np.max(np.abs(g - g.mean())) / g.mean(), abs=0.3)
    assert v[("axial_profile", "slice_mean_cv_pct")] == pytest.approx(100 * np.std(g, ddof=1) / g.mean(), abs=0.3)


@pytest.mark.parametrize("diameter,radial_pct,rotation", [(200.0, 10.0, (0.0, 0.0, 0.0)), (300.0, -8.0, (6.0, 0.0, 0.0)),
                                                          (120.0, 12.0, (0.0, -4.0, 10.0))])
def test_radial_term_matches_closed_form(diameter, radial_pct, rotation):
    res = synthesize(_spec(diameter_mm=diameter, length_mm=160, radial_gain_pct=radial_pct, rotation_deg=rotation, shift_mm=(3.0, -6.0, 1.0)))
    v = _vals(_measure(res))
    c, rho = radial_pct / 100, (diameter / 2 - MARGIN) / (diameter / 2)
    expected = -100 * (2 / 3) * c * rho**2 / (1 + c * rho**2 / 2)
    assert v[("transverse", "radial_nonuniformity_pct")] == pytest.approx(expected, abs=0.3)
    # the volume mean carries the radial gain's mean over the analysis disc: 1 + c rho^2 / 2
    assert v[("uniform_volume", "activity_recovery")] == pytest.approx(1 + c * rho**2 / 2, abs=2e-3)
    assert v[("transverse", "sector_max_deviation_pct")] < 0.1  # rotationally symmetric


# ============================================================================ noise
@pytest.mark.parametrize("cv,voxel,fwhm", [(0.05, 3.0, 6.0), (0.15, 3.0, 6.0), (0.25, 4.0, 10.0)])
def test_voxel_cv_equals_imposed_noise(cv, voxel, fwhm):
    # the synthesizer's background voxel SD is cv x background (phantometry.synth, step 3)
    res = synthesize(_spec(noise_cv=cv, seed=int(cv * 100), voxel_mm=(voxel,) * 3, psf_fwhm_mm=fwhm))
    a = _measure(res)
    assert a.value("uniform_volume", "voxel_cv_pct") == pytest.approx(100 * cv, rel=0.05)
    assert a.value("uniform_volume", "activity_recovery") == pytest.approx(1.0, abs=0.01)
    doc = a.json_extras()
    assert doc["noise"]["voxel_cv_pct"] == pytest.approx(100 * cv, rel=0.1)
    assert len(doc["uniform_cylinder"]["slices"]["mean_bq_ml"]) == a.regions.n_slices


@pytest.mark.slow
def test_uncertainties_agree_with_monte_carlo_over_realisations():
    # JCGM 101:2008 (GUM Supplement 1): the spread over independent realisations of the same
    # scan is the standard uncertainty each single analysis must estimate. 40 realisations:
    # the sample SD itself scatters by about 11 %, hence the 30 % window.
    keys = [("uniform_volume", "mean_bq_ml"), ("uniform_volume", "voxel_cv_pct"), ("axial_profile", "max_deviation_pct"),
            ("axial_profile", "slice_mean_cv_pct"), ("transverse", "radial_nonuniformity_pct"), ("transverse", "sector_max_deviation_pct")]
    values, uncerts = {k: [] for k in keys}, {k: [] for k in keys}
    for seed in range(40):
        res = synthesize(_spec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=8.0, noise_cv=0.1, seed=100 + seed, diameter_mm=150, length_mm=140))
        a = _measure(res)
        for r in a.rows:
            if (r.roi, r.metric) in values:
                values[(r.roi, r.metric)].append(r.value)
                uncerts[(r.roi, r.metric)].append(r.uncertainty)
    for k in keys:
        spread = float(np.std(values[k], ddof=1))
        ratio = float(np.mean(uncerts[k])) / spread
        assert 0.7 < ratio < 1.3, (k, ratio)


# ============================================================================ SUV series
def test_mean_suv_of_a_series_stored_in_suv(tmp_path):
    res = synthesize(_spec(voxel_mm=(4.0,) * 3, diameter_mm=200, length_mm=180, calibration_factor=1.02))
    weight_kg, dose_bq = 9.4, 110e6
    injection = res.volume.acquired_at - timedelta(minutes=75)
    write_dicom_series(res.volume, tmp_path / "suv", units="GML", patient_weight_kg=weight_kg, injected_dose_bq=dose_bq,
                       injection_time=injection)
    vol = load_dicom(tmp_path / "suv")
    assert vol.original_units == "GML" and len(vol.bq_ml_per_suv) == vol.shape[0]
    a = measure_volume(vol, TPL, FillRecord.from_dict(res.fill_record))
    # SUVbw = C W / D, D decayed from injection to the series time (QIBA vendor-neutral SUV
    # pseudo-code; F-18 half-life 109.77 min, European Pharmacopoeia / NNDC)
    decayed = dose_bq * 2 ** (-75.0 / 109.77)
    mean = a.value("uniform_volume", "mean_bq_ml")
    assert a.value("uniform_volume", "mean_suv") == pytest.approx(mean * weight_kg * 1000 / decayed, rel=1e-4)
    assert a.value("uniform_volume", "activity_recovery") == pytest.approx(1.02, rel=2e-3)


# ============================================================================ fields of view
def test_cylinder_longer_than_the_axial_field_of_view():
    res = synthesize(_spec(voxel_mm=(3.0,) * 3, length_mm=260, matrix=(90, 90, 50)))
    a = _measure(res)
    visible = 49 * 3.0  # first to last slice centre
    assert a.value("uniform_volume", "length_mm") == pytest.approx(visible, abs=1.0)
    assert a.value("uniform_volume", "activity_recovery") == pytest.approx(1.0, rel=2e-3)
    assert a.value("uniform_volume", "diameter_mm") == pytest.approx(200.0, abs=1.0)
    assert any("beyond the axial field of view" in w for w in a.warnings)
    assert a.analysis_length_mm == pytest.approx(visible - 2 * MARGIN, abs=1.0)


def test_cylinder_wider_than_the_transverse_field_of_view_is_refused():
    res = synthesize(_spec(voxel_mm=(3.0,) * 3, matrix=(60, 90, 80)))
    with pytest.raises(PhantomNotFound, match="beyond the image's transverse field of view"):
        _measure(res)


# ============================================================================ bad input
def test_body_phantom_refused_naming_the_template_that_fits(demo_scan, tmp_path):
    out = tmp_path / "res"
    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="200")
    r = subprocess.run([str(SCRIPT), "measure", str(demo_scan["image"]), "--template", "uniform-cylinder", "--fill", str(demo_scan["fill"]),
                        "--out", str(out)], capture_output=True, text=True, env=env, timeout=300)
    assert r.returncode == 2
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("phantometry: error:"), r.stderr
    assert "not a uniform cylinder" in lines[0] and "--template iec-body" in lines[0]
    assert "Traceback" not in r.stdout + r.stderr
    assert not out.exists()


def test_cylinder_scan_with_the_body_template_is_refused_naming_the_cylinder_template(tmp_path):
    """The reverse case: the fill record of a cylinder (``phantom: uniform-cylinder``) does not
    fit the body template; the one line says which template the record is for."""
    scan = tmp_path / "scan"
    write_synthetic(synthesize(_spec(voxel_mm=(4.0,) * 3, noise_cv=0.0)), scan)
    before = {p: p.read_bytes() for p in scan.rglob("*") if p.is_file()}
    out = tmp_path / "res"
    env = dict(os.environ, MPLBACKEND="Agg", COLUMNS="200")
    r = subprocess.run([str(SCRIPT), "measure", str(scan / "dicom"), "--fill", str(scan / "fill.yaml"), "--out", str(out)],
                       capture_output=True, text=True, env=env, timeout=300)
    assert r.returncode == 2, r.stderr
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("phantometry: error:"), r.stderr
    assert "fill.yaml" in lines[0] and "--template uniform-cylinder" in lines[0]
    assert not out.exists()
    assert {p: p.read_bytes() for p in scan.rglob("*") if p.is_file()} == before


@pytest.mark.parametrize("phantom,spec,expected", [
    ("small-animal", dict(voxel_mm=(0.6,) * 3, psf_fwhm_mm=1.8, background_kbq_ml=150.0), "small-animal"),
    ("site-rod-cylinder", dict(voxel_mm=(4.0,) * 3, noise_cv=0.05), "site-rod-cylinder"),
])
def test_other_phantoms_refused_naming_the_template_that_fits(phantom, spec, expected):
    res = synthesize(SynthSpec(phantom=phantom, **spec))
    with pytest.raises(PhantomNotFound, match=rf"not a uniform cylinder.*--template {expected}$"):
        _measure(res)


def test_cylinder_outside_the_size_ranges_is_refused():
    res = synthesize(_spec(voxel_mm=(4.0,) * 3, length_mm=380, matrix=(80, 80, 120)))
    with pytest.raises(PhantomNotFound, match=r"outside the template's ranges") as err:
        _measure(res)
    assert "iec-body" not in str(err.value)  # a round object is not offered the D-shaped body phantom


def test_uniform_cylinder_measured_with_another_template_names_this_one():
    res = synthesize(_spec(voxel_mm=(4.0,) * 3, noise_cv=0.05))
    with pytest.raises(PhantomNotFound, match="--template uniform-cylinder"):
        measure_volume(res.volume, load_template("small-animal"), FillRecord.from_dict(res.fill_record))


def test_suggest_template_asks_every_kind():
    assert suggest_template([300, 300, 150]) == "uniform-cylinder"  # a wide, short cylinder: in the ranges
    assert suggest_template([180, 224, 294], exclude="uniform-cylinder") == "iec-body"
    assert suggest_template([30, 30, 50]) == "small-animal"
    assert suggest_template([1000, 1000, 1000]) is None


# ============================================================================ bands, outputs
def test_calibration_band_set_judges_recovery():
    bs = load_band_set("uniform-cylinder-calibration")
    assert bs.template == "uniform-cylinder"
    entry = bs.entry("uniform_volume", "activity_recovery")
    assert (entry.low, entry.high) == (0.90, 1.10) and entry.recalled  # +-10 %, recalled (EANM/EARL)
    for factor, verdict in ((1.04, "pass"), (1.15, "fail"), (0.88, "fail")):
        res = synthesize(_spec(voxel_mm=(4.0,) * 3, calibration_factor=factor))
        a = judge(_measure(res, uncertainties=False), [bs])
        row = next(r for r in a.rows if r.metric == "activity_recovery")
        assert row.verdict == verdict, (factor, row)
        assert any("from the fill record" in w for w in a.warnings) == (verdict == "fail")


def _readme_site_bands() -> dict:
    text = README.read_text(encoding="utf-8")
    block = re.search(r"```yaml\n(phantometry_bands: 1\nname: site-uniformity\n.*?)```", text, re.S)
    assert block, "README: the example site band set for uniformity is missing"
    return yaml.safe_load(block.group(1))


def test_readme_site_band_set_loads_and_sets_the_profile_tolerance():
    bs = band_set_from_dict(_readme_site_bands(), "<README>")
    check_band_set(bs, "uniform-cylinder", known_metrics(TPL))
    res = synthesize(_spec(voxel_mm=(4.0,) * 3, slice_artefact=(0.0, 8.0)))
    a = judge(_measure(res, uncertainties=False), [bs])
    assert a.profile_tolerance_pct() == bs.entry("axial_profile", "max_deviation_pct").high
    assert next(r for r in a.rows if r.metric == "max_deviation_pct").verdict == "fail"


def test_cli_measure_writes_pictures_report_and_strict_exit(tmp_path, capsys):
    paths = write_synthetic(synthesize(_spec(voxel_mm=(4.0,) * 3, noise_cv=0.05, calibration_factor=1.12, radial_gain_pct=5)),
                            tmp_path / "scan", "dicom")
    out = tmp_path / "res"
    code = main(["measure", str(paths["image"]), "-t", "uniform-cylinder", "-f", str(paths["fill"]), "-o", str(out),
                 "--bands", "uniform-cylinder-calibration", "--strict", "--report"])
    captured = capsys.readouterr()
    assert code == 3, captured.err  # the calibration (1.12) fails the +-10 % band
    for name in ("overlay.png", "axial_profile.png", "radial_profile.png", "report.html"):
        assert (out / name).stat().st_size > 10_000, name
    assert "axial_profile.png, radial_profile.png" in captured.out.replace("\n", "")  # the console wraps long lines
    doc = json.loads((out / "measurements.json").read_text(encoding="utf-8"))
    assert doc["template"]["analysis_kind"] == "uniform_cylinder"
    cyl = doc["uniform_cylinder"]["cylinder"]
    assert cyl["diameter_mm"] == pytest.approx(200, abs=1) and cyl["truncated_ends"] == {"low": False, "high": False}
    assert doc["placement_quality"][0]["roi_set"] == "analysis_volume"
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Slice means of the analysis volume" in html and "results-axial-profile" in html


# ============================================================================ synthesizer options
def test_cli_synth_options_reach_the_truth(tmp_path, capsys):
    out = tmp_path / "syn"
    code = main(["synth", str(out), "--phantom", "uniform-cylinder", "--voxel", "4", "--noise", "0", "--diameter", "150", "--length", "120",
                 "--calibration-factor", "0.95", "--axial-slope", "2", "--slice-artefact", "10,5", "--radial", "-6"])
    assert code == 0, capsys.readouterr().err
    truth = json.loads((out / "truth.json").read_text(encoding="utf-8"))
    assert truth["body"]["diameter_mm"] == 150 and truth["body"]["length_mm"] == 120
    spec = truth["spec"]
    assert (spec["calibration_factor"], spec["axial_slope_pct_per_100mm"], spec["slice_artefact"], spec["radial_gain_pct"]) == (0.95, 2.0, [10.0, 5.0], -6.0)


@pytest.mark.parametrize("args,needle", [
    (["--diameter", "-5"], "--diameter"),
    (["--slice-artefact", "abc"], "--slice-artefact"),
    (["--calibration-factor", "0"], "--calibration-factor"),
    (["--radial", "-150"], "--radial"),
])
def test_cli_synth_refuses_bad_imperfections(tmp_path, capsys, args, needle):
    code = main(["synth", str(tmp_path / "x"), "--phantom", "uniform-cylinder", *args])
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2 and len(lines) == 1 and lines[0].startswith("phantometry: error:") and needle in lines[0], err
    assert not (tmp_path / "x").exists()


def test_diameter_of_a_body_phantom_refused():
    with pytest.raises(InputError, match="cylindrical phantoms; template iec-body has a d_shape body"):
        synthesize(SynthSpec(phantom="iec-body", diameter_mm=200))


# ============================================================================ ledger: monthly drift
def test_monthly_calibration_drift_is_flagged_in_the_ledger(tmp_path):
    # measure --record itself is exercised for every kind in tests/test_every_kind.py; here the
    # analyses go straight into the store (no DICOM round trip), one a month
    start = datetime(2026, 1, 6, 9, 0, tzinfo=timezone.utc)
    factors = [1.00, 1.01, 1.02, 1.03, 1.04, 1.05]  # a calibration drifting by 1 % a month
    with Ledger(str(tmp_path / "ledger.sqlite3")) as ledger:
        for month, factor in enumerate(factors):
            res = synthesize(_spec(voxel_mm=(5.0,) * 3, diameter_mm=150, length_mm=150, calibration_factor=factor, noise_cv=0.02, seed=month,
                                   acquired_at=start + timedelta(days=30 * month)))
            volume = dataclasses.replace(res.volume, series_uid=f"2.25.{20260106 + month}")
            a = measure_volume(volume, TPL, FillRecord.from_dict(res.fill_record))
            ledger.record_analysis(a, scanner="PET-CT 1", protocol="QC")
        trend = ledger.trend("PET-CT 1", "QC", "uniform_volume", "activity_recovery")
    assert [round(p.value, 2) for p in trend.points] == factors
    # Western Electric / Nelson rule: six in a row steadily rising
    assert any(f.rule.startswith("6") for f in trend.flags)
