"""Digital phantom synthesizer: geometry, blur and noise against outside truth."""

import math

import numpy as np
import pytest
from scipy import ndimage, stats

from phantometry.rois import sphere_weights
from phantometry.synth import (
    FWHM_PER_SIGMA,
    SynthSpec,
    correlated_unit_noise,
    gaussian_blur,
    rotation_matrix_xyz,
    synthesize,
)


def test_fwhm_sigma_relation():
    # FWHM = 2 sqrt(2 ln 2) sigma (mathematics)
    assert FWHM_PER_SIGMA == pytest.approx(2.35482, abs=1e-5)


@pytest.mark.parametrize("fwhm, spacing", [(6.0, (2.0, 2.0, 2.0)), (4.0, (3.27, 2.0, 2.0)), (9.0, (2.0, 4.0, 3.0))])
def test_blur_equals_scipy_gaussian_filter(fwhm, spacing):
    # reference library: scipy.ndimage.gaussian_filter with the same sigma per axis, zero outside
    rng = np.random.default_rng(0)
    a = rng.random((24, 30, 28))
    sig = [fwhm / FWHM_PER_SIGMA / s for s in spacing]
    ref = ndimage.gaussian_filter(a, sig, mode="constant", truncate=4.0)
    np.testing.assert_allclose(gaussian_blur(a, fwhm, np.array(spacing)), ref, rtol=1e-10, atol=1e-12)


def test_blur_preserves_total_activity_inside_grid():
    a = np.zeros((40, 40, 40))
    a[15:25, 15:25, 15:25] = 1.0
    assert gaussian_blur(a, 6.0, np.array([2.0, 2.0, 2.0])).sum() == pytest.approx(a.sum(), rel=1e-9)


def test_correlated_noise_has_unit_variance():
    rng = np.random.default_rng(1)
    n = correlated_unit_noise((60, 60, 60), 6.0, np.array([2.0, 2.0, 2.0]), rng)
    assert n.std() == pytest.approx(1.0, rel=0.05)
    # neighbours are correlated (reconstructed-PET-like), white noise would give ~0
    r = np.corrcoef(n[:, :, :-1].ravel(), n[:, :, 1:].ravel())[0, 1]
    assert r > 0.5


@pytest.fixture(scope="module")
def unblurred_scan():
    return synthesize(SynthSpec(voxel_mm=(2, 2, 2), psf_fwhm_mm=0, noise_cv=0, sphere_ratio=2.0, shift_mm=(0.37, -0.81, 0.55)))


@pytest.mark.parametrize("diameter", [10, 13, 17, 22, 28, 37])
def test_rasterised_sphere_volumes(unblurred_scan, diameter):
    # mathematics: 4/3 pi r^3 within 0.5 % at 2 mm voxels (sub-voxel supersampled rasterisation)
    res = unblurred_scan
    v = res.volume
    bg = res.truth["background_bq_ml"]
    name = f"sphere_{diameter}mm"
    c = np.array(res.truth["inserts"][name]["centre_mm"])
    # activity above background inside a box around the sphere = (ratio - 1) x bg x inner volume
    # minus bg x wall volume (cold wall)
    roi = sphere_weights(v, c, diameter + 2 + 14)
    excess = (v.data[roi.box] - bg)[roi.weights > 0.999].sum() * v.voxel_volume_ml * 1000  # Bq/mL x mm^3
    r = diameter / 2
    inner = 4 / 3 * math.pi * r**3
    wall = 4 / 3 * math.pi * (r + 1) ** 3 - inner
    expected = (2.0 - 1.0) * bg * inner - bg * wall
    assert excess == pytest.approx(expected, rel=0.005 * inner * bg / abs(expected) + 1e-3)


def test_centre_value_matches_maxwell_cdf():
    # uniform ball blurred by an isotropic Gaussian: centre value = maxwell.cdf(R / sigma)
    # (scipy.stats.maxwell, reference library). Noise-free, fine voxels, no wall, via a hot
    # sphere in a cold body of background ~0 is not possible here, so use contrast:
    # centre = bg + (c_h - bg) * F(R/s) - (bg) * [F((R+1)/s) - F(R/s)] (wall), F = maxwell.cdf.
    fwhm = 8.0
    res = synthesize(SynthSpec(voxel_mm=(1.0, 1.0, 1.0), psf_fwhm_mm=fwhm, noise_cv=0, sphere_ratio=4.0, matrix=(120, 120, 80), shift_mm=(28.6, 84.537, 20)))
    v = res.volume
    bg = res.truth["background_bq_ml"]
    sigma = fwhm / FWHM_PER_SIGMA
    for name, r in (("sphere_37mm", 18.5),):
        c = np.array(res.truth["inserts"][name]["centre_mm"])
        idx = np.round(v.world_to_index(c)).astype(int)
        measured = float(v.data[tuple(idx)])
        F = stats.maxwell.cdf
        expected = 4 * bg * F(r / sigma) - bg * (F((r + 1) / sigma) - F(r / sigma)) + bg * (1 - F((r + 1) / sigma))
        assert measured == pytest.approx(expected, rel=0.01)


def test_noise_level_in_background():
    res = synthesize(SynthSpec(voxel_mm=(4, 4, 4), psf_fwhm_mm=6, noise_cv=0.2, seed=3))
    v = res.volume
    bg = res.truth["background_bq_ml"]
    lung = np.array(res.truth["inserts"]["lung_insert"]["centre_mm"])
    # a background region far from spheres and insert: 40 mm below the insert axis along -y template
    p = res.rotation @ np.array([0.0, -85.0, -60.0]) + res.translation_mm
    roi = sphere_weights(v, p, 40)
    vals = v.data[roi.box][roi.weights > 0.999]
    assert vals.mean() == pytest.approx(bg, rel=0.05)
    assert vals.std() == pytest.approx(0.2 * bg, rel=0.2)
    assert np.linalg.norm(lung - p) > 50


def test_rotation_matrix_is_proper():
    r = rotation_matrix_xyz(10, -20, 200)
    np.testing.assert_allclose(r @ r.T, np.eye(3), atol=1e-12)
    assert np.linalg.det(r) == pytest.approx(1.0)


def test_truth_centres_follow_pose():
    spec = SynthSpec(voxel_mm=(4, 4, 4), psf_fwhm_mm=0, shift_mm=(10, -5, 3), rotation_deg=(0, 0, 90), flip=True)
    res = synthesize(spec)
    t = res.template
    for ins in t.inserts:
        expect = res.rotation @ np.array(ins.centre_mm) + res.translation_mm
        assert res.truth["inserts"][ins.name]["centre_mm"] == pytest.approx(expect.tolist())
    # the body centre sits at the requested shift from the grid centre (world origin)
    np.testing.assert_allclose(res.rotation @ t.body_centre_mm + res.translation_mm, [10, -5, 3], atol=1e-9)


def test_fill_record_decays_to_truth():
    from phantometry.nuclides import decay_factor
    from datetime import datetime

    spec = SynthSpec()
    res_fill = synthesize(SynthSpec(voxel_mm=(6, 6, 6), psf_fwhm_mm=0)).fill_record
    measured_at = datetime.fromisoformat(res_fill["background"]["measured_at"])
    kbq = res_fill["background"]["concentration_kbq_ml"] * decay_factor("F-18", measured_at, spec.acquired_at)
    assert kbq == pytest.approx(spec.background_kbq_ml, rel=1e-6)
