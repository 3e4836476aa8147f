"""Effective resolution from the sphere curve: the blurred-sphere model and its fit."""

import math

import numpy as np
import pytest
from scipy import integrate, stats

from phantometry.fill import FillRecord
from phantometry.locate import Placement
from phantometry.measure import measure_volume
from phantometry.metrics.resolution import (
    FWHM_PER_SIGMA,
    SphereObservation,
    blurred_ball_profile,
    blurred_ball_profile_derivatives,
    blurred_disc_profile,
    blurred_sphere_centre,
    effective_sigma_mm,
    fit_effective_fwhm,
    fit_sphere_profiles,
    model_rc_max,
    model_rc_mean,
    model_rc_peak,
    sphere_profile,
)
from phantometry.synth import SynthSpec, correlated_unit_noise, synthesize
from phantometry.templates import load_template
from phantometry.noise import estimate_noise

TPL = load_template("iec-body")


# ----------------------------------------------------------------------------- closed forms
@pytest.mark.parametrize("ratio", [0.3, 0.8, 1.0, 1.7, 3.0, 6.0])
def test_centre_value_is_maxwell_cdf(ratio):
    # Reference library: the centre of a unit ball of radius R blurred by an isotropic 3-D
    # Gaussian is scipy.stats.maxwell.cdf(R / sigma) (the length of a 3-D normal vector).
    sigma = 2.5
    assert blurred_sphere_centre(ratio * sigma, sigma) == pytest.approx(stats.maxwell.cdf(ratio), abs=1e-12)
    # the profile's r -> 0 limit is the same value
    assert blurred_ball_profile(np.array([0.0, 1e-9, 1e-3]), ratio * sigma, sigma) == pytest.approx(
        stats.maxwell.cdf(ratio), abs=1e-6
    )


def test_profile_is_noncentral_chi_square():
    # Reference library: |r e + s Z|^2 / s^2 is non-central chi-square (3 dof, nc = (r/s)^2),
    # so the blurred ball profile is scipy.stats.ncx2.cdf((R/s)^2, 3, (r/s)^2) for r > 0.
    R, s = 9.0, 3.1
    r = np.array([0.5, 2.0, 6.0, 8.9, 9.0, 11.0, 15.0, 22.0])
    expected = stats.ncx2.cdf((R / s) ** 2, 3, (r / s) ** 2)
    assert blurred_ball_profile(r, R, s) == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("R, s", [(5.0, 2.0), (18.5, 2.6), (10.0, 0.4), (3.0, 6.0)])
def test_profile_derivatives_match_finite_differences(R, s):
    # Reference library: the profile is scipy.stats.ncx2.cdf((R/s)^2, 3, (r/s)^2); its
    # derivatives in r and s by central differences of that reference (step 1e-4 mm).
    r = np.array([0.0, 1e-7, 1e-3, 0.05, 0.5, 3.0, 4.99, 9.9, 10.0, 14.0, 25.0])
    f, f_r, f_s = blurred_ball_profile_derivatives(r, R, s)

    def ref(rr, ss):
        return stats.ncx2.cdf((R / ss) ** 2, 3, (np.asarray(rr) / ss) ** 2)

    h = 1e-4
    rr = np.maximum(r, 2 * h)  # central differences away from r = 0, where df/dr = 0 by symmetry
    assert f == pytest.approx(blurred_ball_profile(r, R, s), abs=1e-12)
    assert f_r[r >= 2 * h] == pytest.approx(((ref(rr + h, s) - ref(rr - h, s)) / (2 * h))[r >= 2 * h], abs=1e-6)
    assert f_r[r < 1e-4 * s] == pytest.approx(0.0, abs=1e-12)
    assert f_s == pytest.approx((ref(np.maximum(r, 1e-9), s + h) - ref(np.maximum(r, 1e-9), s - h)) / (2 * h), abs=1e-6)


def test_disc_profile_axis_value_and_chi2():
    # Reference library: the 2-D (long rod) analogue; on the axis 1 - exp(-R^2 / 2 s^2) =
    # scipy.stats.chi(2).cdf(R / s).
    R, s = 25.0, 4.0
    assert blurred_disc_profile(np.array([0.0]), R, s)[0] == pytest.approx(stats.chi(2).cdf(R / s), abs=1e-12)
    assert blurred_disc_profile(np.array([0.0]), R, s)[0] == pytest.approx(1 - math.exp(-R * R / (2 * s * s)), abs=1e-12)


def test_profile_conserves_activity():
    # Mathematics: blurring conserves the integral; 4 pi int f(r) r^2 dr = 4/3 pi R^3.
    R, s = 6.5, 2.8
    total, _ = integrate.quad(lambda r: 4 * math.pi * r * r * blurred_ball_profile(np.array([r]), R, s)[0], 0, R + 12 * s, limit=200)
    assert total == pytest.approx(4 / 3 * math.pi * R**3, rel=1e-6)


def test_effective_sigma_adds_voxel_box_variance():
    # Mathematics: a box of side d has variance d^2 / 12; FWHM = 2 sqrt(2 ln 2) sigma.
    assert effective_sigma_mm(6.0, (2.0, 2.0, 2.0)) == pytest.approx(math.sqrt((6 / FWHM_PER_SIGMA) ** 2 + 4 / 12))
    assert FWHM_PER_SIGMA == pytest.approx(2.354820045, rel=1e-9)


def test_model_rc_max_with_wall_and_background():
    # Linearity of the blur (mathematics): centre = c F(R/s) + b (1 - F((R + w)/s)), with F
    # the Maxwell CDF (scipy.stats.maxwell).
    s = effective_sigma_mm(7.0, 3.0)
    for d in (10.0, 17.0, 37.0):
        expected = stats.maxwell.cdf(d / 2 / s) + (1 - stats.maxwell.cdf((d / 2 + 1) / s)) / 10.0
        assert model_rc_max(d, 7.0, activity_ratio=10.0, wall_mm=1.0, voxel_mm=3.0) == pytest.approx(expected, abs=1e-12)
    assert sphere_profile(np.array([0.0]), 5.0, 10.0, 1.0, s, 1.0)[0] / 10 == pytest.approx(
        model_rc_max(10.0, 7.0, activity_ratio=10.0, wall_mm=1.0, voxel_mm=3.0), abs=1e-12)


def test_model_rc_mean_and_peak_limits():
    # Hand-worked limits: without blur the A50 VOI is the sphere itself (RC mean 1), and a
    # sphere much larger than the blur and the 1 mL peak sphere recovers fully.
    assert model_rc_mean(20.0, 1e-4, activity_ratio=10.0) == pytest.approx(1.0, abs=1e-3)
    assert model_rc_peak(60.0, 6.0, activity_ratio=10.0) == pytest.approx(1.0, abs=1e-4)
    # blur lowers the recovery, most for small spheres; the A50 mean lies below the centre value
    curve = model_rc_mean(np.array([10.0, 13, 17, 22, 28, 37]), 8.0, activity_ratio=10.0, wall_mm=1.0, voxel_mm=2.0)
    assert np.all(np.diff(curve) > 0)
    assert np.all(curve < model_rc_max(np.array([10.0, 13, 17, 22, 28, 37]), 8.0, activity_ratio=10.0, wall_mm=1.0, voxel_mm=2.0))


# ----------------------------------------------------------------------------- the fit
def _observations(res, jitter_mm=0.0, seed=0):
    rng = np.random.default_rng(seed)
    tr = res.truth["inserts"]
    return [
        SphereObservation(s.name, np.array(tr[s.name]["centre_mm"]) + rng.uniform(-jitter_mm, jitter_mm, 3), s.diameter_mm, s.wall_mm,
                          tr[s.name]["concentration_bq_ml"])
        for s in TPL.spheres
    ]


def _lung_exclusion(res):
    lung = res.truth["inserts"]["lung_insert"]
    c, a = np.array(lung["centre_mm"]), np.array(lung["axis"])

    def fn(p):
        rel = p - c
        ax = rel @ a
        return np.sqrt(np.maximum((rel * rel).sum(-1) - ax * ax, 0)) < 25 + 15

    return fn


@pytest.fixture(scope="module")
def sphere_scans():
    """Noise-free scans of the sphere region at 2 mm voxels (only the central part of the
    phantom is in the grid, which the model does not need), one per FWHM, at sub-voxel shifts."""
    out = {}
    shifts = {4.0: (0.3, -0.7, 0.45), 6.0: (-0.9, 0.2, -0.35), 8.0: (0.55, 0.8, 0.1), 10.0: (-0.2, -0.45, 0.9)}
    for fwhm, sh in shifts.items():
        out[fwhm] = synthesize(SynthSpec(voxel_mm=(2.0,) * 3, matrix=(96, 96, 40), shift_mm=(sh[0], 35 + sh[1], 20 + sh[2]),
                                         psf_fwhm_mm=fwhm, noise_cv=0.0, sphere_ratio=10.0, background_kbq_ml=2.0))
    return out


@pytest.mark.parametrize("fwhm", [4.0, 6.0, 8.0, 10.0])
def test_noise_free_fwhm_within_0_3_mm(sphere_scans, fwhm):
    # Known truth: the synthesizer's Gaussian PSF FWHM (phantometry.synth); issue 4 asks for
    # 0.3 mm at 2 mm voxels. Starting centres are off by up to 0.6 mm: the fit refines them.
    res = sphere_scans[fwhm]
    fit = fit_sphere_profiles(res.volume, _observations(res, jitter_mm=0.6, seed=int(fwhm)), 2000.0, exclusions=[_lung_exclusion(res)])
    assert abs(fit.fwhm_mm - fwhm) < 0.3
    assert fit.sphere_scale == pytest.approx(1.0, abs=0.01)
    assert fit.background_bq_ml == pytest.approx(2000.0, rel=0.01)
    for name, c in fit.centres_mm.items():
        assert np.linalg.norm(c - np.array(res.truth["inserts"][name]["centre_mm"])) < 0.15, name


@pytest.mark.parametrize("fwhm", [4.0, 6.0, 8.0, 10.0])
def test_noisy_fwhm_within_0_8_mm(sphere_scans, fwhm):
    # The same scans with the synthesizer's noise (10 % background voxel CV, correlated over
    # the PSF width, variance proportional to the level); the noise model comes from the
    # background as in a measurement. Issue 4 asks for 0.8 mm.
    res = sphere_scans[fwhm]
    img = res.volume.data.astype(float)
    noise = correlated_unit_noise(img.shape, fwhm, res.volume.spacing_mm, np.random.default_rng(int(fwhm * 10)))
    noisy = res.volume.with_data((img + 0.1 * np.sqrt(np.clip(img, 0, None) * 2000.0) * noise).astype(np.float32))
    placement = Placement(TPL, res.rotation, res.translation_mm, 2000.0, 200.0)
    nm = estimate_noise(noisy, placement, TPL)
    fwhm_fit, lo, hi = fit_effective_fwhm(noisy, _observations(res, jitter_mm=0.5), 2000.0, exclusions=[_lung_exclusion(res)], noise=nm)
    assert abs(fwhm_fit - fwhm) < 0.8
    assert lo < fwhm_fit < hi
    assert 0.02 < (hi - lo) / 3.92 < 0.8  # a standard error, neither zero nor huge


def test_measure_reports_effective_fwhm(demo_scan):
    # End to end on the shared 3 mm noisy demo scan (FWHM 6 mm, phantometry.synth).
    res = demo_scan["result"]
    a = measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))
    rows = [r for r in a.rows if r.roi == "phantom" and r.metric == "effective_fwhm_mm"]
    assert len(rows) == 1
    row = rows[0]
    assert row.unit == "mm" and abs(row.value - 6.0) < 0.8
    assert row.uncertainty is not None and 0 < row.uncertainty < 0.5
    assert "95 % interval" in row.note
    assert a.resolution.rms_weighted_residual == pytest.approx(1.0, abs=0.3)  # the model fits to the noise


def test_fit_refuses_empty_input(sphere_scans):
    from phantometry.errors import PhantomNotFound

    res = sphere_scans[6.0]
    with pytest.raises(PhantomNotFound, match="no spheres"):
        fit_sphere_profiles(res.volume, [], 2000.0)
    far = [SphereObservation("sphere_10mm", np.array([900.0, 900.0, 900.0]), 10.0, 1.0, 20000.0)]
    with pytest.raises(PhantomNotFound, match="too few voxels"):
        fit_sphere_profiles(res.volume, far, 2000.0)


def test_implausible_fit_is_refused(sphere_scans):
    # A fill record that is ten times off (sphere scale 0.1) is not silently fitted.
    from phantometry.errors import PhantomNotFound

    res = sphere_scans[6.0]
    wrong = [SphereObservation(o.name, o.centre_mm, o.diameter_mm, o.wall_mm, 10 * o.true_bq_ml) for o in _observations(res)]
    with pytest.raises(PhantomNotFound, match="no plausible solution"):
        fit_sphere_profiles(res.volume, wrong, 2000.0, exclusions=[_lung_exclusion(res)])


@pytest.mark.parametrize("R, s", [(25.0, 4.0), (12.5, 2.0), (3.0, 5.0)])
def test_disc_profile_off_axis_matches_noncentral_chi2(R, s):
    # Reference library: scipy.stats.ncx2 (|X|^2 / s^2 for a 2-D normal at distance rho from the axis)
    rho = np.linspace(0.0, R + 5 * s, 41)
    ref = stats.ncx2.cdf((R / s) ** 2, 2, (rho / s) ** 2)
    np.testing.assert_allclose(blurred_disc_profile(rho, R, s), ref, rtol=1e-9, atol=1e-12)
