"""Sub-voxel regions of interest in world millimetres.

Every ROI here is defined by its geometry in world mm (the frame of ``Volume.affine``) and is
turned into *partial-volume weights* on the voxel grid: each voxel gets the fraction of its
own cell (the parallelepiped spanned by the affine's columns around the voxel centre) that
lies inside the ROI, 0..1. Weights are only ever computed on a small array-order sub-box
around the ROI, never as a full-volume mask, so that hundreds of ROIs on a large volume cost
milliseconds.

How the fractions are computed
------------------------------
1. Classification by a centre-based distance test. Every point of a voxel cell lies within the
   cell's circumradius ``rho`` (half its longest diagonal, from the affine) of the voxel
   centre. A voxel whose centre is deeper than ``rho`` inside the shape is wholly inside
   (weight 1), deeper than ``rho`` outside is wholly outside (weight 0). Only the remaining
   boundary shell is supersampled.
2. Boundary voxels, spheres and cylinders ("semi-analytic supersampling"): the cell is crossed
   by ``supersample**2`` lines parallel to one of its own edges, placed on the voxel's own
   sub-grid through the affine (so oblique and anisotropic grids are exact). The length of
   each line inside the shape is solved in closed form (a quadratic for the curved surface,
   a linear inequality for flat end caps), so the fraction is exact along the line and
   midpoint-sampled only across it. This is the midpoint rule in two dimensions applied to
   the exact chord length, which is markedly more accurate than ``supersample**3`` points.
3. Boundary voxels, generic shapes (:func:`fractional_occupancy`): ``supersample**3`` points
   on the voxel's sub-grid, the fraction is the share of points for which ``inside_fn`` is
   true.

2-D ROIs (discs on a plane, NEMA NU 2 background and insert ROIs) are drawn on a
:class:`PlaneImage` resampled from the volume by :func:`sample_plane`. The same
classification is used on pixels, and boundary pixels get the *exact* area of the
disc-square intersection (closed form, no sampling).

Errors
------
ROI parameters that cannot be meaningful (non-positive diameter) raise
:class:`~phantometry.errors.TemplateError`; ROIs lying outside the image or touching pixels
without data raise :class:`~phantometry.errors.PhantomNotFound`; unusable plane directions
raise :class:`~phantometry.errors.GeometryError`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy import ndimage

from .errors import GeometryError, PhantomNotFound, TemplateError
from .fftconv import fft_convolve
from .volume import Volume

__all__ = [
    "PERCIST_PEAK_DIAMETER_MM",
    "RoiWeights",
    "PlaneImage",
    "fractional_occupancy",
    "sphere_weights",
    "cylinder_weights",
    "sample_plane",
    "disc_weights",
    "disc_mean",
    "disc_means",
    "disc_stats",
    "peak_search",
    "isocontour_mean",
    "isocontour_voi",
    "slice_as_acquired",
    "max_in_sphere",
    "weighted_stats",
]

#: Diameter (mm) of a sphere of 1 mL (1000 mm^3): the SUVpeak sphere of PERCIST
#: (Wahl et al., J Nucl Med 2009;50 Suppl 1:122S-150S).
PERCIST_PEAK_DIAMETER_MM = 12.41

# Largest number of (voxel, line) or (voxel, point) pairs evaluated in one numpy batch.
_BATCH = 400_000


# =========================================================================== weights type
@dataclass(frozen=True, eq=False)
class RoiWeights:
    """Partial-volume weights of one ROI on a sub-box of a volume.

    Attributes
    ----------
    box : tuple of 3 slices
        Array-order ``(k, j, i)`` sub-box of the volume the weights live on.
    weights : ndarray, float32, shape of the box
        Fraction (0..1) of each voxel cell that lies inside the ROI.
    clipped : bool
        True when the ROI reaches beyond the image grid, so that part of it has no voxels.
        Means over a clipped ROI are refused unless explicitly allowed.
    """

    box: tuple[slice, slice, slice]
    weights: np.ndarray
    clipped: bool = False

    @property
    def count(self) -> float:
        """Sum of the weights, i.e. the ROI volume in voxels (float)."""
        return float(np.sum(self.weights, dtype=np.float64))

    @property
    def n_voxels_touched(self) -> int:
        """Number of voxels with a non-zero weight."""
        return int(np.count_nonzero(self.weights))

    def volume_ml(self, voxel_volume_ml: float) -> float:
        """ROI volume in mL: sum of weights x volume of one voxel (mL)."""
        return self.count * float(voxel_volume_ml)

    def values(self, data: np.ndarray | Volume) -> np.ndarray:
        """The voxel values on :attr:`box` of a full-volume array (or Volume)."""
        arr = data.data if isinstance(data, Volume) else np.asarray(data)
        return arr[self.box]

    def mean(self, data: np.ndarray | Volume, allow_clipped: bool = False) -> float:
        """Partial-volume weighted mean ``sum(w x) / sum(w)`` of a full-volume array.

        Parameters
        ----------
        data : ndarray (nz, ny, nx) or Volume
            Values on the same grid as the ROI (Bq/mL for activity).
        allow_clipped : bool
            Accept an ROI that reaches beyond the image (mean over its in-image part only).
        """
        return weighted_stats(data, self, allow_clipped=allow_clipped)[0]

    def to_full(self, shape: tuple[int, int, int]) -> np.ndarray:
        """Dense float32 weight array of the whole volume shape (for tests and DICOM SEG)."""
        full = np.zeros(tuple(shape), dtype=np.float32)
        full[self.box] = self.weights
        return full


# =========================================================================== geometry helpers
def _where(volume: Volume) -> str:
    return f"{volume.source}: " if getattr(volume, "source", None) else "image: "


def _check_diameter(diameter_mm: float, what: str) -> float:
    d = float(diameter_mm)
    if not np.isfinite(d) or d <= 0:
        raise TemplateError(f"{what} must be a positive number of mm, got {diameter_mm!r}; fix the ROI definition")
    return d


def _edges(volume: Volume) -> np.ndarray:
    """World vectors (mm) of one voxel step along the array axes; row m is axis m (k, j, i)."""
    return volume.affine[:3, :3][:, ::-1].T.copy()


def _index_gradients(volume: Volume) -> np.ndarray:
    """Rows g_m with ``index_m = g_m . (x - t)`` for array axes m = (k, j, i)."""
    return np.linalg.inv(volume.affine[:3, :3])[::-1].copy()


def _circumradius(edges: np.ndarray) -> float:
    """Half the longest diagonal of the voxel cell (mm): every cell point is this close to the centre."""
    e0, e1, e2 = edges
    diags = [e0 + e1 + e2, -e0 + e1 + e2, e0 - e1 + e2, e0 + e1 - e2]
    return 0.5 * max(float(np.linalg.norm(d)) for d in diags)


def _index_box(
    volume: Volume, lo_idx: np.ndarray, hi_idx: np.ndarray
) -> tuple[tuple[slice, slice, slice], bool]:
    """Array box of voxels whose cells intersect the fractional index range [lo, hi].

    Voxel n covers index [n - 0.5, n + 0.5]; returns the box clipped to the grid and whether
    clipping removed part of the range. Raises PhantomNotFound when nothing is left.
    """
    lo = np.ceil(np.asarray(lo_idx, float) - 0.5).astype(int)
    hi = np.floor(np.asarray(hi_idx, float) + 0.5).astype(int)
    shape = np.array(volume.shape)
    clipped = bool(np.any(lo < 0) or np.any(hi > shape - 1))
    lo_c = np.maximum(lo, 0)
    hi_c = np.minimum(hi, shape - 1)
    if np.any(hi_c < lo_c):
        raise PhantomNotFound(
            f"{_where(volume)}ROI lies entirely outside the image grid; check the phantom position or ROI template"
        )
    box = tuple(slice(int(a), int(b) + 1) for a, b in zip(lo_c, hi_c))
    return box, clipped  # type: ignore[return-value]


def box_world(volume: Volume, box: tuple[slice, ...]) -> np.ndarray:
    """World mm of the voxel centres of a box, shape (nk, nj, ni, 3)."""
    e = _edges(volume)
    t = volume.affine[:3, 3]
    k = np.arange(box[0].start, box[0].stop, dtype=float)
    j = np.arange(box[1].start, box[1].stop, dtype=float)
    i = np.arange(box[2].start, box[2].stop, dtype=float)
    return (
        t
        + k[:, None, None, None] * e[0]
        + j[None, :, None, None] * e[1]
        + i[None, None, :, None] * e[2]
    )


def _sub_offsets(n: int) -> np.ndarray:
    """Midpoints of n equal sub-intervals of [-0.5, 0.5] (index units)."""
    return (np.arange(n, dtype=float) + 0.5) / n - 0.5


def _chord_fractions(
    rel_centres: np.ndarray,
    edges: np.ndarray,
    line_axis: int,
    supersample: int,
    interval_fn: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]],
) -> np.ndarray:
    """Fraction of each voxel cell inside a shape, by exact chords along one cell edge.

    Parameters
    ----------
    rel_centres : ndarray (n, 3)
        Voxel centres in world mm relative to the shape's reference point.
    edges : ndarray (3, 3)
        World vectors of the three cell edges (array order).
    line_axis : int
        Cell edge the lines run along.
    supersample : int
        Lines per cell side across the other two edges (``supersample**2`` lines per voxel).
    interval_fn : callable
        ``interval_fn(p (n, L, 3), d (3,)) -> (t0, t1)``: parameter interval of the line
        ``p + t d`` inside the shape (empty when ``t1 <= t0``).
    """
    others = [m for m in range(3) if m != line_axis]
    o = _sub_offsets(supersample)
    offs = (o[:, None, None] * edges[others[0]] + o[None, :, None] * edges[others[1]]).reshape(-1, 3)
    d = edges[line_axis]
    out = np.empty(len(rel_centres), dtype=float)
    step = max(1, _BATCH // len(offs))
    for a in range(0, len(rel_centres), step):
        p = rel_centres[a : a + step, None, :] + offs[None, :, :]
        t0, t1 = interval_fn(p, d)
        length = np.clip(t1, -0.5, 0.5) - np.clip(t0, -0.5, 0.5)
        out[a : a + step] = np.maximum(length, 0.0).mean(axis=1)
    return out


def _sphere_fractions(rel_centres: np.ndarray, edges: np.ndarray, radius_mm: float, supersample: int) -> np.ndarray:
    """Cell fractions inside a sphere centred at the origin for voxel centres ``rel_centres`` (..., 3)."""
    shape = rel_centres.shape[:-1]
    q = rel_centres.reshape(-1, 3)
    rho = _circumradius(edges)
    dist = np.sqrt(np.einsum("ij,ij->i", q, q))
    frac = (dist <= radius_mm - rho).astype(float)
    boundary = (dist > radius_mm - rho) & (dist < radius_mm + rho)
    if np.any(boundary):
        line_axis = int(np.argmax(np.linalg.norm(edges, axis=1)))
        frac[boundary] = _sphere_chord_fractions(q[boundary], edges, line_axis, supersample, radius_mm)
    return frac.reshape(shape)


def _sphere_chord_fractions(
    q: np.ndarray, edges: np.ndarray, line_axis: int, supersample: int, radius_mm: float
) -> np.ndarray:
    """Exact-chord cell fractions (see :func:`_chord_fractions`) for a sphere at the origin.

    The line ``p + t d`` meets the sphere where ``|d|^2 t^2 + 2 (p.d) t + |p|^2 - r^2 = 0``.
    With ``p = q + o`` (voxel centre + sub-line offset) the dot products are expanded as
    ``p.d = q.d + o.d`` and ``p.p = q.q + 2 q.o + o.o``, which avoids building an
    (n, L, 3) point array.
    """
    others = [m for m in range(3) if m != line_axis]
    o = _sub_offsets(supersample)
    offs = (o[:, None, None] * edges[others[0]] + o[None, :, None] * edges[others[1]]).reshape(-1, 3)
    d = edges[line_axis]
    a2 = 2.0 * float(d @ d)
    qd = q @ d
    od = offs @ d
    qq = np.einsum("ij,ij->i", q, q) - radius_mm * radius_mm
    oo = np.einsum("ij,ij->i", offs, offs)
    out = np.empty(len(q))
    step = max(1, _BATCH // len(offs))
    for k in range(0, len(q), step):
        b = 2.0 * (qd[k : k + step, None] + od[None, :])
        c = qq[k : k + step, None] + 2.0 * (q[k : k + step] @ offs.T) + oo[None, :]
        disc = b * b - 2.0 * a2 * c
        sq = np.sqrt(np.maximum(disc, 0.0))
        t0 = np.clip((-b - sq) / a2, -0.5, 0.5)
        t1 = np.clip((-b + sq) / a2, -0.5, 0.5)
        out[k : k + step] = np.where(disc > 0, t1 - t0, 0.0).mean(axis=1)
    return out


def _check_supersample(supersample: int) -> int:
    s = int(supersample)
    if s < 1:
        raise TemplateError(f"supersample must be a positive integer, got {supersample!r}")
    return s


# =========================================================================== 3-D ROIs
def fractional_occupancy(
    volume: Volume,
    inside_fn: Callable[[np.ndarray], np.ndarray],
    bbox_min_mm: np.ndarray,
    bbox_max_mm: np.ndarray,
    supersample: int = 5,
) -> RoiWeights:
    """Partial-volume weights of an arbitrary shape given by a point-membership test.

    Parameters
    ----------
    volume : Volume
        Grid the weights are computed on (only its geometry is used).
    inside_fn : callable
        ``inside_fn(points_mm (n, 3)) -> bool (n,)``: True for world points (mm) inside the
        shape. Called on arrays of points, never point by point.
    bbox_min_mm, bbox_max_mm : array_like (3,)
        World-axis-aligned bounding box (mm) that contains the whole shape. Parts of the shape
        outside it are not counted.
    supersample : int
        Sub-points per cell edge for boundary voxels (``supersample**3`` points per voxel).

    Returns
    -------
    RoiWeights

    Notes
    -----
    Without a distance function the clear inside/outside test is made on the cell corners:
    a voxel whose centre and eight corners all agree is taken as wholly inside (exact for
    convex shapes) or wholly outside; every voxel that disagrees, and its 26 neighbours (to
    catch surfaces bulging through a face between corners), is supersampled. The shape's
    features must therefore be larger than a voxel.
    """
    s = _check_supersample(supersample)
    lo_w = np.asarray(bbox_min_mm, float)
    hi_w = np.asarray(bbox_max_mm, float)
    if lo_w.shape != (3,) or hi_w.shape != (3,) or np.any(hi_w < lo_w):
        raise TemplateError(f"bounding box must be two 3-vectors with min <= max, got {lo_w} and {hi_w}")
    corners = np.array([[(lo_w, hi_w)[b][a] for a, b in enumerate(bits)] for bits in np.ndindex(2, 2, 2)])
    idx = volume.world_to_index(corners)
    box, clipped = _index_box(volume, idx.min(axis=0), idx.max(axis=0))
    e = _edges(volume)
    centres = box_world(volume, box)
    nb = centres.shape[:3]
    inside_c = np.asarray(inside_fn(centres.reshape(-1, 3)), dtype=bool).reshape(nb)
    # cell corners: centres shifted by half a step along every axis, on an (n+1)^3 lattice
    corner_lattice = (
        centres[0, 0, 0] - 0.5 * e.sum(axis=0)
        + np.arange(nb[0] + 1)[:, None, None, None] * e[0]
        + np.arange(nb[1] + 1)[None, :, None, None] * e[1]
        + np.arange(nb[2] + 1)[None, None, :, None] * e[2]
    )
    inside_k = np.asarray(inside_fn(corner_lattice.reshape(-1, 3)), dtype=bool).reshape(tuple(n + 1 for n in nb))
    n_in = inside_c.astype(np.int8)
    for dk, dj, di in np.ndindex(2, 2, 2):
        n_in = n_in + inside_k[dk : dk + nb[0], dj : dj + nb[1], di : di + nb[2]]
    all_in = n_in == 9
    mixed = (n_in > 0) & (n_in < 9)
    boundary = ndimage.binary_dilation(mixed, structure=np.ones((3, 3, 3), bool)) if mixed.any() else mixed
    weights = all_in.astype(np.float64)
    if boundary.any():
        o = _sub_offsets(s)
        sub = (
            o[:, None, None, None] * e[0] + o[None, :, None, None] * e[1] + o[None, None, :, None] * e[2]
        ).reshape(-1, 3)
        bc = centres[boundary]
        frac = np.empty(len(bc))
        step = max(1, _BATCH // len(sub))
        for a in range(0, len(bc), step):
            pts = (bc[a : a + step, None, :] + sub[None]).reshape(-1, 3)
            inside = np.asarray(inside_fn(pts), dtype=bool).reshape(-1, len(sub))
            frac[a : a + step] = inside.mean(axis=1)
        weights[boundary] = frac
    return RoiWeights(box=box, weights=weights.astype(np.float32), clipped=clipped)


def sphere_weights(volume: Volume, centre_mm: np.ndarray, diameter_mm: float, supersample: int = 5) -> RoiWeights:
    """Partial-volume weights of a sphere.

    Parameters
    ----------
    volume : Volume
        Grid; any affine (oblique, anisotropic): cells and sub-lines follow the affine.
    centre_mm : array_like (3,)
        Sphere centre, world mm.
    diameter_mm : float
        Sphere diameter, mm.
    supersample : int
        Boundary voxels are crossed by ``supersample**2`` exact chords (see module notes).

    Returns
    -------
    RoiWeights
        At 2 mm voxels and random sub-voxel centres ``count * voxel volume`` agrees with
        ``4/3 pi r^3`` within about 0.2 % at r = 5 mm and 0.05 % at r >= 10 mm (tested to
        0.5 %, also on oblique and 2 x 2 x 3.27 mm grids).
    """
    r = 0.5 * _check_diameter(diameter_mm, "sphere diameter")
    s = _check_supersample(supersample)
    c = np.asarray(centre_mm, float)
    g = _index_gradients(volume)
    c_idx = volume.world_to_index(c)
    half = r * np.linalg.norm(g, axis=1)
    box, clipped = _index_box(volume, c_idx - half, c_idx + half)
    rel = box_world(volume, box) - c
    w = _sphere_fractions(rel, _edges(volume), r, s)
    return RoiWeights(box=box, weights=w.astype(np.float32), clipped=clipped)


def cylinder_weights(
    volume: Volume,
    centre_mm: np.ndarray,
    axis_direction: np.ndarray,
    diameter_mm: float,
    length_mm: float,
    supersample: int = 5,
) -> RoiWeights:
    """Partial-volume weights of a finite right circular cylinder.

    Parameters
    ----------
    volume : Volume
        Grid (any affine).
    centre_mm : array_like (3,)
        Centre of the cylinder (midpoint of its axis), world mm.
    axis_direction : array_like (3,)
        Direction of the axis in world coordinates (normalised here).
    diameter_mm, length_mm : float
        Cylinder diameter and length along the axis, mm.
    supersample : int
        Boundary voxels are crossed by ``supersample**2`` exact chords run along the cell edge
        most parallel to the axis (flat caps are then exact for an aligned cylinder).

    Returns
    -------
    RoiWeights
    """
    R = 0.5 * _check_diameter(diameter_mm, "cylinder diameter")
    h = 0.5 * _check_diameter(length_mm, "cylinder length")
    s = _check_supersample(supersample)
    a = np.asarray(axis_direction, float)
    na = np.linalg.norm(a)
    if a.shape != (3,) or not np.isfinite(na) or na == 0:
        raise GeometryError(f"cylinder axis direction must be a non-zero 3-vector, got {axis_direction!r}")
    a = a / na
    c = np.asarray(centre_mm, float)
    g = _index_gradients(volume)
    ga = g @ a
    half = h * np.abs(ga) + R * np.sqrt(np.maximum(np.einsum("ij,ij->i", g, g) - ga * ga, 0.0))
    c_idx = volume.world_to_index(c)
    box, clipped = _index_box(volume, c_idx - half, c_idx + half)
    e = _edges(volume)
    rel = (box_world(volume, box) - c).reshape(-1, 3)
    axial = rel @ a
    radial = np.sqrt(np.maximum(np.einsum("ij,ij->i", rel, rel) - axial * axial, 0.0))
    rho = _circumradius(e)
    inside = (radial + rho <= R) & (np.abs(axial) + rho <= h)
    outside = (radial - rho >= R) | (np.abs(axial) - rho >= h)
    w = inside.astype(float)
    boundary = ~inside & ~outside

    def interval(p: np.ndarray, d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        pa = p @ a
        da = float(d @ a)
        pp = p - pa[..., None] * a
        dp = d - da * a
        A = float(dp @ dp)
        big = 1e30
        if A > 1e-12 * float(d @ d):
            B = 2.0 * (pp @ dp)
            C = np.einsum("...i,...i->...", pp, pp) - R * R
            disc = B * B - 4 * A * C
            sq = np.sqrt(np.maximum(disc, 0.0))
            r0 = np.where(disc > 0, (-B - sq) / (2 * A), 0.0)
            r1 = np.where(disc > 0, (-B + sq) / (2 * A), 0.0)
        else:  # line parallel to the axis: inside the curved surface everywhere or nowhere
            inside_r = np.einsum("...i,...i->...", pp, pp) <= R * R
            r0 = np.where(inside_r, -big, 0.0)
            r1 = np.where(inside_r, big, 0.0)
        if abs(da) > 1e-12 * math.sqrt(float(d @ d)):
            ta = (-h - pa) / da
            tb = (h - pa) / da
            a0, a1 = np.minimum(ta, tb), np.maximum(ta, tb)
        else:  # line parallel to the caps
            inside_a = np.abs(pa) <= h
            a0 = np.where(inside_a, -big, 0.0)
            a1 = np.where(inside_a, big, 0.0)
        return np.maximum(r0, a0), np.minimum(r1, a1)

    if np.any(boundary):
        norms = np.linalg.norm(e, axis=1)
        cosines = np.abs(e @ a) / norms
        line_axis = int(np.argmax(cosines))
        others = [m for m in range(3) if m != line_axis]
        if cosines[line_axis] > 1 - 1e-12 and np.all(cosines[others] < 1e-9):
            # axis along a cell edge and the cell is a right prism about it: the fraction is
            # (axial overlap, exact) x (fraction of the cross-section inside the circle).
            w[boundary] = _prism_cylinder_fractions(rel[boundary], e, line_axis, a, R, h, s)
        else:
            w[boundary] = _chord_fractions(rel[boundary], e, line_axis, s, interval)
    w = w.reshape(tuple(sl.stop - sl.start for sl in box))
    return RoiWeights(box=box, weights=w.astype(np.float32), clipped=clipped)


def _prism_cylinder_fractions(
    rel: np.ndarray, edges: np.ndarray, axis_edge: int, a: np.ndarray, R: float, h: float, supersample: int
) -> np.ndarray:
    """Cell fractions inside a cylinder whose axis ``a`` is parallel to cell edge ``axis_edge``.

    The cell is a right prism over the parallelogram spanned by the other two edges (both
    perpendicular to ``a``). Axial part: exact overlap of the cell's axial extent with
    ``[-h, h]``. Cross-section: ``supersample**2`` exact chords of the circle of radius ``R``
    along one base edge, midpoint-sampled along the other (the 2-D analogue of
    :func:`_chord_fractions`).
    """
    length = float(np.linalg.norm(edges[axis_edge]))
    qa = rel @ a
    axial = np.clip(np.minimum(qa + 0.5 * length, h) - np.maximum(qa - 0.5 * length, -h), 0.0, None) / length
    e1, e2 = (edges[m] for m in range(3) if m != axis_edge)
    qp = rel - qa[:, None] * a
    o = _sub_offsets(supersample * supersample)
    A = float(e1 @ e1)
    out = np.empty(len(rel))
    step = max(1, _BATCH // len(o))
    for k in range(0, len(rel), step):
        p = qp[k : k + step, None, :] + o[None, :, None] * e2  # (n, L, 3), lines p + t e1
        B = 2.0 * (p @ e1)
        C = np.einsum("...i,...i->...", p, p) - R * R
        disc = B * B - 4 * A * C
        sq = np.sqrt(np.maximum(disc, 0.0))
        t0 = np.where(disc > 0, (-B - sq) / (2 * A), 0.0)
        t1 = np.where(disc > 0, (-B + sq) / (2 * A), 0.0)
        chord = np.maximum(np.clip(t1, -0.5, 0.5) - np.clip(t0, -0.5, 0.5), 0.0)
        out[k : k + step] = chord.mean(axis=1)
    return axial * out


# =========================================================================== statistics
def weighted_stats(
    data: np.ndarray | Volume, roi: RoiWeights, allow_clipped: bool = False
) -> tuple[float, float, float]:
    """Partial-volume weighted mean, SD and weight sum of an ROI.

    Parameters
    ----------
    data : ndarray (nz, ny, nx) or Volume
        Full-volume values on the ROI's grid.
    roi : RoiWeights
    allow_clipped : bool
        Accept an ROI that reaches beyond the image.

    Returns
    -------
    mean, sd, weight_sum : float
        With weights ``w`` and values ``x``, ``V1 = sum w``, ``V2 = sum w^2``:
        ``mean = sum(w x) / V1`` and ``sd = sqrt(sum(w (x - mean)^2) / (V1 - V2 / V1))``, the
        unbiased estimator for reliability weights (recalled: the weighted variance of the
        GNU Scientific Library, ``gsl_stats_wvariance``). For a binary mask it equals the
        ordinary sample SD with ``N - 1`` (``numpy.std(ddof=1)``). ``sd`` is NaN when the ROI
        holds a single effective voxel (``V1 - V2/V1 == 0``). ``weight_sum = V1`` (voxels).
    """
    if roi.clipped and not allow_clipped:
        where = _where(data) if isinstance(data, Volume) else ""
        raise PhantomNotFound(
            f"{where}ROI reaches beyond the image grid; check the phantom position or use a smaller ROI"
        )
    arr = data.data if isinstance(data, Volume) else np.asarray(data)
    w = roi.weights.astype(np.float64)
    x = arr[roi.box].astype(np.float64)
    return _weighted_mean_sd(x, w, _where(data) if isinstance(data, Volume) else "")


def _weighted_mean_sd(x: np.ndarray, w: np.ndarray, where: str = "") -> tuple[float, float, float]:
    v1 = float(w.sum())
    if v1 <= 0:
        raise PhantomNotFound(f"{where}ROI covers no voxel; check the ROI position and size")
    used = w > 0
    xv = x[used]
    wv = w[used]
    if not np.all(np.isfinite(xv)):
        raise PhantomNotFound(f"{where}ROI touches voxels without data (outside the image); check the ROI position")
    mean = float((wv * xv).sum() / v1)
    v2 = float((wv * wv).sum())
    denom = v1 - v2 / v1
    sd = float(np.sqrt((wv * (xv - mean) ** 2).sum() / denom)) if denom > 1e-12 * v1 else float("nan")
    return mean, sd, v1


# =========================================================================== voxel-centre searches
def centres_in_sphere(
    volume: Volume, centre_mm: np.ndarray, radius_mm: float
) -> tuple[tuple[slice, slice, slice], np.ndarray]:
    """Box and boolean mask of voxels whose centres lie within the sphere.

    When no voxel centre lies within it, the voxel whose cell contains the sphere centre
    (rounded index; the nearest voxel centre on any orthogonal grid) is returned alone.
    """
    c = np.asarray(centre_mm, float)
    c_idx = volume.world_to_index(c)
    half = radius_mm * np.linalg.norm(_index_gradients(volume), axis=1)
    try:
        box, _ = _index_box(volume, c_idx - half, c_idx + half)
        rel = box_world(volume, box) - c
        mask = np.einsum("...i,...i->...", rel, rel) <= radius_mm * radius_mm
    except PhantomNotFound:
        mask = np.zeros((0, 0, 0), bool)
    if mask.any():
        return box, mask
    nearest = np.rint(c_idx).astype(int)
    if np.any(nearest < 0) or np.any(nearest >= np.array(volume.shape)):
        raise PhantomNotFound(
            f"{_where(volume)}search sphere at {np.round(c, 2).tolist()} mm lies outside the image; "
            "check the phantom position or ROI template"
        )
    box = tuple(slice(int(n), int(n) + 1) for n in nearest)
    return box, np.ones((1, 1, 1), bool)  # type: ignore[return-value]


def _box_index_to_world(volume: Volume, box: tuple[slice, ...], local_idx: tuple[int, ...]) -> np.ndarray:
    kji = np.array([sl.start + int(n) for sl, n in zip(box, local_idx)], dtype=float)
    return volume.index_to_world(kji)


def max_in_sphere(volume: Volume, centre_mm: np.ndarray, diameter_mm: float) -> tuple[float, np.ndarray]:
    """Hottest voxel whose centre lies within a sphere.

    Parameters
    ----------
    volume : Volume
    centre_mm : array_like (3,)
        Sphere centre, world mm.
    diameter_mm : float
        Sphere diameter, mm. When no voxel centre lies within it, the voxel nearest to the
        centre is used.

    Returns
    -------
    max_value : float
        Bq/mL (the "RC max" numerator of the NEMA NU 2 / EARL recovery analyses).
    position_mm : ndarray (3,)
        World mm of that voxel's centre (first in array order on ties).
    """
    r = 0.5 * _check_diameter(diameter_mm, "search diameter")
    box, mask = centres_in_sphere(volume, centre_mm, r)
    vals = np.where(mask, volume.data[box], -np.inf)
    flat = int(np.argmax(vals))
    loc = np.unravel_index(flat, vals.shape)
    return float(vals[loc]), _box_index_to_world(volume, box, loc)


def peak_search(
    volume: Volume,
    region_centre_mm: np.ndarray,
    region_diameter_mm: float,
    peak_diameter_mm: float = PERCIST_PEAK_DIAMETER_MM,
) -> tuple[float, np.ndarray]:
    """Highest mean over a sphere of ``peak_diameter_mm`` centred within a search region.

    The peak value of PERCIST (Wahl et al., J Nucl Med 2009;50 Suppl 1:122S): the mean in a
    1 mL sphere (12.41 mm diameter) placed where it is highest, see also Lodge et al. for the
    implementation choices. The partial-volume weighted kernel is built once on the voxel grid
    from the real affine (anisotropic and oblique voxels handled), and correlated over a local
    box by FFT (:func:`phantometry.fftconv.fft_convolve` with the flipped kernel). Candidate centres are the voxel centres
    inside the region sphere (the voxel nearest to the region centre if there are none).
    Candidates whose peak sphere would reach beyond the image are skipped.

    Parameters
    ----------
    volume : Volume
    region_centre_mm : array_like (3,)
        Centre of the search region, world mm.
    region_diameter_mm : float
        Diameter of the search region, mm.
    peak_diameter_mm : float
        Diameter of the averaging sphere, mm (default 12.41 mm = 1 mL).

    Returns
    -------
    peak_mean : float
        Bq/mL.
    peak_centre_mm : ndarray (3,)
        World mm of the voxel centre the best sphere is centred on.
    """
    r_region = 0.5 * _check_diameter(region_diameter_mm, "peak search region diameter")
    r_peak = 0.5 * _check_diameter(peak_diameter_mm, "peak sphere diameter")
    cbox, cmask = centres_in_sphere(volume, region_centre_mm, r_region)
    e = _edges(volume)
    g = _index_gradients(volume)
    hk = np.ceil(r_peak * np.linalg.norm(g, axis=1) + 0.5).astype(int)
    offs = [np.arange(-n, n + 1, dtype=float) for n in hk]
    rel = (
        offs[0][:, None, None, None] * e[0]
        + offs[1][None, :, None, None] * e[1]
        + offs[2][None, None, :, None] * e[2]
    )
    kernel = _sphere_fractions(rel, e, r_peak, 5)
    kernel_sum = float(kernel.sum())
    # data box = candidate box grown by the kernel half size, padded with zeros beyond the image
    lo = np.array([sl.start for sl in cbox]) - hk
    hi = np.array([sl.stop for sl in cbox]) + hk
    shape = np.array(volume.shape)
    lo_c, hi_c = np.maximum(lo, 0), np.minimum(hi, shape)
    padded = np.zeros(tuple(hi - lo), dtype=np.float64)
    in_image = np.zeros(tuple(hi - lo), dtype=np.float64)
    inner = tuple(slice(int(a - b), int(c - b)) for a, b, c in zip(lo_c, lo, hi_c))
    padded[inner] = volume.data[tuple(slice(int(a), int(c)) for a, c in zip(lo_c, hi_c))]
    in_image[inner] = 1.0
    # correlation with the kernel = convolution with the flipped kernel; "valid" keeps exactly
    # the candidate box (FFT: ~10x faster than ndimage.correlate for 9^3 kernels)
    flipped = kernel[::-1, ::-1, ::-1]
    means = fft_convolve(padded, flipped, mode="valid") / kernel_sum
    ok = cmask.copy()
    if np.any(lo < 0) or np.any(hi > shape):
        cover = fft_convolve(in_image, flipped, mode="valid")
        ok &= cover >= kernel_sum * (1 - 1e-6)
    if not ok.any():
        raise PhantomNotFound(
            f"{_where(volume)}every {peak_diameter_mm:g} mm peak sphere in the search region reaches beyond "
            "the image; check the phantom position"
        )
    means = np.where(ok, means, -np.inf)
    loc = np.unravel_index(int(np.argmax(means)), means.shape)
    return float(means[loc]), _box_index_to_world(volume, cbox, loc)


def isocontour_voi(
    volume: Volume,
    centre_mm: np.ndarray,
    search_diameter_mm: float,
    background_bq_ml: float,
    fraction: float = 0.5,
) -> tuple[tuple[slice, slice, slice], np.ndarray, float]:
    """The voxels of the background-adapted isocontour VOI of :func:`isocontour_mean`.

    Returns
    -------
    box : tuple of slices
        The box of the volume (array order) the mask covers.
    voi : ndarray of bool
        The VOI's voxels within ``box``.
    max_value : float
        The hottest voxel value used, Bq/mL.
    """
    r = 0.5 * _check_diameter(search_diameter_mm, "isocontour search diameter")
    f = float(fraction)
    if not (0.0 < f <= 1.0):
        raise TemplateError(f"isocontour fraction must be in (0, 1], got {fraction!r}")
    bg = float(background_bq_ml)
    max_value, max_pos = max_in_sphere(volume, centre_mm, 2 * r)
    if not np.isfinite(bg) or not max_value > bg:
        raise PhantomNotFound(
            f"{_where(volume)}no voxel above the background ({bg:g} Bq/mL) in the isocontour search sphere at "
            f"{np.round(np.asarray(centre_mm, float), 2).tolist()} mm; check the sphere position and the background"
        )
    threshold = bg + f * (max_value - bg)
    margin = float(np.max(volume.spacing_mm))
    box, mask = centres_in_sphere(volume, centre_mm, r + margin)
    vals = volume.data[box].astype(np.float64)  # compare in float64: no float32 rounding of T
    candidates = mask & (vals >= threshold)
    labels, _ = ndimage.label(candidates, structure=np.ones((3, 3, 3), dtype=bool))
    max_idx = np.rint(volume.world_to_index(max_pos)).astype(int) - np.array([sl.start for sl in box])
    lab = labels[tuple(max_idx)]
    if lab == 0:  # cannot happen: the hottest voxel is inside the grown sphere and >= T
        raise AssertionError("isocontour: hottest voxel not in its own component")
    return box, labels == lab, max_value


def isocontour_mean(
    volume: Volume,
    centre_mm: np.ndarray,
    search_diameter_mm: float,
    background_bq_ml: float,
    fraction: float = 0.5,
) -> tuple[float, int, float]:
    """Mean in a background-adapted isocontour VOI (the "A50" VOI of EANM/EARL).

    Boellaard et al., FDG PET/CT: EANM procedure guidelines for tumour imaging: version 2.0,
    Eur J Nucl Med Mol Imaging 2015;42:328-354, and the EARL harmonisation: threshold ``T = B + fraction (max - B)`` where ``max`` is the
    hottest voxel (centre) within the search sphere and ``B`` the background. For
    ``fraction = 0.5``, ``T = (max + B) / 2``. The VOI is the 26-connected component
    (``scipy.ndimage.label``) of voxels ``>= T`` that contains the hottest voxel, restricted to
    voxel centres within the search sphere grown by one voxel (largest spacing) on every side,
    i.e. a diameter of ``search_diameter_mm + 2`` voxels, so that the contour of an object
    filling the search sphere is not cut by the search boundary but neighbouring hot
    objects are not swallowed. The VOI itself: :func:`isocontour_voi`.

    Parameters
    ----------
    volume : Volume
    centre_mm : array_like (3,)
        Centre of the search sphere, world mm.
    search_diameter_mm : float
        Diameter of the search sphere, mm (typically the object's diameter plus a margin).
    background_bq_ml : float
        Background activity concentration B, Bq/mL.
    fraction : float
        Fraction of the contrast above background, 0 < fraction <= 1.

    Returns
    -------
    mean : float
        Unweighted mean of the VOI voxels, Bq/mL.
    n_voxels : int
        Number of voxels in the VOI.
    max_value : float
        The hottest voxel value used, Bq/mL.
    """
    box, voi, max_value = isocontour_voi(volume, centre_mm, search_diameter_mm, background_bq_ml, fraction)
    vals = volume.data[box].astype(np.float64)
    return float(vals[voi].mean()), int(voi.sum()), max_value


# =========================================================================== planes
@dataclass
class PlaneImage:
    """A square-pixel image resampled from a volume on a plane in world space.

    Pixel ``values[r, c]`` is the sample at in-plane coordinates
    ``(u, v) = (c * pixel_mm, r * pixel_mm)``, i.e. at world
    ``origin_mm + u * u_dir + v * v_dir``.

    Attributes
    ----------
    values : ndarray (nv, nu)
        Sampled values (Bq/mL); NaN where the plane leaves the image grid.
    origin_mm : ndarray (3,)
        World mm of pixel (0, 0).
    u_dir, v_dir : ndarray (3,)
        Orthonormal world directions of increasing column and row index.
    pixel_mm : float
        Pixel spacing, mm (both directions).
    centre_uv_mm : ndarray (2,) or None
        In-plane coordinates of the centre the plane was requested around.
    """

    values: np.ndarray
    origin_mm: np.ndarray
    u_dir: np.ndarray
    v_dir: np.ndarray
    pixel_mm: float
    centre_uv_mm: np.ndarray | None = None

    @property
    def normal(self) -> np.ndarray:
        """Unit normal ``u x v``."""
        return np.cross(self.u_dir, self.v_dir)

    def uv_to_world(self, uv_mm: np.ndarray) -> np.ndarray:
        """World mm (..., 3) of in-plane coordinates (..., 2) in mm."""
        uv = np.asarray(uv_mm, float)
        return self.origin_mm + uv[..., :1] * self.u_dir + uv[..., 1:2] * self.v_dir

    def world_to_uv(self, points_mm: np.ndarray) -> np.ndarray:
        """In-plane coordinates (..., 2) in mm of the orthogonal projection of world points."""
        rel = np.asarray(points_mm, float) - self.origin_mm
        return np.stack([rel @ self.u_dir, rel @ self.v_dir], axis=-1)

    def distance_to_plane(self, points_mm: np.ndarray) -> np.ndarray:
        """Signed distance (mm) of world points from the plane, along :attr:`normal`."""
        return (np.asarray(points_mm, float) - self.origin_mm) @ self.normal


def _orthonormal_pair(u_dir: np.ndarray, v_dir: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    u = np.asarray(u_dir, float)
    v = np.asarray(v_dir, float)
    nu, nv = np.linalg.norm(u), np.linalg.norm(v)
    if u.shape != (3,) or v.shape != (3,) or not (nu > 0 and nv > 0):
        raise GeometryError(f"plane directions must be non-zero 3-vectors, got {u_dir!r} and {v_dir!r}")
    u, v = u / nu, v / nv
    if abs(float(u @ v)) > 1e-6:
        raise GeometryError(
            f"plane directions are not perpendicular (cosine {float(u @ v):.2g}); pass orthogonal u and v"
        )
    v = v - (u @ v) * u
    return u, v / np.linalg.norm(v)


def sample_plane(
    volume: Volume,
    centre_mm: np.ndarray,
    u_dir: np.ndarray,
    v_dir: np.ndarray,
    half_width_mm: float,
    pixel_mm: float | None = None,
    order: int = 1,
) -> PlaneImage:
    """Resample a volume on a square grid in the plane through ``centre_mm`` spanned by u, v.

    Interpolation by ``scipy.ndimage.map_coordinates`` (``order=1``: trilinear) on a local
    box of the volume. The grid of nodes is anchored on the orthogonal projection onto the
    plane of the voxel centre nearest to ``centre_mm``, so that for an untilted plane through
    voxel centres with ``pixel_mm`` equal to the voxel spacing every node *is* a voxel centre
    and the samples reproduce the slice exactly. Nodes cover in-plane offsets
    ``[-half_width_mm, +half_width_mm]`` from the centre in u and v.

    Parameters
    ----------
    volume : Volume
    centre_mm : array_like (3,)
        A point of the plane, world mm.
    u_dir, v_dir : array_like (3,)
        Perpendicular in-plane directions (columns, rows of the result).
    half_width_mm : float
        Half the side of the square sampled, mm.
    pixel_mm : float, optional
        Pixel spacing; default the mean of the column and row voxel spacings.
    order : int
        Spline order of ``map_coordinates`` (1 = trilinear).

    Returns
    -------
    PlaneImage
        NaN where a node lies outside the image grid (beyond the outer voxel faces).
    """
    u, v = _orthonormal_pair(u_dir, v_dir)
    c = np.asarray(centre_mm, float)
    if pixel_mm is None:
        sp = volume.spacing_mm
        p = float(0.5 * (sp[1] + sp[2]))
    else:
        p = float(pixel_mm)
        if not (np.isfinite(p) and p > 0):
            raise TemplateError(f"plane pixel size must be positive mm, got {pixel_mm!r}")
    hw = float(half_width_mm)
    if not (np.isfinite(hw) and hw >= 0):
        raise TemplateError(f"plane half width must be >= 0 mm, got {half_width_mm!r}")
    shape = np.array(volume.shape)
    nearest = np.clip(np.rint(volume.world_to_index(c)), 0, shape - 1)
    anchor_rel = volume.index_to_world(nearest) - c
    au, av = float(anchor_rel @ u), float(anchor_rel @ v)
    tol = 1e-9
    m_lo, m_hi = math.ceil((-hw - au) / p - tol), math.floor((hw - au) / p + tol)
    n_lo, n_hi = math.ceil((-hw - av) / p - tol), math.floor((hw - av) / p + tol)
    origin = c + (au + m_lo * p) * u + (av + n_lo * p) * v
    cols = np.arange(m_hi - m_lo + 1, dtype=float) * p
    rows = np.arange(n_hi - n_lo + 1, dtype=float) * p
    nodes = origin + rows[:, None, None] * v + cols[None, :, None] * u  # (nv, nu, 3)
    idx = volume.world_to_index(nodes)
    snapped = np.rint(idx)
    idx = np.where(np.abs(idx - snapped) < 1e-6, snapped, idx)
    outside = np.any((idx < -0.5 - 1e-9) | (idx > shape - 0.5 + 1e-9), axis=-1)
    margin = 1 if order <= 1 else 3 * int(order)
    flat = idx.reshape(-1, 3)
    inside_pts = flat[~outside.reshape(-1)]
    values = np.full(idx.shape[:2], np.nan, dtype=np.float64)
    if inside_pts.size:
        lo = np.clip(np.floor(inside_pts.min(axis=0)).astype(int) - margin, 0, shape - 1)
        hi = np.clip(np.ceil(inside_pts.max(axis=0)).astype(int) + margin, 0, shape - 1)
        local = volume.data[tuple(slice(int(a), int(b) + 1) for a, b in zip(lo, hi))]
        sampled = ndimage.map_coordinates(
            local, (inside_pts - lo).T, order=order, mode="nearest", output=np.float64
        )
        values.reshape(-1)[~outside.reshape(-1)] = sampled
    centre_uv = np.array([-(au + m_lo * p), -(av + n_lo * p)])
    return PlaneImage(values=values, origin_mm=origin, u_dir=u, v_dir=v, pixel_mm=p, centre_uv_mm=centre_uv)


def slice_as_acquired(volume: Volume, point_mm: np.ndarray, half_width_mm: float) -> tuple[PlaneImage, int]:
    """The original transverse slice nearest ``point_mm``, as the scanner stored it, for pictures.

    The plane's columns and rows follow the image's own column and row directions (pixel =
    the column spacing; on square, orthogonal voxels its values *are* the slice's voxels), over
    ``half_width_mm`` about the point. Shown with its first row on top
    (rows downwards), it is the slice as any viewer shows it, whatever the phantom's
    position; orientation letters follow from the plane's directions.

    Returns
    -------
    (plane, slice index k)
    """
    idx = volume.world_to_index(np.asarray(point_mm, float))
    k = int(np.clip(np.rint(idx[0]), 0, volume.shape[0] - 1))
    on_slice = volume.index_to_world(np.array([float(k), idx[1], idx[2]]))
    cols, rows = volume.axes_world[2], volume.axes_world[1]
    rows = rows - float(rows @ cols) * cols  # sheared voxels: the nearest orthogonal direction
    plane = sample_plane(volume, on_slice, cols, rows / np.linalg.norm(rows), half_width_mm, pixel_mm=float(volume.spacing_mm[2]))
    return plane, k


# =========================================================================== discs on a plane
def _disc_quadrant_area(x: np.ndarray, y: np.ndarray, radius: float) -> np.ndarray:
    """Signed area of ``{(X, Y) in the disc |.| <= radius : 0 <= X <= x, 0 <= Y <= y}``.

    Closed form (mathematics): for ``0 <= x, y <= R`` the area is ``x y`` when the corner
    ``(x, y)`` is inside the circle, else ``xa y + G(x) - G(xa)`` with ``xa = sqrt(R^2 - y^2)``
    and ``G(X) = (X sqrt(R^2 - X^2) + R^2 asin(X / R)) / 2`` the primitive of
    ``sqrt(R^2 - X^2)``. Coordinates beyond R are clipped to R; negative ones follow by the
    odd symmetry ``A(-x, y) = -A(x, y)``.
    """
    R = float(radius)
    ax = np.minimum(np.abs(x), R)
    ay = np.minimum(np.abs(y), R)
    r2 = R * R

    def prim(t: np.ndarray) -> np.ndarray:
        return 0.5 * (t * np.sqrt(np.maximum(r2 - t * t, 0.0)) + r2 * np.arcsin(np.clip(t / R, -1.0, 1.0)))

    xa = np.sqrt(np.maximum(r2 - ay * ay, 0.0))
    corner_in = ax * ax + ay * ay <= r2
    area = np.where(corner_in, ax * ay, xa * ay + prim(ax) - prim(np.minimum(xa, ax)))
    return np.sign(x) * np.sign(y) * area


def _disc_stencils(frac_uv: np.ndarray, radius_px: float) -> tuple[np.ndarray, int]:
    """Exact pixel fractions of discs of radius ``radius_px`` (pixel units) at offsets ``frac_uv``.

    ``frac_uv`` (n, 2) are the centre offsets (u, v) from the centre pixel, each in
    [-0.5, 0.5]. Returns weights (n, 2H+1, 2H+1) over pixel offsets -H..H (rows = v,
    columns = u) and H. Pixels whose centre is farther than the pixel circumradius
    sqrt(2)/2 from the circle are exactly 1 or 0; the others get the exact area of the
    disc-square intersection by inclusion-exclusion of :func:`_disc_quadrant_area` over the
    four pixel corners.
    """
    H = int(math.ceil(radius_px + 1.0))
    off = np.arange(-H, H + 1, dtype=float)
    x = off[None, None, :] - frac_uv[:, 0, None, None]  # (n, 1, S) column offset from centre
    y = off[None, :, None] - frac_uv[:, 1, None, None]  # (n, S, 1)
    dist = np.hypot(x, y)
    rho = math.sqrt(0.5)
    w = (dist <= radius_px - rho).astype(float)
    boundary = (dist > radius_px - rho) & (dist < radius_px + rho)
    if boundary.any():
        xb = np.broadcast_to(x, boundary.shape)[boundary]
        yb = np.broadcast_to(y, boundary.shape)[boundary]
        x0, x1, y0, y1 = xb - 0.5, xb + 0.5, yb - 0.5, yb + 0.5
        area = (
            _disc_quadrant_area(x1, y1, radius_px)
            - _disc_quadrant_area(x0, y1, radius_px)
            - _disc_quadrant_area(x1, y0, radius_px)
            + _disc_quadrant_area(x0, y0, radius_px)
        )
        w[boundary] = np.clip(area, 0.0, 1.0)  # clip: rounding only
    return w, H


def _disc_batch(
    plane: PlaneImage, centres_uv_mm: np.ndarray, diameter_mm: float, supersample: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Stencils (n, S, S), centre pixel rows/cols (n,), H for many discs; one stencil per distinct offset."""
    r_px = 0.5 * _check_diameter(diameter_mm, "disc diameter") / plane.pixel_mm
    _check_supersample(supersample)
    cuv = np.asarray(centres_uv_mm, float).reshape(-1, 2) / plane.pixel_mm
    c0 = np.rint(cuv[:, 0]).astype(int)
    r0 = np.rint(cuv[:, 1]).astype(int)
    frac = np.round(cuv - np.stack([c0, r0], axis=1), 9)
    uniq, inverse = np.unique(frac, axis=0, return_inverse=True)
    stencils, H = _disc_stencils(uniq, r_px)
    return stencils[inverse.reshape(-1)], r0, c0, H


def disc_weights(
    plane: PlaneImage, centre_uv_mm: np.ndarray, diameter_mm: float, supersample: int = 7
) -> tuple[tuple[slice, slice], np.ndarray]:
    """Partial-area weights of a disc on a plane image.

    Parameters
    ----------
    plane : PlaneImage
    centre_uv_mm : array_like (2,)
        Disc centre in the plane's (u, v) mm coordinates.
    diameter_mm : float
        Disc diameter, mm.
    supersample : int
        Accepted for symmetry with the 3-D functions and validated, but not needed: boundary
        pixel fractions are exact (closed-form area of the disc-square intersection).

    Returns
    -------
    box2d : (slice, slice)
        Rows (v) and columns (u) of ``plane.values`` covered, clipped to the image and
        trimmed to pixels of non-zero weight.
    weights2d : ndarray
        Fraction of each pixel inside the disc (0..1); ``weights2d.sum() * pixel_mm**2`` is
        the disc area in mm^2.
    """
    w, r0, c0, H = _disc_batch(plane, centre_uv_mm, diameter_mm, supersample)
    w = w[0]
    nv, nu = plane.values.shape
    rows = np.arange(r0[0] - H, r0[0] + H + 1)
    cols = np.arange(c0[0] - H, c0[0] + H + 1)
    keep_r = (rows >= 0) & (rows < nv) & (w.sum(axis=1) > 0)
    keep_c = (cols >= 0) & (cols < nu) & (w.sum(axis=0) > 0)
    if not keep_r.any() or not keep_c.any():
        raise PhantomNotFound("disc ROI lies entirely outside the plane image; check the ROI position")
    ra, rb = np.flatnonzero(keep_r)[[0, -1]]
    ca, cb = np.flatnonzero(keep_c)[[0, -1]]
    box = (slice(int(rows[ra]), int(rows[rb]) + 1), slice(int(cols[ca]), int(cols[cb]) + 1))
    return box, w[ra : rb + 1, ca : cb + 1]


def _gather_disc_values(plane: PlaneImage, w: np.ndarray, r0: np.ndarray, c0: np.ndarray, H: int) -> np.ndarray:
    nv, nu = plane.values.shape
    off = np.arange(-H, H + 1)
    rows = r0[:, None] + off[None, :]
    cols = c0[:, None] + off[None, :]
    valid = ((rows >= 0) & (rows < nv))[:, :, None] & ((cols >= 0) & (cols < nu))[:, None, :]
    if np.any((w > 0) & ~valid):
        raise PhantomNotFound("disc ROI reaches beyond the sampled plane; sample a wider plane or move the ROI")
    vals = plane.values[np.clip(rows, 0, nv - 1)[:, :, None], np.clip(cols, 0, nu - 1)[:, None, :]]
    used = w > 0
    if not np.all(np.isfinite(vals[used])):
        raise PhantomNotFound("disc ROI touches pixels outside the image grid; check the ROI position")
    return np.where(used, vals, 0.0)


def disc_means(
    plane: PlaneImage, centres_uv_mm: np.ndarray, diameter_mm: float, supersample: int = 7
) -> np.ndarray:
    """Partial-area weighted means of many equal discs on one plane (vectorised).

    One weight stencil is computed per distinct sub-pixel offset of the centres and the
    pixel values of all discs are gathered in one fancy-indexing step.

    Parameters
    ----------
    plane : PlaneImage
    centres_uv_mm : array_like (n, 2)
        Disc centres in (u, v) mm.
    diameter_mm : float
        Disc diameter, mm (NEMA NU 2: 10 to 37 mm background ROIs).
    supersample : int
        Not needed (exact pixel fractions, see :func:`disc_weights`).

    Returns
    -------
    ndarray (n,)
        ``sum(w x) / sum(w)`` per disc, in the plane's units (Bq/mL).
    """
    w, r0, c0, H = _disc_batch(plane, centres_uv_mm, diameter_mm, supersample)
    vals = _gather_disc_values(plane, w, r0, c0, H)
    return (w * vals).sum(axis=(1, 2)) / w.sum(axis=(1, 2))


def disc_mean(plane: PlaneImage, centre_uv_mm: np.ndarray, diameter_mm: float, supersample: int = 7) -> float:
    """Partial-area weighted mean of one disc (see :func:`disc_means`)."""
    return float(disc_means(plane, np.asarray(centre_uv_mm, float).reshape(1, 2), diameter_mm, supersample)[0])


def disc_stats(
    plane: PlaneImage, centre_uv_mm: np.ndarray, diameter_mm: float, supersample: int = 7
) -> tuple[float, float, float]:
    """Weighted mean, weighted SD and weight sum of one disc.

    Returns
    -------
    mean, sd, weight_sum : float
        Same estimators as :func:`weighted_stats` (reliability-weight unbiased SD, equal to
        the ``N - 1`` sample SD for binary weights); ``weight_sum`` in pixels (multiply by
        ``pixel_mm**2`` for mm^2).
    """
    w, r0, c0, H = _disc_batch(plane, np.asarray(centre_uv_mm, float).reshape(1, 2), diameter_mm, supersample)
    vals = _gather_disc_values(plane, w, r0, c0, H)
    return _weighted_mean_sd(vals[0], w[0])
