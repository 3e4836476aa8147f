"""Tests of the fill record (phantometry.fill): parsing, decay correction, errors.

Expected concentrations are worked by hand from the physical decay law
A(t) = A(t0) exp(-ln2 (t - t0) / T_half) with the F-18 half-life 109.77 min (European
Pharmacopoeia / NNDC NuDat, as listed in shared/REFERENCE-VALUES.md). Sites and dates are
invented.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import pytest

from phantometry.errors import FillRecordError, InputError
from phantometry.fill import FillRecord, load_fill_record, write_fill_record

LAMBDA_F18_PER_MIN = math.log(2) / 109.77
CET = timezone(timedelta(hours=1))
SCAN = datetime(2026, 11, 3, 10, 30, tzinfo=CET)  # 50 min after the background reading

CANONICAL = """\
nuclide: F-18
background:
  concentration_kbq_ml: 5.30
  measured_at: 2026-11-03T09:40:00+01:00
spheres:                      # either ratio_to_background, or concentration_kbq_ml + measured_at
  ratio_to_background: 4.0
cold: [sphere_28mm, sphere_37mm]   # optional: inserts filled with non-radioactive water
site: Demo Hospital Nowhere
phantom: iec-body
operator_note: water bath filled to the brim
"""


def _write(tmp_path, text, name="fill.yaml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _base() -> dict:
    return {
        "nuclide": "F-18",
        "background": {"concentration_kbq_ml": 5.30, "measured_at": "2026-11-03T09:40:00+01:00"},
        "spheres": {"ratio_to_background": 4.0},
    }


# ---------------------------------------------------------------------------- good records
def test_canonical_form_parsed(tmp_path):
    rec = load_fill_record(_write(tmp_path, CANONICAL))
    assert rec.nuclide.name == "F-18"
    assert rec.nuclide.half_life_s == pytest.approx(109.77 * 60)
    assert rec.background.concentration_kbq_ml == 5.30
    assert rec.background.measured_at == datetime(2026, 11, 3, 8, 40, tzinfo=timezone.utc)
    assert rec.spheres.ratio_to_background == 4.0
    assert rec.cold == ["sphere_28mm", "sphere_37mm"]
    assert rec.site == "Demo Hospital Nowhere" and rec.phantom == "iec-body"
    assert str(tmp_path / "fill.yaml") in rec.source


def test_background_decay_corrected_by_hand(tmp_path):
    rec = load_fill_record(_write(tmp_path, CANONICAL))
    measured = datetime(2026, 11, 3, 9, 40, tzinfo=CET)
    # at the measurement time: 5.30 kBq/mL = 5300 Bq/mL
    assert rec.background_bq_ml(measured) == pytest.approx(5300.0, rel=1e-12)
    # one half-life later: half
    assert rec.background_bq_ml(measured + timedelta(minutes=109.77)) == pytest.approx(2650.0, rel=1e-12)
    # 50 min later: 5300 exp(-ln2 50/109.77) = 3865.07 Bq/mL (by hand)
    assert rec.background_bq_ml(SCAN) == pytest.approx(5300.0 * math.exp(-LAMBDA_F18_PER_MIN * 50), rel=1e-12)
    assert rec.background_bq_ml(SCAN) == pytest.approx(3865.07, abs=0.01)
    # the same instant given in another offset
    assert rec.background_bq_ml(SCAN.astimezone(timezone.utc)) == pytest.approx(rec.background_bq_ml(SCAN), rel=1e-12)


def test_ratio_cold_and_hot_inserts(tmp_path):
    rec = load_fill_record(_write(tmp_path, CANONICAL))
    assert rec.is_cold("sphere_28mm") and rec.is_cold("sphere_37mm")
    assert not rec.is_cold("sphere_10mm")
    assert rec.insert_bq_ml("sphere_28mm", SCAN) == 0.0
    assert rec.activity_ratio("sphere_37mm") == 0.0
    assert rec.insert_bq_ml("sphere_10mm", SCAN) == pytest.approx(4.0 * 3865.069886, rel=1e-9)
    assert rec.activity_ratio("sphere_10mm") == 4.0


def test_syringe_background_worked_by_hand():
    d = _base()
    d["background"] = {
        "syringe_mbq": 25.0,
        "syringe_measured_at": "2026-11-03T09:00:00+01:00",
        "residual_mbq": 0.8,
        "residual_measured_at": "2026-11-03T09:20:00+01:00",
        "volume_ml": 9700,
    }
    rec = FillRecord.from_dict(d, source="syringe.yaml")
    # 25 MBq decayed 20 min: 25 exp(-ln2 20/109.77) = 22.03396 MBq; minus 0.8 MBq residual
    # = 21.23396 MBq in 9700 mL = 2189.068 Bq/mL at the residual time 09:20+01:00.
    at_residual = datetime(2026, 11, 3, 9, 20, tzinfo=CET)
    assert rec.background_bq_ml(at_residual) == pytest.approx(2189.068, abs=1e-3)
    expected = (25.0e6 * math.exp(-LAMBDA_F18_PER_MIN * 20) - 0.8e6) / 9700
    assert rec.background_bq_ml(at_residual) == pytest.approx(expected, rel=1e-12)
    # and decayed on to the scan (70 min after the residual reading)
    assert rec.background_bq_ml(SCAN) == pytest.approx(expected * math.exp(-LAMBDA_F18_PER_MIN * 70), rel=1e-12)
    assert rec.insert_bq_ml("sphere_10mm", SCAN) == pytest.approx(4 * rec.background_bq_ml(SCAN), rel=1e-12)


def test_syringe_spheres_rods_synonym_and_ratio():
    d = _base()
    del d["spheres"]
    # the sphere stock solution: 10 MBq, 0.2 MBq residual 10 min later, in 500 mL
    d["rods"] = {
        "syringe_mbq": 10.0,
        "syringe_measured_at": "2026-11-03T09:30:00+01:00",
        "residual_mbq": 0.2,
        "residual_measured_at": "2026-11-03T09:40:00+01:00",
        "volume_ml": 500.0,
    }
    rec = FillRecord.from_dict(d)
    stock_at_0940 = (10.0e6 * math.exp(-LAMBDA_F18_PER_MIN * 10) - 0.2e6) / 500.0
    assert rec.hot_fill is rec.rods
    assert rec.insert_bq_ml("rod_5mm", datetime(2026, 11, 3, 9, 40, tzinfo=CET)) == pytest.approx(stock_at_0940, rel=1e-12)
    # both readings refer to 09:40, so the ratio is stock / 5300
    assert rec.activity_ratio("rod_5mm") == pytest.approx(stock_at_0940 / 5300.0, rel=1e-12)


def test_concentration_spheres_ratio_is_time_independent():
    d = _base()
    d["spheres"] = {"concentration_kbq_ml": 21.2, "measured_at": "2026-11-03T10:00:00+01:00"}
    rec = FillRecord.from_dict(d)
    # background at 10:00 is 5300 exp(-ln2 20/109.77); spheres 21200 at 10:00
    ratio = 21200.0 / (5300.0 * math.exp(-LAMBDA_F18_PER_MIN * 20))
    assert rec.activity_ratio("sphere_22mm") == pytest.approx(ratio, rel=1e-12)
    for at in (SCAN, SCAN + timedelta(hours=3)):
        assert rec.insert_bq_ml("sphere_22mm", at) / rec.background_bq_ml(at) == pytest.approx(ratio, rel=1e-12)
    assert rec.insert_bq_ml("sphere_22mm", SCAN) == pytest.approx(21200.0 * math.exp(-LAMBDA_F18_PER_MIN * 30), rel=1e-12)


def test_inserts_override_spheres():
    d = _base()
    d["inserts"] = {
        "sphere_10mm": {"ratio_to_background": 8.0},
        "sphere_13mm": {"concentration_kbq_ml": 42.4, "measured_at": "2026-11-03T09:40:00+01:00"},
    }
    rec = FillRecord.from_dict(d)
    bg = rec.background_bq_ml(SCAN)
    assert rec.insert_bq_ml("sphere_10mm", SCAN) == pytest.approx(8.0 * bg, rel=1e-12)
    assert rec.insert_bq_ml("sphere_13mm", SCAN) == pytest.approx(42400.0 * math.exp(-LAMBDA_F18_PER_MIN * 50), rel=1e-12)
    assert rec.activity_ratio("sphere_13mm") == pytest.approx(8.0, rel=1e-12)
    assert rec.insert_bq_ml("sphere_17mm", SCAN) == pytest.approx(4.0 * bg, rel=1e-12)


def test_no_hot_entry_only_cold_and_background():
    d = _base()
    del d["spheres"]
    d["cold"] = ["sphere_37mm"]
    rec = FillRecord.from_dict(d, source="uniform.yaml")
    assert rec.insert_bq_ml("sphere_37mm", SCAN) == 0.0
    with pytest.raises(FillRecordError, match=r"uniform\.yaml: no fill given for insert 'sphere_10mm'"):
        rec.insert_bq_ml("sphere_10mm", SCAN)


def test_naive_query_time_refused(tmp_path):
    rec = load_fill_record(_write(tmp_path, CANONICAL))
    with pytest.raises(InputError, match="time zone"):
        rec.background_bq_ml(datetime(2026, 11, 3, 10, 30))


def test_aliases_and_times_as_strings():
    d = _base()
    d["nuclide"] = "18F"
    d["background"]["measured_at"] = "2026-11-03T08:40:00Z"
    rec = FillRecord.from_dict(d)
    assert rec.nuclide.name == "F-18"
    assert rec.background_bq_ml(datetime(2026, 11, 3, 9, 40, tzinfo=CET)) == pytest.approx(5300.0, rel=1e-12)


def test_round_trip(tmp_path):
    d = _base()
    d["inserts"] = {"sphere_13mm": {"concentration_kbq_ml": 42.4, "measured_at": "2026-11-03T09:45:00+02:00"}}
    d["background"] = {
        "syringe_mbq": 25.0,
        "syringe_measured_at": "2026-11-03T09:00:00+01:00",
        "residual_mbq": 0.0,
        "residual_measured_at": "2026-11-03T09:20:00+01:00",
        "volume_ml": 9700.0,
    }
    d["cold"] = ["sphere_37mm"]
    d["operator_note"] = "second fill"
    rec = FillRecord.from_dict(d)
    path = write_fill_record(rec, tmp_path / "out" / "fill.yaml")
    assert path == tmp_path / "out" / "fill.yaml"
    back = load_fill_record(path)
    assert back.to_dict() == rec.to_dict()
    assert back.to_dict()["background"]["residual_measured_at"] == "2026-11-03T09:20:00+01:00"
    for name in ("sphere_13mm", "sphere_22mm", "sphere_37mm"):
        assert back.insert_bq_ml(name, SCAN) == pytest.approx(rec.insert_bq_ml(name, SCAN), rel=1e-15)
    assert back.background_bq_ml(SCAN) == pytest.approx(rec.background_bq_ml(SCAN), rel=1e-15)
    # the canonical file too
    canon = load_fill_record(_write(tmp_path, CANONICAL))
    assert FillRecord.from_dict(canon.to_dict()).to_dict() == canon.to_dict()
    assert load_fill_record(write_fill_record(canon, tmp_path / "canon2.yaml")).to_dict() == canon.to_dict()


# ---------------------------------------------------------------------------- bad records
def _error(tmp_path, text) -> str:
    path = _write(tmp_path, text, "bad_fill.yaml")
    with pytest.raises(FillRecordError) as info:
        load_fill_record(path)
    message = str(info.value)
    assert message.startswith(f"{path}: "), message
    assert "\n" not in message
    return message


@pytest.mark.parametrize("value", ["-5.30", "0", "0.0"])
def test_negative_or_zero_activity(tmp_path, value):
    msg = _error(tmp_path, CANONICAL.replace("concentration_kbq_ml: 5.30", f"concentration_kbq_ml: {value}"))
    assert "background.concentration_kbq_ml: must be positive" in msg


def test_negative_syringe_and_volume(tmp_path):
    text = """\
nuclide: F-18
background: {syringe_mbq: -25.0, syringe_measured_at: 2026-11-03T09:00:00+01:00, residual_mbq: -0.8,
             residual_measured_at: 2026-11-03T09:20:00+01:00, volume_ml: 0}
"""
    msg = _error(tmp_path, text)
    assert "background.syringe_mbq: must be positive" in msg
    assert "background.residual_mbq: must be zero or more" in msg
    assert "background.volume_ml: must be positive" in msg


def test_residual_larger_than_syringe(tmp_path):
    text = """\
nuclide: F-18
background: {syringe_mbq: 25.0, syringe_measured_at: 2026-11-03T09:00:00+01:00, residual_mbq: 24.0,
             residual_measured_at: 2026-11-03T09:20:00+01:00, volume_ml: 9700}
"""
    # 25 MBq decayed 20 min is 22.03 MBq < 24 MBq residual: no activity left
    msg = _error(tmp_path, text)
    assert "background: residual_mbq 24 MBq is not less than syringe_mbq decayed" in msg
    assert "22.03 MBq" in msg


def test_residual_before_syringe(tmp_path):
    text = """\
nuclide: F-18
background: {syringe_mbq: 25.0, syringe_measured_at: 2026-11-03T09:30:00+01:00, residual_mbq: 0.5,
             residual_measured_at: 2026-11-03T09:20:00+01:00, volume_ml: 9700}
"""
    assert "background: residual_measured_at is before syringe_measured_at" in _error(tmp_path, text)


def test_missing_activity(tmp_path):
    msg = _error(tmp_path, CANONICAL.replace("  concentration_kbq_ml: 5.30\n", ""))
    assert "background: missing concentration_kbq_ml" in msg


def test_missing_background_and_nuclide(tmp_path):
    msg = _error(tmp_path, "site: Demo\n")
    assert "nuclide: missing" in msg and "background: missing" in msg


def test_empty_activity_entry(tmp_path):
    msg = _error(tmp_path, CANONICAL.replace("  ratio_to_background: 4.0\n", "  {}\n"))
    assert "spheres: no activity given" in msg


def test_naive_time(tmp_path):
    msg = _error(tmp_path, CANONICAL.replace("2026-11-03T09:40:00+01:00", "2026-11-03T09:40:00"))
    assert "background.measured_at: 2026-11-03T09:40:00 has no time-zone offset" in msg


def test_date_without_time(tmp_path):
    msg = _error(tmp_path, CANONICAL.replace("2026-11-03T09:40:00+01:00", "2026-11-03"))
    assert "background.measured_at: 2026-11-03 is a date without a time" in msg


def test_unknown_nuclide(tmp_path):
    msg = _error(tmp_path, CANONICAL.replace("nuclide: F-18", "nuclide: Tc-99m"))
    assert "nuclide: unknown radionuclide 'Tc-99m'" in msg


@pytest.mark.parametrize(
    "text, expected",
    [
        (CANONICAL + "operator: A. Person\n", "operator: unknown key 'operator'; allowed here: nuclide, background"),
        (CANONICAL.replace("ratio_to_background", "ratio"), "spheres.ratio: unknown key 'ratio'"),
        (CANONICAL.replace("spheres:", "background_extra:"), "background_extra: unknown key"),
        # a ratio has no meaning for the background itself
        (CANONICAL.replace("  concentration_kbq_ml: 5.30\n", "  ratio_to_background: 1.0\n  concentration_kbq_ml: 5.3\n"),
         "background.ratio_to_background: unknown key 'ratio_to_background'"),
    ],
)
def test_unknown_key(tmp_path, text, expected):
    assert expected in _error(tmp_path, text)


def test_both_ratio_and_concentration(tmp_path):
    text = CANONICAL.replace(
        "  ratio_to_background: 4.0\n",
        "  ratio_to_background: 4.0\n  concentration_kbq_ml: 21.2\n  measured_at: 2026-11-03T09:40:00+01:00\n",
    )
    msg = _error(tmp_path, text)
    assert "spheres: both concentration_kbq_ml and ratio_to_background given; give only one of" in msg


def test_both_spheres_and_rods(tmp_path):
    msg = _error(tmp_path, CANONICAL + "rods: {ratio_to_background: 2.0}\n")
    assert "spheres, rods: both given" in msg


def test_cold_insert_also_overridden(tmp_path):
    msg = _error(tmp_path, CANONICAL + "inserts: {sphere_28mm: {ratio_to_background: 2.0}}\n")
    assert "inserts.sphere_28mm: sphere_28mm is also listed in cold" in msg


def test_all_problems_listed_on_one_line(tmp_path):
    text = CANONICAL.replace("nuclide: F-18", "nuclide: X-1").replace("5.30", "-1").replace("4.0", "yes")
    msg = _error(tmp_path, text)
    for part in ("nuclide: unknown radionuclide", "background.concentration_kbq_ml: must be positive",
                 "spheres.ratio_to_background: expected a number, got True"):
        assert part in msg
    assert msg.count("; ") >= 3


def test_not_yaml_missing_file_and_not_a_mapping(tmp_path):
    assert "not valid YAML at line 3" in _error(tmp_path, "nuclide: F-18\nbackground:\n\tconcentration_kbq_ml: 5.3\n")
    assert "expected a mapping" in _error(tmp_path, "- F-18\n")
    assert "is empty" in _error(tmp_path, "")
    with pytest.raises(FillRecordError, match=r"nowhere\.yaml: no such fill record"):
        load_fill_record(tmp_path / "nowhere.yaml")


# ---------------------------------------------------------------------------- unusable numbers
@pytest.mark.parametrize(
    "replace, needle",
    [
        ("concentration_kbq_ml: 1e308", "background: concentration_kbq_ml give inf Bq/mL"),
        ("concentration_kbq_ml: 1.0e-300", "background: concentration_kbq_ml give 1e-297 Bq/mL"),
        ("concentration_kbq_ml: .inf", "background.concentration_kbq_ml: Input should be a finite number"),
    ],
)
def test_concentrations_must_be_finite_and_usable(tmp_path, replace, needle):
    msg = _error(tmp_path, CANONICAL.replace("concentration_kbq_ml: 5.30", replace))
    assert needle in msg


def test_syringe_over_a_vanishing_volume_refused_naming_the_fields(tmp_path):
    text = """\
nuclide: F-18
background: {syringe_mbq: 80.0, syringe_measured_at: 2026-11-03T09:00:00+01:00, residual_mbq: 2.0,
             residual_measured_at: 2026-11-03T09:20:00+01:00, volume_ml: 1.0e-308}
"""
    assert "background: syringe_mbq, residual_mbq and volume_ml give inf Bq/mL" in _error(tmp_path, text)


def test_ratio_times_background_beyond_the_range_refused(tmp_path):
    msg = _error(tmp_path, CANONICAL.replace("ratio_to_background: 4.0", "ratio_to_background: 1.0e+308"))
    assert "spheres: ratio_to_background times the background give inf Bq/mL" in msg


def test_syringe_readings_decades_apart_refused(tmp_path):
    text = """\
nuclide: F-18
background: {syringe_mbq: 80.0, syringe_measured_at: 1900-11-03T09:00:00+01:00, residual_mbq: 2.0,
             residual_measured_at: 2026-11-03T09:20:00+01:00, volume_ml: 9700}
"""
    msg = _error(tmp_path, text)
    assert "background: syringe_measured_at to residual_measured_at: the decay-correction gap is" in msg and "F-18" in msg


@pytest.mark.parametrize("when", ["1900-11-03T09:40:00+01:00", "2030-11-03T09:40:00+01:00", "9999-12-31T23:00:00-05:00"])
def test_scan_time_far_from_the_fill_refused_naming_file_and_field(tmp_path, when):
    rec = load_fill_record(_write(tmp_path, CANONICAL.replace("2026-11-03T09:40:00+01:00", when)))
    with pytest.raises(FillRecordError) as info:
        rec.background_bq_ml(SCAN)
    msg = str(info.value)
    assert msg.startswith(f"{tmp_path / 'fill.yaml'}: background.measured_at to the scan time: the decay-correction gap is")
    assert "days" in msg and "F-18" in msg and "timedelta" not in msg
    with pytest.raises(FillRecordError, match="background.measured_at"):
        rec.insert_bq_ml("sphere_10mm", SCAN)


def test_insert_entry_far_from_the_scan_names_the_insert(tmp_path):
    data = _base() | {"inserts": {"sphere_10mm": {"concentration_kbq_ml": 20.0, "measured_at": "9999-01-01T00:00:00+00:00"}}}
    rec = FillRecord.from_dict(data, source="f.yaml")
    with pytest.raises(FillRecordError, match=r"^f\.yaml: inserts\.sphere_10mm\.measured_at to the scan time"):
        rec.insert_bq_ml("sphere_10mm", SCAN)
    with pytest.raises(FillRecordError, match=r"background\.measured_at to inserts\.sphere_10mm's time"):
        rec.activity_ratio("sphere_10mm")


# ---------------------------------------------------------------------------- insert names
def test_insert_names_checked_against_the_template():
    from phantometry.templates import load_template

    iec = load_template("iec-body")
    rec = FillRecord.from_dict(
        _base() | {"cold": ["sphere_99mm", "sphere_37mm", "lung_insert"], "inserts": {"sphere_1mm": {"ratio_to_background": 8}}},
        source="f.yaml",
    )
    with pytest.raises(FillRecordError) as info:
        rec.check_inserts(iec)
    msg = str(info.value)
    assert msg.startswith("f.yaml: cold: sphere_99mm is not an insert of template iec-body; inserts: sphere_1mm is not an insert")
    assert "lung_insert" not in msg  # cold in the template too: consistent, accepted
    assert "the fill record fills sphere_" in msg
    # an insert the template fills itself cannot be given a concentration
    with pytest.raises(FillRecordError, match="inserts: lung_insert is filled by template iec-body itself"):
        FillRecord.from_dict(_base() | {"inserts": {"lung_insert": {"ratio_to_background": 2}}}).check_inserts(iec)
    small_animal = load_template("small-animal")
    with pytest.raises(FillRecordError, match=r"cold: rod_1mm is filled by template small-animal itself \(fill: background\)"):
        FillRecord.from_dict(_base() | {"cold": ["rod_1mm"]}).check_inserts(small_animal)
    FillRecord.from_dict(_base() | {"cold": ["cold_water", "cold_air"]}).check_inserts(small_animal)
    FillRecord.from_dict(_base() | {"cold": ["sphere_37mm"]}).check_inserts(iec)
