"""DecayCorrection semantics on hand-built two-bed DICOM series, against closed forms.

Every combination of Units (BQML, GML) and Decay Correction (START, ADMIN, NONE) is written by
hand: bed 1 starts at t0, bed 2 one frame duration T later; the true (instantaneous)
concentration is C(t) = C0 exp(-lambda (t - t0)). What a scanner stores (DICOM PS3.3 PET
Image / PET Series modules; QIBA vendor-neutral SUV pseudo-code):

* START: every bed decay-corrected to the scan start t0, frame decay included: C0;
* ADMIN: every bed decay-corrected to the administration time t_inj: C(t_inj);
* NONE: the frame's mean activity without decay correction: C(s_k) f(T) with
  f(T) = (1 - exp(-lambda T)) / (lambda T) (the integral of the decay law over the frame).

GML stores SUVbw = C x W / D with the dose D decayed to the scan start (START), to the bed's own
start (NONE, as the loader documents) or not at all (ADMIN). The loader must give back the
activity at ``acquired_at`` in every slice: C0 at t0 (START), C(t_inj) at t_inj (ADMIN), and
C(t_ref) = C0 f(T) at t_ref = t0 + Delta(T), exp(-lambda Delta) = f(T) (NONE).
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import numpy as np
import pydicom
import pytest

from phantometry.errors import UnitsError
from phantometry.io.dicom import load_dicom
from phantometry.io.dicom_write import write_dicom_series
from phantometry.volume import Volume, affine_from_axes

TZ = timezone(timedelta(hours=1))
T0 = datetime(2031, 5, 14, 10, 15, 0, tzinfo=TZ)  # invented scan start (bed 1)
INJECTION = T0 - timedelta(minutes=75)
C0 = 5300.0  # Bq/mL at t0
WEIGHT_KG = 70.0
DOSE_BQ = 370e6  # at the injection
NZ = 6  # slices 0-2 bed 1, 3-5 bed 2
# Half-lives (s): F-18 109.77 min (EP 5.7 / NNDC), Ga-68 67.83 min (DDEP 2019), C-11 20.3402
# min (NUBASE2020), as in phantometry.nuclides
HALF_LIFE_S = {"F-18": 109.77 * 60, "Ga-68": 67.83 * 60, "C-11": 20.3402 * 60}


def _bed(k: int) -> int:
    return 0 if k < NZ // 2 else 1


def _write(tmp_path, nuclide: str, units: str, correction: str, frame_s: float, stored: list[float], starts: list[datetime],
           duration: bool = True, injection: bool = True):
    """A two-bed series whose slice k stores ``stored[k]`` (Bq/mL, or SUV for GML) uniformly."""
    volume = Volume(data=np.ones((NZ, 8, 8), np.float32), affine=affine_from_axes([0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], (2, 2, 2)),
                    acquired_at=T0, nuclide=nuclide)
    folder = tmp_path / f"{nuclide}-{units}-{correction}-{frame_s:g}"
    paths = write_dicom_series(volume, folder, frame_duration_s=frame_s, decay_correction=correction)
    for k, path in enumerate(paths):
        ds = pydicom.dcmread(path)
        ds.Units = units
        ds.AcquisitionTime = starts[_bed(k)].strftime("%H%M%S.%f")
        ds.AcquisitionDate = starts[_bed(k)].strftime("%Y%m%d")
        ds.SeriesTime = T0.strftime("%H%M%S.%f")
        ds.PatientWeight = f"{WEIGHT_KG:g}"
        item = ds.RadiopharmaceuticalInformationSequence[0]
        item.RadionuclideTotalDose = f"{DOSE_BQ:.0f}"
        item.RadionuclideHalfLife = pydicom.valuerep.format_number_as_ds(HALF_LIFE_S[nuclide])
        if injection:
            item.RadiopharmaceuticalStartDateTime = INJECTION.strftime("%Y%m%d%H%M%S.%f")
        else:
            for name in ("RadiopharmaceuticalStartDateTime", "RadiopharmaceuticalStartTime"):
                if name in item:
                    delattr(item, name)
        if not duration:
            del ds.ActualFrameDuration
        ds.PixelData = np.full((8, 8), 30000, dtype="<i2").tobytes()
        ds.RescaleSlope = pydicom.valuerep.format_number_as_ds(stored[k] / 30000.0)
        ds.save_as(path)
    return folder


def _decay(nuclide: str, seconds: float) -> float:
    return math.exp(-math.log(2) / HALF_LIFE_S[nuclide] * seconds)


def _f(nuclide: str, frame_s: float) -> float:
    x = math.log(2) / HALF_LIFE_S[nuclide] * frame_s
    return (1 - math.exp(-x)) / x


def _dose_at(nuclide: str, t: datetime) -> float:
    return DOSE_BQ * _decay(nuclide, (t - INJECTION).total_seconds())


@pytest.mark.parametrize("units", ["BQML", "GML"])
@pytest.mark.parametrize("correction", ["START", "ADMIN", "NONE"])
@pytest.mark.parametrize("nuclide", ["F-18", "Ga-68", "C-11"])
@pytest.mark.parametrize("minutes", [5, 10, 20])
def test_every_combination_against_the_closed_form(tmp_path, units, correction, nuclide, minutes):
    frame_s = minutes * 60.0
    starts = [T0, T0 + timedelta(seconds=frame_s)]
    weight_g = WEIGHT_KG * 1000.0
    if correction == "START":
        conc = [C0] * NZ
        suv_dose = [_dose_at(nuclide, T0)] * NZ
        expected_time, expected = T0, C0
    elif correction == "ADMIN":
        c_inj = C0 / _decay(nuclide, (T0 - INJECTION).total_seconds())
        conc = [c_inj] * NZ
        suv_dose = [DOSE_BQ] * NZ
        expected_time, expected = INJECTION, c_inj
    else:  # NONE: frame means, each bed's own start
        conc = [C0 * _decay(nuclide, (starts[_bed(k)] - T0).total_seconds()) * _f(nuclide, frame_s) for k in range(NZ)]
        suv_dose = [_dose_at(nuclide, starts[_bed(k)]) for k in range(NZ)]
        delta = -math.log(_f(nuclide, frame_s)) / (math.log(2) / HALF_LIFE_S[nuclide])
        expected_time, expected = T0 + timedelta(seconds=delta), C0 * _f(nuclide, frame_s)
        # the closed form itself: C(t0 + Delta) equals the first frame's mean
        assert C0 * _decay(nuclide, delta) == pytest.approx(expected, rel=1e-12)
    stored = conc if units == "BQML" else [c * weight_g / d for c, d in zip(conc, suv_dose)]
    loaded = load_dicom(_write(tmp_path, nuclide, units, correction, frame_s, stored, starts))
    np.testing.assert_allclose(loaded.data.mean(axis=(1, 2)), expected, rtol=1e-6)
    assert abs((loaded.acquired_at - expected_time).total_seconds()) < 1e-3
    assert loaded.scan_start == T0 and loaded.frame_duration_s == pytest.approx(frame_s)


@pytest.mark.parametrize("nuclide, minutes, loss_pct", [("F-18", 10, 3.1), ("F-18", 20, 6.1), ("Ga-68", 20, 9.6), ("C-11", 10, 15.3)])
def test_none_series_recovers_the_loss_of_reading_the_frame_mean_at_its_start(tmp_path, nuclide, minutes, loss_pct):
    # Referred to the frame start (the old reading), the single-bed frame mean is low by f(T):
    # the truth at acquired_at now equals the stored value, and acquired_at moved by Delta.
    frame_s = minutes * 60.0
    stored = [C0 * _f(nuclide, frame_s)] * NZ
    loaded = load_dicom(_write(tmp_path, nuclide, "BQML", "NONE", frame_s, stored, [T0, T0]))
    true_at_reference = C0 * _decay(nuclide, (loaded.acquired_at - T0).total_seconds())
    assert float(loaded.data.mean()) / true_at_reference == pytest.approx(1.0, abs=1e-6)
    # what reading at the frame start gave (the bug): low by the percentage
    assert 100 * (1 - float(loaded.data.mean()) / C0) == pytest.approx(loss_pct, abs=0.15)


def test_none_without_frame_duration_is_refused(tmp_path):
    folder = _write(tmp_path, "F-18", "BQML", "NONE", 600.0, [C0] * NZ, [T0, T0], duration=False)
    with pytest.raises(UnitsError, match="ActualFrameDuration .* is missing"):
        load_dicom(folder)


def test_admin_without_administration_time_is_refused(tmp_path):
    folder = _write(tmp_path, "F-18", "BQML", "ADMIN", 600.0, [C0] * NZ, [T0, T0], injection=False)
    with pytest.raises(UnitsError, match="ADMIN.*RadiopharmaceuticalStartDateTime"):
        load_dicom(folder)
