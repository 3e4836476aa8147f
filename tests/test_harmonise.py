"""Harmonising filter (phantometry.harmonise, phantometry.postfilter, the body kind's re-reading).

Known truth used here:

* The filter is the one of ``scipy.ndimage.gaussian_filter`` (reference library): the sampled,
  normalised Gaussian truncated at 4 sigma, image borders reflected.
* Gaussians compose (mathematics: the variances of convolved Gaussians add), so a noise-free
  scan of point-response FWHM ``a`` filtered by ``f`` is a scan of FWHM ``sqrt(a^2 + f^2)``.
* A linear shift-invariant filter ``g`` turns a stationary noise autocovariance ``C`` into
  ``C * (g * g~)`` (mathematics); checked against filtered simulated noise fields.
* The band limits of eanm-fdg-2015 (Boellaard et al., Eur J Nucl Med Mol Imaging
  2015;42:328-354, its accreditation specification; confirmed in the project's
  REFERENCE-VALUES) at 10:1.
"""

from __future__ import annotations

import csv
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pydicom
import pytest
import yaml
from scipy import ndimage

from phantometry import noise as NOISE
from phantometry.bands import load_band_set
from phantometry.fill import FillRecord
from phantometry.harmonise import (
    CSV_COLUMNS,
    _Worker,
    filter_grid,
    harmonise_analysis,
    harmonise_volume,
)
from phantometry.errors import InputError
from phantometry.measure import measure_volume
from phantometry.postfilter import FWHM_PER_SIGMA, PostFilter, filtered_noise, gaussian_kernel1d
from phantometry.synth import SynthSpec, correlated_unit_noise, synthesize, write_synthetic
from phantometry.templates import load_template

TPL = load_template("iec-body")
SCRIPT = Path(sys.executable).parent / "phantometry"
ENV = dict(os.environ, MPLBACKEND="Agg", COLUMNS="120")
SPHERES = [s.name for s in TPL.spheres]
EANM_2015 = load_band_set("eanm-fdg-2015")


def run(*args, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run([str(SCRIPT), *map(str, args)], capture_output=True, text=True, env=ENV, cwd=cwd, timeout=600)


def wide_bands(tmp: Path, metrics=("rc_max", "rc_mean", "rc_peak"), extra: list[dict] | None = None) -> Path:
    """An invented band set (for tests) judging the given metrics of every sphere with wide limits."""
    entries = [{"roi": s, "metric": m, "low": 0.0, "high": 5.0} for m in metrics for s in SPHERES] + list(extra or [])
    path = tmp / "test-wide.yaml"
    path.write_text(yaml.safe_dump({"phantometry_bands": 1, "name": "test-wide", "title": "wide limits (invented, for tests)",
                                    "source": "invented for a test", "template": "iec-body", "entries": entries}), encoding="utf-8")
    return path


def picture_colours(path: Path) -> dict[str, int]:
    """Pixels of harmonisation.png by the colour the picture promises: the bands shaded grey,
    the passing range shaded green, the recommendation a red line."""
    import matplotlib.image as mi

    im = (mi.imread(path)[..., :3] * 255).round().astype(int)
    r, g, b = im[..., 0], im[..., 1], im[..., 2]
    return {
        "green": int(((g - np.maximum(r, b) >= 8) & (np.abs(r - b) <= 4)).sum()),
        "red": int((r - np.maximum(g, b) > 80).sum()),
        "grey": int(((np.abs(r - g) <= 1) & (np.abs(g - b) <= 1) & (r >= 215) & (r <= 235)).sum()),
    }


# ============================================================================== the filter
@pytest.mark.parametrize("sigma", [0.3, 0.85, 1.7, 4.0])
def test_kernel_is_scipys(sigma):
    # reference library: the impulse response of scipy.ndimage.gaussian_filter1d
    k = gaussian_kernel1d(sigma)
    r = (len(k) - 1) // 2
    impulse = np.zeros(201)
    impulse[100] = 1.0
    ref = ndimage.gaussian_filter1d(impulse, sigma)
    assert np.allclose(ref[100 - r:101 + r], k, rtol=0, atol=1e-15)
    assert abs(ref.sum() - k.sum()) < 1e-12  # nothing beyond the truncation


@pytest.mark.parametrize("fwhm", [0.0, 1.0, 4.5, 12.0])
def test_filtering_a_box_equals_scipy_gaussian_filter(fwhm):
    # reference library: scipy.ndimage.gaussian_filter on the whole array (anisotropic voxels
    # in mm, borders reflected); the box filter reads only the box grown by the radius
    rng = np.random.default_rng(4)
    data = rng.normal(100.0, 10.0, size=(30, 41, 37)).astype(np.float32)
    pf = PostFilter(fwhm, (3.0, 2.0, 2.5))
    whole = ndimage.gaussian_filter(data.astype(np.float64), pf.sigma_vox, mode="reflect", truncate=4.0)
    boxes = [(slice(0, 30), slice(0, 41), slice(0, 37)), (slice(10, 18), slice(5, 30), slice(20, 22)),
             (slice(0, 1), slice(40, 41), slice(0, 5)), (slice(29, 30), slice(0, 3), slice(36, 37))]
    for box in boxes:
        assert np.max(np.abs(pf.filter_box(data, box) - whole[box])) < 2e-5 * 100.0, box
    if fwhm == 0:
        assert pf.is_identity and np.array_equal(pf.filter_box(data, boxes[1]), data[boxes[1]])


def test_filter_variance_and_autocorrelation_are_gaussian():
    # mathematics: a sampled Gaussian wider than a voxel has variance sigma^2, and its
    # autocorrelation is a Gaussian of SD sqrt(2) sigma
    pf = PostFilter(9.0, (2.0, 2.0, 2.0))
    s = pf.sigma_vox[0]
    assert pf.variance_mm2 == pytest.approx(pf.sigma_mm**2, rel=1e-3)  # (truncation at 4 sigma: -0.015 %)
    a = pf.autocorrelations()[0]
    x = np.arange(len(a)) - (len(a) - 1) / 2
    g = np.exp(-x * x / (4 * s * s))
    assert np.max(np.abs(a / a.max() - g / g.max())) < 2e-4
    # a filter narrower than a voxel is applied with less variance than nominal (said in a warning)
    assert PostFilter(1.0, (2.0, 2.0, 2.0)).variance_mm2 < 0.01 * PostFilter(1.0, (2.0, 2.0, 2.0)).sigma_mm ** 2


def _noise_model(lags=4, sigma_vox=1.2, variance=4.0, spacing=(2.0, 2.0, 2.0)):
    g = np.meshgrid(*[np.arange(-lags, lags + 1)] * 3, indexing="ij")
    rho = np.exp(-(g[0] ** 2 + g[1] ** 2 + g[2] ** 2) / (4 * sigma_vox**2))
    return NOISE.NoiseModel(variance * rho, variance, 100.0, 1000, spacing, 1.0)


def test_filtered_noise_matches_filtered_noise_fields():
    # Monte Carlo (JCGM 101): 300 stationary fields with the model's autocovariance
    # (phantometry.noise.simulate_noise, itself checked against its model), each filtered by
    # scipy.ndimage.gaussian_filter; their voxel variance, lag covariances and the variance of
    # a ball ROI's mean must match the filtered model (C * (g * g~)) and its quadratic form
    noise = _noise_model()
    pf = PostFilter(5.0, (2.0, 2.0, 2.0))
    nf = filtered_noise(noise, pf)
    rng = np.random.default_rng(11)
    shape, n = (34, 34, 34), 300
    m = 2 * max(pf.radius_vox) + 2  # away from the reflected borders
    inner = (slice(m, shape[0] - m),) * 3
    grid = np.meshgrid(*[np.arange(s) - (s - 1) / 2 for s in shape], indexing="ij")
    ball = ((grid[0] ** 2 + grid[1] ** 2 + grid[2] ** 2) <= 16).astype(float)
    var, lag1, lag3, roi = [], [], [], []
    for chunk in range(6):
        fields = NOISE.simulate_noise(noise, shape, n // 6, rng)
        for f in fields:
            ff = ndimage.gaussian_filter(f.astype(np.float64), pf.sigma_vox, mode="reflect", truncate=4.0)
            core = ff[inner]
            var.append(np.mean(core * core))
            lag1.append(np.mean(core[1:] * core[:-1]))
            lag3.append(np.mean(core[:, 3:] * core[:, :-3]))
            roi.append(float(np.sum(ff * ball) / ball.sum()))
    c = tuple(k // 2 for k in nf.autocov_bq2_ml2.shape)
    assert np.mean(var) == pytest.approx(nf.variance_bq2_ml2, rel=0.04)
    assert np.mean(lag1) == pytest.approx(nf.autocov_bq2_ml2[c[0] + 1, c[1], c[2]], rel=0.05)
    assert np.mean(lag3) == pytest.approx(nf.autocov_bq2_ml2[c[0], c[1] + 3, c[2]], rel=0.06)
    predicted = nf.weighted_mean_variance(ball)
    assert np.var(roi, ddof=1) == pytest.approx(predicted, rel=0.2)  # 300 draws: the variance scatters by ~8 %
    # the filter lowered the noise, as it must
    assert nf.variance_bq2_ml2 < 0.5 * noise.variance_bq2_ml2


def test_filter_grid():
    assert filter_grid() == [0.25 * i for i in range(41)]
    assert filter_grid(1.0, 0.3) == [0.0, 0.3, 0.6, 0.9]
    for mx, st in [(0, 0.25), (-1, 0.25), (math.nan, 0.25), (100, 0.25), (10, 0), (10, 20), (10, 0.01), (10, math.inf)]:
        with pytest.raises(InputError):
            filter_grid(mx, st)


# ============================================================================== re-reading the body
@pytest.fixture(scope="module", params=["tilted", "square"])
def body(request):
    """A noisy 3 mm scan at 10:1: tilted (its planes interpolated) or square to the slices (nearest slices)."""
    rot = (1.5, -2.0, 35.0) if request.param == "tilted" else (0.0, 0.0, 20.0)
    res = synthesize(SynthSpec(voxel_mm=(3.0,) * 3, psf_fwhm_mm=5.0, sphere_ratio=10.0, background_kbq_ml=2.0, noise_cv=0.08,
                               rotation_deg=rot, shift_mm=(3, -2, 1), seed=2))
    fill = FillRecord.from_dict(res.fill_record)
    analysis = measure_volume(res.volume, TPL, fill)
    return {"res": res, "fill": fill, "analysis": analysis, "mode": request.param}


ALL_KEYS = ([(s, m) for s in SPHERES for m in ("rc_max", "rc_mean", "rc_peak", "percent_contrast", "background_variability_pct")]
            + [("sphere_22mm", "centre_x_mm"), ("lung_insert", "lung_residual_pct"), ("background", "mean_bq_ml"),
               ("background", "activity_recovery"), ("phantom", "effective_fwhm_mm")])


def test_reread_without_filter_gives_the_analysis_values_and_uncertainties(body):
    a = body["analysis"]
    assert (a.sampler.mode == "interpolated") == (body["mode"] == "tilted")
    rr = a.reread(ALL_KEYS)
    values, state = rr.read(a.volume, 0.0)
    old = {(r.roi, r.metric): r for r in a.rows}
    for k in ALL_KEYS:
        assert values[k] == pytest.approx(old[k].value, rel=1e-9, abs=1e-12), k
    us = rr.uncertainties(a.volume, a.noise, 0.0, state)
    for k in ALL_KEYS:
        if old[k].uncertainty is None:
            assert us[k] is None, k
        else:  # the same propagation and the same simulation draws as measure
            assert us[k] == pytest.approx(old[k].uncertainty, rel=1e-6), k


def test_reread_on_filtered_boxes_equals_the_whole_filtered_image(body):
    a = body["analysis"]
    rr = a.reread(ALL_KEYS)
    pf = PostFilter.for_volume(5.5, a.volume)
    w = _Worker(a.volume)
    for box in rr.boxes:
        w.data[box] = pf.filter_box(a.volume.data, box)
    on_boxes, _ = rr.read(w.volume, pf.variance_mm2)
    whole = a.volume.with_data(ndimage.gaussian_filter(a.volume.data, pf.sigma_vox, mode="reflect", truncate=4.0))
    on_whole, _ = rr.read(whole, pf.variance_mm2)
    for k in ALL_KEYS:
        assert on_boxes[k] == pytest.approx(on_whole[k], rel=2e-5, abs=1e-9), k
    # the filter lowered every sphere's recovery and its background variability
    old = a.values()
    for s in SPHERES:
        assert on_boxes[(s, "rc_max")] < old[(s, "rc_max")] and on_boxes[(s, "background_variability_pct")] < old[(s, "background_variability_pct")]
    # effective resolution composed with the filter (mathematics: variances add)
    assert on_boxes[("phantom", "effective_fwhm_mm")] == pytest.approx(math.hypot(old[("phantom", "effective_fwhm_mm")], 5.5), rel=2e-3)


def test_the_sweep_equals_measure_on_the_filtered_image(body, tmp_path):
    # the ROIs kept against a full analysis of the filtered image (found again): RC max and mean
    a = body["analysis"]
    bands = wide_bands(tmp_path, metrics=("rc_max", "rc_mean"))
    h = harmonise_analysis(a, [bands], max_fwhm_mm=6.0, step_mm=3.0, uncertainties=False)
    pf = PostFilter.for_volume(6.0, a.volume)
    filtered = a.volume.with_data(ndimage.gaussian_filter(a.volume.data, pf.sigma_vox, truncate=4.0))
    again = measure_volume(filtered, TPL, body["fill"], uncertainties=False, resolution=False).values()
    last = h.steps[-1]
    for s in SPHERES:
        for m in ("rc_max", "rc_mean"):
            assert last.row((s, m)).value == pytest.approx(again[(s, m)], rel=2e-3), (s, m)


# ============================================================================== known truth: Gaussians compose
@pytest.mark.slow
def test_gaussians_compose(tmp_path):
    # mathematics: filtering a noise-free scan of point response a by f gives the scan of
    # sqrt(a^2 + f^2); values within 0.5 % (RC max, RC mean) and 1 % (RC peak) of measure on a
    # scan synthesised at that width (same grid, so the voxels sample the spheres alike)
    a_fwhm, spec = 5.0, dict(voxel_mm=(2.5,) * 3, matrix=(134, 109, 90), sphere_ratio=10.0, background_kbq_ml=2.0, noise_cv=0.0,
                             rotation_deg=(0.0, 0.0, 15.0), shift_mm=(2.0, -1.0, 0.5))
    res = synthesize(SynthSpec(psf_fwhm_mm=a_fwhm, **spec))
    fill = FillRecord.from_dict(res.fill_record)
    analysis = measure_volume(res.volume, TPL, fill, uncertainties=False)
    h = harmonise_analysis(analysis, [wide_bands(tmp_path)], max_fwhm_mm=8.0, step_mm=2.0, uncertainties=False)
    # a filter narrower than about a voxel is a sampled kernel of less variance than nominal
    # (scipy's, as the scanner's would be sampled too): it composes with the width it applies,
    # FWHM_PER_SIGMA * sqrt(variance), which the sweep records (measured: 2 mm nominal on
    # 2.5 mm voxels applies 0.94 mm; against the nominal width the values differ by 5 %)
    for f in (2.0, 4.0, 6.0, 8.0):
        step = h.steps[h.fwhms.index(f)]
        applied = FWHM_PER_SIGMA * math.sqrt(step.variance_mm2)
        if f >= 4.0:
            assert applied == pytest.approx(f, rel=5e-3)
        else:
            assert applied < 0.6 * f
        composed = synthesize(SynthSpec(psf_fwhm_mm=math.hypot(a_fwhm, applied), **spec))
        ref = measure_volume(composed.volume, TPL, fill, uncertainties=False, resolution=False).values()
        for s in SPHERES:
            for m, tol in (("rc_max", 0.005), ("rc_mean", 0.005), ("rc_peak", 0.01)):
                assert step.row((s, m)).value == pytest.approx(ref[(s, m)], rel=tol), (f, s, m)


# ============================================================================== known truth: bands at 10:1
@pytest.fixture(scope="module")
def sharp_scan():
    """A 2.5 mm scan at 4 mm FWHM, 10:1 (the harmonisation bands' ratio), modest noise."""
    res = synthesize(SynthSpec(voxel_mm=(2.5,) * 3, psf_fwhm_mm=4.0, sphere_ratio=10.0, background_kbq_ml=2.0, noise_cv=0.05,
                               rotation_deg=(0.0, 0.0, 20.0), shift_mm=(3.0, -2.0, 1.0), seed=3))
    fill = FillRecord.from_dict(res.fill_record)
    return res, fill, harmonise_volume(res.volume, TPL, fill, [EANM_2015])


def test_recommended_filter_passes_and_just_outside_fails(sharp_scan):
    res, fill, h = sharp_scan
    o = h.overall
    assert o.found and o.low_mm > 0 and o.low_mm <= o.recommended_mm <= o.high_mm < h.max_fwhm_mm
    assert not h.steps[0].passes  # a 4 mm reconstruction recovers too much for these bands

    def measured(fwhm):
        pf = PostFilter.for_volume(fwhm, res.volume)
        vol = res.volume.with_data(ndimage.gaussian_filter(res.volume.data, pf.sigma_vox, truncate=4.0))
        return measure_volume(vol, TPL, fill, bands=[EANM_2015])

    at = measured(o.recommended_mm)
    judged = [r for r in at.rows if r.verdict is not None]
    assert len(judged) == 12 and all(r.verdict == "pass" for r in judged), [(r.roi, r.metric, r.value) for r in judged if r.verdict != "pass"]
    for fwhm in (o.low_mm - h.step_mm, o.high_mm + h.step_mm):
        out = measured(fwhm)
        assert any(r.verdict == "fail" for r in out.rows), fwhm
    # what limits each end is named, from the filter just beyond it
    assert o.low_end.beyond_mm == o.low_mm - h.step_mm and all(d["side"] == "above" for d in o.low_end.limits)
    assert o.high_end.beyond_mm == o.high_mm + h.step_mm and all(d["side"] == "below" for d in o.high_end.limits)
    # the recommendation is the passing filter closest to the band centres
    passing = [s for s in h.steps if s.passes]
    assert min(passing, key=lambda s: s.distance).fwhm_mm == o.recommended_mm
    assert h.by_set["eanm-fdg-2015"].recommended_mm == o.recommended_mm


def test_uncertainties_are_simulated_at_nodes_and_interpolated_between(sharp_scan):
    _, _, h = sharp_scan
    rec = h.recommended
    assert all(v == "simulation" for v in rec.uncertainty_from.values())
    for s in h.steps:
        kinds = set(s.uncertainty_from.values())
        assert kinds == ({"simulation"} if s.fwhm_mm in h.nodes_mm or s is rec else {"interpolated"}), s.fwhm_mm
        assert all(r.uncertainty is not None and r.uncertainty > 0 for r in s.rows)
    # filtering lowers the noise of the 37 mm sphere's RC mean
    key = ("sphere_37mm", "rc_max")
    assert h.steps[-1].row(key).uncertainty < h.steps[0].row(key).uncertainty


def test_outputs_of_a_sweep(sharp_scan, tmp_path):
    from phantometry.harmonise import write_harmonisation

    _, _, h = sharp_scan
    names = write_harmonisation(h, tmp_path)
    assert sorted(names) == ["harmonisation.csv", "harmonisation.json", "harmonisation.png"]
    doc = json.loads((tmp_path / "harmonisation.json").read_text(encoding="utf-8"))
    assert doc["schema_version"] == 1
    assert doc["recommended_fwhm_mm"] == h.overall.recommended_mm
    assert doc["passing_range_mm"] == [h.overall.low_mm, h.overall.high_mm] and doc["passing_range_reason"] is None
    assert doc["band_sets"]["eanm-fdg-2015"]["passing_range_mm"] == doc["passing_range_mm"]
    assert {r["verdict"] for r in doc["at_recommendation"]} == {"pass"} and len(doc["at_recommendation"]) == 12
    assert doc["lower_end"]["limited_by"] and doc["upper_end"]["limited_by"]
    rows = list(csv.DictReader(open(tmp_path / "harmonisation.csv", encoding="utf-8")))
    assert list(rows[0]) == CSV_COLUMNS and len(rows) == 41 * 12
    at_rec = {(r["roi"], r["metric"]): r for r in rows if float(r["filter_fwhm_mm"]) == h.overall.recommended_mm}
    for r in doc["at_recommendation"]:
        assert float(at_rec[(r["roi"], r["metric"])]["value"]) == pytest.approx(r["value"], rel=1e-9)
    # the width applied: the nominal one from about a voxel (2.5 mm) up, less below it
    applied = {float(r["filter_fwhm_mm"]): float(r["applied_fwhm_mm"]) for r in rows}
    assert applied[0.0] == 0.0 and applied[1.0] < 0.05 and 0.5 < applied[2.0] < 1.5
    assert all(a == pytest.approx(f, rel=5e-3) for f, a in applied.items() if f >= 4.0)
    png = (tmp_path / "harmonisation.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20_000
    # the bands shaded, the passing range shaded and the recommendation drawn
    colours = picture_colours(tmp_path / "harmonisation.png")
    assert colours["grey"] > 50_000 and colours["green"] > 10_000 and colours["red"] > 500, colours


# ============================================================================== uncertainty by realisations
@pytest.mark.slow
def test_uncertainty_of_filtered_values_matches_realisations(tmp_path):
    # Known truth by simulation: 40 noise realisations (the synthesizer's noise law) of one
    # noise-free 3 mm scan, each filtered at 6 mm by scipy.ndimage.gaussian_filter and read with
    # the ROIs kept; the sweep's standard uncertainty at 6 mm (mean over 4 realisations, each
    # from its own noise estimate) must match the SD across realisations within 30 % (40
    # samples: the SD itself scatters by about 11 %).
    base = synthesize(SynthSpec(voxel_mm=(3.0,) * 3, psf_fwhm_mm=5.0, noise_cv=0.0, sphere_ratio=10.0, background_kbq_ml=2.0,
                                rotation_deg=(0.0, 0.0, 20.0)))
    fill = FillRecord.from_dict(base.fill_record)
    img = base.volume.data.astype(np.float64)
    b, cv = 2000.0, 0.12
    scale = cv * np.sqrt(np.clip(img, 0, None) * b)

    def realisation(seed):
        n = correlated_unit_noise(img.shape, 5.0, base.volume.spacing_mm, np.random.default_rng(500 + seed))
        return base.volume.with_data((img + scale * n).astype(np.float32))

    keys = [(s, m) for s in SPHERES for m in ("rc_max", "rc_mean")] + [("sphere_17mm", "percent_contrast"), ("background", "mean_bq_ml")]
    bands = load_band_set(str(wide_bands(tmp_path, metrics=("rc_max", "rc_mean"), extra=[
        {"roi": "sphere_17mm", "metric": "percent_contrast", "low": 0, "high": 200},
        {"roi": "background", "metric": "mean_bq_ml", "low": 0, "high": 1e6}])))
    predicted = {k: [] for k in keys}
    reread = None
    for seed in range(4):
        a = measure_volume(realisation(seed), TPL, fill, uncertainties=False)
        if reread is None:
            reread = a.reread(keys)
        h = harmonise_analysis(a, [bands], max_fwhm_mm=6.0, step_mm=6.0)
        for k in keys:
            predicted[k].append(h.steps[-1].row(k).uncertainty)
    pf = PostFilter.for_volume(6.0, base.volume)
    values = {k: [] for k in keys}
    for seed in range(100, 140):
        vol = realisation(seed)
        vol = vol.with_data(ndimage.gaussian_filter(vol.data, pf.sigma_vox, truncate=4.0))
        got, _ = reread.read(vol, pf.variance_mm2)
        for k in keys:
            values[k].append(got[k])
    ratios = {k: np.mean(predicted[k]) / np.std(values[k], ddof=1) for k in keys}
    bad = {f"{k[0]} {k[1]}": round(v, 3) for k, v in ratios.items() if not 0.7 <= v <= 1.3}
    assert not bad, bad


# ============================================================================== the command
@pytest.fixture(scope="module")
def scans(tmp_path_factory):
    """Small 4 mm DICOM scans at 10:1: sharp (4 mm FWHM) and already too blurred (12 mm)."""
    root = tmp_path_factory.mktemp("harmonise_scans")
    out = {}
    for name, fwhm in (("sharp", 4.0), ("blurred", 12.0)):
        res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=fwhm, sphere_ratio=10.0, background_kbq_ml=2.0, noise_cv=0.04,
                                   rotation_deg=(0.0, 0.0, 15.0), seed=1))
        out[name] = write_synthetic(res, root / name, "dicom")
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=4.0, sphere_ratio=10.0, background_kbq_ml=2.0, noise_cv=0.04, seed=1))
    out["nifti"] = write_synthetic(res, root / "nifti", "nifti")
    return out


def test_no_passing_filter_exit_0_and_strict_3(scans, tmp_path):
    s = scans["blurred"]
    r = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", tmp_path / "h")
    assert r.returncode == 0, r.stderr
    doc = json.loads((tmp_path / "h" / "harmonisation.json").read_text(encoding="utf-8"))
    assert doc["passing_range_mm"] is None and doc["recommended_fwhm_mm"] is None
    assert "already" in doc["passing_range_reason"] and "too little" in doc["passing_range_reason"]
    said = " ".join(r.stdout.split())
    assert "no filter meets every band" in said and "reconstruct the phantom on the scanner" in said
    colours = picture_colours(tmp_path / "h" / "harmonisation.png")  # bands, but no range and no recommendation
    assert colours["grey"] > 50_000 and colours["green"] == 0 and colours["red"] == 0, colours
    r = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", tmp_path / "h2", "--strict", "--write-filtered",
            "--max-fwhm", "4", "--step", "1")
    assert r.returncode == 3, r.stderr
    assert (tmp_path / "h2" / "harmonisation.json").exists() and not (tmp_path / "h2" / "filtered").exists()
    assert "no filtered image written" in " ".join(r.stdout.split())


def test_command_writes_a_measurable_filtered_series(scans, tmp_path):
    s = scans["sharp"]
    out = tmp_path / "h"
    r = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", out, "--write-filtered", "--strict")
    assert r.returncode == 0, r.stderr
    said = " ".join(r.stdout.split())
    doc = json.loads((out / "harmonisation.json").read_text(encoding="utf-8"))
    rec = doc["recommended_fwhm_mm"]
    lo, hi = doc["passing_range_mm"]
    assert f"recommended: {rec:g} mm FWHM" in said and f"every band met from {lo:g} to {hi:g} mm" in said
    assert "lower end:" in said and "upper end:" in said
    marker = json.loads((out / ".phantometry-results.json").read_text(encoding="utf-8"))
    assert marker["kind"] == "harmonise" and "filtered/" in marker["entries"]
    src = pydicom.dcmread(sorted(Path(s["image"]).glob("*.dcm"))[0])
    files = sorted((out / "filtered").glob("*.dcm"))
    assert len(files) == len(list(Path(s["image"]).glob("*.dcm")))
    ds = pydicom.dcmread(files[0])
    assert list(ds.ImageType) == ["DERIVED", "SECONDARY"] and f"Gaussian {rec:g} mm" in ds.SeriesDescription
    assert ds.SeriesInstanceUID != src.SeriesInstanceUID and ds.SOPInstanceUID != src.SOPInstanceUID
    assert ds.StudyInstanceUID == src.StudyInstanceUID and ds.FrameOfReferenceUID == src.FrameOfReferenceUID
    assert f"{rec:g} mm FWHM" in ds.DerivationDescription
    # measured like any scan, it gives the sweep's values at the recommendation and passes
    m = run("measure", out / "filtered", "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", tmp_path / "m", "--strict")
    assert m.returncode == 0, m.stdout[-2000:] + m.stderr
    rows = {(x["roi"], x["metric"]): x for x in csv.DictReader(open(tmp_path / "m" / "measurements.csv", encoding="utf-8"))}
    for v in doc["at_recommendation"]:
        assert float(rows[(v["roi"], v["metric"])]["value"]) == pytest.approx(v["value"], rel=2e-3)
        assert rows[(v["roi"], v["metric"])]["verdict"] == "pass"
    # the same folder again: refused without --overwrite, replaced with it
    again = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", out)
    lines = [x for x in again.stderr.splitlines() if x.strip()]
    assert again.returncode == 2 and len(lines) == 1 and "--overwrite" in lines[0]
    again = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", out, "--overwrite", "--max-fwhm", "2",
                "--step", "1")
    assert again.returncode == 0 and "replaced the earlier harmonise results folder" in " ".join(again.stdout.split())
    assert not (out / "filtered").exists()


def test_command_with_nifti_writes_nifti(scans, tmp_path):
    from phantometry.io.nifti import load_nifti

    s = scans["nifti"]
    out = tmp_path / "h"
    r = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--bands", "eanm-fdg-2018", "--out", out,
            "--write-filtered", "--max-fwhm", "8", "--step", "0.5")
    assert r.returncode == 0, r.stderr
    doc = json.loads((out / "harmonisation.json").read_text(encoding="utf-8"))
    assert doc["method"]["fwhm_mm"] == {"from": 0.0, "to": 8.0, "step": 0.5, "count": 17}
    assert set(doc["band_sets"]) == {"eanm-fdg-2015", "eanm-fdg-2018"}
    if doc["recommended_fwhm_mm"] is None:  # the two specifications may not overlap for this scan
        assert not (out / "filtered.nii.gz").exists()
    else:
        vol = load_nifti(out / "filtered.nii.gz")
        assert vol.data.shape == load_nifti(s["image"]).data.shape
    assert "eanm-fdg-2015:" in " ".join(r.stdout.split())  # each band set's own range


def test_other_kinds_and_bad_sweeps_are_refused_in_one_line(scans, tmp_path):
    s = scans["sharp"]
    cases = [
        (["--template", "small-animal"], "small-animal"),
        (["--max-fwhm", "0"], "--max-fwhm"),
        (["--max-fwhm", "nan"], "--max-fwhm"),
        (["--step", "20"], "--step"),
        (["--bands", "uniform-cylinder-calibration"], "uniform-cylinder-calibration"),
    ]
    for extra, named in cases:
        args = ["harmonise", s["image"], "--fill", s["fill"], "--out", tmp_path / "h"]
        if "--bands" not in extra:
            args += ["--bands", "eanm-fdg-2015"]
        r = run(*args, *extra)
        lines = [x for x in r.stderr.splitlines() if x.strip()]
        assert r.returncode == 2 and len(lines) == 1 and lines[0].startswith("phantometry: error: ") and named in lines[0], (extra, r.stderr)
        assert "Traceback" not in r.stderr and not (tmp_path / "h").exists()


# ============================================================================== compare --harmonise
def test_compare_harmonise(tmp_path):
    from phantometry.synth import write_synthetic_family

    fam = write_synthetic_family(tmp_path / "recons", [dict(fwhm_mm=4.0, noise_cv=0.04), dict(fwhm_mm=12.0, noise_cv=0.04)],
                                 voxel_mm=4.0, sphere_ratio=10.0)
    out = tmp_path / "cmp"
    r = run("compare", tmp_path / "recons", "--fill", fam["fill"], "--bands", "eanm-fdg-2015", "--out", out, "--workers", "1",
            "--harmonise", "--report")
    assert r.returncode == 0, r.stderr
    rows = [x for x in csv.DictReader(open(out / "comparison.csv", encoding="utf-8")) if x["roi"] == "harmonisation"]
    assert len(rows) == 6
    by = {(x["label"], x["metric"]): x for x in rows}
    labels = sorted({x["label"] for x in rows})
    sharp = [lab for lab in labels if "4mm" in lab][0]
    blurred = [lab for lab in labels if "12mm" in lab][0]
    assert float(by[(sharp, "recommended_filter_fwhm_mm")]["value"]) > 0
    assert by[(blurred, "recommended_filter_fwhm_mm")]["value"] == "" and "already" in by[(blurred, "recommended_filter_fwhm_mm")]["note"]
    ranking = list(csv.DictReader(open(out / "ranking.csv", encoding="utf-8")))
    assert "recommended_filter_fwhm_mm" in ranking[0] and "filter_note" in ranking[0]
    for series in ("series_001", "series_002"):
        assert (out / "series" / series / "harmonisation.json").exists()
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "harmonising filter" in html
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert all("harmonisation" in s for s in summary["series"])
    said = " ".join(r.stdout.split())
    assert "filter (passing range)" in said
    # without bands there is nothing to aim for: refused before any work
    r = run("compare", tmp_path / "recons", "--fill", fam["fill"], "--out", tmp_path / "cmp2", "--harmonise")
    lines = [x for x in r.stderr.splitlines() if x.strip()]
    assert r.returncode == 2 and len(lines) == 1 and "--harmonise" in lines[0] and not (tmp_path / "cmp2").exists()


# ============================================================================== site time
def test_timezone_is_read_as_measure_reads_it(tmp_path):
    # a scan whose DICOM times carry no UTC offset: --timezone gives the site's zone, as for
    # measure (phantometry.sitetime); a zone that does not exist is refused in one line
    from datetime import datetime
    from zoneinfo import ZoneInfo

    spec = SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=4.0, sphere_ratio=10.0, background_kbq_ml=2.0, noise_cv=0.04,
                     acquired_at=datetime(2026, 10, 25, 3, 10, tzinfo=ZoneInfo("Europe/Berlin")), fill_measured_before_s=7200.0)
    s = write_synthetic(synthesize(spec), tmp_path / "scan", "dicom", local_times=True)
    out = tmp_path / "h"
    r = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", out, "--max-fwhm", "2", "--step", "1",
            "--timezone", "Europe/Berlin")
    assert r.returncode == 0, r.stderr
    doc = json.loads((out / "harmonisation.json").read_text(encoding="utf-8"))
    assert doc["series"]["time_basis"] == "given zone" and doc["series"]["time_zone"] == "Europe/Berlin (--timezone)"
    assert doc["series"]["acquired_at"].endswith("+01:00")  # 03:10 on the night the clocks went back: winter time
    bad = run("harmonise", s["image"], "--fill", s["fill"], "--bands", "eanm-fdg-2015", "--out", tmp_path / "h2", "--timezone", "Mars/Olympus")
    lines = [x for x in bad.stderr.splitlines() if x.strip()]
    assert bad.returncode == 2 and len(lines) == 1 and "Mars/Olympus" in lines[0] and not (tmp_path / "h2").exists()
