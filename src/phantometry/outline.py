"""Outlines found in the image: the body's cross-section (or a cold insert's) in a plane.

Method (phantometry's own)
--------------------------
From a point inside the region, rays are cast in a plane read from the image (an original
slice or an interpolated plane) every ``360 / n_rays`` degrees; the plane, smoothed by a
Gaussian of one pixel (at least 2 mm) against noise, is sampled along them every 1 mm, or a
quarter pixel when finer (bilinear). The edge on a ray is where the
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

from .rois import PlaneImage

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


#: A plane's own edge is kept where it departs from the planes' median by more than this many
#: robust SDs of the departures (and at least :data:`OWN_EDGE_MIN_MM`): a real difference (the
#: field of view cutting one plane, a body end), not noise.
OWN_EDGE_SDS = 4.0
OWN_EDGE_MIN_MM = 3.0
#: ... and along at least this many degrees of rays.
OWN_EDGE_MIN_RUN_DEG = 10.0
#: SD (degrees) of the Gaussian smoothing of the combined radii along the outline (at the
#: body's radius of 100-150 mm, 3.5-5 mm of edge: it leaves the D shape's smooth curve alone).
SMOOTH_DEG = 2.0


def combine_outlines(outlines: list[Outline | None]) -> tuple[list[Outline | None], float | None]:
    """Outlines of one prism-shaped body on several parallel planes, with the noise averaged out.

    The planes must share the in-plane directions and ray angles, and each outline's origin must
    lie on the same line parallel to the body's axis (the phantom axis), so that the radius
    along a ray is the same on every plane for a prism. Each ray's radius becomes the median
    over the planes, smoothed along the outline by a Gaussian of :data:`SMOOTH_DEG`, except
    where a plane's own radius departs from that median by more than
    ``max(OWN_EDGE_MIN_MM, OWN_EDGE_SDS x robust SD)`` of all departures along at least
    :data:`OWN_EDGE_MIN_RUN_DEG` of rays: there the plane's own edge is kept.

    Returns
    -------
    (outlines, standard error): the outlines, and the standard error (mm) of the combined edge
    of one ray, ``1.25 s / sqrt(n)`` from the robust SD ``s`` of the planes about their median
    (the median's efficiency; an upper bound, as the smoothing is not counted). With fewer
    than three outlines they are returned unchanged and the standard error is None.
    """
    found = [o for o in outlines if o is not None]
    if len(found) < 3:
        return list(outlines), None
    radii = np.array([o.radii_mm for o in found])
    med = np.median(radii, axis=0)
    dev = radii - med
    sd = 1.4826 * float(np.median(np.abs(dev)))
    n = len(med)
    smooth = ndimage.gaussian_filter1d(med, SMOOTH_DEG / 360.0 * n, mode="wrap")
    limit = max(OWN_EDGE_MIN_MM, OWN_EDGE_SDS * sd)
    run = max(3, int(round(OWN_EDGE_MIN_RUN_DEG / 360.0 * n)))
    out: list[Outline | None] = []
    for o in outlines:
        if o is None:
            out.append(None)
            continue
        own = np.abs(o.radii_mm - med) > limit
        if own.any():  # only departures along a run of rays (a circular opening): not a noise blob
            padded = np.r_[own[-run:], own, own[:run]]
            own = ndimage.binary_opening(padded, structure=np.ones(run, bool))[run:-run]
        out.append(Outline(o.origin_mm, o.u_dir, o.v_dir, o.angles_rad, np.where(own, o.radii_mm, smooth)))
    return out, 1.25 * sd / math.sqrt(len(found))


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
    plane: PlaneImage,
    origin_mm: np.ndarray,
    level: float,
    max_radius_mm: float,
    *,
    n_rays: int = 720,
    mode: str = "outward",
    min_radius_mm: float = 0.0,
    smooth_mm: float | None = None,
) -> Outline:
    """The outline about ``origin_mm`` (a point of the plane) in a plane image (module notes).

    Parameters
    ----------
    plane : the plane read from the image (an original slice or an interpolated plane).
    level : the edge level, Bq/mL (half the background).
    max_radius_mm : how far the rays reach.
    mode : ``outward`` (outermost crossing; a body) or ``first`` (first rise above the
        level; a cold insert around the origin).
    min_radius_mm : ``first`` mode: crossings nearer than this are ignored.
    smooth_mm : SD (mm) of a Gaussian the plane is smoothed with first (default
        :func:`edge_smoothing_mm`): it does not move a straight edge's half-level point and
        keeps noise from breaking the level into islands.

    Returns
    -------
    Outline with NaN radii on rays without a crossing.
    """
    p = float(plane.pixel_mm)
    vals2d = np.nan_to_num(plane.values, nan=0.0)
    sm = edge_smoothing_mm(p) if smooth_mm is None else float(smooth_mm)
    if sm > 0:
        vals2d = ndimage.gaussian_filter(vals2d, sm / p, mode="constant", cval=0.0)
    o_uv = plane.world_to_uv(np.asarray(origin_mm, float))
    theta = np.arange(n_rays) * 2 * np.pi / n_rays
    step = min(RAY_STEP_MM, 0.25 * p)
    r = np.arange(0.0, max_radius_mm + step / 2, step)
    cu = (o_uv[0] + r[None, :] * np.cos(theta)[:, None]) / p
    cv = (o_uv[1] + r[None, :] * np.sin(theta)[:, None]) / p
    vals = ndimage.map_coordinates(vals2d, [cv.ravel(), cu.ravel()], order=1, mode="constant", cval=0.0, prefilter=False).reshape(cu.shape)
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
    return Outline(plane.uv_to_world(o_uv), plane.u_dir.copy(), plane.v_dir.copy(), theta, radii)


def edge_smoothing_mm(pixel_mm: float) -> float:
    """Default smoothing (Gaussian SD, mm) before an edge is found: one pixel, at least 2 mm
    (a symmetric kernel leaves a straight edge's half-level point in place; on a curved edge of
    radius R it moves it by about (s^2 + s_psf^2) / (2 R), a few tenths of a mm for the body)."""
    return max(2.0, float(pixel_mm))


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
