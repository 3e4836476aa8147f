"""A sealed Ge-68 uniform cylinder calibrated 500 days before the scan (issue 18's request).

The synthetic scan (the project's synthesizer; invented scenario) shows the Ga-68 activity in
equilibrium; the fill record states the Ge-68 activity concentration on the calibration date
500 days earlier. Activity recovery must come out 1 within 0.2 %: the decay over 500 days
(2^(-500/270.95) = 0.278, Ge-68 half-life NUBASE2020) and the equilibrium ratio
lambda_Ga / (lambda_Ga - lambda_Ge) = 1.00017 both have to be right (a 0.1 % error in the
half-life alone would shift the result by 0.18 %).
"""

from __future__ import annotations

from datetime import timedelta

import pytest

from phantometry.fill import FillRecord
from phantometry.measure import load_image, measure_volume
from phantometry.nuclides import get_nuclide
from phantometry.phantoms import load_template
from phantometry.sitetime import site_clock
from phantometry.synth import SynthSpec, synthesize, write_synthetic

TPL = load_template("uniform-cylinder")
DAYS = 500


@pytest.fixture(scope="module")
def ge68_scan():
    spec = SynthSpec(phantom="uniform-cylinder", voxel_mm=(3.0,) * 3, psf_fwhm_mm=6.0, noise_cv=0.0, nuclide="Ge-68",
                     background_kbq_ml=20.0, fill_measured_before_s=DAYS * 86400.0)
    return synthesize(spec)


def test_activity_recovery_after_500_days(ge68_scan):
    fill = FillRecord.from_dict(ge68_scan.fill_record)
    measured_at = fill.background.measured_at
    assert (ge68_scan.volume.acquired_at - measured_at) == timedelta(days=DAYS)
    # the record's concentration is the Ge-68 one 500 days earlier: 20 kBq/mL imaged now is
    # 20 / 2^(-500/270.95) / 1.000174 = 71.86 kBq/mL then (worked from the closed forms)
    ge = get_nuclide("Ge-68")
    expected_then = 20.0 / 2.0 ** (-DAYS / 270.95) / ge.imaged_activity_ratio
    assert fill.background.concentration_kbq_ml == pytest.approx(expected_then, rel=1e-6)
    assert expected_then == pytest.approx(71.856, abs=0.01)
    a = measure_volume(ge68_scan.volume, TPL, fill)
    assert a.value("uniform_volume", "activity_recovery") == pytest.approx(1.0, abs=0.002)
    assert a.true_background_bq_ml == pytest.approx(20000.0, rel=1e-7)  # the record keeps 6 decimals of kBq/mL


def test_dicom_round_trip_and_fill_uncertainty(tmp_path, ge68_scan):
    # through DICOM (the loader names the nuclide Ge-68 from its half-life), with the
    # certificate's 3 % standard uncertainty (fill record uncertainty.calibration_pct)
    paths = write_synthetic(ge68_scan, tmp_path / "scan", "dicom")
    record = dict(ge68_scan.fill_record, uncertainty={"calibration_pct": 3.0})
    fill = FillRecord.from_dict(record)
    volume = load_image(paths["image"], site_clock=site_clock(fill))
    assert volume.nuclide == "Ge-68" and volume.time_basis == "header offset"
    a = measure_volume(volume, TPL, fill, uncertainties=False)
    rec = next(r for r in a.rows if r.roi == "uniform_volume" and r.metric == "activity_recovery")
    assert rec.value == pytest.approx(1.0, abs=0.002)
    # u_fill = activity recovery x u_rel(true concentration) = AR x 3 % (GUM, sensitivity 1)
    assert rec.uncertainty_fill == pytest.approx(0.03 * rec.value, rel=1e-6)
    err = next(r for r in a.rows if r.metric == "calibration_error_pct")
    assert err.uncertainty_fill == pytest.approx(3.0 * rec.value, rel=1e-6)
    # rows that do not depend on the fill record carry none
    assert all(r.uncertainty_fill is None for r in a.rows if r.metric in ("voxel_cv_pct", "diameter_mm", "max_deviation_pct"))
    # no warning of a long gap: Ge-68 is long-lived
    assert not any("before the scan start" in w for w in a.warnings)
