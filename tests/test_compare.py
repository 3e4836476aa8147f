"""Reconstruction-setting comparison: physics of a synthetic family, failures, labels, ranking, outputs."""

from __future__ import annotations

import csv
import json
import math

import nibabel as nib
import numpy as np
import pydicom
import pytest
from pydicom.uid import generate_uid

from phantometry import compare as cmp
from phantometry import ranking as rk
from phantometry.cli import main
from phantometry.errors import InputError, NoPETSeries
from phantometry.io.dicom_write import write_dicom_series
from phantometry.results import CSV_COLUMNS, Measurement, read_measurements_csv
from phantometry.synth import DEMO_SCAN_TIME, write_synthetic_family
from phantometry.volume import Volume

FWHMS = (5.0, 8.0, 12.0)
#: shipped acceptance bands (EANM FDG guideline v2.0, RC max and RC mean at 10:1)
BANDS = "eanm-fdg-2015"


def _family_settings():
    # One acquisition post-filtered three ways: a Gaussian filter of width s applied to white
    # noise leaves a voxel variance proportional to s^-3 in 3-D (mathematics: the sum of the
    # squared normalised kernel), so the voxel CV scales as FWHM^-1.5. Every setting filters
    # the same white-noise realisation (one acquisition).
    return [{"fwhm_mm": f, "noise_cv": 0.2 * (5.0 / f) ** 1.5, "filter": f"Gauss {f:g}mm"} for f in FWHMS]


def _damaged_copy(src, dst, series_number):
    """A copy of a series under new UIDs with one file's pixel data cut short."""
    dst.mkdir(parents=True)
    uid = generate_uid()
    files = sorted(src.iterdir())
    for f in files:
        ds = pydicom.dcmread(f)
        ds.SeriesInstanceUID = uid
        ds.SOPInstanceUID = generate_uid()
        ds.file_meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
        ds.SeriesNumber = series_number
        ds.save_as(dst / f.name)
    victim = sorted(dst.iterdir())[len(files) // 2]
    data = victim.read_bytes()
    victim.write_bytes(data[: len(data) - 3000])
    return victim


def _uniform_cylinder(dst, series_number):
    """A series of a uniform cylinder: not the body phantom."""
    shape = (50, 75, 75)
    _, y, x = np.indices(shape)
    data = np.where((x - 37) ** 2 + (y - 37) ** 2 < 30**2, 5300.0, 0.0).astype(np.float32)
    aff = np.diag([4.0, 4.0, 4.0, 1.0])
    aff[:3, 3] = [-148, -148, -100]
    vol = Volume(data=data, affine=aff, acquired_at=DEMO_SCAN_TIME, nuclide="F-18", series_description="uniform cylinder")
    write_dicom_series(vol, dst, series_number=series_number)


@pytest.fixture(scope="module")
def family(tmp_path_factory):
    root = tmp_path_factory.mktemp("family")
    fam = write_synthetic_family(root / "in", _family_settings(), voxel_mm=4.0)
    victim = _damaged_copy(fam["series"][0], root / "in" / "damaged", 4)
    _uniform_cylinder(root / "in" / "wrong", 5)
    labels = root / "labels.yaml"
    labels.write_text("2: smoother filter (site protocol B)\n", encoding="utf-8")
    return {**fam, "root": root, "victim": victim, "labels": labels}


@pytest.fixture(scope="module")
def run(family):
    seen = []
    result = cmp.compare(
        family["root"] / "in", fill=family["fill"], out=family["root"] / "out", bands=[BANDS],
        labels=family["labels"], workers=2, progress=lambda d, t, o: seen.append((d, t, o is None)),
    )
    return {"result": result, "out": family["root"] / "out", "progress": seen}


def _values(outcome, metric):
    return {r.roi: r.value for r in outcome.rows if r.metric == metric}


def test_family_ranks_as_physics_says(run):
    # A wider point-response blurs the spheres (partial-volume loss: lower contrast and RC),
    # and more smoothing of one acquisition's noise lowers the background variability
    # (NEMA NU 2 image-quality metrics; common practice).
    res = run["result"]
    ok = [o for o in res.outcomes if o.ok]
    assert [o.job.number for o in ok] == [1, 2, 3]
    for metric in ("percent_contrast", "rc_mean", "rc_max", "background_variability_pct"):
        per_setting = [_values(o, metric) for o in ok]
        for roi in per_setting[0]:
            series = [v[roi] for v in per_setting]
            assert series[0] > series[1] > series[2], (metric, roi, series)


def test_failed_series_are_reported_and_do_not_stop_the_others(run, family):
    res = run["result"]
    assert len(res.outcomes) == 5 and len(res.succeeded) == 3
    assert res.exit_code == rk.EXIT_SERIES_FAILED == cmp.EXIT_SERIES_FAILED == 4
    failed = {o.job.series_number: o for o in res.failed}
    assert failed[4].error_type == "InputError" and family["victim"].name in failed[4].error and "truncated" in failed[4].error
    assert failed[5].error_type == "PhantomNotFound" and "wrong" in failed[5].error
    assert not any(o.internal for o in res.failed)
    summary = json.loads((run["out"] / "summary.json").read_text())
    assert summary["series_failed"] == 2 and summary["series_total"] == 5
    by_number = {s["series_number"]: s for s in summary["series"]}
    assert by_number[4]["status"] == by_number[5]["status"] == "error"
    assert by_number[5]["error"] == failed[5].error
    ranking = list(csv.DictReader(open(run["out"] / "ranking.csv")))
    assert [r["status"] for r in ranking] == ["measured"] * 3 + ["error"] * 2
    # progress: once with the total before any series, then once per series
    assert run["progress"][0] == (0, 5, True) and [p[0] for p in run["progress"][1:]] == [1, 2, 3, 4, 5]


def test_comparison_csv_is_the_measure_rows_plus_label(run):
    res = run["result"]
    out = run["out"]
    with open(out / "comparison.csv", newline="") as fh:
        header = next(csv.reader(fh))
    # label keeps its place after note; later measurement columns are appended after it
    assert header == CSV_COLUMNS[: CSV_COLUMNS.index("note") + 1] + ["label"] + CSV_COLUMNS[CSV_COLUMNS.index("note") + 1 :]
    back = rk.read_comparison_csv(out / "comparison.csv")
    assert len(back) == sum(len(o.rows) for o in res.succeeded)
    for o in res.succeeded:
        mine = [m for label, m in back if label == o.label]
        per_series = read_measurements_csv(out / "series" / o.job.folder_name / "measurements.csv")
        assert [(m.roi, m.metric) for m in mine] == [(m.roi, m.metric) for m in per_series]
        assert np.allclose([m.value for m in mine], [m.value for m in per_series], rtol=1e-9, equal_nan=True)
        assert all(m.series_uid == o.job.series_uid for m in mine)
        assert (out / "series" / o.job.folder_name / "overlay.png").stat().st_size > 10_000


def test_labels_from_reconstruction_attributes_and_the_mapping_file(run):
    labels = {o.job.series_number: o.label for o in run["result"].outcomes}
    assert labels[1] == "OSEM 3i21s, Gauss 5mm"
    assert labels[2] == "smoother filter (site protocol B)"  # from the labels file (series number 2)
    assert labels[3] == "OSEM 3i21s, Gauss 12mm"
    assert len(set(labels.values())) == 5


def test_ranking_meets_bands_first_then_distance(run):
    res = run["result"]
    back = rk.read_comparison_csv(run["out"] / "comparison.csv")
    by_label = {o.label: o.job.number for o in res.succeeded}
    # by hand, from the CSV: rows with a pass/fail verdict; distance = RMS of
    # (value - centre) / half-width with centre (low + high) / 2, half-width (high - low) / 2
    judged: dict[int, list[Measurement]] = {n: [] for n in by_label.values()}
    for label, m in back:
        if m.verdict in ("pass", "fail"):
            judged[by_label[label]].append(m)
    assert all(len(v) == 12 for v in judged.values())  # RC max and RC mean of six hot spheres
    fails = {n: sum(m.verdict == "fail" for m in rows) for n, rows in judged.items()}
    dist = {n: math.sqrt(np.mean([((m.value - (m.band_low + m.band_high) / 2) / ((m.band_high - m.band_low) / 2)) ** 2 for m in rows]))
            for n, rows in judged.items()}
    for rows in judged.values():  # the verdicts themselves: inclusive limits
        for m in rows:
            assert (m.verdict == "pass") == (m.band_low <= m.value <= m.band_high)
    assert all(f > 0 for f in fails.values())  # at 4:1 rather than the bands' 10:1 nothing fits all
    ranked = [e.number for e in res.ranking]
    assert ranked == sorted(judged, key=lambda n: (fails[n] > 0, fails[n], dist[n]))
    for e in res.ranking:
        assert e.distance == pytest.approx(dist[e.number], rel=1e-9)
        assert e.meets_all_bands is (fails[e.number] == 0) and e.failed == fails[e.number]
        assert len(e.reasons) == fails[e.number]
    # too sharp recovers too much, too smooth too little (partial-volume effect): the sharpest
    # setting fails only above its bands, the smoothest only below
    reasons = {e.number: e.reasons for e in res.ranking}
    assert all(" above the band" in r for r in reasons[1]) and all(" below the band" in r for r in reasons[3])
    # the bands were set for a typical clinical resolution of about 7-8 mm (recalled): the middle setting is closest
    assert res.ranking[0].number == 2
    rows = {r["setting"]: r for r in csv.DictReader(open(run["out"] / "ranking.csv"))}
    assert rows["3"]["meets_all_bands"] == "no" and rows["3"]["reasons"] == "; ".join(reasons[3])
    # the per-series folders carry the same verdicts
    per_series = read_measurements_csv(run["out"] / "series" / "series_003" / "measurements.csv")
    assert sum(m.verdict == "fail" for m in per_series) == fails[3]
    # the bands are for 10:1, this fill is 4:1: the mismatch is said, not hidden
    assert any("ratio" in w for o in res.succeeded for w in o.warnings)


def test_charts_are_written(run):
    for name in ("contrast_noise.png", "recovery_curves.png"):
        data = (run["out"] / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000


def test_values_by_setting_follow_the_kinds_key_metrics(run):
    # the report's tables of values by setting: one per key metric of the phantom kind, its
    # columns the ROIs that have it in the kind's order (the body: spheres smallest first)
    from phantometry.phantoms import load_template

    res = run["result"]
    spheres = [s.name for s in load_template("iec-body").spheres]
    assert [s.split("_")[1] for s in spheres] == ["10mm", "13mm", "17mm", "22mm", "28mm", "37mm"]
    tables = {t.metric: t for t in rk.key_metric_columns(res.outcomes)}
    for metric in ("rc_max", "rc_mean", "rc_peak", "percent_contrast", "background_variability_pct"):
        assert tables[metric].rois == spheres, metric
    assert tables["effective_fwhm_mm"].rois == ["phantom"]
    assert tables["rc_mean"].title == "RC mean"  # the kind's title (its report table)
    measured = {r.metric for o in res.succeeded for r in o.rows}
    assert set(tables) <= measured and not any(m.startswith("centre_") for m in tables)
    from phantometry.report import compare_report_html

    page = compare_report_html(res, folder=run["out"])  # no report in this run: built here
    for metric in tables:
        assert f'id="matrix-{metric.replace("_", "-")}"' in page
    assert "<th class=\"num\">10mm</th>" in page  # the common ROI prefix is left out of the headings


def test_key_metric_columns_by_hand():
    def outcome(n, pairs, rows, error=None):
        job = rk.SeriesJob(n, "nifti", (f"/x/{n}.nii",))
        return rk.SeriesOutcome(job=job, rows=rows, key_metrics=pairs, metric_titles={"a": "A title"}, error=error)

    def m(roi, metric):
        return Measurement("u", None, "t", roi, metric, 1.0, "1")

    first = outcome(1, [("r2", "a"), ("r1", "a"), ("r1", "b")], [m("r2", "a"), m("r1", "a"), m("r1", "b")])
    second = outcome(2, [("r3", "a"), ("r1", "c")], [m("r3", "a")])  # c: a key metric without any row
    failed = outcome(3, [("r9", "d")], [m("r9", "d")], error="boom")
    cols = rk.key_metric_columns([first, second, failed])
    assert [(c.metric, c.title, c.rois) for c in cols] == [("a", "A title", ["r2", "r1", "r3"]), ("b", "b", ["r1"])]
    assert rk.short_roi_names(["sphere_10mm", "sphere_13mm"]) == ["10mm", "13mm"]
    assert rk.short_roi_names(["rod_1mm", "rod_12mm"]) == ["1mm", "12mm"]
    assert rk.short_roi_names(["water_chamber", "air_chamber"]) == ["water_chamber", "air_chamber"]
    assert rk.short_roi_names(["sphere_10mm"]) == ["sphere_10mm"]
    assert rk.short_roi_names(["a_b", "a_"]) == ["a_b", "a_"]  # no empty heading


def test_rank_settings_by_hand():
    def row(roi, value, low, high, unc=None):
        verdict = "pass" if low <= value <= high else "fail"
        return Measurement("uid", None, "iec-body", roi, "rc_mean", value, "1", unc, "b", low, high, verdict)

    a = [row("s1", 0.7, 0.4, 1.0), row("s2", 0.5, 0.3, 0.7)]            # both at centre: distance 0
    b = [row("s1", 1.0, 0.4, 1.0), row("s2", 0.5, 0.3, 0.7)]            # one at a limit: sqrt(1/2)
    c = [row("s1", 0.39, 0.4, 1.0, unc=0.02), row("s2", 0.5, 0.3, 0.7)]  # fails, 0.01 below: within 2 u
    d = [row("s1", 0.1, 0.4, 1.0), row("s2", 0.9, 0.3, 0.7)]            # fails twice
    ranked = rk.rank_settings([("D", 4, None, d), ("C", 3, None, c), ("B", 2, None, b), ("A", 1, None, a)])
    assert [e.label for e in ranked] == ["A", "B", "C", "D"]
    assert [e.rank for e in ranked] == [1, 2, 3, 4]
    assert ranked[0].distance == pytest.approx(0.0, abs=1e-12)
    assert ranked[1].distance == pytest.approx(math.sqrt(0.5))
    assert ranked[2].meets_all_bands is False and ranked[2].failed == 1
    assert "below the band (b) limit 0.4" in ranked[2].reasons[0] and "within 2 standard uncertainties" in ranked[2].reasons[0]
    assert ranked[3].failed == 2 and "above" in ranked[3].reasons[1]
    # no verdicts at all: no claim about bands, order by setting number
    plain = [Measurement("u", None, "t", "s1", "rc_mean", 0.5, "1")]
    none = rk.rank_settings([("y", 2, None, plain), ("x", 1, None, plain)])
    assert [e.number for e in none] == [1, 2] and none[0].meets_all_bands is None and none[0].distance is None


def test_load_labels_yaml_csv_and_errors(tmp_path):
    y = tmp_path / "l.yaml"
    y.write_text("labels:\n  1.2.3.4: sharp\n  7: smooth\n", encoding="utf-8")
    assert cmp.load_labels(y) == {"1.2.3.4": "sharp", "7": "smooth"}
    c = tmp_path / "l.csv"
    c.write_text("series,label\n1.2.3.4,sharp\n7,smooth\n", encoding="utf-8")
    assert cmp.load_labels(c) == {"1.2.3.4": "sharp", "7": "smooth"}
    bad = tmp_path / "bad.csv"
    bad.write_text("uid,name\n1,x\n", encoding="utf-8")
    with pytest.raises(InputError, match="bad.csv: header"):
        cmp.load_labels(bad)
    empty = tmp_path / "e.yaml"
    empty.write_text("7: ''\n", encoding="utf-8")
    with pytest.raises(InputError, match="e.yaml: 7: empty label"):
        cmp.load_labels(empty)
    with pytest.raises(InputError, match="labels file not found"):
        cmp.load_labels(tmp_path / "missing.yaml")


def test_duplicate_automatic_labels_are_told_apart():
    from phantometry.volume import Reconstruction

    rec = Reconstruction(method="OSEM", iterations=2, subsets=10, filter="none", matrix=(128, 128, 90), voxel_size_mm=(2.5, 2.5, 2.5))
    outs = [rk.SeriesOutcome(job=rk.SeriesJob(n, "dicom", (f"/x/{n}",), f"1.2.{n}", n, "same"), reconstruction=rec) for n in (1, 2)]
    notes = cmp.assign_labels(outs, {"99": "unused"})
    assert [o.label for o in outs] == ["OSEM 2i10s, none [same] #1", "OSEM 2i10s, none [same] #2"]
    assert any("match no series: 99" in n for n in notes)


def test_discover_jobs_finds_nifti_and_refuses_empty(tmp_path):
    (tmp_path / "a").mkdir()
    nib.save(nib.Nifti1Image(np.zeros((4, 4, 4), np.float32), np.eye(4)), tmp_path / "a" / "r1.nii.gz")
    (tmp_path / "a" / "notes.txt").write_text("not an image")
    jobs, _ = cmp.discover_jobs(tmp_path)
    assert [(j.kind, j.number) for j in jobs] == [("nifti", 1)] and jobs[0].paths[0].endswith("r1.nii.gz")
    (tmp_path / "b").mkdir()
    with pytest.raises(NoPETSeries, match="no PET series"):
        cmp.discover_jobs(tmp_path / "b")


def test_cli_compare_exit_code_and_table(family, tmp_path, capsys):
    # one good series and the wrong phantom, in this process (--workers 1)
    good = family["root"] / "in" / "recon_01"
    code = main(["compare", str(good), str(family["root"] / "in" / "wrong"), "--fill", str(family["fill"]),
                 "--out", str(tmp_path / "o"), "--workers", "1"])
    out = capsys.readouterr().out
    assert code == 4
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    error = next(s["error"] for s in summary["series"] if s["status"] == "error")
    assert "wrong" in error
    flat = " ".join(out.split())
    assert f"FAILED #2 {family['root'] / 'in' / 'wrong'}: {' '.join(error.split())}" in flat  # the message itself, on one line
    assert "Gauss" in out and "rank" in out
    assert (tmp_path / "o" / "comparison.csv").is_file()
    # a bad fill record is a problem common to all: exit 2, nothing written
    bad = tmp_path / "bad_fill.yaml"
    bad.write_text("nuclide: F-18\n", encoding="utf-8")
    code = main(["compare", str(good), "--fill", str(bad), "--out", str(tmp_path / "o2")])
    assert code == 2 and not (tmp_path / "o2").exists()
