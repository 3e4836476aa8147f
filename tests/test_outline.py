"""Outlines found in the image and the background ROI placement rules, on shapes with closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage

from phantometry.background_rois import Obstacle, PlaneGeometry, check_size, place
from phantometry.outline import Outline, find_outline, match_profiles, polygon_area_centroid, radius_profile
from phantometry.rois import sample_plane
from phantometry.volume import Volume


def _lens_area(r1: float, r2: float, d: float) -> float:
    """Area of the intersection of two discs (radii r1, r2, centres d apart); mathematics."""
    if d >= r1 + r2:
        return 0.0
    if d <= abs(r1 - r2):
        return math.pi * min(r1, r2) ** 2
    a1 = r1 * r1 * math.acos((d * d + r1 * r1 - r2 * r2) / (2 * d * r1))
    a2 = r2 * r2 * math.acos((d * d + r2 * r2 - r1 * r1) / (2 * d * r2))
    return a1 + a2 - 0.5 * math.sqrt((-d + r1 + r2) * (d + r1 - r2) * (d - r1 + r2) * (d + r1 + r2))


def _circle(radius: float, n: int = 720) -> Outline:
    theta = np.arange(n) * 2 * np.pi / n
    return Outline(np.zeros(3), np.array([1.0, 0, 0]), np.array([0, 1.0, 0]), theta, np.full(n, radius))


def test_outline_of_a_blurred_cylinder_is_its_edge():
    # a uniform cylinder (radius 60 mm, 2 mm voxels) blurred by a Gaussian: the 50 % level of a
    # blurred straight edge lies on the edge; a circle's curvature moves it by about
    # sigma^2 / (2 R) (here 0.02 mm), well inside the 0.25 mm allowed
    sp = 2.0
    n = 96
    idx = (np.arange(n) - (n - 1) / 2) * sp
    y, x = np.meshgrid(idx, idx, indexing="ij")
    disc = ((x - 3.3) ** 2 + (y + 1.7) ** 2 <= 60.0**2).astype(float)
    # sub-voxel edge: average a 5 x 5 supersampling of each voxel cell
    sub = (np.arange(5) + 0.5) / 5 - 0.5
    frac = np.zeros_like(disc)
    for a in sub:
        for b in sub:
            frac += ((x + a * sp - 3.3) ** 2 + (y + b * sp + 1.7) ** 2 <= 60.0**2)
    frac /= 25
    data = np.repeat(frac[None], 12, axis=0) * 1000.0
    data = ndimage.gaussian_filter(data, (0, 1.5, 1.5))
    aff = np.diag([sp, sp, sp, 1.0])
    aff[:3, 3] = [idx[0], idx[0], -11.0]
    vol = Volume(data.astype(np.float32), aff)
    plane = sample_plane(vol, np.array([0.0, 0.0, 0.0]), np.array([1.0, 0, 0]), np.array([0, 1.0, 0]), 90.0)
    ol = find_outline(plane, np.array([0.0, 0.0, 0.0]), 500.0, 90.0)
    assert ol.valid
    pts = ol.points_world()
    r = np.hypot(pts[:, 0] - 3.3, pts[:, 1] + 1.7)
    assert np.abs(r - 60.0).max() < 0.25
    area, centroid = ol.area_centroid_local()
    assert area == pytest.approx(math.pi * 60.0**2, rel=0.005)
    assert np.allclose(centroid, [3.3, -1.7], atol=0.1)


def test_signed_distance_and_disc_fraction_of_a_circle_match_closed_forms():
    ol = _circle(100.0)
    rng = np.random.default_rng(3)
    pts = rng.uniform(-130, 130, (200, 2))
    d = ol.signed_distance_local(pts)
    exact = 100.0 - np.hypot(pts[:, 0], pts[:, 1])
    assert np.abs(d - exact).max() < 0.05  # a 720-gon and its 0.25 mm densification
    for centre_dist in (0.0, 70.0, 85.0, 100.0, 110.0, 130.0):
        f = ol.disc_inside_fraction(np.array([[centre_dist, 0.0, 0.0]]), 37.0)[0]
        expected = _lens_area(100.0, 18.5, centre_dist) / (math.pi * 18.5**2)
        assert f == pytest.approx(expected, abs=0.01), centre_dist


def test_profile_match_finds_a_rotation_and_a_shift_leaves_no_residual():
    # a D-like outline turned by 23.4 degrees is found turned by 23.4 degrees
    t = np.linspace(0, 2 * np.pi, 2000, endpoint=False)
    shape = np.c_[150 * np.cos(t), np.where(np.sin(t) > 0, 150 * np.sin(t), 80 * np.sin(t))]
    _, c = polygon_area_centroid(shape)
    a = math.radians(23.4)
    rot = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
    turned = (shape - c) @ rot.T + [12.0, -7.0]
    _, c2 = polygon_area_centroid(turned)
    phi, rms = match_profiles(radius_profile(turned, c2), radius_profile(shape, c))
    assert math.degrees(phi) == pytest.approx(23.4, abs=0.1) and rms < 0.2


def _plane(outline: Outline, offset: float = 0.0) -> PlaneGeometry:
    return PlaneGeometry(offset, lambda xy: np.c_[np.asarray(xy, float).reshape(-1, 2), np.full(len(np.asarray(xy).reshape(-1, 2)), offset)], outline)


def test_background_positions_are_kept_moved_to_the_nearest_valid_place_or_dropped():
    body = _circle(120.0)
    obstacles = [Obstacle("sphere", np.array([0.0, 0.0]), 20.0)]
    D, C = 37.0, 15.0
    template = np.array([
        [0.0, 75.0],  # keeps 120 - 75 - 18.5 = 26.5 from the edge, 75 - 18.5 - 20 = 36.5 from the sphere: kept
        [60.0, 0.0],  # 60 - 18.5 - 20 = 21.5 from the sphere, 120 - 60 - 18.5 = 41.5 from the edge: kept
        [-40.0, 0.0],  # 1.5 mm from the sphere: moved
        [0.0, -95.0],  # 6.5 mm from the edge: moved inwards
    ])
    bp = place(template, [_plane(body)], obstacles, D, C, (-150, 150, -150, 150))
    assert bp.status == ["kept", "kept", "moved", "moved"]
    # the moved ones keep every clearance, and no valid point (brute force, 0.25 mm grid) is nearer
    g = np.arange(-130, 130.01, 0.25)
    gx, gy = np.meshgrid(g, g)
    grid = np.c_[gx.ravel(), gy.ravel()]
    r = D / 2
    valid = (120.0 - np.hypot(*grid.T) - r >= C) & (np.hypot(*grid.T) - r - 20.0 >= C)
    for i in (2, 3):
        j = list(bp.index).index(i)
        xy = bp.xy[j]
        assert 120.0 - np.hypot(*xy) - r >= C - 1e-6 and np.hypot(*xy) - r - 20.0 >= C - 1e-6
        others = np.delete(bp.xy, j, axis=0)
        ok = valid & (np.hypot(*(grid[:, None, :] - others[None]).transpose(2, 0, 1)).min(axis=1) >= min(D, 75.0) - 0.5)
        nearest = np.hypot(*(grid[ok] - template[i]).T).min()
        assert bp.moved_mm[i] <= nearest + 0.15
    # twenty positions too near the edge, and a large insert: only the ring 85.5 <= |xy| <= 86.5
    # keeps every clearance, about 540 mm round, and moved ROIs stay 29.3 mm apart (the
    # template's closest spacing less 0.5 mm): at most 18 fit, the rest are dropped
    crowd = np.array([[95.0 * math.cos(a), 95.0 * math.sin(a)] for a in np.linspace(0, 2 * np.pi, 20, endpoint=False)])
    big = [Obstacle("insert", np.array([0.0, 0.0]), 52.0)]
    bp2 = place(crowd, [_plane(body)], big, D, C, (-150, 150, -150, 150))
    assert bp2.n_kept == 0 and bp2.n_dropped > 0 and len(bp2.xy) == 20 - bp2.n_dropped <= 18
    sep = np.hypot(*(bp2.xy[:, None, :] - bp2.xy[None]).transpose(2, 0, 1))
    np.fill_diagonal(sep, np.inf)
    assert sep.min() >= 2 * 95.0 * math.sin(math.pi / 20) - 0.5 - 1e-6
    check = check_size(bp2.xy, [_plane(body)], big, D)
    assert check.min_inside_fraction == 1.0 and check.min_edge_distance_mm >= C - 1e-6 and check.min_obstacle_distance_mm >= C - 1e-6


def test_a_plane_without_outline_cannot_confirm_but_does_not_drop_everything():
    body = _circle(120.0)
    planes = [_plane(body, 0.0), PlaneGeometry(10.0, lambda xy: np.c_[np.asarray(xy, float).reshape(-1, 2), np.full(len(np.asarray(xy).reshape(-1, 2)), 10.0)], None)]
    bp = place(np.array([[0.0, 75.0], [60.0, 0.0]]), planes, [], 37.0, 15.0, (-150, 150, -150, 150))
    assert bp.status == ["kept", "kept"]
    check = check_size(bp.xy, planes, [], 37.0)
    assert check.min_inside_fraction == 1.0  # on the plane that has an outline


def test_combined_outlines_average_noise_but_keep_a_real_departure():
    from phantometry.outline import combine_outlines

    rng = np.random.default_rng(7)
    n = 720
    theta = np.arange(n) * 2 * np.pi / n
    planes = []
    for p in range(5):
        radii = 100.0 + rng.normal(0.0, 0.8, n)
        if p == 2:  # this plane is cut (e.g. by the field of view) over 40 degrees: 12 mm inside
            radii[100:180] -= 12.0
        planes.append(Outline(np.array([0.0, 0.0, 10.0 * p]), np.array([1.0, 0, 0]), np.array([0, 1.0, 0]), theta, radii))
    combined, se = combine_outlines(planes)
    # the median of 5 planes of SD 0.8 mm, then smoothed: well under the single-plane SD
    assert np.std(combined[0].radii_mm - 100.0) < 0.3
    assert 0.2 < se < 0.8  # 1.25 x 0.8 / sqrt(5) = 0.45 mm
    # the cut plane keeps its own edge where it is cut, and only there
    assert np.all(combined[2].radii_mm[105:175] < 90.0)
    assert np.all(np.abs(combined[2].radii_mm[300:600] - 100.0) < 1.0)
    assert np.all(combined[0].radii_mm[105:175] > 98.0)
