"""Fill-record uncertainties (GUM): propagation against a Monte Carlo of the fill inputs.

GUM Supplement 1 (JCGM 101:2008) validates the law of propagation of uncertainty (JCGM
100:2008) by propagating the distributions of the inputs through the model by Monte Carlo;
here the model is the fill record's own rules (a record rebuilt from perturbed YAML values and
validated each draw), the inputs Gaussian with the stated standard uncertainties and one
calibration factor common to every reading. The propagated standard uncertainties must agree
with the Monte Carlo SDs within 10 % (the task's tolerance; 4000 draws give the SD to about
1.1 %).
"""

from __future__ import annotations

import copy
import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from phantometry.errors import FillRecordError
from phantometry.fill import FillRecord
from phantometry.results import CSV_COLUMNS, measurements_csv, read_measurements_csv

CET = timezone(timedelta(hours=1))
SCAN = datetime(2026, 11, 3, 10, 30, tzinfo=CET)  # invented
RECORD = {
    "nuclide": "F-18",
    "uncertainty": {"activity_pct": 2.0, "calibration_pct": 3.0, "residual_mbq": 1.5},
    "background": {"syringe_mbq": 70.0, "syringe_measured_at": "2026-11-03T09:00:00+01:00", "residual_mbq": 4.0,
                   "residual_measured_at": "2026-11-03T09:10:00+01:00", "volume_ml": 9700.0, "volume_u_ml": 150.0},
    "spheres": {"syringe_mbq": 20.0, "syringe_measured_at": "2026-11-03T09:20:00+01:00", "residual_mbq": 2.0,
                "residual_measured_at": "2026-11-03T09:25:00+01:00", "volume_ml": 500.0, "volume_u_ml": 5.0},
}
NAMES = ["sphere_37mm"]


def _monte_carlo(n: int = 4000, seed: int = 1) -> np.ndarray:
    """(background, sphere, ratio) at SCAN for n draws of the inputs."""
    rng = np.random.default_rng(seed)
    out = np.empty((n, 3))
    for i in range(n):
        d = copy.deepcopy(RECORD)
        del d["uncertainty"]
        cal = 1.0 + 0.03 * rng.standard_normal()
        for key in ("background", "spheres"):
            e = d[key]
            u_v = e.pop("volume_u_ml")
            e["syringe_mbq"] = e["syringe_mbq"] * (1 + 0.02 * rng.standard_normal()) * cal
            e["residual_mbq"] = max(0.0, (e["residual_mbq"] + 1.5 * rng.standard_normal()) * cal)
            e["volume_ml"] = e["volume_ml"] + u_v * rng.standard_normal()
        rec = FillRecord.from_dict(d)
        out[i] = rec.background_bq_ml(SCAN), rec.insert_bq_ml(NAMES[0], SCAN), rec.activity_ratio(NAMES[0])
    return out


def test_propagation_agrees_with_monte_carlo_within_10_percent():
    record = FillRecord.from_dict(RECORD)
    fu = record.uncertainties(SCAN, NAMES)
    mc = _monte_carlo()
    mean = mc.mean(axis=0)
    sd = mc.std(axis=0, ddof=1)
    assert fu.background_rel == pytest.approx(sd[0] / mean[0], rel=0.10)
    assert fu.insert_rel[NAMES[0]] == pytest.approx(sd[1] / mean[1], rel=0.10)
    assert fu.ratio[NAMES[0]] == pytest.approx(sd[2], rel=0.10)
    # the common calibration cancels in the ratio: with it alone, the concentrations carry its
    # 3 % and the ratio nothing
    only_cal = copy.deepcopy(RECORD)
    only_cal["uncertainty"] = {"calibration_pct": 3.0}
    for key in ("background", "spheres"):
        del only_cal[key]["volume_u_ml"]
    fc = FillRecord.from_dict(only_cal).uncertainties(SCAN, NAMES)
    assert fc.background_rel == pytest.approx(0.03, rel=1e-6) and fc.insert_rel[NAMES[0]] == pytest.approx(0.03, rel=1e-6)
    assert fc.ratio[NAMES[0]] == pytest.approx(0.0, abs=1e-9)
    # and the propagation is not trivially zero or equal across outputs
    assert 0.03 < fu.background_rel < 0.06 and fu.insert_rel[NAMES[0]] != fu.background_rel


def test_concentration_form_closed_form():
    # C = reading x calibration: u_rel = sqrt(u_reading^2 + u_cal^2) (GUM eq. 10, relative
    # sensitivities 1); the decay to the scan time does not change relative uncertainties
    d = {"nuclide": "F-18", "uncertainty": {"activity_pct": 1.5, "calibration_pct": 2.0},
         "background": {"concentration_kbq_ml": 5.3, "measured_at": "2026-11-03T09:40:00+01:00"},
         "spheres": {"ratio_to_background": 4.0}}
    fu = FillRecord.from_dict(d).uncertainties(SCAN, NAMES)
    assert fu.background_rel == pytest.approx(math.hypot(0.015, 0.02), rel=1e-6)
    # a ratio stated without an uncertainty: the sphere follows the background, the ratio is exact
    assert fu.insert_rel[NAMES[0]] == pytest.approx(fu.background_rel, rel=1e-6)
    assert fu.ratio[NAMES[0]] == pytest.approx(0.0, abs=1e-12)
    d["uncertainty"]["ratio_pct"] = 2.5
    fu = FillRecord.from_dict(d).uncertainties(SCAN, NAMES)
    assert fu.ratio[NAMES[0]] == pytest.approx(0.025 * 4.0, rel=1e-6)


def test_percent_contrast_only_through_the_activity_ratio():
    # Q = (C_H/C_B - 1)/(r - 1) x 100 (NEMA NU 2, recalled): with the measured means fixed, the
    # Monte Carlo SD of Q over draws of r equals |Q| u(r) / (r - 1) within 10 %
    record = FillRecord.from_dict(RECORD)
    fu = record.uncertainties(SCAN, NAMES)
    r = record.activity_ratio(NAMES[0])
    measured = 1.0 + 0.7 * (r - 1.0)  # C_H/C_B of a sphere recovering 70 % contrast
    q = (measured - 1.0) / (r - 1.0) * 100.0
    draws = _monte_carlo()[:, 2]
    q_mc = (measured - 1.0) / (draws - 1.0) * 100.0
    assert abs(q) * fu.ratio[NAMES[0]] / (r - 1.0) == pytest.approx(q_mc.std(ddof=1), rel=0.10)


def test_uncertainty_keys_are_checked():
    bad = copy.deepcopy(RECORD)
    bad["uncertainty"]["activity_pct"] = -1
    with pytest.raises(FillRecordError, match="uncertainty.activity_pct: must be zero or more"):
        FillRecord.from_dict(bad)
    bad = copy.deepcopy(RECORD)
    bad["uncertainty"]["volume_ml"] = 3
    with pytest.raises(FillRecordError, match="unknown key 'volume_ml'.*allowed here: activity_pct"):
        FillRecord.from_dict(bad)
    bad = {"nuclide": "F-18", "background": {"concentration_kbq_ml": 5.3, "measured_at": "2026-11-03T09:40:00+01:00",
                                              "volume_u_ml": 4}}
    with pytest.raises(FillRecordError, match="volume_u_ml is the uncertainty of volume_ml, which is not given"):
        FillRecord.from_dict(bad)
    # without any uncertainty key nothing is claimed
    plain = copy.deepcopy(RECORD)
    del plain["uncertainty"]
    for key in ("background", "spheres"):
        del plain[key]["volume_u_ml"]
    assert not FillRecord.from_dict(plain).has_uncertainties
    assert FillRecord.from_dict(RECORD).has_uncertainties
    # the record round-trips with its uncertainty keys
    assert FillRecord.from_dict(FillRecord.from_dict(RECORD).to_dict()).to_dict() == FillRecord.from_dict(RECORD).to_dict()


def test_csv_column_appended_and_read_back(tmp_path):
    from phantometry.results import Measurement

    assert CSV_COLUMNS[-1] == "uncertainty_fill" and CSV_COLUMNS.index("note") == len(CSV_COLUMNS) - 2
    rows = [Measurement("1.2", SCAN.isoformat(), "iec-body", "sphere_37mm", "rc_max", 0.91, "1", 0.01, uncertainty_fill=0.035),
            Measurement("1.2", SCAN.isoformat(), "iec-body", "background", "mean_bq_ml", 5300.0, "Bq/mL")]
    path = tmp_path / "m.csv"
    path.write_text(measurements_csv(rows), encoding="utf-8")
    back = read_measurements_csv(path)
    assert back[0].uncertainty_fill == pytest.approx(0.035) and back[1].uncertainty_fill is None
