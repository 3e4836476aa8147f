"""Automatic localisation of the body phantom on synthetic scans with known truth."""

import numpy as np
import pytest

from phantometry.errors import PhantomNotFound
from phantometry.locate import _coarse, kabsch, locate
from phantometry.synth import SynthSpec, rotation_matrix_xyz, synthesize
from phantometry.templates import load_template
from phantometry.volume import Volume

TPL = load_template("iec-body")


def _sphere_errors(res, placement):
    return [
        float(np.linalg.norm(placement.insert_centre(s.name) - np.array(res.truth["inserts"][s.name]["centre_mm"])))
        for s in TPL.spheres
    ]


@pytest.mark.parametrize("voxel", [2.0, 4.0])
def test_localisation_accuracy_over_random_poses(voxel):
    # Known truth: the synthesizer's exact centres. Goal: mean error <= 0.5 mm, worst <= 1 mm,
    # over shifts +-20 mm, any rotation about the axis, tilts +-5 deg, both lying directions.
    rng = np.random.default_rng(20261202 + int(voxel))
    errors = []
    for trial in range(4 if voxel == 2.0 else 8):
        spec = SynthSpec(
            voxel_mm=(voxel,) * 3,
            psf_fwhm_mm=6.0,
            noise_cv=0.15,
            seed=trial,
            shift_mm=tuple(rng.uniform(-20, 20, 3)),
            rotation_deg=(rng.uniform(-5, 5), rng.uniform(-5, 5), rng.uniform(0, 360)),
            flip=bool(trial % 2),
        )
        res = synthesize(spec)
        pl = locate(res.volume, TPL, axis_insert="lung_insert")
        errors += _sphere_errors(res, pl)
        # the fitted rotation agrees with the truth
        assert np.allclose(pl.rotation, res.rotation, atol=0.03)
    assert np.mean(errors) <= 0.5
    assert np.max(errors) <= 1.0


def test_cold_spheres_are_located():
    # 2012-edition style fill: 28 and 37 mm spheres with water (cold)
    cold = ["sphere_28mm", "sphere_37mm"]
    res = synthesize(SynthSpec(voxel_mm=(3, 3, 3), noise_cv=0.1, cold=cold, rotation_deg=(2, -3, 200), shift_mm=(5, 8, -10)))
    pl = locate(res.volume, TPL, axis_insert="lung_insert", hot={n: n not in cold for n in (s.name for s in TPL.spheres)})
    assert max(_sphere_errors(res, pl)) < 1.0


def test_kabsch_recovers_known_transform():
    # Kabsch (Acta Cryst A 1976): exact recovery of a rigid transform from noise-free points
    rng = np.random.default_rng(0)
    p = rng.normal(size=(7, 3)) * 50
    r = rotation_matrix_xyz(12, -40, 170)
    t = np.array([3.0, -7.0, 11.0])
    r_fit, t_fit = kabsch(p, p @ r.T + t)
    np.testing.assert_allclose(r_fit, r, atol=1e-10)
    np.testing.assert_allclose(t_fit, t, atol=1e-9)


def test_overrides_for_three_spheres_skip_the_search():
    res = synthesize(SynthSpec(voxel_mm=(4, 4, 4), noise_cv=0.05, rotation_deg=(0, 0, 33)))
    ov = {n: np.array(res.truth["inserts"][n]["centre_mm"]) for n in ("sphere_37mm", "sphere_22mm", "sphere_13mm")}
    pl = locate(res.volume, TPL, axis_insert="lung_insert", overrides=ov)
    assert pl.ring_score is None  # no search was made
    assert pl.fits["sphere_37mm"].source == "override"
    assert max(_sphere_errors(res, pl)) < 1.0


def test_wrong_phantom_size_is_refused():
    # a uniform 60 mm cylinder is not the body phantom
    from phantometry.volume import Volume

    z, y, x = np.mgrid[0:40, 0:60, 0:60]
    data = (((x - 30) ** 2 + (y - 30) ** 2) < 15**2).astype(np.float32) * 5000
    vol = Volume(data, np.diag([2.0, 2.0, 2.0, 1.0]))
    with pytest.raises(PhantomNotFound, match="template iec-body describes"):
        locate(vol, TPL, axis_insert="lung_insert")


def test_empty_image_is_refused():
    from phantometry.volume import Volume

    with pytest.raises(PhantomNotFound, match="empty"):
        locate(Volume(np.zeros((10, 10, 10), np.float32), np.eye(4)), TPL, axis_insert="lung_insert")


def test_ten_to_one_fill_with_strong_noise():
    # EANM harmonisation fill (10:1, 2 kBq/mL background; Boellaard et al. 2015): hot spheres
    # must not be mistaken for the body
    for seed in range(2):
        res = synthesize(SynthSpec(voxel_mm=(4, 4, 4), sphere_ratio=10, background_kbq_ml=2.0, noise_cv=0.2, seed=seed, rotation_deg=(0, 0, 70 * seed)))
        pl = locate(res.volume, TPL, axis_insert="lung_insert", activity_ratio={s.name: 10.0 for s in TPL.spheres})
        assert max(_sphere_errors(res, pl)) < 1.0
        assert pl.background_estimate_bq_ml == pytest.approx(2000, rel=0.05)


@pytest.mark.parametrize("n_threads", [1, 2])
@pytest.mark.parametrize("shape, spacing", [((40, 50, 61), (2.0, 2.0, 2.0)), ((20, 33, 33), (3.0, 1.5, 4.1)), ((10, 10, 10), (7.0, 7.0, 7.0)), ((200, 31, 30), (2.0, 2.0, 2.0))])
def test_coarse_grid_is_the_block_mean(shape, spacing, n_threads):
    # numpy reference: the mean over a 6-D reshaped view (blocks of the factor per axis)
    from phantometry.threads import threads

    data = np.random.default_rng(0).random(shape, dtype=np.float32)
    vol = Volume(data, np.diag([spacing[2], spacing[1], spacing[0], 1.0]))
    with threads(n_threads):
        acc, f = _coarse(vol)
    n = np.array(shape) // f
    ref = data[: n[0] * f[0], : n[1] * f[1], : n[2] * f[2]].reshape(n[0], f[0], n[1], f[1], n[2], f[2]).mean(axis=(1, 3, 5))
    assert acc.dtype == np.float32 and not np.shares_memory(acc, data)
    np.testing.assert_allclose(acc, ref, rtol=1e-5)


@pytest.mark.parametrize("seed", range(4))
def test_in_plane_hole_filling_matches_scipy(seed):
    # Reference library: scipy.ndimage.binary_fill_holes with the in-plane cross as structure
    from scipy import ndimage

    from phantometry.locate import fill_holes_in_planes

    rng = np.random.default_rng(seed)
    mask = ndimage.binary_opening(rng.random((12, 40, 37)) < 0.55 + 0.05 * seed)
    mask[:, 5:30, 8] = True  # walls that close some holes
    mask[:, 20, 3:33] = True
    cross = np.zeros((3, 3, 3), bool)
    cross[1] = [[0, 1, 0], [1, 1, 1], [0, 1, 0]]
    ref = ndimage.binary_fill_holes(mask, structure=cross)
    assert (ref != mask).any()  # there are holes to fill
    np.testing.assert_array_equal(fill_holes_in_planes(mask), ref)


def test_projection_range_of_a_coarse_mask_matches_the_coordinate_list():
    # Reference: the block centres listed explicitly (np.argwhere), projected with numpy
    from phantometry.locate import _coarse_to_world, _projection_range

    rng = np.random.default_rng(3)
    mask = rng.random((9, 14, 11)) < 0.2
    aff = np.array([[0.0, 2.1, 0.3, -40.0], [2.0, 0.0, -0.2, 15.0], [0.1, 0.2, 3.3, 7.0], [0, 0, 0, 1.0]])
    vol = Volume(np.zeros((27, 28, 33), np.float32), aff)
    factors = np.array([3, 2, 3])
    d = np.array([0.3, -0.8, 0.5])
    d /= np.linalg.norm(d)
    origin = np.array([1.0, 2.0, -3.0])
    along = (_coarse_to_world(vol, np.argwhere(mask), factors) - origin) @ d
    lo, hi = _projection_range(vol, mask, factors, d, origin)
    assert lo == pytest.approx(float(along.min()), abs=1e-9) and hi == pytest.approx(float(along.max()), abs=1e-9)
