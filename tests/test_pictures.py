"""Every picture checked for what can be checked without looking at it: a colour bar where the
grey scale needs one, no text over another text, every setting in a chart's key (and the
failed ones listed), orientation letters that follow the image's affine, the A50 VOI drawn on
exactly the voxels it measured, the display window, words instead of code names.

The renderer records what it drew (:class:`phantometry.figures.DrawnOverlay`, ``gid`` on the
charts' artists), so no test reads pixels.
"""

from __future__ import annotations

import dataclasses
import math
import re
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
from matplotlib.path import Path as MplPath

from phantometry import figures as F
from phantometry.bands import load_band_set
from phantometry.fill import FillRecord
from phantometry.ledger import Trend, TrendFlag, TrendPoint, control_limits
from phantometry.ledger.chart import trend_figure
from phantometry.ledger.rules import RULE_BEYOND_3SIGMA
from phantometry.measure import judge, measure_volume
from phantometry.phantoms import kind_of, load_template
from phantometry.results import Measurement as _Measurement
from phantometry.rois import isocontour_mean, isocontour_voi, peak_search
from phantometry.synth import SynthSpec, synthesize

ROOT = Path(__file__).resolve().parents[1]
IEC = load_template("iec-body")


def _clean(fig) -> None:
    """No text over another and none cut off at the figure's edge."""
    assert F.text_overlaps(fig) == []
    assert F.texts_outside(fig) == []


def _texts(fig) -> list[str]:
    from matplotlib.text import Text

    return [t.get_text() for t in fig.findobj(Text) if t.get_visible() and t.get_text().strip()]


# ============================================================================== body phantom
@pytest.fixture(scope="module")
def body10():
    """A 10:1 body scan (3 mm voxels, 10 % noise), untilted: the sphere plane is a stored slice."""
    res = synthesize(SynthSpec(voxel_mm=(3.0, 3.0, 3.0), psf_fwhm_mm=6.0, noise_cv=0.1, sphere_ratio=10.0, shift_mm=(3, -2, 1),
                               rotation_deg=(0, 0, 25), seed=11))
    fill = FillRecord.from_dict(res.fill_record)
    analysis = measure_volume(res.volume, IEC, fill, uncertainties=False, resolution=False)
    return {"res": res, "fill": fill, "analysis": analysis, "drawn": F.draw_overlay(analysis.overlay())}


def _flipped_columns(volume):
    """The same scan stored with its columns in the opposite order (the same world positions):
    what a scanner writing right-to-left columns gives."""
    aff = volume.affine.copy()
    nx = volume.shape[2]
    aff[:3, 3] = aff[:3, 3] + (nx - 1) * aff[:3, 0]
    aff[:3, 0] = -aff[:3, 0]
    return dataclasses.replace(volume, data=volume.data[:, :, ::-1].copy(), affine=aff)


def test_body_overlay_has_colour_bar_scale_bar_letters_and_no_overlapping_text(body10):
    drawn = body10["drawn"]
    fig = drawn.figure
    _clean(fig)
    assert len(drawn.views) == 2  # untilted: the stored slice is the plane measured
    for v in drawn.views:
        assert v.colorbar_axes is not None and v.colorbar_axes in fig.axes
        assert "Bq/mL" in v.colorbar_axes.get_ylabel() and "background" in v.colorbar_axes.get_ylabel()
        assert set(v.letters) == {"left", "right", "top", "bottom"}
    assert any(re.fullmatch(r"\d+ mm", t) for t in _texts(fig))  # the scale bar's label


def test_orientation_letters_follow_the_affine_and_a_flipped_scan_shows_flipped_letters(body10):
    # DICOM patient coordinates (PS3.3 C.7.6.2.1.1): +x towards the patient's left, +y posterior.
    # The synthesiser stores columns along +x and rows along +y, shown rows downwards: the
    # radiological view, L on the right, A on top (common practice in viewers).
    vol = body10["res"].volume
    assert np.allclose(vol.axes_world[2], [1, 0, 0]) and np.allclose(vol.axes_world[1], [0, 1, 0])
    assert body10["drawn"].views[0].letters == {"right": "L", "left": "R", "top": "A", "bottom": "P"}
    flipped = _flipped_columns(vol)
    analysis = measure_volume(flipped, IEC, body10["fill"], uncertainties=False, resolution=False)
    letters = F.draw_overlay(analysis.overlay()).views[0].letters
    assert letters == {"right": "R", "left": "L", "top": "A", "bottom": "P"}
    # the same phantom: the spheres are found where they were (world mm)
    for s in IEC.spheres:
        assert np.allclose(analysis.placement.insert_centre(s.name), body10["analysis"].placement.insert_centre(s.name), atol=0.05)
    # NIfTI scanner coordinates (RAS: +x right, +y anterior): the same directions read R and P
    assert F.orientation_letters([1, 0, 0], "RAS") == "R" and F.orientation_letters([0, 1, 0], "RAS") == "A"
    assert F.orientation_letters([0, 0, -1], "LPS") == "I"
    assert F.orientation_letters([math.cos(0.5), math.sin(0.5), 0], "LPS") == "LP"  # oblique: both letters, larger first


def test_a50_contour_is_drawn_on_the_voxels_it_measured(body10):
    analysis, drawn = body10["analysis"], body10["drawn"]
    vol = analysis.volume
    view = drawn.views[0]
    plane = view.view.plane
    k = int(np.rint(vol.world_to_index(plane.origin_mm)[0]))
    c_b = analysis.value("background", "mean_bq_ml")
    nv, nu = plane.values.shape
    cc, rr = np.meshgrid(np.arange(nu) * plane.pixel_mm, np.arange(nv) * plane.pixel_mm)
    centres = np.c_[cc.ravel(), rr.ravel()]
    checked = 0
    for s in IEC.spheres:
        name = f"{s.name} A50"
        centre = analysis.placement.insert_centre(s.name)
        box, voi, _ = isocontour_voi(vol, centre, s.diameter_mm, c_b, 0.5)
        kk, jj, ii = np.nonzero(voi)
        on_slice = {(int(j + box[1].start), int(i + box[2].start)) for kq, j, i in zip(kk, jj, ii) if kq + box[0].start == k}
        if not on_slice:
            assert not view.masks.get(name)
            continue
        # the VOI drawn is the one measured: its mean over the true concentration is RC mean
        mean, _, _ = isocontour_mean(vol, centre, s.diameter_mm, c_b, 0.5)
        assert mean / analysis.true_insert_bq_ml[s.name] == pytest.approx(analysis.value(s.name, "rc_mean"), rel=1e-12)
        inside = np.zeros(len(centres), bool)
        for poly in view.masks[name]:
            inside ^= MplPath(poly).contains_points(centres)  # even-odd over the outline's polygons
        idx = np.rint(vol.world_to_index(plane.uv_to_world(centres[inside]))).astype(int)
        assert set(idx[:, 0].tolist()) == {k}
        assert {(int(j), int(i)) for j, i in idx[:, 1:]} == on_slice
        checked += 1
    assert checked >= 4  # the slice nearest the sphere plane crosses most spheres' VOIs


def test_body_overlay_draws_what_was_measured_and_explains_it(body10):
    analysis, drawn = body10["analysis"], body10["drawn"]
    view = drawn.views[0]
    shapes = {sh.name: sh for sh, _ in view.artists}
    vol, plane = analysis.volume, view.view.plane
    # the 1 mL peak sphere where peak_search put it (PERCIST, Wahl et al. 2009: 12.41 mm = 1 mL)
    _, peak = peak_search(vol, analysis.placement.insert_centre("sphere_22mm"), 22.0, 12.41)
    assert np.allclose(shapes["sphere_22mm peak"].centre_uv, plane.world_to_uv(peak))
    assert shapes["sphere_22mm peak"].size_mm == pytest.approx(12.41)
    # the background ROIs used, numbered by template position
    used = analysis.background_placement.index
    drawn_bg = [sh for sh, _ in view.artists if sh.role == "background"]
    assert len(drawn_bg) == len(used)
    assert sorted(int(sh.label.rstrip("*")) for sh in drawn_bg) == sorted(int(i) + 1 for i in used)
    assert "body outline" in shapes
    # the window shows the background: 2.5 x background, here a quarter of the 10:1 hot fill
    c_b = analysis.value("background", "mean_bq_ml")
    assert view.vmax == pytest.approx(2.5 * c_b) and view.vmax < 0.3 * max(analysis.true_insert_bq_ml.values())
    # red/blue, the outlines and the ring match in words
    words = " ".join(drawn.legend) + " " + drawn.caption
    for phrase in ("A50 isocontour", "peak sphere", "background ROI", "Ring match", "normalised correlation", "Orange-red: hot, blue: cold"):
        assert phrase in words.replace("\n", " "), phrase


def test_tilted_body_phantom_adds_the_plane_measured(demo_scan):
    # the demo scan is turned 1 and 2 degrees about x and y: the ROIs were measured on
    # interpolated planes, shown beside the stored slice
    res = demo_scan["result"]
    analysis = measure_volume(res.volume, IEC, FillRecord.from_dict(res.fill_record), uncertainties=False, resolution=False)
    drawn = F.draw_overlay(analysis.overlay())
    _clean(drawn.figure)
    assert len(drawn.views) == 3 and "interpolated" in drawn.views[1].view.title
    assert "interpolated" in drawn.caption


# ============================================================================== other kinds
def test_small_animal_labels_clear_every_other_outline():
    tpl = load_template("small-animal")
    res = synthesize(SynthSpec(phantom="small-animal", voxel_mm=(0.5,) * 3, psf_fwhm_mm=1.8, background_kbq_ml=150.0, noise_cv=0.1,
                               seed=2, rotation_deg=(0, 0, 35)))
    analysis = measure_volume(res.volume, tpl, FillRecord.from_dict(res.fill_record), uncertainties=False)
    drawn = F.draw_overlay(analysis.overlay())
    _clean(drawn.figure)
    view = drawn.views[0]
    ax = view.axes
    renderer = drawn.figure.canvas.get_renderer()
    circles = [(sh, ax.transData.transform(sh.centre_uv), sh.size_mm / 2 * abs(ax.transData.transform((1, 0))[0] - ax.transData.transform((0, 0))[0]))
               for sh, _ in view.artists if sh.kind == "circle"]
    assert len(circles) == 5
    for label in view.labels:
        x0, y0, x1, y1 = F._extent(label, renderer)
        for sh, (cx, cy), r in circles:
            if sh.label == label.get_text():
                continue
            near = math.hypot(max(x0 - cx, 0, cx - x1), max(y0 - cy, 0, cy - y1))
            far = max(math.hypot(x - cx, y - cy) for x in (x0, x1) for y in (y0, y1))
            assert not (near <= r <= far), f"label {label.get_text()!r} crosses {sh.name}"
    assert view.colorbar_axes is not None and "Rod match" in drawn.caption


def test_user_template_overlay_draws_the_analysed_vois():
    path = ROOT / "roi_templates" / "examples" / "site-rod-cylinder.yaml"
    tpl = load_template(str(path))
    res = synthesize(SynthSpec(phantom=str(path), voxel_mm=(3.0,) * 3, psf_fwhm_mm=6.0, noise_cv=0.1, seed=4))
    analysis = measure_volume(res.volume, tpl, FillRecord.from_dict(res.fill_record), uncertainties=False)
    drawn = F.draw_overlay(analysis.overlay())
    _clean(drawn.figure)
    f = kind_of(tpl).options(tpl).insert_voi_fraction
    tra = {sh.name: sh for sh, _ in drawn.views[0].artists}
    for ins in tpl.inserts:
        assert tra[ins.name].size_mm == pytest.approx(f * ins.diameter_mm)  # the VOI as analysed
        assert tra[f"{ins.name} wall"].size_mm == pytest.approx(ins.diameter_mm)
    lon = {sh.name: sh for sh, _ in drawn.views[1].artists}
    assert "reference" in lon and lon["reference"].size_mm == (120.0, 40.0)
    assert any(n in lon for n in (i.name for i in tpl.inserts))  # ROIs on the longitudinal view too
    assert "Match" in drawn.caption and "normalised correlation" in drawn.caption
    assert "series" in drawn.figure._suptitle.get_text() and "series  |" not in drawn.figure._suptitle.get_text()


# ============================================================================== comparison charts
def _rows(number: int, spread: float, fail: bool = False) -> list[_Measurement]:
    """Made-up rows of one setting: contrast and noise per sphere, RC per hot sphere."""
    from functools import partial

    Measurement = partial(_Measurement, series_uid=f"1.2.{number}", acquired_at="2026-11-03T10:30:00+01:00", template="iec-body")
    out = []
    for d in (10, 13, 17, 22, 28, 37):
        roi = f"sphere_{d}mm"
        rc = 1 - math.exp(-d / (8 + 0.05 * number)) + spread * number
        out += [Measurement(roi=roi, metric="percent_contrast", value=60 + 0.2 * number + d, unit="%", uncertainty=1.0),
                Measurement(roi=roi, metric="background_variability_pct", value=5 - 0.01 * number, unit="%", uncertainty=0.2),
                Measurement(roi=roi, metric="rc_max", value=rc + 0.1, unit="1", uncertainty=0.02,
                            verdict="fail" if fail and d == 10 else None),
                Measurement(roi=roi, metric="rc_mean", value=rc, unit="1", uncertainty=0.02),
                Measurement(roi=roi, metric="rc_peak", value=rc - 0.05, unit="1", uncertainty=0.02)]
    return out


DIAMETERS = {f"sphere_{d}mm": float(d) for d in (10, 13, 17, 22, 28, 37)}


def test_twelve_settings_keep_their_own_marker_and_colour():
    styles = [F.setting_style(n) for n in range(1, 25)]
    assert len({s["marker"] for s in styles[:12]}) == 12  # no shape repeated before the 13th setting
    assert len({(s["color"], s["marker"]) for s in styles}) == 24
    # Okabe & Ito (2008), "Color Universal Design": the eight colours of their palette
    assert set(F.SETTING_COLOURS) == {"#000000", "#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7", "#F0E442"}


@pytest.mark.parametrize("n", [3, 12])
def test_comparison_charts_list_every_setting_and_the_failed_ones_without_overlaps(n, tmp_path):
    # close values: the numbers beside the points and at the line ends crowd each other
    settings = [(i, f"OSEM {i} iterations, Gauss {4 + i % 3} mm", _rows(i, 0.002, fail=(i == 2))) for i in range(1, n + 1)]
    failed = [(n + 1, "uniform cylinder copy", "folder x: no cold axis insert (lung_insert) found inside the body")]
    for draw in (F.draw_contrast_noise, F.draw_recovery_curves):
        fig = draw(settings, DIAMETERS, failed=failed)
        _clean(fig)
        key = next(a for a in fig.findobj() if getattr(a, "get_gid", lambda: None)() == "settings_key")
        labels = [t.get_text() for t in key.get_texts()]
        for number, label, _ in settings:
            assert f"{number}: {label}" in labels
        gone = next(t for t in fig.texts if t.get_gid() == "failed_settings").get_text().replace("\n", " ")
        assert f"{n + 1}: uniform cylinder copy" in gone and "no cold axis insert" in gone
    fig = F.draw_recovery_curves(settings, DIAMETERS, failed=failed)
    for ax in fig.axes:
        if ax.get_title().startswith("RC"):
            assert ax.get_ylim()[0] == 0
            ends = [c for c in ax.get_children() if str(c.get_gid()).startswith("end_label_")]
            assert len(ends) == n
    # without band limits no band is drawn or named (a failed verdict is still marked hollow)
    assert not any("acceptance band" in t.lower() for t in _texts(fig))
    assert not [p for ax in fig.axes for p in ax.patches if p.get_hatch()]
    assert "hollow: outside the band" in _texts(fig)
    F.recovery_curves_chart(settings, DIAMETERS, tmp_path / "r.png", failed=failed)
    assert (tmp_path / "r.png").stat().st_size > 10_000


def test_body_comparison_captions_mention_bands_only_when_applied():
    kind = kind_of(IEC)
    from phantometry.phantoms.base import ComparedSetting

    fill = FillRecord.from_dict({"nuclide": "F-18", "background": {"concentration_kbq_ml": 5.3, "measured_at": "2026-11-03T10:30:00+01:00"},
                                 "spheres": {"ratio_to_background": 4}})
    settings = [ComparedSetting(1, "a", _rows(1, 0.0)), ComparedSetting(2, "b", [], error="no phantom found")]
    charts = kind.comparison_charts(IEC, fill, settings)
    assert all("band" not in c.caption for c in charts)
    assert all(c.kwargs["failed"] == [(2, "b", "no phantom found")] for c in charts)


def test_uniformity_comparison_lists_failed_settings():
    from phantometry.phantoms.uniform_cylinder import draw_uniformity_comparison

    points = [(i, f"setting {i}", {("uniform_volume", "activity_recovery"): (1 + 0.01 * i, 0.005),
                                    ("uniform_volume", "voxel_cv_pct"): (10 - i, 0.3)}) for i in range(1, 5)]
    fig = draw_uniformity_comparison(points, failed=[(5, "setting 5", "not a uniform cylinder")])
    _clean(fig)
    gone = next(t for t in fig.texts if t.get_gid() == "failed_settings").get_text()
    assert "5: setting 5" in gone
    ax = fig.axes[0]
    markers = {line.get_marker() for line in ax.get_lines() if str(line.get_gid()).startswith("setting_")}
    assert len(markers) == 4


# ============================================================================== recovery curve
def test_recovery_curve_speaks_of_bands_only_when_applied_and_explains_noise_bias(demo_scan):
    res = demo_scan["result"]
    analysis = measure_volume(res.volume, IEC, FillRecord.from_dict(res.fill_record), uncertainties=False)
    opts = kind_of(IEC).options(IEC)
    hot = [(s.name, float(s.diameter_mm), float(s.wall_mm), float(analysis.true_insert_bq_ml[s.name])) for s in IEC.spheres]
    args = (analysis.rows, hot, [s.diameter_mm for s in IEC.spheres], analysis.resolution)
    fig = F.draw_recovery_curve(*args, [], isocontour_fraction=opts.isocontour_fraction)
    _clean(fig)
    text = " ".join(_texts(fig)).lower()
    assert "grey box" not in text and "bands:" not in text and "no acceptance bands" in text
    # the demo scan (10 % noise) reads RC max above the noise-free model for the large spheres
    assert "noise bias" in text
    assert "band" not in analysis.picture_captions()["recovery_curve.png"]
    judge(analysis, [load_band_set("eanm-fdg-2015")])
    fig = F.draw_recovery_curve(*args, analysis.band_sets, isocontour_fraction=opts.isocontour_fraction)
    _clean(fig)
    assert "bands: eanm-fdg-2015" in " ".join(_texts(fig))
    assert "acceptance bands" in analysis.picture_captions()["recovery_curve.png"]
    for ax in fig.axes:
        assert ax.get_ylim()[0] == 0


# ============================================================================== trend chart
def _trend(band=(0.60, 0.85), fail_at=None) -> Trend:
    t0 = datetime(2026, 1, 5, 9, 0, tzinfo=timezone.utc)
    values = [0.70, 0.72, 0.71, 0.69, 0.73, 0.70, 0.72, 0.71, 0.80, 0.71]
    if fail_at is not None:
        values[fail_at] = band[0] - 0.02
    points = [TrendPoint(i + 1, f"uid-{i}", t0 + timedelta(days=30 * i), v, "1", 0.01, band[0], band[1],
                         "fail" if i == fail_at else "pass", i < 8) for i, v in enumerate(values)]
    lim = control_limits(values[:8], source="baseline #1")
    flag = TrendFlag(points[8].analysis_id, points[8].acquired_at, points[8].value, RULE_BEYOND_3SIGMA, "beyond 3 sigma", points[8].acquired_at)
    return Trend("Larkspur Valley Hospital (invented)", "LVH-PET1", "OSEM 3i21s", "sphere_10mm", "rc_max", "1", points, lim, [flag])


def test_trend_chart_reads_in_words_and_dates():
    fig = trend_figure(_trend())
    _clean(fig)
    ax = fig.axes[0]
    assert ax.get_ylabel() == "RC max (ratio)" and "rc_max" not in ax.get_title() and "10 mm sphere" in ax.get_title()
    ticks = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
    ticks = [t for t, tick in zip(ticks, ax.xaxis.get_major_ticks()) if ax.get_xlim()[0] <= tick.get_loc() <= ax.get_xlim()[1]]
    assert ticks and all(re.fullmatch(r"\d{1,2} [A-Z][a-z]{2}", t) for t in ticks), ticks  # never a lone year
    assert "2026" in ax.get_xlabel()


def test_trend_chart_keeps_the_data_in_view_and_marks_band_failures():
    fig = trend_figure(_trend(band=(0.2, 1.5), fail_at=None))
    _clean(fig)
    ax = fig.axes[0]
    lo, hi = ax.get_ylim()
    assert 0.6 < lo and hi < 0.9  # the far band does not squash the values
    gids = {a.get_gid() for a in ax.get_children() if a.get_gid()}
    assert {"band", "band_high_out_of_view", "band_low_out_of_view"} <= gids
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "band upper limit 1.5 (above)" in legend and "band lower limit 0.2 (below)" in legend
    tr = _trend(fail_at=3)
    fig = trend_figure(tr)
    _clean(fig)
    ax = fig.axes[0]
    marks = next(a for a in ax.get_children() if a.get_gid() == "band_failures")
    assert np.allclose(marks.get_ydata(), [tr.points[3].value])
    assert "outside the band" in [t.get_text() for t in ax.get_legend().get_texts()]


# ============================================================================== a failed run
def test_failed_run_picture_shows_the_message_and_where_it_looked(tmp_path):
    # too little contrast (1.2:1 at 30 % noise): the body, the axis and the plane searched are
    # found, the ring is not
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=8.0, noise_cv=0.3, sphere_ratio=1.2, seed=3))
    from phantometry.errors import PhantomNotFound

    with pytest.raises(PhantomNotFound) as err:
        measure_volume(res.volume, IEC, FillRecord.from_dict(res.fill_record), uncertainties=False, resolution=False)
    sketch = kind_of(IEC).failure_sketch(res.volume, IEC, "scan")
    assert sketch.axis_direction is not None and sketch.plane_point_mm is not None
    drawn = F.draw_diagnostic(res.volume, message=str(err.value), sketch=sketch)
    _clean(drawn.figure)
    assert str(err.value) in drawn.figure._suptitle.get_text().replace("\n", " ")
    names = {sh.name for v in drawn.views for sh, _ in v.artists}
    assert {"body found", "axis", "sphere plane searched"} <= names
    for v in drawn.views:  # a window on the body's level, not on the hottest voxel: the body is mid-grey
        assert v.vmax == pytest.approx(2.5 * sketch.level_bq_ml) and v.colorbar_axes is not None
    out = F.diagnostic_picture(res.volume, tmp_path / "f.png", message=str(err.value), sketch=sketch)
    assert out.stat().st_size > 10_000


def test_failed_run_picture_never_raises(tmp_path):
    from phantometry.volume import Volume

    empty = Volume(np.zeros((4, 5, 6), np.float32), np.eye(4), acquired_at=datetime(2026, 1, 1, tzinfo=timezone.utc))
    sketch = kind_of(IEC).failure_sketch(empty, IEC, "empty")
    assert sketch.inside_body is None and "no body found" in sketch.notes[0]
    out = F.diagnostic_picture(empty, tmp_path / "e.png", message="the image is empty", sketch=sketch)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    nan = Volume(np.full((4, 5, 6), np.nan, np.float32), np.eye(4))
    assert F.diagnostic_picture(nan, tmp_path / "n.png", message=None, sketch=None).exists()
