"""Outlines found in the image: the body's cross-section (or a cold insert's) in a plane.

Method (phantometry's own)
--------------------------
From a point inside the region, rays are cast in the plane every ``360 / n_rays`` degrees and
the image is sampled along them every 1 mm, or a quarter voxel when finer (trilinear;
on an original slice this is bilinear within the slice). The edge on a ray is where the
profile crosses ``level`` (half the background: the 50 % point of a blurred step lies on the
edge for a symmetric point response), by linear interpolation between samples:

* ``outward`` (a body): the *outermost* crossing, so cold or hot inserts inside do not count;
* ``first`` (a cold insert): the first crossing from below to above the level.

The radii are median-filtered over five neighbouring rays (noise). The outline is then a
star-shaped polygon about the ray origin: a point is inside when its distance from the origin
is at most the outline radius in its direction; the distance to the edge is the distance to
the nearest outline point (a k-d tree over the outline densified to 0.25 mm).

Samples outside the image grid count as below the level, so a body cut by the edge of the
field of view has its outline there.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

from .volume import Volume

#: Largest sampling step along a ray, mm (a quarter of the smallest voxel spacing when finer).
RAY_STEP_MM = 1.0


@dataclass
class Outline:
    """A closed outline in a plane, star-shaped about ``origin_mm``.

    Attributes
    ----------
    origin_mm : world mm of the ray origin (in the plane).
    u_dir, v_dir : orthonormal in-plane directions (world).
    angles_rad : ray angles, ascending in [0, 2 pi), measured from ``u_dir`` towards ``v_dir``.
    radii_mm : outline radius along each ray (NaN where no edge was found).
    """

    origin_mm: np.ndarray
    u_dir: np.ndarray
    v_dir: np.ndarray
    angles_rad: np.ndarray
    radii_mm: np.ndarray
    _tree: cKDTree | None = field(default=None, repr=False)

    @property
    def valid(self) -> bool:
        return bool(np.all(np.isfinite(self.radii_mm)))

    def local(self, points_mm: np.ndarray) -> np.ndarray:
        """In-plane coordinates (..., 2), mm, of world points (orthogonal projection)."""
        rel = np.asarray(points_mm, float) - self.origin_mm
        return np.stack([rel @ self.u_dir, rel @ self.v_dir], axis=-1)

    def points_local(self) -> np.ndarray:
        """Outline vertices (n, 2) in the local in-plane coordinates."""
        return np.c_[self.radii_mm * np.cos(self.angles_rad), self.radii_mm * np.sin(self.angles_rad)]

    def points_world(self) -> np.ndarray:
        xy = self.points_local()
        return self.origin_mm + xy[:, :1] * self.u_dir + xy[:, 1:] * self.v_dir

    def radius_at(self, angles_rad: np.ndarray) -> np.ndarray:
        """Outline radius in given directions (periodic linear interpolation)."""
        return np.interp(np.mod(angles_rad, 2 * np.pi), self.angles_rad, self.radii_mm, period=2 * np.pi)

    def _kdtree(self) -> cKDTree:
        if self._tree is None:
            xy = self.points_local()
            closed = np.r_[xy, xy[:1]]
            seg = np.diff(closed, axis=0)
            n_sub = np.maximum(1, np.ceil(np.hypot(seg[:, 0], seg[:, 1]) / 0.25).astype(int))
            dense = np.concatenate([p + np.linspace(0, 1, n, endpoint=False)[:, None] * s for p, s, n in zip(closed[:-1], seg, n_sub)])
            self._tree = cKDTree(dense)
        return self._tree

    def signed_distance_local(self, xy: np.ndarray, cap_mm: float = np.inf) -> np.ndarray:
        """Distance (mm) of local points (..., 2) to the outline: positive inside, negative outside.

        Distances beyond ``cap_mm`` come out as +-inf (faster when only near points matter).
        """
        xy = np.asarray(xy, float)
        dist, _ = self._kdtree().query(xy.reshape(-1, 2), distance_upper_bound=cap_mm)
        dist = dist.reshape(xy.shape[:-1])
        rho = np.hypot(xy[..., 0], xy[..., 1])
        inside = rho <= self.radius_at(np.arctan2(xy[..., 1], xy[..., 0]))
        return np.where(inside, dist, -dist)

    def signed_distance(self, points_mm: np.ndarray, cap_mm: float = np.inf) -> np.ndarray:
        """Distance (mm) of world points (projected onto the plane) to the outline, positive inside
        (+-inf beyond ``cap_mm``)."""
        return self.signed_distance_local(self.local(points_mm), cap_mm)

    def disc_inside_fraction(self, centres_mm: np.ndarray, diameter_mm: float, n_samples: int = 2000) -> np.ndarray:
        """Fraction of the area of discs (world centres (n, 3), in the plane) inside the outline.

        Exactly 1 (0) when the disc lies wholly inside (outside) by its centre's distance to
        the outline; otherwise the fraction of ``n_samples`` area-uniform points of the disc
        (a sunflower lattice) that fall inside.
        """
        c = self.local(np.asarray(centres_mm, float).reshape(-1, 3))
        r = 0.5 * float(diameter_mm)
        d = self.signed_distance_local(c)
        out = np.where(d >= r, 1.0, np.where(d <= -r, 0.0, np.nan))
        todo = np.flatnonzero(np.isnan(out))
        if todo.size:
            i = np.arange(n_samples) + 0.5
            rho = r * np.sqrt(i / n_samples)
            th = i * math.pi * (3.0 - math.sqrt(5.0))
            offs = np.c_[rho * np.cos(th), rho * np.sin(th)]
            pts = c[todo][:, None, :] + offs[None]
            rr = np.hypot(pts[..., 0], pts[..., 1])
            inside = rr <= self.radius_at(np.arctan2(pts[..., 1], pts[..., 0]))
            out[todo] = inside.mean(axis=1)
        return out

    def area_centroid_local(self) -> tuple[float, np.ndarray]:
        """Area (mm^2) and area centroid (local mm) of the outline polygon (shoelace formula)."""
        return polygon_area_centroid(self.points_local())


def polygon_area_centroid(xy: np.ndarray) -> tuple[float, np.ndarray]:
    """Area and area centroid of a simple closed polygon (n, 2) (shoelace formula; mathematics)."""
    x, y = xy[:, 0], xy[:, 1]
    xn, yn = np.roll(x, -1), np.roll(y, -1)
    cross = x * yn - xn * y
    area = 0.5 * float(cross.sum())
    if abs(area) < 1e-12:
        return 0.0, xy.mean(axis=0)
    cx = float(((x + xn) * cross).sum()) / (6.0 * area)
    cy = float(((y + yn) * cross).sum()) / (6.0 * area)
    return abs(area), np.array([cx, cy])


def find_outline(
    volume: Volume,
    origin_mm: np.ndarray,
    u_dir: np.ndarray,
    v_dir: np.ndarray,
    level: float,
    max_radius_mm: float,
    *,
    n_rays: int = 720,
    mode: str = "outward",
    min_radius_mm: float = 0.0,
) -> Outline:
    """The outline about ``origin_mm`` in the plane spanned by ``u_dir``, ``v_dir`` (module notes).

    Parameters
    ----------
    level : the edge level, Bq/mL (half the background).
    max_radius_mm : how far the rays reach.
    mode : ``outward`` (outermost crossing; a body) or ``first`` (first rise above the
        level; a cold insert around the origin).
    min_radius_mm : ``first`` mode: crossings nearer than this are ignored.

    Returns
    -------
    Outline with NaN radii on rays without a crossing.
    """
    u = np.asarray(u_dir, float)
    v = np.asarray(v_dir, float)
    o = np.asarray(origin_mm, float)
    theta = np.arange(n_rays) * 2 * np.pi / n_rays
    step = min(RAY_STEP_MM, 0.25 * float(np.min(volume.spacing_mm)))
    r = np.arange(0.0, max_radius_mm + step / 2, step)
    dirs = np.cos(theta)[:, None] * u + np.sin(theta)[:, None] * v  # (n, 3)
    pts = o + r[None, :, None] * dirs[:, None, :]
    idx = volume.world_to_index(pts).reshape(-1, 3).T
    vals = ndimage.map_coordinates(volume.data, idx, order=1, mode="constant", cval=0.0, prefilter=False).reshape(pts.shape[:-1])
    vals = np.nan_to_num(vals, nan=0.0)
    above = vals >= level
    radii = np.full(n_rays, np.nan)
    rows = np.arange(n_rays)
    if mode == "outward":
        has = above.any(axis=1)
        last = r.size - 1 - np.argmax(above[:, ::-1], axis=1)  # last sample at or above the level
        ok = has & (last < r.size - 1)
        i = last[ok]
        a, b = vals[rows[ok], i], vals[rows[ok], i + 1]
        radii[ok] = r[i] + step * (a - level) / np.where(a - b > 0, a - b, 1.0)
    elif mode == "first":
        start = int(np.searchsorted(r, min_radius_mm))
        sub = above[:, start:]
        has = sub.any(axis=1)
        first = start + np.argmax(sub, axis=1)
        ok = has & (first > 0)
        i = first[ok]
        a, b = vals[rows[ok], i - 1], vals[rows[ok], i]
        radii[ok] = r[i - 1] + step * (level - a) / np.where(b - a > 0, b - a, 1.0)
    else:  # pragma: no cover - a programming error
        raise ValueError(f"unknown outline mode {mode!r}")
    if np.isfinite(radii).all():
        radii = ndimage.median_filter(radii, size=5, mode="wrap")
    return Outline(o, u, v, theta, radii)


def radius_profile(xy: np.ndarray, centre: np.ndarray, n_bins: int = 360) -> np.ndarray:
    """Radius (mm) of a closed outline (n, 2) about ``centre`` at ``n_bins`` equally spaced angles
    (the outline must be star-shaped about the centre)."""
    rel = np.asarray(xy, float) - np.asarray(centre, float)
    ang = np.mod(np.arctan2(rel[:, 1], rel[:, 0]), 2 * np.pi)
    rad = np.hypot(rel[:, 0], rel[:, 1])
    order = np.argsort(ang)
    grid = (np.arange(n_bins) + 0.5) * 2 * np.pi / n_bins
    return np.interp(grid, ang[order], rad[order], period=2 * np.pi)


def match_profiles(found: np.ndarray, model: np.ndarray) -> tuple[float, float]:
    """Rotation (radians) that best turns ``model`` into ``found`` (two radius profiles on the
    same angle grid): ``found(theta) ~ model(theta - phi)``; circular cross-correlation by FFT
    with a parabolic sub-bin refinement. Returns (phi, RMS residual in mm at phi)."""
    n = len(found)
    f = found - found.mean()
    m = model - model.mean()
    corr = np.real(np.fft.ifft(np.fft.fft(f) * np.conj(np.fft.fft(m))))
    k = int(np.argmax(corr))
    y0, y1, y2 = corr[(k - 1) % n], corr[k], corr[(k + 1) % n]
    den = y0 - 2 * y1 + y2
    frac = 0.5 * (y0 - y2) / den if den < 0 else 0.0
    phi = (k + frac) * 2 * np.pi / n
    grid = (np.arange(n) + 0.5) * 2 * np.pi / n
    shifted = np.interp(np.mod(grid - phi, 2 * np.pi), grid, model, period=2 * np.pi)
    rms = float(np.sqrt(np.mean((found - shifted) ** 2)))
    return float(phi), rms
