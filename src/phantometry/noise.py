"""Standard uncertainties of the phantom metrics, estimated from the image's own noise.

Method (documented in the README, "Uncertainties")
-------------------------------------------------
1. **Noise autocovariance.** Reconstructed PET noise is spatially correlated, so an ROI of
   ``n`` voxels holds far fewer than ``n`` independent samples. :func:`estimate_noise` takes
   the voxels of the uniform background inside the body, in a slab of up to +- 50 mm about
   the background planes (at most 400 000 voxels in its box), at least ``clearance_mm`` (default: the template's NU 2 ROI clearance,
   15 mm) from the body edge and from every insert. It removes a smooth trend (a
   least-squares quadratic polynomial, so slow non-uniformity is not taken for noise) and
   estimates the 3-D autocovariance ``C(tau)`` of the rest by FFT, as the masked estimator
   ``C(tau) = sum_x m(x) m(x+tau) e(x) e(x+tau) / sum_x m(x) m(x+tau)``
   (``m`` the background mask, ``e`` the detrended values; both correlations by FFT with zero
   padding). Lags are kept inside the ellipsoid reaching one lag beyond the first where the
   correlation along each array axis falls below 0.05 (at most 30 mm); beyond, ``C = 0``
   (the far lags hold mostly estimation noise).
2. **Level law.** Noise grows with the local activity: the variance at level ``L`` is
   ``sigma_b^2 (L / b)^p`` with ``sigma_b^2 = C(0)`` and ``b`` the background level; ``p = 1``
   by default (Poisson-like variance proportional to the mean, common practice; iterative
   reconstructions can come closer to ``p = 2``, a constant coefficient of variation,
   Barrett et al., Phys Med Biol 1994;39:833-846, recalled: set ``variance_power``).
3. **ROI means** (disc ROIs of percent contrast, background and insert): a weighted mean
   ``sum_x w_x v_x / sum_x w_x`` has variance ``sum_x a_x (C * a)_x (L_x / b)^p`` with
   ``a = w / sum w`` and ``C * a`` the convolution with the autocovariance (FFT); for a
   uniform level this is ``sum_tau C(tau) (a * a)(tau)`` with ``(a * a)`` the
   autocorrelation of ``a``. (The level factor of two nearby voxels, ``sqrt(L_x L_y)``, is
   taken as their mean, which for ``p = 1`` makes the form linear in the image, so the noisy
   image is an unbiased level.) The *effective number of independent samples* of an ROI is
   ``N_eff = (sum w)^2 / sum_tau rho(tau) (w * w)(tau)`` with ``rho = C / C(0)``. Disc ROIs
   on resampled planes are first spread back onto the voxels they interpolate (the
   trilinear weights of every plane node), so interpolation is accounted for exactly. The
   K background ROIs of one size are combined into one weight field, so their overlaps and
   correlations, within a plane and across the 10 mm slices, are included. In the cold
   low-density insert the level changes by orders of magnitude within a few voxels, so there
   the noise-free spill-in of the blurred cold cylinder at the fitted effective resolution,
   ``b (1 - g(rho))`` (:func:`_cylinder_level`), is the level, with the exact ``s_x s_y``.
4. **Propagation.** First-order propagation of the ROI-mean variances (JCGM 100:2008, the
   GUM, law of propagation of uncertainty), the sphere ROI, the background ROIs and the
   insert ROI being independent (at least 15 mm apart, beyond the noise correlation):
   ``Q_H``, ``Q_C``, lung residual and activity recovery follow from their formulas
   (:func:`u_percent_contrast_hot` ...). The fill record's own uncertainty (dose calibrator,
   volumes) is *not* included: these are noise-only uncertainties.
5. **Background variability** ``N = SD / C_B x 100``: the standard error of a sample SD of
   K independent normal values, ``SD / sqrt(2 (K - 1))`` (common practice; large-sample
   normal theory), propagated with ``u(C_B)``.
6. **RC max, RC mean, RC peak** are found by *searching* the image (the hottest voxel, the
   isocontour VOI whose threshold is set by that hottest voxel, the best-placed 1 mL
   sphere): extreme-value statistics whose spread linear propagation misses (it
   underestimated RC mean by 20-50 % in our Monte Carlo check, because the threshold moves
   with the noise). Their uncertainty is propagated by Monte Carlo instead (JCGM 101:2008,
   GUM Supplement 1): :data:`BOOTSTRAP_DRAWS` noise fields with the estimated
   autocovariance and level law are added to the fitted noise-free blurred-sphere image
   (:mod:`phantometry.metrics.resolution`), the three searches are repeated on each draw,
   and the SD over the draws is the standard uncertainty (:func:`bootstrap_search_sd`,
   :class:`SearchSimulation`: every sphere takes its box out of one shared stack of
   draws, made in chunks with fixed seeds, so results are reproducible).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

from .errors import PhantomNotFound
from .rois import box_world
from .threads import fft_workers
from .volume import Volume

if TYPE_CHECKING:  # pragma: no cover
    from .locate import Placement
    from .rois import PlaneImage
    from .templates import Template

__all__ = [
    "NoiseModel",
    "estimate_noise",
    "background_mask",
    "masked_autocovariance",
    "plane_voxel_weights",
    "level_map",
    "sd_standard_error",
    "u_ratio",
    "simulate_noise",
    "discs_variance",
    "weights_variance",
]

#: SD (voxels) of a Gaussian smoothing the image into the level map of the level law (0: none;
#: smoothing mixes hot edges into cold ROIs and lowers hot peaks, and a noisy level is unbiased).
LEVEL_SMOOTH_VOXELS = 0.0
#: Largest lag (mm) of the autocovariance kept.
MAX_LAG_MM = 30.0
#: Correlation below which the autocovariance is taken to have ended (along an axis): the
#: window keeps one lag more. Estimates of single lags scatter by about 0.01-0.02.
CORRELATION_FLOOR = 0.05


# =========================================================================== noise model
@dataclass
class NoiseModel:
    """Estimated noise of an image: autocovariance in the background and its level law.

    Attributes
    ----------
    autocov_bq2_ml2 : ndarray, shape (2 Lk + 1, 2 Lj + 1, 2 Li + 1)
        ``C(tau)`` at array-order voxel lags ``tau = (dk, dj, di)``, centre = lag 0, (Bq/mL)^2.
    variance_bq2_ml2 : float
        ``C(0)``: the background voxel variance, (Bq/mL)^2.
    background_bq_ml : float
        Mean of the background voxels used, Bq/mL (the level ``b`` of the level law).
    n_voxels : int
        Background voxels used.
    spacing_mm : (dz, dy, dx)
    variance_power : float
        ``p`` of ``var(L) = C(0) (L / b)^p``.
    """

    autocov_bq2_ml2: np.ndarray
    variance_bq2_ml2: float
    background_bq_ml: float
    n_voxels: int
    spacing_mm: tuple[float, float, float]
    variance_power: float = 1.0

    @property
    def half_lags(self) -> tuple[int, int, int]:
        return tuple(int(n // 2) for n in self.autocov_bq2_ml2.shape)  # type: ignore[return-value]

    @property
    def correlation(self) -> np.ndarray:
        """``rho(tau) = C(tau) / C(0)`` (dimensionless); zeros for a noise-free image."""
        if self.variance_bq2_ml2 <= 0:
            out = np.zeros_like(self.autocov_bq2_ml2)
            out[self.half_lags] = 1.0
            return out
        return self.autocov_bq2_ml2 / self.variance_bq2_ml2

    @property
    def correlation_volume_voxels(self) -> float:
        """``sum_tau rho(tau)``: voxels per independent sample in a large uniform ROI."""
        return float(max(1.0, self.correlation.sum()))

    @property
    def sd_bq_ml(self) -> float:
        return math.sqrt(max(self.variance_bq2_ml2, 0.0))

    def sd_at(self, level_bq_ml: np.ndarray | float) -> np.ndarray:
        """Noise SD (Bq/mL) at activity level(s) ``L``: ``sigma_b (L / b)^(p/2)``, at least 5 % of ``sigma_b``.

        The floor keeps residual weights finite in cold regions (used by the resolution fit).
        """
        return self.sd_bq_ml * np.maximum(self.scale_at(level_bq_ml), 0.05)

    def scale_at(self, level_bq_ml: np.ndarray | float) -> np.ndarray:
        """``(L / b)^(p/2)``: noise SD at level L relative to the background's (no floor below 0)."""
        rel = np.clip(np.asarray(level_bq_ml, float) / max(self.background_bq_ml, 1e-12), 0.0, None)
        return rel ** (0.5 * self.variance_power)

    # ------------------------------------------------------------------ quadratic forms
    def quadratic_form(self, a: np.ndarray, *, correlation: bool = False, single_precision: bool = False) -> float:
        """``sum_{x,y} a_x a_y C(x - y)`` for a coefficient array ``a`` on a box of the grid.

        Computed as ``sum_tau C(tau) (a * a)(tau)`` with the autocorrelation of ``a`` by FFT
        (zero padded by the lag window). ``correlation=True`` uses ``rho`` instead of ``C``.
        ``single_precision``: the FFTs in float32 (half the memory; about 1e-6 relative).
        """
        kern = self.correlation if correlation else self.autocov_bq2_ml2
        # lags beyond the box size are zero in the autocorrelation (zero padding by the window)
        a = np.asarray(a, np.float32 if single_precision else float)
        return float(np.sum(_autocorrelation(a, self.half_lags).astype(np.float64) * kern))

    def quadratic_form_flat(self, g: np.ndarray, flat: np.ndarray, shape: tuple[int, int, int], *, correlation: bool = True) -> float:
        """:meth:`quadratic_form` of values ``g`` at flat voxel indices ``flat`` of a grid ``shape``.

        The values are scattered onto their bounding box in single precision (the box is
        mostly empty around scattered voxel sets; 1e-6 relative precision is ample for a
        standard error).
        """
        kji = np.array(np.unravel_index(np.asarray(flat), shape))
        lo = kji.min(axis=1)
        dims = tuple(int(v) for v in kji.max(axis=1) - lo + 1)
        inner = np.ravel_multi_index(tuple(kji - lo[:, None]), dims)
        del kji
        box = np.bincount(inner, np.asarray(g, float), int(np.prod(dims))).astype(np.float32).reshape(dims)
        return self.quadratic_form(box, correlation=correlation, single_precision=True)

    def weighted_mean_variance(self, weights: np.ndarray, level: np.ndarray | None = None) -> float:
        """Variance (Bq/mL)^2 of ``sum w v / sum w`` for weights on a box (level: same box, Bq/mL)."""
        w = np.asarray(weights, float)
        total = float(w.sum())
        if total <= 0:
            raise PhantomNotFound("uncertainty: ROI has no weight; check the ROI position")
        a = w / total
        if level is not None:
            a = a * self.scale_at(level)
        return max(self.quadratic_form(a), 0.0)

    def effective_samples(self, weights: np.ndarray) -> float:
        """Effective number of independent samples ``(sum w)^2 / sum_tau rho (w * w)`` of an ROI."""
        w = np.asarray(weights, float)
        q = self.quadratic_form(w, correlation=True)
        return float(w.sum() ** 2 / q) if q > 0 else float("inf")

    def correlation_fwhm_mm(self) -> tuple[float, float, float]:
        """Full width at half maximum of ``rho`` along the array axes (z, y, x), mm (linear interpolation)."""
        rho = self.correlation
        c = self.half_lags
        out = []
        for axis in range(3):
            sl = [c[0], c[1], c[2]]
            sl[axis] = slice(None)
            prof = rho[tuple(sl)][c[axis]:]
            below = np.flatnonzero(prof < 0.5)
            if below.size == 0:
                out.append(float("nan"))
                continue
            i = int(below[0])
            x = (i - 1) + (prof[i - 1] - 0.5) / (prof[i - 1] - prof[i]) if i > 0 else 0.0
            out.append(2.0 * x * self.spacing_mm[axis])
        return tuple(out)  # type: ignore[return-value]

    def as_dict(self) -> dict[str, Any]:
        fw = self.correlation_fwhm_mm()
        return {
            "method": "masked FFT autocovariance of detrended background voxels",
            "background_bq_ml": round(self.background_bq_ml, 3),
            "voxel_sd_bq_ml": round(self.sd_bq_ml, 4),
            "voxel_cv_pct": round(100 * self.sd_bq_ml / self.background_bq_ml, 3) if self.background_bq_ml > 0 else None,
            "correlation_volume_voxels": round(self.correlation_volume_voxels, 3),
            "correlation_fwhm_mm_zyx": [None if not math.isfinite(v) else round(v, 3) for v in fw],
            "lag_window_voxels_zyx": list(self.half_lags),
            "n_voxels": self.n_voxels,
            "variance_power": self.variance_power,
        }


# =========================================================================== estimation
def background_mask(
    volume: Volume,
    placement: "Placement",
    template: "Template",
    *,
    clearance_mm: float | None = None,
    slab_mm: tuple[float, float] | None = None,
    max_voxels: int = 400_000,
) -> tuple[tuple[slice, slice, slice], np.ndarray]:
    """Box and mask of the uniform-background voxels used for the noise estimate.

    Voxel centres inside the body at least ``clearance_mm`` from its edge (the closed-form
    distance to the outline, :meth:`~phantometry.templates.DShapeBody.edge_distance_xy`, and
    to the end faces) and from every insert's outer surface, within the
    slab ``slab_mm`` (template z, mm; default the background slice offsets +- 50 mm, within
    the body), thinned about its middle so that its box holds at most ``max_voxels`` voxels
    (enough for a precise estimate; fine grids need far fewer millimetres).
    """
    bg = template.background
    clearance = float(clearance_mm if clearance_mm is not None else (bg.min_clearance_mm if bg is not None else 15.0))
    if slab_mm is None:
        offs = bg.slice_offsets_mm if bg is not None else [0.0]
        slab_mm = (min(offs) - 50.0, max(offs) + 50.0)
    z0, z1 = template.body.z_range_mm
    h = template.body.half_extent_xy_mm + 2.0 * float(np.max(volume.spacing_mm))
    cx, cy = template.body.centre_xy_mm
    shape = np.array(volume.shape)
    zmid = 0.5 * (slab_mm[0] + slab_mm[1])
    half = 0.5 * (slab_mm[1] - slab_mm[0])
    min_half = 6.0 * float(np.max(volume.spacing_mm))
    for _ in range(4):  # thin the slab (about its middle) until the box holds at most max_voxels
        zlo, zhi = max(zmid - half, z0), min(zmid + half, z1)
        corners_t = np.array([[cx + sx * h, cy + sy * h, z] for sx in (-1, 1) for sy in (-1, 1) for z in (zlo, zhi)])
        idx = volume.world_to_index(placement.to_world(corners_t))
        lo = np.clip(np.floor(idx.min(axis=0)).astype(int) - 1, 0, shape - 1)
        hi = np.clip(np.ceil(idx.max(axis=0)).astype(int) + 1, 0, shape - 1)
        count = int(np.prod(hi - lo + 1))
        if count <= max_voxels or half <= min_half:
            break
        half = max(min_half, half * max_voxels / count * 0.95)
    box = tuple(slice(int(a), int(b) + 1) for a, b in zip(lo, hi))
    nb = tuple(int(b - a + 1) for a, b in zip(lo, hi))
    mask = np.empty(nb, dtype=bool)
    # in slabs of the box's first axis (a loop over slabs, not voxels): the coordinates and
    # tests of one slab at a time keep the working memory a small fraction of the volume
    step = max(1, int(math.ceil(nb[0] / 8)))
    for k0 in range(0, nb[0], step):
        k1 = min(nb[0], k0 + step)
        sub = (slice(box[0].start + k0, box[0].start + k1), box[1], box[2])
        mask[k0:k1] = _background_slab(volume, placement, template, sub, clearance, z0, z1, zlo, zhi)
    mask &= np.isfinite(volume.data[box])
    assert mask.shape == nb
    # the box of the voxels kept (the body's edge band and the inserts' surroundings are not)
    if mask.any():
        keep = [np.flatnonzero(mask.any(axis=tuple(b for b in range(3) if b != a))) for a in range(3)]
        inner = tuple(slice(int(k[0]), int(k[-1]) + 1) for k in keep)
        mask = mask[inner].copy()
        box = tuple(slice(b.start + i.start, b.start + i.stop) for b, i in zip(box, inner))
    return box, mask  # type: ignore[return-value]


def _background_slab(volume, placement, template, box, clearance: float, z0: float, z1: float, zlo: float, zhi: float) -> np.ndarray:
    """The background test of :func:`background_mask` on one array-order box."""
    # template coordinates of the box's voxel centres (single precision: 1e-4 mm is ample)
    qx, qy, qz = volume.box_coordinates(box, placement.rotation, placement.translation_mm)
    # distance to the body edge (closed form; the slab's own ends are not edges)
    edge = template.body.edge_distance_xy(qx, qy)
    np.minimum(edge, qz - np.float32(z0), out=edge)
    np.minimum(edge, np.float32(z1) - qz, out=edge)
    mask = (edge >= clearance) & (qz >= zlo) & (qz <= zhi)
    del edge
    for ins in template.inserts:
        cx, cy, cz = (np.float32(v) for v in ins.centre_mm)
        r_out = np.float32(0.5 * ins.outer_diameter_mm + clearance)
        if ins.shape == "sphere":
            mask &= (qx - cx) ** 2 + (qy - cy) ** 2 + (qz - cz) ** 2 > r_out * r_out
        else:
            a = ins.axis_unit.astype(np.float32)
            dx, dy, dz = qx - cx, qy - cy, qz - cz
            ax = a[0] * dx + a[1] * dy + a[2] * dz
            rho2 = dx * dx + dy * dy + dz * dz - ax * ax
            mask &= (rho2 > r_out * r_out) | (np.abs(ax) > np.float32(0.5 * float(ins.length_mm) + clearance))
    return mask


def _autocorrelation(a: np.ndarray, half_lags: Sequence[int]) -> np.ndarray:
    """``sum_x a(x) a(x + tau)`` at lags ``-L..L`` (array order), by FFT with zero padding by the window.

    In the precision of ``a``; the power spectrum ``|F a|^2`` is kept real (half the memory
    of the complex product).
    """
    L = np.asarray(half_lags, int)
    size = [sfft.next_fast_len(int(n + l), real=True) for n, l in zip(a.shape, L)]
    f = sfft.rfftn(a, size, workers=fft_workers())
    return _lags_of_power(f, size, L)


def _lags_of_power(f: np.ndarray, size: Sequence[int], L: np.ndarray) -> np.ndarray:
    """Lags ``-L..L`` of the inverse FFT of ``|f|^2`` (``f`` a half spectrum, overwritten).

    The power spectrum replaces ``f`` in place and the inverse runs one axis at a time in
    place (the last one real), so no second spectrum-sized array is made.
    """
    power = f.real**2
    power += f.imag**2
    f.real = power
    f.imag = 0.0
    del power
    for axis in range(f.ndim - 1):
        f = sfft.ifft(f, axis=axis, overwrite_x=True, workers=fft_workers())
    acf = sfft.irfft(f, size[-1], axis=-1, overwrite_x=True, workers=fft_workers())
    del f
    idx = [np.r_[np.arange(-l, 0) % s, np.arange(0, l + 1)] for l, s in zip(L, size)]  # wrap-around lags
    return acf[np.ix_(*idx)]


def masked_autocovariance(values: np.ndarray, mask: np.ndarray, half_lags: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
    """Masked autocovariance of zero-mean ``values`` (where ``mask``) at lags ``-L..L``.

    Both correlations by FFT in single precision (relative error about 1e-6 of ``C(0)``).
    Returns ``(C, pairs)``: the estimate (float64) and the number of voxel pairs behind each lag.
    """
    L = np.asarray(half_lags, int)
    size = [sfft.next_fast_len(int(n + l), real=True) for n, l in zip(mask.shape, L)]
    # the masked values exist only while their transform is made (a temporary of the call)
    num_w = _lags_of_power(sfft.rfftn(np.where(mask, values, np.float32(0)).astype(np.float32, copy=False), size, workers=fft_workers()), size, L)
    num_w = num_w.astype(np.float64)
    den_w = np.rint(_lags_of_power(sfft.rfftn(mask.astype(np.float32), size, workers=fft_workers()), size, L).astype(np.float64))
    with np.errstate(invalid="ignore", divide="ignore"):
        cov = np.where(den_w > 0.5, num_w / np.maximum(den_w, 1.0), 0.0)
    return cov, den_w


#: Most voxels the quadratic trend of the noise estimate is fitted to (an even subsample).
TREND_FIT_VOXELS = 20_000


def _quadratic_trend(values: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Least-squares quadratic polynomial in the voxel indices fitted to ``values`` where ``mask``.

    Ten coefficients: slow non-uniformity is removed while the noise keeps almost all its
    power (10 degrees of freedom out of thousands of independent samples). Fitted to an even
    subsample of at most :data:`TREND_FIT_VOXELS` voxels (ample for ten smooth terms);
    returned on the whole box in single precision.
    """
    flat = np.flatnonzero(mask)
    step = max(1, int(math.ceil(flat.size / TREND_FIT_VOXELS)))
    idx = np.unravel_index(flat[::step], mask.shape)
    del flat
    centre = np.array([np.mean(i) for i in idx])
    scale = np.array([max(1.0, np.ptp(i) / 2) for i in idx])
    z, y, x = [(i - c) / s for i, c, s in zip(idx, centre, scale)]
    A = np.stack([np.ones_like(z), z, y, x, z * z, y * y, x * x, z * y, z * x, y * x], axis=1)
    coef = np.linalg.solve(A.T @ A, A.T @ values[idx].astype(np.float64))  # normal equations: 10 x 10, well scaled
    Z, Y, X = np.meshgrid(*[((np.arange(n) - c) / s).astype(np.float32) for n, c, s in zip(values.shape, centre, scale)],
                          indexing="ij", sparse=True)
    c = coef.astype(np.float32)
    # the separable terms first (small arrays), then the full box once
    out = (c[0] + c[1] * Z + c[4] * Z * Z) + (c[2] * Y + c[5] * Y * Y + c[7] * Z * Y) + (c[3] * X + c[6] * X * X + c[8] * Z * X + c[9] * Y * X)
    return out.astype(np.float32, copy=False)


def estimate_noise(
    volume: Volume,
    placement: "Placement",
    template: "Template",
    *,
    clearance_mm: float | None = None,
    variance_power: float = 1.0,
    where: str | None = None,
    slab_mm: tuple[float, float] | None = None,
) -> NoiseModel:
    """Estimate the noise autocovariance from the uniform background (module notes, step 1).

    Parameters
    ----------
    volume : Volume in Bq/mL.
    placement : where the template sits in the image.
    template : the phantom template (body, inserts, background slice offsets); a kind
        that measures the body from the image passes a copy with the measured body.
    clearance_mm : distance kept from the body edge and the inserts, mm (default the
        template's background ``min_clearance_mm``).
    variance_power : ``p`` of the level law ``var(L) = C(0) (L / b)^p``.
    slab_mm : template z range (mm) the voxels are taken from (default: the background
        slice offsets +- 50 mm, :func:`background_mask`).

    Raises
    ------
    PhantomNotFound
        When fewer than 500 background voxels remain (phantom mostly outside the image).
    """
    where = where or volume.source or "image"
    box, mask = background_mask(volume, placement, template, clearance_mm=clearance_mm, slab_mm=slab_mm)
    n = int(mask.sum())
    if n < 500:
        raise PhantomNotFound(f"{where}: only {n} background voxels away from the inserts and edges; cannot estimate the noise (is the phantom in the field of view?)")
    vals = volume.data[box]
    spacing = np.asarray(volume.spacing_mm, float)
    background = float(vals[mask].mean(dtype=np.float64))
    resid = vals - _quadratic_trend(vals, mask)
    resid[~mask] = 0.0
    del vals
    L0 = np.minimum(np.ceil(MAX_LAG_MM / spacing).astype(int), np.maximum(np.array(mask.shape) // 3, 1))
    cov, _ = masked_autocovariance(resid, mask, L0)
    c0 = float(cov[tuple(L0)])
    # window: one lag beyond the first where the correlation along each axis drops below the floor
    L = []
    for axis in range(3):
        sl: list[Any] = [int(v) for v in L0]
        sl[axis] = slice(None)
        prof = cov[tuple(sl)][L0[axis]:] / c0 if c0 > 0 else np.zeros(L0[axis] + 1)
        below = np.flatnonzero(prof < CORRELATION_FLOOR)
        first = int(below[0]) if below.size else int(L0[axis])
        L.append(int(min(L0[axis], first + 1)))
    crop = tuple(slice(int(l0 - l), int(l0 + l + 1)) for l0, l in zip(L0, L))
    cov = cov[crop]
    # the kept window: an ellipsoid in lag space (the box's corners hold only estimation noise)
    g = np.meshgrid(*[np.arange(-l, l + 1) / max(l, 1) for l in L], indexing="ij")
    inside = (g[0] ** 2 + g[1] ** 2 + g[2] ** 2) <= 1.0 + 1e-9
    cov = np.where(inside, cov, 0.0)
    return NoiseModel(
        autocov_bq2_ml2=cov,
        variance_bq2_ml2=max(c0, 0.0),
        background_bq_ml=background,
        n_voxels=n,
        spacing_mm=tuple(float(s) for s in spacing),  # type: ignore[arg-type]
        variance_power=float(variance_power),
    )


# =========================================================================== ROI weights
def plane_voxel_weights(volume: Volume, plane: "PlaneImage", box2d: tuple[slice, slice], weights2d: np.ndarray) -> tuple[tuple[slice, slice, slice], np.ndarray]:
    """Voxel weights equivalent to a weighted ROI on a resampled plane.

    Each plane node ``(u, v)`` is a trilinear interpolation of 8 voxels
    (:func:`phantometry.rois.sample_plane`, ``order=1``); its ROI weight is spread over those
    voxels with the interpolation weights, so that ``sum_x W_x v_x = sum_nodes w_n p_n``.

    Returns
    -------
    (box, W) : array-order box of the volume and the voxel weights on it.
    """
    rows = np.arange(box2d[0].start, box2d[0].stop, dtype=float)
    cols = np.arange(box2d[1].start, box2d[1].stop, dtype=float)
    used = weights2d > 0
    rr, cc = np.meshgrid(rows, cols, indexing="ij")
    uv = np.stack([cc[used] * plane.pixel_mm, rr[used] * plane.pixel_mm], axis=-1)
    w = weights2d[used].astype(float)
    idx = volume.world_to_index(plane.uv_to_world(uv))
    snapped = np.rint(idx)
    idx = np.where(np.abs(idx - snapped) < 1e-6, snapped, idx)
    base = np.floor(idx).astype(int)
    frac = idx - base
    shape = np.array(volume.shape)
    lo = np.clip(base.min(axis=0), 0, shape - 1)
    hi = np.clip(base.max(axis=0) + 1, 0, shape - 1)
    dims = tuple(int(v) for v in hi - lo + 1)
    flat_idx, flat_w = [], []
    for corner in np.ndindex(2, 2, 2):
        c = np.array(corner)
        flat_w.append(np.prod(np.where(c == 1, frac, 1.0 - frac), axis=1) * w)
        pos = np.clip(base + c, 0, shape - 1) - lo  # map_coordinates mode "nearest" at the faces
        flat_idx.append(np.ravel_multi_index(tuple(pos.T), dims))
    out = np.bincount(np.concatenate(flat_idx), np.concatenate(flat_w), int(np.prod(dims))).reshape(dims)
    box = tuple(slice(int(a), int(b) + 1) for a, b in zip(lo, hi))
    return box, out  # type: ignore[return-value]


def level_map(volume: Volume, box: tuple[slice, slice, slice]) -> np.ndarray:
    """The activity level on a box for the level law: the image values clipped at 0 (Bq/mL).

    (Smoothed by :data:`LEVEL_SMOOTH_VOXELS` when that is set above 0.)
    """
    # smooth on a box grown by 3 voxels so the edges see their neighbours
    shape = np.array(volume.shape)
    lo = np.array([s.start for s in box])
    hi = np.array([s.stop for s in box])
    glo = np.maximum(lo - 3, 0)
    ghi = np.minimum(hi + 3, shape)
    big = np.nan_to_num(volume.data[tuple(slice(int(a), int(b)) for a, b in zip(glo, ghi))].astype(np.float64))
    sm = ndimage.gaussian_filter(big, LEVEL_SMOOTH_VOXELS, mode="nearest") if LEVEL_SMOOTH_VOXELS > 0 else big
    inner = tuple(slice(int(a - g), int(a - g + (b - a))) for a, b, g in zip(lo, hi, glo))
    return np.clip(sm[inner], 0.0, None)


def combine_weights(parts: Sequence[tuple[tuple[slice, slice, slice], np.ndarray, float]]) -> tuple[tuple[slice, slice, slice], np.ndarray]:
    """Sum of scaled weight boxes ``sum coef * W`` on their common bounding box."""
    lo = np.min([[s.start for s in b] for b, _, _ in parts], axis=0)
    hi = np.max([[s.stop for s in b] for b, _, _ in parts], axis=0)
    out = np.zeros(tuple(hi - lo))
    for b, w, coef in parts:
        sl = tuple(slice(int(s.start - l), int(s.stop - l)) for s, l in zip(b, lo))
        out[sl] += coef * w
    return tuple(slice(int(a), int(b)) for a, b in zip(lo, hi)), out  # type: ignore[return-value]


# =========================================================================== propagation
def sd_standard_error(sd: float, k: int) -> float:
    """Standard error of a sample SD of ``k`` independent normal values: ``SD / sqrt(2 (k - 1))``.

    Large-sample normal theory (common practice).
    """
    if k < 2:
        return float("nan")
    return float(sd) / math.sqrt(2.0 * (k - 1))


def u_ratio(a: float, u_a: float, b: float, u_b: float) -> float:
    """Standard uncertainty of ``a / b`` for independent ``a``, ``b`` (first order, GUM)."""
    return abs(a / b) * math.sqrt((u_a / a) ** 2 + (u_b / b) ** 2) if a != 0 else abs(u_a / b)


# =========================================================================== simulation
#: Spectral components of the simulated noise left out: the weakest ones, together carrying
#: at most this fraction of the noise power (the variance is exact to this fraction).
SPECTRAL_TAIL = 1e-7


@dataclass(frozen=True)
class _SpectralFilter:
    """Half-spectrum filter of :func:`simulate_noise` for one box shape."""

    size: tuple[int, int, int]  # the periodic synthesis grid (>= box + lag window per axis)
    half_shape: tuple[int, int, int]  # rfftn output shape of that grid
    kept: np.ndarray  # flat indices (into half_shape) of the components drawn
    coef: np.ndarray  # float32 SD of the real and of the imaginary part of each kept component


def spectral_filter(noise: NoiseModel, shape: tuple[int, int, int]) -> _SpectralFilter:
    """The spectral filter of :func:`simulate_noise` for a box ``shape`` (kept per model and shape)."""
    cache = noise.__dict__.setdefault("_filters", {})
    if shape in cache:
        return cache[shape]
    L = np.array(noise.half_lags)
    # a period of n + L keeps every wrapped lag between two points of the box beyond the window
    size = tuple(sfft.next_fast_len(int(n + l), real=True) for n, l in zip(shape, L))
    emb = np.zeros(size)
    idx = [np.r_[np.arange(-l, 0) % s, np.arange(0, l + 1)] for l, s in zip(L, size)]
    emb[np.ix_(*idx)] = noise.autocov_bq2_ml2
    spec = np.clip(sfft.rfftn(emb, workers=fft_workers()).real, 0.0, None)
    # components on the last axis's zero (and, for an even length, Nyquist) plane stand for
    # themselves only; the others also for their mirror image -k, which the inverse real FFT adds
    own = np.zeros(spec.shape, bool)
    own[..., 0] = True
    if size[-1] % 2 == 0:
        own[..., -1] = True
    power = (spec * np.where(own, 1.0, 2.0)).ravel()
    order = np.argsort(power, kind="stable")
    dropped = int(np.searchsorted(np.cumsum(power[order]), SPECTRAL_TAIL * power.sum(), side="right"))
    kept = np.sort(order[dropped:])
    # rfftn of unit white noise on N points: E|X_k|^2 = N, real and imaginary parts independent
    # with variance N / 2 each (real with variance N where k = -k). On the own planes the inverse
    # real FFT keeps only the Hermitian part (X_k + conj X_-k) / 2 of independent draws, which
    # halves their variance: those get twice the variance, which makes the law exact everywhere.
    n_total = float(np.prod(size))
    coef = np.sqrt(spec.ravel()[kept] * n_total / 2.0 * np.where(own.ravel()[kept], 2.0, 1.0))
    out = _SpectralFilter(size, spec.shape, kept, coef.astype(np.float32))
    cache[shape] = out
    return out


def simulate_noise(noise: NoiseModel, shape: tuple[int, int, int], n_draws: int, rng: np.random.Generator) -> np.ndarray:
    """Stationary Gaussian noise fields with the model's autocovariance, shape ``(n_draws, *shape)``.

    Spectral synthesis: the autocovariance is embedded (circularly) in a grid larger than
    ``shape`` by the lag window (so every lag within the box is exact); its power spectrum
    ``S`` (negative parts, which an estimate can have, clipped to 0) gives independent
    complex Gaussian Fourier components of variance ``N S`` (the law of the FFT of ``sqrt(S)``
    filtered white noise), drawn directly in the half spectrum, and one inverse real FFT per
    draw makes the fields. Components with ``S = 0``, and the weakest ones carrying together
    at most :data:`SPECTRAL_TAIL` of the power, are not drawn. Background-level noise
    (variance ``C(0)``), single precision; scale by :meth:`NoiseModel.scale_at`.
    """
    return np.moveaxis(noise_fields(noise, shape, n_draws, rng), -1, 0)


def noise_fields(noise: NoiseModel, shape: tuple[int, int, int], n_draws: int, rng: np.random.Generator) -> np.ndarray:
    """:func:`simulate_noise` with the draws on the last axis: shape ``(*shape, n_draws)``, a view."""
    filt = spectral_filter(noise, tuple(shape))
    n_half = int(np.prod(filt.half_shape))
    draws = rng.standard_normal((filt.kept.size, n_draws, 2), dtype=np.float32)
    draws *= filt.coef[:, None, None]
    spectrum = np.zeros((n_half, n_draws), np.complex64)
    spectrum[filt.kept] = draws.view(np.complex64)[..., 0]  # whole rows: a fast copy
    del draws
    field = sfft.irfftn(spectrum.reshape(*filt.half_shape, n_draws), filt.size, axes=(0, 1, 2), workers=fft_workers())
    return field[: shape[0], : shape[1], : shape[2]]


# =========================================================================== ROI helpers


def weights_variance(
    noise: NoiseModel,
    volume: Volume,
    parts: Sequence[tuple[tuple[slice, slice, slice], np.ndarray, float]],
    *,
    heteroscedastic: bool = True,
) -> float:
    """Variance (Bq/mL)^2 of ``sum_i coef_i sum(W_i v) / sum(W_i)`` for weight boxes ``(box, W_i, coef_i)``.

    With ``heteroscedastic`` the variance is scaled by the level law at the ROI's own level
    ``L`` (its weighted mean): ``(L / b)^p``.
    """
    scaled = [(b, w / float(w.sum()), c) for b, w, c in parts if float(w.sum()) > 0]
    if not scaled:
        raise PhantomNotFound("uncertainty: ROI has no weight; check the ROI position")
    box, a = combine_weights(scaled)
    return _scaled_quadratic_form(noise, volume, box, a, heteroscedastic)


def _scaled_quadratic_form(noise: NoiseModel, volume: Volume, box, a: np.ndarray, heteroscedastic: bool, level_fn=None) -> float:
    """Variance of ``sum a v`` under the level law (module notes, step 3).

    ``sum_{x,y} a_x a_y C(x - y) s_x s_y`` with ``s = (L / b)^(p/2)``; the product
    ``s_x s_y`` of two nearby voxels (C is short-ranged) is taken as the mean of ``s_x^2`` and
    ``s_y^2``, which makes the form ``sum_x a_x (C * a)_x (L_x / b)^p``. For ``p = 1`` it is
    linear in the image values, so the noisy image itself is an unbiased level (no clipping of
    single voxels; only the total is kept >= 0); for other ``p`` the level is clipped at 0.
    With ``level_fn(points_mm) -> Bq/mL`` (a noise-free model of the level) the exact form
    with ``s_x s_y`` is used instead.
    """
    if not heteroscedastic:  # (large boxes: the background ROI sets) in single precision
        return max(noise.quadratic_form(a, single_precision=True), 0.0)
    if level_fn is not None:  # a noise-free level is known: the exact form with s_x s_y
        return max(noise.quadratic_form(a * noise.scale_at(level_fn(box_world(volume, box)))), 0.0)
    from .fftconv import fft_convolve

    field = fft_convolve(a, noise.autocov_bq2_ml2, mode="same")
    vals = np.nan_to_num(volume.data[box].astype(np.float64)) / max(noise.background_bq_ml, 1e-12)
    if noise.variance_power != 1.0:
        vals = np.clip(vals, 0.0, None) ** noise.variance_power
    return max(float(np.sum(a * field * vals)), 0.0)


def discs_variance(
    noise: NoiseModel,
    volume: Volume,
    discs: Sequence[tuple["PlaneImage", np.ndarray]],
    diameter_mm: float,
    *,
    heteroscedastic: bool = True,
    level_fn=None,
) -> float:
    """Variance (Bq/mL)^2 of the average of disc-ROI means (same diameter) on resampled planes.

    ``discs`` is a list of ``(plane, centre_uv_mm)``. Discs on one plane are combined into a
    single weight image before being spread onto the voxels (:func:`plane_voxel_weights`),
    so the covariance of every pair of discs, on one plane or across planes, is included.
    """
    from .rois import _disc_batch

    k = len(discs)
    by_plane: dict[int, tuple["PlaneImage", list[np.ndarray]]] = {}
    for plane, uv in discs:
        by_plane.setdefault(id(plane), (plane, []))[1].append(np.asarray(uv, float).reshape(2))
    parts = []
    for plane, uvs in by_plane.values():
        # every disc of this plane at once: exact pixel fractions, each disc normalised to 1 / K
        w, r0, c0, H = _disc_batch(plane, np.array(uvs), diameter_mm, 7)
        w = w / w.sum(axis=(1, 2), keepdims=True) / k
        nv, nu = plane.values.shape
        ra, rb = max(int(r0.min()) - H, 0), min(int(r0.max()) + H + 1, nv)
        ca, cb = max(int(c0.min()) - H, 0), min(int(c0.max()) + H + 1, nu)
        img = np.zeros((rb - ra, cb - ca))
        for stencil, r, c in zip(w, r0, c0):  # one small stencil per ROI (K ROIs, not voxels)
            rows = slice(r - H, r + H + 1)
            cols = slice(c - H, c + H + 1)
            # clip the stencil to the plane (weights beyond it are zero for ROIs inside the image)
            sr = slice(max(0, ra - rows.start), (2 * H + 1) - max(0, rows.stop - rb))
            sc = slice(max(0, ca - cols.start), (2 * H + 1) - max(0, cols.stop - cb))
            img[max(rows.start, ra) - ra : min(rows.stop, rb) - ra, max(cols.start, ca) - ca : min(cols.stop, cb) - ca] += stencil[sr, sc]
        used_r = np.flatnonzero(img.sum(axis=1) > 0)
        used_c = np.flatnonzero(img.sum(axis=0) > 0)
        if used_r.size == 0:
            raise PhantomNotFound("uncertainty: disc ROIs lie outside the plane image; check the ROI positions")
        img = img[used_r[0] : used_r[-1] + 1, used_c[0] : used_c[-1] + 1]
        box2d = (slice(ra + int(used_r[0]), ra + int(used_r[-1]) + 1), slice(ca + int(used_c[0]), ca + int(used_c[-1]) + 1))
        box3, w3 = plane_voxel_weights(volume, plane, box2d, img)
        parts.append((box3, w3, 1.0))
    box, a = combine_weights(parts)
    return _scaled_quadratic_form(noise, volume, box, a, heteroscedastic, level_fn)


# =========================================================================== the body phantom


