"""Tests of the sub-voxel ROI engine (phantometry.rois).

Every expected value is an external truth named beside it: closed-form geometry
(mathematics), a reference library (scikit-image, numpy), or a count worked by hand.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation
from skimage.draw import disk, ellipsoid

from phantometry import rois
from phantometry.errors import GeometryError, PhantomNotFound, TemplateError
from phantometry.volume import Volume, affine_from_axes

RNG_SEED = 20240611


# ----------------------------------------------------------------------------- helpers
def make_volume(shape_zyx, spacing_xyz=(2.0, 2.0, 2.0), rotation=None, origin=(-40.0, -30.0, -50.0), data=None):
    """Volume whose voxel axes are the world axes, optionally rotated (an oblique affine)."""
    axes = np.eye(3) if rotation is None else rotation.as_matrix()
    affine = affine_from_axes(np.asarray(origin, float), axes[:, 0], axes[:, 1], axes[:, 2], spacing_xyz)
    if data is None:
        data = np.zeros(shape_zyx, np.float32)
    return Volume(data=data, affine=affine, source="test.nii")


def interior_point(volume, rng, spread_vox=1.0):
    """A random point near the grid centre (random sub-voxel position)."""
    idx = (np.array(volume.shape) - 1) / 2 + rng.uniform(-spread_vox, spread_vox, 3)
    return volume.index_to_world(idx)


OBLIQUE = Rotation.from_euler("zyx", [23.0, -11.0, 7.0], degrees=True)

GRIDS = {
    "iso2mm": dict(spacing_xyz=(2.0, 2.0, 2.0), rotation=None),
    "oblique2mm": dict(spacing_xyz=(2.0, 2.0, 2.0), rotation=OBLIQUE),
    "aniso_2x2x3.27": dict(spacing_xyz=(2.0, 2.0, 3.27), rotation=None),
    "oblique_aniso_2x2x3.27": dict(spacing_xyz=(2.0, 2.0, 3.27), rotation=OBLIQUE),
}


# ----------------------------------------------------------------------------- spheres
@pytest.mark.parametrize("grid", list(GRIDS))
@pytest.mark.parametrize("radius_mm", [5.0, 6.5, 8.5, 11.0, 14.0, 18.5])
def test_sphere_volume_matches_formula(grid, radius_mm):
    # mathematics: volume of a ball = 4/3 pi r^3; goal 0.5 % at 2 mm voxels, random sub-voxel centres
    vol = make_volume((40, 40, 40), **GRIDS[grid])
    rng = np.random.default_rng(RNG_SEED + int(radius_mm * 10))
    exact_ml = 4.0 / 3.0 * math.pi * radius_mm**3 / 1000.0
    for _ in range(12):
        roi = rois.sphere_weights(vol, interior_point(vol, rng), 2 * radius_mm)
        assert not roi.clipped
        assert roi.volume_ml(vol.voxel_volume_ml) == pytest.approx(exact_ml, rel=0.005)
        assert roi.weights.dtype == np.float32
        assert roi.weights.min() >= 0.0 and roi.weights.max() <= 1.0


@pytest.mark.parametrize("spacing_xyz", [(2.0, 2.0, 2.0), (2.0, 2.0, 3.27), (1.5, 2.5, 3.0)])
def test_sphere_membership_agrees_with_skimage_ellipsoid(spacing_xyz):
    # reference library: skimage.draw.ellipsoid marks grid points with sum((x/a)^2) <= 1; with
    # a = b = c = r and the voxel spacing it is the set of voxel centres inside the sphere.
    # Voxels farther than the cell circumradius from the surface must be exactly 0 or 1.
    r = 9.3
    dz, dy, dx = spacing_xyz[2], spacing_xyz[1], spacing_xyz[0]
    level = ellipsoid(r, r, r, spacing=(dz, dy, dx), levelset=True)
    ref = ellipsoid(r, r, r, spacing=(dz, dy, dx))
    ref_centre = np.array(np.unravel_index(np.argmin(level), level.shape))
    vol = make_volume((30, 30, 30), spacing_xyz=spacing_xyz)
    centre_idx = np.array([15, 15, 15])
    roi = rois.sphere_weights(vol, vol.index_to_world(centre_idx), 2 * r)
    full = roi.to_full(vol.shape)
    start = centre_idx - ref_centre
    ours = full[tuple(slice(s, s + n) for s, n in zip(start, ref.shape))]
    # distance of every voxel centre of the reference grid from the sphere centre
    kk, jj, ii = np.meshgrid(*[np.arange(n) - c for n, c in zip(ref.shape, ref_centre)], indexing="ij")
    dist = np.sqrt((kk * dz) ** 2 + (jj * dy) ** 2 + (ii * dx) ** 2)
    rho = 0.5 * math.sqrt(dx * dx + dy * dy + dz * dz)
    far = np.abs(dist - r) > rho
    assert far.sum() > 100
    np.testing.assert_array_equal(ours[far] == 1.0, ref[far])
    np.testing.assert_array_equal(ours[far] == 0.0, ~ref[far])
    # nothing outside the reference array is touched
    assert full.sum() == pytest.approx(ours.sum())


def test_roi_weights_helpers_are_consistent():
    vol = make_volume((30, 30, 30))
    roi = rois.sphere_weights(vol, vol.index_to_world([15.2, 14.7, 15.4]), 17.0)
    full = roi.to_full(vol.shape)
    assert full.shape == vol.shape
    assert full.sum(dtype=np.float64) == pytest.approx(roi.count, rel=1e-6)
    assert np.count_nonzero(full) == roi.n_voxels_touched
    assert roi.volume_ml(vol.voxel_volume_ml) == pytest.approx(roi.count * 0.008)
    # the box is small: a local bounding box, not the whole volume
    assert roi.weights.size < 15**3


def test_sphere_mean_of_constant_and_linear_field():
    # mathematics: the mean of a linear function over a ball equals its value at the centre;
    # the weighted voxel mean deviates by at most the discretisation of the boundary shell.
    vol = make_volume((30, 30, 30), spacing_xyz=(2.0, 2.0, 3.27), rotation=OBLIQUE)
    world = vol.world_grid()
    grad = np.array([0.3, -0.2, 0.5])  # Bq/mL per mm
    field = (world @ grad + 100.0).astype(np.float32)
    vol_lin = vol.with_data(field)
    rng = np.random.default_rng(RNG_SEED)
    for _ in range(5):
        c = interior_point(vol, rng)
        roi = rois.sphere_weights(vol_lin, c, 28.0)
        assert roi.mean(vol_lin) == pytest.approx(c @ grad + 100.0, abs=0.02 * np.linalg.norm(grad))
        assert roi.mean(np.full(vol.shape, 7.5, np.float32)) == pytest.approx(7.5, rel=1e-6)


# ----------------------------------------------------------------------------- cylinders
@pytest.mark.parametrize("grid", ["iso2mm", "oblique2mm", "aniso_2x2x3.27"])
@pytest.mark.parametrize("axis", [(0, 0, 1), (0.3, -0.4, 0.87), (1, 0, 0)])
@pytest.mark.parametrize("diameter_mm,length_mm", [(10.0, 20.0), (22.5, 10.0), (30.0, 30.0)])
def test_cylinder_volume_matches_formula(grid, axis, diameter_mm, length_mm):
    # mathematics: volume of a right circular cylinder = pi r^2 L; goal 1 %
    vol = make_volume((40, 40, 40), **GRIDS[grid])
    rng = np.random.default_rng(RNG_SEED + 7)
    exact_ml = math.pi * (diameter_mm / 2) ** 2 * length_mm / 1000.0
    for _ in range(4):
        roi = rois.cylinder_weights(vol, interior_point(vol, rng), axis, diameter_mm, length_mm)
        assert not roi.clipped
        assert roi.volume_ml(vol.voxel_volume_ml) == pytest.approx(exact_ml, rel=0.01)


def test_cylinder_membership_far_from_surface():
    # mathematics: a voxel centre deeper than the cell circumradius inside (outside) the
    # cylinder has its whole cell inside (outside)
    vol = make_volume((30, 30, 30), rotation=OBLIQUE)
    c = interior_point(vol, np.random.default_rng(3))
    a = np.array([0.2, 0.5, 0.84])
    a /= np.linalg.norm(a)
    R, h = 8.0, 9.0
    roi = rois.cylinder_weights(vol, c, a, 2 * R, 2 * h)
    rel = vol.world_grid() - c
    axial = rel @ a
    radial = np.linalg.norm(rel - axial[..., None] * a, axis=-1)
    rho = math.sqrt(3.0)  # half diagonal of a 2 mm cube
    full = roi.to_full(vol.shape)
    inside = (radial < R - rho) & (np.abs(axial) < h - rho)
    outside = (radial > R + rho) | (np.abs(axial) > h + rho)
    assert np.all(full[inside] == 1.0) and inside.sum() > 50
    assert np.all(full[outside] == 0.0)


# ----------------------------------------------------------------------------- generic shapes
def test_fractional_occupancy_axis_aligned_box_is_exact():
    # mathematics: a box whose faces lie on voxel faces covers whole voxels only
    vol = make_volume((20, 20, 20))
    lo = vol.index_to_world([4.5, 5.5, 6.5])  # voxel faces (k, j, i)
    hi = vol.index_to_world([10.5, 9.5, 12.5])
    eps = 1e-9

    def inside(p):
        return np.all((p >= lo - eps) & (p <= hi + eps), axis=-1)

    roi = rois.fractional_occupancy(vol, inside, lo, hi)
    assert roi.count == pytest.approx(6 * 4 * 6, abs=1e-4)  # hand count: (10.5-4.5)(9.5-5.5)(12.5-6.5)


def test_fractional_occupancy_rotated_cube_and_sphere():
    # mathematics: a rotated cube of side s has volume s^3; a ball 4/3 pi r^3
    vol = make_volume((40, 40, 40), spacing_xyz=(2.0, 2.0, 3.27))
    c = interior_point(vol, np.random.default_rng(11))
    rot = Rotation.from_euler("xyz", [30, 20, 10], degrees=True).as_matrix()
    side = 20.0

    def in_cube(p):
        local = (p - c) @ rot
        return np.all(np.abs(local) <= side / 2, axis=-1)

    half_diag = side * math.sqrt(3) / 2
    roi = rois.fractional_occupancy(vol, in_cube, c - half_diag, c + half_diag)
    assert roi.count * vol.voxel_volume_ml * 1000 == pytest.approx(side**3, rel=0.01)

    r = 10.0
    ball = rois.fractional_occupancy(vol, lambda p: np.sum((p - c) ** 2, axis=-1) <= r * r, c - r, c + r)
    assert ball.count * vol.voxel_volume_ml * 1000 == pytest.approx(4 / 3 * math.pi * r**3, rel=0.005)
    # agrees voxel by voxel with the analytic sphere engine to within the point-sampling step
    exact = rois.sphere_weights(vol, c, 2 * r).to_full(vol.shape)
    assert np.max(np.abs(ball.to_full(vol.shape) - exact)) < 0.15


# ----------------------------------------------------------------------------- errors
def test_roi_outside_image_and_bad_parameters_raise():
    vol = make_volume((20, 20, 20))
    far = vol.index_to_world([100.0, 100.0, 100.0])
    with pytest.raises(PhantomNotFound):
        rois.sphere_weights(vol, far, 10.0)
    with pytest.raises(TemplateError):
        rois.sphere_weights(vol, vol.centre_world, 0.0)
    with pytest.raises(TemplateError):
        rois.cylinder_weights(vol, vol.centre_world, (0, 0, 1), 10.0, -1.0)
    with pytest.raises(GeometryError):
        rois.cylinder_weights(vol, vol.centre_world, (0, 0, 0), 10.0, 10.0)
    # partly outside: weights are returned but flagged, and a mean over them is refused
    edge = vol.index_to_world([0.0, 10.0, 10.0])
    roi = rois.sphere_weights(vol, edge, 10.0)
    assert roi.clipped
    with pytest.raises(PhantomNotFound):
        roi.mean(vol)
    assert roi.mean(vol, allow_clipped=True) == 0.0


# ----------------------------------------------------------------------------- weighted statistics
def test_weighted_stats_binary_mask_matches_numpy():
    # reference library: numpy mean and std(ddof=1) on the masked voxels
    rng = np.random.default_rng(RNG_SEED)
    data = rng.normal(100.0, 15.0, (12, 13, 14)).astype(np.float32)
    box = (slice(2, 9), slice(3, 11), slice(1, 12))
    mask = rng.random((7, 8, 11)) < 0.4
    roi = rois.RoiWeights(box=box, weights=mask.astype(np.float32))
    mean, sd, wsum = rois.weighted_stats(data, roi)
    x = data[box][mask].astype(np.float64)
    assert mean == pytest.approx(np.mean(x), rel=1e-12)
    assert sd == pytest.approx(np.std(x, ddof=1), rel=1e-12)
    assert wsum == mask.sum()
    # mathematics: the estimator is invariant to a common scale of the weights
    half = rois.RoiWeights(box=box, weights=(0.5 * mask).astype(np.float32))
    assert rois.weighted_stats(data, half)[:2] == pytest.approx((mean, sd), rel=1e-9)


def test_weighted_stats_fractional_weights_formula():
    # hand-worked: values 1, 2, 4 with weights 1, 0.5, 0.25
    data = np.array([1.0, 2.0, 4.0], np.float32).reshape(1, 1, 3)
    weights = np.array([[[1.0, 0.5, 0.25]]], np.float32)
    roi = rois.RoiWeights(box=(slice(0, 1), slice(0, 1), slice(0, 3)), weights=weights)
    mean, sd, wsum = rois.weighted_stats(data, roi)
    v1, v2 = 1.75, 1.3125
    m = 3.0 / 1.75
    var = (1 * (1 - m) ** 2 + 0.5 * (2 - m) ** 2 + 0.25 * (4 - m) ** 2) / (v1 - v2 / v1)
    assert mean == pytest.approx(m)
    assert sd == pytest.approx(math.sqrt(var))
    assert wsum == pytest.approx(v1)


# ----------------------------------------------------------------------------- planes
def test_sample_plane_untilted_axial_reproduces_slice_exactly():
    # mathematics: trilinear interpolation at a grid node returns the node value
    rng = np.random.default_rng(RNG_SEED)
    data = rng.random((10, 40, 36)).astype(np.float32) * 1000
    vol = make_volume(data.shape, spacing_xyz=(2.0, 2.0, 3.27), data=data)
    k, j, i = 6, 20, 17
    # centre on the slice, off the voxel centres in-plane by a fraction of a voxel
    centre = vol.index_to_world([k, j + 0.3, i - 0.4])
    plane = rois.sample_plane(vol, centre, u_dir=(1, 0, 0), v_dir=(0, 1, 0), half_width_mm=12.0)
    assert plane.pixel_mm == pytest.approx(2.0)
    # nodes = the voxel centres within 12 mm of the centre in u and v. Hand count: in j the
    # voxel centres sit at -0.6 + 2n mm from the centre, n = -5..6 (12 rows from j - 5); in i at
    # +0.8 + 2n mm, n = -6..5 (12 columns from i - 6)
    first = np.rint(vol.world_to_index(plane.origin_mm)).astype(int)
    assert tuple(first) == (k, j - 5, i - 6)
    assert plane.values.shape == (12, 12)
    expected = data[k, j - 5 : j + 7, i - 6 : i + 6]
    np.testing.assert_array_equal(plane.values, expected.astype(np.float64))
    np.testing.assert_allclose(plane.uv_to_world(plane.centre_uv_mm), centre, atol=1e-9)
    np.testing.assert_allclose(plane.world_to_uv(centre), plane.centre_uv_mm, atol=1e-9)


@pytest.mark.parametrize("rotation", [None, OBLIQUE])
def test_sample_plane_tilted_linear_field_is_exact(rotation):
    # mathematics: trilinear interpolation reproduces a linear field exactly
    vol = make_volume((30, 30, 30), spacing_xyz=(2.0, 2.5, 3.0), rotation=rotation)
    grad = np.array([1.5, -0.7, 2.1])
    vol = vol.with_data((vol.world_grid() @ grad + 50.0).astype(np.float64))
    tilt = Rotation.from_euler("xy", [17.0, -9.0], degrees=True).as_matrix()
    u, v = tilt[:, 0], tilt[:, 1]
    centre = interior_point(vol, np.random.default_rng(5))
    plane = rois.sample_plane(vol, centre, u, v, half_width_mm=15.0, pixel_mm=1.3)
    nv, nu = plane.values.shape
    uv = np.stack(np.meshgrid(np.arange(nu) * 1.3, np.arange(nv) * 1.3, indexing="xy"), axis=-1)
    truth = plane.uv_to_world(uv) @ grad + 50.0
    np.testing.assert_allclose(plane.values, truth, rtol=2e-6, atol=2e-4)
    assert np.all(np.abs(plane.distance_to_plane(plane.uv_to_world(uv)) ) < 1e-9)


def test_sample_plane_outside_is_nan_and_bad_directions_raise():
    vol = make_volume((10, 10, 10), data=np.ones((10, 10, 10), np.float32))
    plane = rois.sample_plane(vol, vol.index_to_world([5, 5, 9]), (1, 0, 0), (0, 1, 0), 6.0)
    # columns beyond the last voxel face (i > 9.5) are NaN, the rest are data
    assert np.isnan(plane.values).any() and np.nanmin(plane.values) == 1.0
    with pytest.raises(GeometryError):
        rois.sample_plane(vol, vol.centre_world, (1, 0, 0), (1, 1, 0), 6.0)


def make_plane(values, pixel_mm=2.0):
    return rois.PlaneImage(
        values=np.asarray(values, float), origin_mm=np.zeros(3), u_dir=np.array([1.0, 0, 0]),
        v_dir=np.array([0, 1.0, 0]), pixel_mm=pixel_mm,
    )


@pytest.mark.parametrize("diameter_mm", [3.0, 10.0, 13.0, 17.0, 22.0, 28.0, 37.0])
def test_disc_area_matches_formula(diameter_mm):
    # mathematics: area of a disc = pi r^2 (goal 0.5 %; the pixel fractions are exact areas, so
    # the sum must agree to rounding), 2 mm pixels, random sub-pixel centres
    plane = make_plane(np.zeros((60, 60)))
    rng = np.random.default_rng(RNG_SEED + int(diameter_mm))
    for _ in range(20):
        c = 60.0 + rng.uniform(-1, 1, 2)
        box, w = rois.disc_weights(plane, c, diameter_mm)
        assert w.sum() * plane.pixel_mm**2 == pytest.approx(math.pi * (diameter_mm / 2) ** 2, rel=1e-9)
        assert w.shape == (box[0].stop - box[0].start, box[1].stop - box[1].start)
        assert w.min() >= 0.0 and w.max() <= 1.0


def test_disc_membership_agrees_with_skimage_disk():
    # reference library: skimage.draw.disk selects the pixels whose centres are inside the circle;
    # pixels farther than sqrt(2)/2 pixel from the circle must be exactly 1 (inside) or 0 (outside)
    shape = (50, 50)
    plane = make_plane(np.zeros(shape), pixel_mm=2.0)
    centre_px = np.array([24.37, 23.81])  # (row, col)
    radius_px = 8.6
    rr, cc = disk((centre_px[0], centre_px[1]), radius_px, shape=shape)
    ref = np.zeros(shape, bool)
    ref[rr, cc] = True
    box, w = rois.disc_weights(plane, centre_px[::-1] * 2.0, 2 * radius_px * 2.0)
    ours = np.zeros(shape)
    ours[box] = w
    r_idx, c_idx = np.indices(shape)
    dist = np.hypot(r_idx - centre_px[0], c_idx - centre_px[1])
    far = np.abs(dist - radius_px) > math.sqrt(0.5)
    np.testing.assert_array_equal(ours[far] == 1.0, ref[far])
    np.testing.assert_array_equal(ours[far] == 0.0, ~ref[far])


def test_disc_pixel_fractions_match_fine_rasterisation():
    # mathematics: the midpoint rule on a fine sub-grid converges to the exact area fraction;
    # with n x n sub-points the count error of a pixel is below its boundary length / n
    plane = make_plane(np.zeros((20, 20)), pixel_mm=2.0)
    centre_uv = np.array([19.37, 20.81])
    diameter = 11.3
    box, w = rois.disc_weights(plane, centre_uv, diameter)
    n = 200
    sub = (np.arange(n) + 0.5) / n - 0.5
    rows = np.arange(box[0].start, box[0].stop)
    cols = np.arange(box[1].start, box[1].stop)
    v = (rows[:, None, None, None] + sub[None, None, :, None]) * 2.0
    u = (cols[None, :, None, None] + sub[None, None, None, :]) * 2.0
    inside = (u - centre_uv[0]) ** 2 + (v - centre_uv[1]) ** 2 <= (diameter / 2) ** 2
    brute = inside.mean(axis=(2, 3))
    np.testing.assert_allclose(w, brute, atol=3.0 / n)


@pytest.mark.parametrize("diameter_mm", [10.0, 17.0, 37.0])
def test_disc_mean_of_linear_ramp_is_centre_value(diameter_mm):
    # mathematics: the mean of a linear function over a disc equals its value at the centre.
    # With exact area weights the pixel-centre estimate differs only through the centroid of
    # each partial pixel: for a part of area w of a unit pixel the centroid term is at most
    # w (1 - w) / 2 pixel per axis, so |error| <= (|gu| + |gv|) p sum(w (1 - w) / 2) / sum(w).
    p = 2.0
    nv, nu = 60, 70
    gu, gv, c0 = 3.0, -1.7, 500.0  # Bq/mL per mm, Bq/mL
    uu, vv = np.meshgrid(np.arange(nu) * p, np.arange(nv) * p, indexing="xy")
    plane = make_plane(gu * uu + gv * vv + c0, pixel_mm=p)
    rng = np.random.default_rng(RNG_SEED)
    centres = np.column_stack([rng.uniform(45, 95, 40), rng.uniform(45, 75, 40)])
    means = rois.disc_means(plane, centres, diameter_mm)
    truth = centres @ np.array([gu, gv]) + c0
    for c, m, t in zip(centres, means, truth):
        _, w = rois.disc_weights(plane, c, diameter_mm)
        bound = (abs(gu) + abs(gv)) * p * np.sum(w * (1 - w) / 2) / w.sum()
        assert abs(m - t) <= bound
    # observed errors are far inside the bound: the centroid terms cancel around the circle
    np.testing.assert_allclose(means, truth, atol=0.01 * p * math.hypot(gu, gv))
    # the single-disc call and the vectorised call agree
    assert rois.disc_mean(plane, centres[3], diameter_mm) == pytest.approx(means[3], rel=1e-12)


def test_disc_stats_against_numpy_and_disc_errors():
    rng = np.random.default_rng(RNG_SEED)
    values = rng.normal(10.0, 2.0, (40, 40))
    plane = make_plane(values)
    centre = np.array([40.3, 39.1])
    box, w = rois.disc_weights(plane, centre, 20.0)
    mean, sd, wsum = rois.disc_stats(plane, centre, 20.0)
    x = values[box]
    # numpy reference on the same weights: weighted average and the reliability-weight SD
    assert mean == pytest.approx(np.average(x, weights=w), rel=1e-12)
    v1, v2 = w.sum(), (w**2).sum()
    assert sd == pytest.approx(math.sqrt(np.sum(w * (x - mean) ** 2) / (v1 - v2 / v1)), rel=1e-10)
    assert wsum == pytest.approx(v1)
    with pytest.raises(PhantomNotFound):  # disc reaching beyond the plane
        rois.disc_mean(plane, np.array([2.0, 40.0]), 20.0)
    with_nan = values.copy()
    with_nan[20, 20] = np.nan
    with pytest.raises(PhantomNotFound):  # disc touching pixels outside the volume
        rois.disc_mean(make_plane(with_nan), np.array([40.0, 40.0]), 20.0)


# ----------------------------------------------------------------------------- peak, max, isocontour
@pytest.mark.parametrize("grid", ["iso2mm", "oblique_aniso_2x2x3.27"])
def test_peak_search_matches_brute_force(grid):
    # brute force: the 12.41 mm sphere mean (sphere_weights) at every voxel centre of the region
    rng = np.random.default_rng(RNG_SEED)
    vol = make_volume((16, 18, 18), **GRIDS[grid], data=rng.random((16, 18, 18)).astype(np.float32) * 100)
    centre = interior_point(vol, rng, spread_vox=0.5)
    region_d = 14.0
    peak, where = rois.peak_search(vol, centre, region_d)
    best, best_pos = -np.inf, None
    world = vol.world_grid()
    cand = np.argwhere(np.linalg.norm(world - centre, axis=-1) <= region_d / 2)
    assert len(cand) > 10
    for kji in cand:
        pos = vol.index_to_world(kji)
        m = rois.sphere_weights(vol, pos, 12.41).mean(vol)
        if m > best:
            best, best_pos = m, pos
    assert peak == pytest.approx(best, rel=1e-5)
    np.testing.assert_allclose(where, best_pos, atol=1e-6)


def test_peak_search_skips_spheres_reaching_outside_the_image():
    # a hot voxel on the image face: the 12.41 mm sphere centred on it would leave the grid,
    # so the peak is found one voxel further in (radius 6.2 mm = 3.1 voxels: the first centre
    # whose sphere stays inside is at k = 3, where the sphere reaches index -0.1 > -0.5)
    data = np.zeros((20, 20, 20), np.float32)
    data[0, 10, 10] = 1000.0
    vol = make_volume((20, 20, 20), data=data)
    peak, pos = rois.peak_search(vol, vol.index_to_world([2, 10, 10]), 8.0)
    assert vol.world_to_index(pos)[0] == pytest.approx(3.0)
    with pytest.raises(PhantomNotFound):
        rois.peak_search(vol, vol.index_to_world([0, 10, 10]), 1.0)


def test_peak_search_uniform_and_nearest_voxel_fallback():
    # mathematics: any weighted mean of a constant field is that constant
    vol = make_volume((20, 20, 20), data=np.full((20, 20, 20), 3.25, np.float32))
    peak, _ = rois.peak_search(vol, vol.centre_world, 20.0)
    assert peak == pytest.approx(3.25, rel=1e-6)
    # a region too small to contain a voxel centre: the nearest voxel is the only candidate
    data = np.zeros((20, 20, 20), np.float32)
    data[10, 10, 10] = 1000.0
    vol2 = make_volume((20, 20, 20), data=data)
    c = vol2.index_to_world([10.3, 9.8, 10.2])
    peak2, pos2 = rois.peak_search(vol2, c, 0.2)
    np.testing.assert_allclose(pos2, vol2.index_to_world([10, 10, 10]))
    kernel_sum = rois.sphere_weights(vol2, pos2, 12.41).count
    assert peak2 == pytest.approx(1000.0 / kernel_sum, rel=1e-6)


def test_max_in_sphere():
    data = np.zeros((20, 20, 20), np.float32)
    data[10, 10, 13] = 50.0  # 6 mm from the centre voxel, outside a 10 mm sphere
    data[10, 11, 11] = 20.0  # 2.83 mm from the centre: inside
    vol = make_volume((20, 20, 20), data=data)
    centre = vol.index_to_world([10, 10, 10])
    value, pos = rois.max_in_sphere(vol, centre, 10.0)
    assert value == 20.0
    np.testing.assert_allclose(pos, vol.index_to_world([10, 11, 11]))
    value, pos = rois.max_in_sphere(vol, centre, 12.2)  # now 6 mm <= 6.1 mm
    assert value == 50.0
    # no voxel centre within a tiny sphere: the nearest voxel
    value, pos = rois.max_in_sphere(vol, vol.index_to_world([10.2, 10.7, 11.1]), 0.5)
    assert value == 20.0


def test_isocontour_hand_made_image():
    # hand count: background 1, a 3x3x3 block of 10 (27 voxels), a face neighbour at exactly the
    # threshold 1 + 0.5 (10 - 1) = 5.5 (included, >=), a corner-only neighbour of 7 (included by
    # 26-connectivity), a face neighbour of 5 (below threshold), and a separate voxel of 9 with
    # a one-voxel gap (another component): VOI = 29 voxels, mean (270 + 5.5 + 7) / 29
    data = np.ones((20, 20, 20), np.float32)
    data[9:12, 9:12, 9:12] = 10.0
    data[12, 10, 10] = 5.5
    data[8, 8, 8] = 7.0
    data[10, 10, 12] = 5.0
    data[10, 10, 7] = 9.0
    vol = make_volume((20, 20, 20), data=data)
    mean, n, vmax = rois.isocontour_mean(vol, vol.index_to_world([10, 10, 10]), 16.0, background_bq_ml=1.0)
    assert n == 29
    assert vmax == 10.0
    assert mean == pytest.approx((270 + 5.5 + 7.0) / 29, rel=1e-7)
    # fraction 0.7: threshold 1 + 0.7 * 9 = 7.3 keeps the 27 block voxels only
    mean, n, _ = rois.isocontour_mean(vol, vol.index_to_world([10, 10, 10]), 16.0, 1.0, fraction=0.7)
    assert (n, mean) == (27, pytest.approx(10.0))


def test_isocontour_is_restricted_to_grown_search_sphere():
    # hand count: a hot rod along i through the centre; search diameter 10 mm at 2 mm voxels,
    # restriction radius 5 + 2 = 7 mm: rod voxels at offsets 0, +-2, +-4, +-6 mm -> 7 voxels
    data = np.ones((15, 15, 31), np.float32)
    data[7, 7, :] = 10.0
    vol = make_volume(data.shape, data=data)
    mean, n, vmax = rois.isocontour_mean(vol, vol.index_to_world([7, 7, 15]), 10.0, 1.0)
    assert (n, vmax) == (7, 10.0)
    assert mean == pytest.approx(10.0)
    with pytest.raises(PhantomNotFound):  # nothing above background
        rois.isocontour_mean(vol, vol.index_to_world([2, 2, 15]), 4.0, 5.0)
