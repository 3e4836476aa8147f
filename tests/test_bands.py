"""Acceptance bands: shipped values, validation, verdicts, ratio warnings, CLI."""

import csv
import json
import math
from pathlib import Path

import pytest
import yaml

from phantometry.bands import (
    BandSet,
    apply_bands,
    builtin_band_dir,
    check_band_set,
    list_band_sets,
)
from phantometry.cli import main
from phantometry.errors import BandError
from phantometry.fill import FillRecord
from phantometry.phantoms import known_metrics, load_band_set, load_template
from phantometry.results import Measurement

TPL = load_template("iec-body")
KNOWN = known_metrics(TPL)

# EANM FDG PET/CT guideline v2.0 (Boellaard et al., Eur J Nucl Med Mol Imaging
# 2015;42:328-354) and its accreditation specification: RC ranges at 10:1 (confirmed values,
# /work/shared REFERENCE-VALUES: "confirmed from the published specification").
EANM_2015 = {
    "rc_mean": {37: (0.76, 0.89), 28: (0.72, 0.85), 22: (0.63, 0.78), 17: (0.57, 0.73), 13: (0.44, 0.60), 10: (0.27, 0.43)},
    "rc_max": {37: (0.95, 1.16), 28: (0.91, 1.13), 22: (0.83, 1.09), 17: (0.73, 1.01), 13: (0.59, 0.85), 10: (0.34, 0.57)},
}
# Kaalep et al., Eur J Nucl Med Mol Imaging 2018;45:1344-1361: recalled, to verify against the
# paper's table (REFERENCE-VALUES marks them recalled).
EANM_2018_RECALLED = {
    "rc_max": {37: (1.05, 1.29), 28: (1.01, 1.26), 22: (1.01, 1.32), 17: (1.00, 1.38), 13: (0.85, 1.22), 10: (0.52, 0.88)},
    "rc_mean": {37: (0.85, 1.00), 28: (0.82, 0.97), 22: (0.80, 0.99), 17: (0.76, 0.97), 13: (0.63, 0.86), 10: (0.39, 0.61)},
}


def _limits(bs: BandSet) -> dict:
    out: dict = {}
    for e in bs.entries:
        out.setdefault(e.metric, {})[int(e.roi.removeprefix("sphere_").removesuffix("mm"))] = (e.low, e.high)
    return out


def test_shipped_2015_bands_are_the_published_values():
    bs = load_band_set("eanm-fdg-2015")
    assert bs.template == "iec-body" and bs.activity_ratio == 10.0
    assert "Boellaard" in bs.source and "2015;42:328-354" in bs.source
    assert _limits(bs) == EANM_2015
    assert not any(e.recalled for e in bs.entries)


def test_shipped_2018_bands_are_flagged_recalled_without_peak():
    bs = load_band_set("eanm-fdg-2018")
    assert "Kaalep" in bs.source and "2018;45:1344-1361" in bs.source
    assert _limits(bs) == EANM_2018_RECALLED
    assert all(e.recalled for e in bs.entries)
    assert not any(e.metric == "rc_peak" for e in bs.entries)
    assert any("RC peak" in n and "not recalled reliably" in n for n in bs.notes)


def test_band_files_ship_as_package_data():
    # the wheel carries roi_templates/bands/*.yaml inside phantometry.roi_templates
    assert (builtin_band_dir() / "eanm-fdg-2015.yaml").is_file()
    pyproject = (Path(__file__).resolve().parents[1] / "pyproject.toml").read_text()
    assert '"bands/*.yaml"' in pyproject
    found = list_band_sets()
    assert {"eanm-fdg-2015", "eanm-fdg-2018"} <= set(found)


# ----------------------------------------------------------------------------- bad input
def _write(tmp_path, name, entries, **top):
    doc = {"phantometry_bands": 1, "name": name, "title": "test", "source": "site limits (invented)", "template": "iec-body",
           "entries": entries, **top}
    p = tmp_path / f"{name}.yaml"
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return p


def test_unknown_band_name_lists_choices():
    with pytest.raises(BandError, match="unknown band set 'nope'.*eanm-fdg-2015.*eanm-fdg-2018"):
        load_band_set("nope")


@pytest.mark.parametrize(
    "entries, needle",
    [
        ([{"roi": "sphere_37mm", "metric": "rc_mean", "low": 0.9, "high": 0.8}], r"entries\[0\] \(sphere_37mm rc_mean\).*low 0.9 is above high 0.8"),
        ([{"roi": "sphere_37mm", "metric": "rc_mean", "low": 0.7, "high": 0.9},
          {"roi": "sphere_37mm", "metric": "rc_mean", "low": 0.8, "high": 1.0}], r"entries\[1\] \(sphere_37mm rc_mean\).*overlaps entries\[0\]"),
        ([{"roi": "sphere_99mm", "metric": "rc_mean", "low": 0.7, "high": 0.9}], r"entries\[0\] \(sphere_99mm rc_mean\).*no ROI 'sphere_99mm'"),
        ([{"roi": "sphere_37mm", "metric": "rc_median", "low": 0.7}], r"entries\[0\] \(sphere_37mm rc_median\).*no metric 'rc_median'.*rc_mean"),
        ([{"roi": "sphere_37mm", "metric": "rc_mean", "lo": 0.7}], r"entries\[0\] \(sphere_37mm rc_mean\).lo: unknown key"),
        ([{"roi": "sphere_37mm", "metric": "rc_mean", "baseline": 0.8}], r"entries\[0\].*needs both baseline and tolerance_pct"),
        ([{"roi": "sphere_37mm", "metric": "rc_mean"}], r"entries\[0\].*needs low, high or both"),
    ],
)
def test_invalid_band_files_name_file_and_entry(tmp_path, entries, needle):
    p = _write(tmp_path, "site-a", entries)
    with pytest.raises(BandError, match=needle) as exc:
        load_band_set(str(p))
    assert str(p) in str(exc.value) and "\n" not in str(exc.value)


def test_name_must_match_file_and_template_must_exist(tmp_path):
    p = _write(tmp_path, "site-b", [{"roi": "sphere_37mm", "metric": "rc_max", "low": 0.5}])
    q = tmp_path / "other-name.yaml"
    q.write_text(p.read_text())
    with pytest.raises(BandError, match="differs from the file name"):
        load_band_set(str(q))
    r = _write(tmp_path, "site-c", [{"roi": "sphere_37mm", "metric": "rc_max", "low": 0.5}], template="no-such-phantom")
    with pytest.raises(BandError, match="template 'no-such-phantom' cannot be loaded"):
        load_band_set(str(r))


def test_band_found_by_name_in_extra_folder_and_env(tmp_path, monkeypatch):
    _write(tmp_path, "site-d", [{"roi": "background", "metric": "activity_recovery", "baseline": 1.0, "tolerance_pct": 10}])
    assert load_band_set("site-d", [tmp_path]).name == "site-d"
    monkeypatch.setenv("PHANTOMETRY_BANDS", str(tmp_path))
    assert "site-d" in list_band_sets()


# ----------------------------------------------------------------------------- verdicts
def _row(roi, metric, value, unit="1"):
    return Measurement(series_uid="1.2.3", acquired_at="2026-11-03T10:30:00+01:00", template="iec-body", roi=roi, metric=metric,
                       value=value, unit=unit)


def _fill(ratio):
    return FillRecord.from_dict({"nuclide": "F-18", "background": {"concentration_kbq_ml": 2.0, "measured_at": "2026-11-03T10:30:00+01:00"},
                                 "spheres": {"ratio_to_background": ratio}})


def test_verdicts_inclusive_limits_nan_absent_and_unbanded():
    bs = load_band_set("eanm-fdg-2015")
    rows = [
        _row("sphere_37mm", "rc_mean", 0.76),  # on the lower limit: pass (inclusive)
        _row("sphere_37mm", "rc_max", 1.1601),  # just above 1.16: fail
        _row("sphere_10mm", "rc_max", math.nan),  # not a number: n/a
        _row("sphere_10mm", "percent_contrast", 30.0, "%"),  # no band: untouched
    ]
    out, warnings = apply_bands(rows, [bs], fill=_fill(10.0))
    by = {(r.roi, r.metric): r for r in out}
    assert by[("sphere_37mm", "rc_mean")].verdict == "pass"
    assert (by[("sphere_37mm", "rc_mean")].band_low, by[("sphere_37mm", "rc_mean")].band_high) == (0.76, 0.89)
    assert by[("sphere_37mm", "rc_max")].verdict == "fail"
    assert by[("sphere_10mm", "rc_max")].verdict == "n/a"
    assert by[("sphere_10mm", "percent_contrast")].verdict is None and by[("sphere_10mm", "percent_contrast")].band is None
    # banded metrics missing from the rows appear as n/a rows (12 entries, 3 given)
    assert len([r for r in out if r.band == "eanm-fdg-2015"]) == 12
    missing = by[("sphere_22mm", "rc_mean")]
    assert missing.verdict == "n/a" and math.isnan(missing.value) and missing.band_low == 0.63
    assert warnings == []
    assert rows[0].verdict is None  # the input rows are not modified


def test_cold_sphere_rc_is_na_with_reason():
    fill = FillRecord.from_dict({"nuclide": "F-18", "background": {"concentration_kbq_ml": 2.0, "measured_at": "2026-11-03T10:30:00+01:00"},
                                 "spheres": {"ratio_to_background": 10.0}, "cold": ["sphere_37mm"]})
    out, _ = apply_bands([], [load_band_set("eanm-fdg-2015")], fill=fill)
    r = next(r for r in out if (r.roi, r.metric) == ("sphere_37mm", "rc_max"))
    assert r.verdict == "n/a" and "cold" in r.note


def test_baseline_band_and_two_sets(tmp_path):
    # baseline 1.0 +- 5 %: limits 0.95 and 1.05 (hand-worked)
    p = _write(tmp_path, "site-e", [{"roi": "sphere_37mm", "metric": "rc_max", "baseline": 1.0, "tolerance_pct": 5, "note": "trend baseline"}])
    site = load_band_set(str(p))
    e = site.entries[0]
    assert e.kind == "baseline" and e.low == pytest.approx(0.95) and e.high == pytest.approx(1.05)
    out, _ = apply_bands([_row("sphere_37mm", "rc_max", 1.06)], [site, load_band_set("eanm-fdg-2015")])
    judged = [r for r in out if r.roi == "sphere_37mm" and r.metric == "rc_max"]
    # one row per roi and metric: the sets joined, the limits intersected, the worst verdict
    assert len(judged) == 1
    r = judged[0]
    assert r.band == "site-e+eanm-fdg-2015" and r.verdict == "fail"
    assert (r.band_low, r.band_high) == (pytest.approx(0.95), pytest.approx(1.05))  # [0.95, 1.05] and [0.95, 1.16]
    assert "site-e 1 +- 5 % (0.95 to 1.05): fail" in r.note and "eanm-fdg-2015 0.95 to 1.16: pass" in r.note
    assert "trend baseline" in r.note
    # bands that do not overlap: no limits, and every value fails one of them
    q = _write(tmp_path, "site-g", [{"roi": "sphere_37mm", "metric": "rc_max", "low": 2.0, "high": 3.0}])
    (r2,) = [r for r in apply_bands([_row("sphere_37mm", "rc_max", 1.0)], [load_band_set(str(q)), load_band_set("eanm-fdg-2015")])[0]
             if r.metric == "rc_max" and r.roi == "sphere_37mm"]
    assert r2.band_low is None and r2.band_high is None and r2.verdict == "fail" and "do not overlap" in r2.note


def test_recalled_limits_say_so_in_the_note():
    out, _ = apply_bands([_row("sphere_37mm", "rc_max", 1.1)], [load_band_set("eanm-fdg-2018")])
    r = next(r for r in out if (r.roi, r.metric) == ("sphere_37mm", "rc_max"))
    assert r.verdict == "pass" and "recalled" in r.note and "Kaalep" in r.note


@pytest.mark.parametrize("ratio, warns", [(10.0, False), (10.9, False), (11.5, True), (4.0, True)])
def test_ratio_mismatch_over_10_percent_warns(ratio, warns):
    out, warnings = apply_bands([_row("sphere_37mm", "rc_max", 1.0)], [load_band_set("eanm-fdg-2015")], fill=_fill(ratio))
    assert bool(warnings) is warns
    r = next(r for r in out if (r.roi, r.metric) == ("sphere_37mm", "rc_max"))
    if warns:
        assert "10:1" in warnings[0] and f"{ratio:g}:1" in warnings[0]
        assert "WARNING" in r.note
    else:
        assert r.note is None


def test_band_for_another_template_is_refused(tmp_path):
    p = _write(tmp_path, "site-f", [{"roi": "sphere_37mm", "metric": "rc_max", "low": 0.5}])
    bs = load_band_set(str(p))
    bs.template = "small-animal"
    with pytest.raises(BandError, match="is for template small-animal.*iec-body"):
        check_band_set(bs, TPL.name, KNOWN)


# ----------------------------------------------------------------------------- CLI
def test_bands_list_and_show(capsys):
    assert main(["bands", "list"]) == 0
    out = capsys.readouterr().out
    assert "eanm-fdg-2015" in out and "eanm-fdg-2018" in out
    assert main(["bands", "show", "eanm-fdg-2015"]) == 0
    out = capsys.readouterr().out
    assert "Boellaard" in out and "0.76" in out and "1.16" in out
    assert main(["bands", "show", "eanm-fdg-2018", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["name"] == "eanm-fdg-2018" and all(e["recalled"] for e in doc["entries"])
    assert main(["bands", "show", "nope"]) == 2
    assert "unknown band set" in capsys.readouterr().err


def test_measure_strict_exit_codes_and_columns(capsys, demo_scan, tmp_path):
    # a band every value passes, and one the 37 mm RC max must fail
    wide = _write(tmp_path, "site-wide", [{"roi": "sphere_37mm", "metric": "rc_max", "low": 0.0, "high": 10.0}])
    impossible = _write(tmp_path, "site-fail", [{"roi": "sphere_37mm", "metric": "rc_max", "low": 5.0, "high": 6.0}])
    base = ["measure", str(demo_scan["image"]), "--fill", str(demo_scan["fill"])]
    assert main(base + ["--out", str(tmp_path / "ok"), "--bands", str(wide), "--bands", "eanm-fdg-2015", "--strict"]) in (0, 3)
    out = capsys.readouterr().out
    assert "Acceptance bands" in out and "verdict" in out
    rows = list(csv.DictReader(open(tmp_path / "ok" / "measurements.csv")))
    assert len({(r["roi"], r["metric"]) for r in rows}) == len(rows)  # still one row per roi and metric
    both = [r for r in rows if r["band"] == "site-wide+eanm-fdg-2015"]
    assert [(r["roi"], r["metric"]) for r in both] == [("sphere_37mm", "rc_max")]
    assert (both[0]["band_low"], both[0]["band_high"]) == ("0.95", "1.16")  # [0, 10] and [0.95, 1.16]
    assert len([r for r in rows if r["band"] == "eanm-fdg-2015"]) == 11
    assert all(r["uncertainty"] != "" for r in rows if r["metric"] in ("rc_max", "percent_contrast", "mean_bq_ml"))
    assert (tmp_path / "ok" / "recovery_curve.png").stat().st_size > 10_000
    doc = json.loads((tmp_path / "ok" / "measurements.json").read_text())
    assert [b["name"] for b in doc["bands"]] == ["site-wide", "eanm-fdg-2015"]
    # the demo scan is filled 4:1, the EANM bands assume 10:1: a visible warning
    assert any("assumes a 10:1 ratio" in w for w in doc["warnings"])
    assert main(base + ["--out", str(tmp_path / "bad"), "--bands", str(impossible), "--strict"]) == 3
    assert "exit code 3" in capsys.readouterr().out
    assert (tmp_path / "bad" / "measurements.csv").exists()  # results are written all the same
    assert main(base + ["--out", str(tmp_path / "s"), "--strict"]) == 2
    assert "--strict needs" in capsys.readouterr().err
    assert main(base + ["--out", str(tmp_path / "u"), "--bands", "nope"]) == 2
    assert not (tmp_path / "u").exists()


def test_unconfirmed_roi_set_withholds_verdicts(demo_scan):
    # a verdict on an ROI the image does not confirm would be a silent wrong answer: n/a instead
    import dataclasses

    from phantometry.measure import judge, measure_volume
    from phantometry.phantoms.base import RoiSetCheck

    res = demo_scan["result"]
    a = measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record), uncertainties=False, resolution=False)
    wide = dataclasses.replace(load_band_set("eanm-fdg-2015"), name="wide")
    a.placement_checks = [RoiSetCheck("spheres", 6, 6, 0.7, -2.0, confirmed=False, note="ROI crosses the body edge",
                                      rows=[("sphere_37mm", "rc_max")])]
    judge(a, [wide])
    r = next(r for r in a.rows if (r.roi, r.metric) == ("sphere_37mm", "rc_max"))
    other = next(r for r in a.rows if (r.roi, r.metric) == ("sphere_28mm", "rc_max"))
    assert r.verdict == "n/a" and "not confirmed" in r.note
    assert other.verdict in ("pass", "fail")
