"""Site time: scanner times without a UTC offset read in the site's zone (phantometry.sitetime).

The synthetic scans (the project's synthesizer, invented scenario) are written twice: with
Timezone Offset From UTC (the reference: the header says when) and as most scanners write
them, local wall clock without an offset. Measured with the fill record's offset, a given zone,
or across a daylight-saving change, the recovery coefficients must equal the reference ones to
0.1 %; read as UTC (the old behaviour) they were 46 % high for F-18 an hour off
(exp(ln 2 x 60 / 109.77) = 1.461).
"""

from __future__ import annotations

import json
import subprocess
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
import yaml

from phantometry.errors import FillRecordError, InputError
from phantometry.fill import FillRecord, load_fill_record
from phantometry.measure import load_image, measure_volume
from phantometry.phantoms import load_template
from phantometry.sitetime import BASIS_FILL_OFFSET, BASIS_GIVEN_ZONE, BASIS_HEADER, site_clock
from phantometry.timeutil import zone_from_name
from phantometry.synth import SynthSpec, synthesize, write_synthetic

PHANTOMETRY = Path(sys.executable).parent / "phantometry"
RC = ("rc_max", "rc_mean", "rc_peak")


def _scan(tmp_path: Path, name: str, acquired_at: datetime, local_times: bool, before_s: float = 3000.0) -> dict:
    spec = SynthSpec(voxel_mm=(2.0, 2.0, 2.0), psf_fwhm_mm=6.0, noise_cv=0.0, acquired_at=acquired_at, fill_measured_before_s=before_s)
    return write_synthetic(synthesize(spec), tmp_path / name, "dicom", local_times=local_times)


def _measure(paths: dict, timezone_name: str | None = None, fill: FillRecord | None = None):
    fill = fill or load_fill_record(paths["fill"])
    volume = load_image(paths["image"], site_clock=site_clock(fill, timezone_name))
    return measure_volume(volume, load_template("iec-body"), fill, uncertainties=False, resolution=False, timezone=timezone_name)


def _rcs(analysis) -> dict:
    return {(r.roi, r.metric): r.value for r in analysis.rows if r.metric in RC or r.metric == "activity_recovery"}


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The +01:00 scan written with its offset: the header says when (basis header offset)."""
    tmp = tmp_path_factory.mktemp("ref")
    paths = _scan(tmp, "ref", datetime(2026, 11, 3, 10, 30, tzinfo=timezone(timedelta(hours=1))), local_times=False)
    analysis = _measure(paths)
    assert analysis.volume.time_basis == BASIS_HEADER
    return _rcs(analysis)


def _assert_same(values: dict, reference: dict, rel: float = 1e-3) -> None:
    assert values.keys() == reference.keys() and len(values) >= 10
    for key, value in values.items():
        assert value == pytest.approx(reference[key], rel=rel), key


@pytest.mark.parametrize("offset_h", [1, -5])
def test_local_times_with_the_fill_record_offset(tmp_path, reference, offset_h):
    # the same wall clock (10:30) and the same image: the fill record's offset places it
    zone = timezone(timedelta(hours=offset_h))
    paths = _scan(tmp_path, "local", datetime(2026, 11, 3, 10, 30, tzinfo=zone), local_times=True)
    assert "TimezoneOffsetFromUTC" not in __import__("pydicom").dcmread(next(Path(paths["image"]).iterdir()), stop_before_pixels=True)
    analysis = _measure(paths)
    assert analysis.volume.time_basis == BASIS_FILL_OFFSET
    assert analysis.volume.acquired_at.utcoffset() == timedelta(hours=offset_h)
    _assert_same(_rcs(analysis), reference)
    # the inference is said, not silent
    assert any("time basis inferred" in w and "fill record's offset" in w for w in analysis.warnings)


def test_local_times_across_a_daylight_saving_change_with_a_given_zone(tmp_path, reference):
    # Europe/Berlin leaves summer time on 2026-10-25 at 03:00 CEST -> 02:00 CET (IANA tz
    # database). Scan at 03:10 CET (02:10 UTC); the fill record measured 2 h of elapsed time
    # earlier, at 02:10 CEST (+02:00, 00:10 UTC): the wall clock moved only 1 h.
    berlin = ZoneInfo("Europe/Berlin")
    scan = datetime(2026, 10, 25, 3, 10, tzinfo=berlin)
    paths = _scan(tmp_path, "dst", scan, local_times=True, before_s=7200.0)
    fill = load_fill_record(paths["fill"])
    assert fill.background.measured_at.utcoffset() == timedelta(hours=2)
    # reference for this scan: the same image with its offset written
    ref_paths = _scan(tmp_path, "dst-ref", scan, local_times=False, before_s=7200.0)
    ref = _rcs(_measure(ref_paths))
    analysis = _measure(paths, "Europe/Berlin")
    assert analysis.volume.time_basis == BASIS_GIVEN_ZONE and analysis.volume.acquired_at.utcoffset() == timedelta(hours=1)
    assert not any("time basis inferred" in w for w in analysis.warnings)
    _assert_same(_rcs(analysis), ref)
    # the background's activity recovery of a noise-free scan is the same as at 10:30 +01:00
    assert analysis.value("background", "activity_recovery") == pytest.approx(reference[("background", "activity_recovery")], rel=1e-3)
    # without the zone the fill record's offset (+02:00, summer time) is an hour off: the
    # recovery coefficients come out exp(-ln 2 x 60 / 109.77) = 0.684 times (and it is warned)
    wrong = _measure(paths)
    assert wrong.volume.time_basis == BASIS_FILL_OFFSET
    ratio = wrong.value("sphere_37mm", "rc_max") / ref[("sphere_37mm", "rc_max")]
    assert ratio == pytest.approx(0.5 ** (60 / 109.77), rel=1e-3)


def test_fill_time_after_the_scan_is_refused(tmp_path):
    paths = _scan(tmp_path, "late", datetime(2026, 11, 3, 10, 30, tzinfo=timezone(timedelta(hours=1))), local_times=False)
    data = yaml.safe_load(Path(paths["fill"]).read_text())
    data["background"]["measured_at"] = "2026-11-03T10:45:00+01:00"
    fill = FillRecord.from_dict(data, source="late.yaml")
    with pytest.raises(FillRecordError) as info:
        _measure(paths, fill=fill)
    message = str(info.value)
    assert "late.yaml" in message and "background.measured_at" in message and "15 min after the scan start" in message
    assert "\n" not in message


def test_a_long_gap_for_a_short_lived_nuclide_is_warned(tmp_path):
    # F-18 (109.77 min): a fill record 30 h before the scan is probably a wrong date
    paths = _scan(tmp_path, "gap", datetime(2026, 11, 3, 10, 30, tzinfo=timezone(timedelta(hours=1))), local_times=False,
                  before_s=30 * 3600.0)
    analysis = _measure(paths)
    assert any("30.0 h before the scan start" in w and "F-18" in w for w in analysis.warnings)


def test_zone_names_are_checked():
    assert zone_from_name("Europe/Berlin").utcoffset(datetime(2026, 7, 1)) == timedelta(hours=2)
    for bad in ("Mars/Olympus", "", "../etc/passwd", "Europe/"):
        with pytest.raises(InputError, match="not a time zone of the IANA database"):
            zone_from_name(bad)
    # the fill record's timezone: is validated with it
    with pytest.raises(FillRecordError, match="timezone: .*Mars/Olympus"):
        FillRecord.from_dict({"nuclide": "F-18", "timezone": "Mars/Olympus",
                              "background": {"concentration_kbq_ml": 5.3, "measured_at": "2026-11-03T09:40:00+01:00"}})


def test_site_clock_order():
    record = FillRecord.from_dict({"nuclide": "F-18", "timezone": "America/New_York",
                                  "background": {"concentration_kbq_ml": 5.3, "measured_at": "2026-11-03T09:40:00+01:00"}})
    assert site_clock(record, "Europe/Berlin").label == "Europe/Berlin (--timezone)"
    assert site_clock(record).label == "America/New_York (fill record timezone)"
    plain = FillRecord.from_dict({"nuclide": "F-18", "background": {
        "syringe_mbq": 300, "syringe_measured_at": "2026-11-03T09:00:00-04:00", "residual_mbq": 1,
        "residual_measured_at": "2026-11-03T09:20:00-05:00", "volume_ml": 9700}})
    clock = site_clock(plain)
    assert clock.inferred and clock.label.startswith("-05:00")  # the latest time, 14:20 UTC
    assert "several offsets (-04:00, -05:00)" in clock.note


def test_cli_timezone_end_to_end(tmp_path):
    # the console script with --timezone: series.time_basis and the zone in measurements.json
    berlin = ZoneInfo("Europe/Berlin")
    paths = _scan(tmp_path, "cli", datetime(2026, 10, 25, 3, 10, tzinfo=berlin), local_times=True, before_s=7200.0)
    out = tmp_path / "out"
    proc = subprocess.run([str(PHANTOMETRY), "measure", str(paths["image"]), "--fill", str(paths["fill"]), "--out", str(out),
                           "--timezone", "Europe/Berlin"], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads((out / "measurements.json").read_text())
    assert doc["series"]["time_basis"] == "given zone" and doc["series"]["time_zone"] == "Europe/Berlin (--timezone)"
    assert doc["series"]["acquired_at"].endswith("+01:00")
    assert "times: given zone" in proc.stdout
    # a bad zone: one line, exit 2, nothing written
    bad = subprocess.run([str(PHANTOMETRY), "measure", str(paths["image"]), "--fill", str(paths["fill"]), "--out",
                          str(tmp_path / "out2"), "--timezone", "Mars/Olympus"], capture_output=True, text=True, timeout=600)
    assert bad.returncode == 2 and bad.stderr.count("\n") == 1 and "Mars/Olympus" in bad.stderr
    assert not (tmp_path / "out2").exists()
