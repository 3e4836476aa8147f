"""A Gaussian post-filter applied to a reconstructed image, and what it does to the image's noise.

The filter
----------
An isotropic 3-D Gaussian of full width at half maximum ``F`` mm (``sigma = F / (2 sqrt(2 ln
2))``), applied separably along the array axes with ``sigma_a = sigma / d_a`` voxels along an
axis of spacing ``d_a`` (anisotropic voxels are handled in mm; the axes must be orthogonal).
Along each axis the kernel is the one of ``scipy.ndimage.gaussian_filter1d`` (the sampled,
normalised Gaussian truncated at ``4 sigma_a``, image borders reflected), so
:meth:`PostFilter.filter_box` gives the values ``scipy.ndimage.gaussian_filter(data,
sigma_vox)`` gives on that box (tested). A box is filtered from the box grown by the kernel's
radius, one axis at a time, each pass keeping only what the next needs: the cost is that of the
region read, not of the image. Filters narrower than about one voxel are poorly represented by
a sampled kernel (its variance falls short of ``sigma^2``): :attr:`PostFilter.variance_mm2`
is the variance actually applied.

The filter's effect on the noise
--------------------------------
The filter is linear and shift-invariant, so the autocovariance of the filtered noise is known
exactly from the image's (:class:`phantometry.noise.NoiseModel`): ``C_f = C * (g * g~)``, the
convolution of ``C`` with the filter's autocorrelation. For a continuous Gaussian of SD
``sigma`` that autocorrelation is a Gaussian of SD ``sqrt(2) sigma`` in each dimension
(mathematics); here it is the exact autocorrelation of the sampled kernel applied along each
axis (the two agree closely above one voxel; tested). :func:`filtered_noise` returns the noise
model of the filtered image, which the body kind's quadratic forms and Monte Carlo take
unchanged. The level law (variance growing with the activity) is kept and applied at the
filtered image's level: an approximation where the filter mixes levels (at sphere edges), of
the same kind the unfiltered model already makes there.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from .errors import UnsupportedSeries
from .noise import NoiseModel
from .volume import Volume

__all__ = [
    "FWHM_PER_SIGMA",
    "TRUNCATE",
    "PostFilter",
    "gaussian_kernel1d",
    "filter_autocorrelation",
    "filtered_autocovariance",
    "filtered_noise",
    "check_filterable",
]

#: FWHM / sigma of a Gaussian, 2 sqrt(2 ln 2) (mathematics).
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: Kernel truncation in SDs (``scipy.ndimage.gaussian_filter``'s default).
TRUNCATE = 4.0
#: Lags of a filtered autocovariance whose magnitude stays below this fraction of its lag-0
#: value (over the rest of the lag array) are dropped.
AUTOCOVARIANCE_TAIL = 1e-6

Box = tuple[slice, slice, slice]


def gaussian_kernel1d(sigma_vox: float, truncate: float = TRUNCATE) -> np.ndarray:
    """The sampled, normalised Gaussian of ``scipy.ndimage.gaussian_filter1d`` (float64).

    ``radius = int(truncate * sigma + 0.5)`` voxels, weights ``exp(-x^2 / (2 sigma^2))`` for
    ``x = -radius..radius`` divided by their sum; ``[1.0]`` for ``sigma = 0``.
    """
    s = float(sigma_vox)
    if s <= 0:
        return np.ones(1)
    r = int(truncate * s + 0.5)
    x = np.arange(-r, r + 1, dtype=float)
    w = np.exp(-0.5 * (x / s) ** 2)
    return w / w.sum()


def _reflect(idx: np.ndarray, n: int) -> np.ndarray:
    """Indices beyond ``[0, n)`` reflected about the array's edges (``scipy.ndimage`` mode
    ``reflect``: ``d c b a | a b c d | d c b a``), repeatedly for long overhangs."""
    m = np.mod(idx, 2 * n)
    return np.where(m >= n, 2 * n - 1 - m, m)


def _axis_matrix(kernel: np.ndarray, out_lo: int, out_hi: int, n: int) -> tuple[np.ndarray, int, int]:
    """Matrix of one axis's pass: outputs ``out_lo..out_hi-1`` from inputs ``in_lo..in_hi-1``.

    Returns ``(M, in_lo, in_hi)`` with ``M[o, i]`` the weight of input ``in_lo + i`` in output
    ``out_lo + o`` (reflected border taps folded in).
    """
    r = (len(kernel) - 1) // 2
    raw = np.arange(out_lo, out_hi)[:, None] + np.arange(-r, r + 1)[None, :]
    reflected = out_lo - r < 0 or out_hi - 1 + r >= n
    src = _reflect(raw, n) if reflected else raw
    in_lo, in_hi = int(src.min()), int(src.max()) + 1
    m = np.zeros((out_hi - out_lo, in_hi - in_lo), np.float32)
    rows = np.broadcast_to(np.arange(out_hi - out_lo)[:, None], src.shape)
    taps = np.broadcast_to(kernel.astype(np.float32), src.shape)
    if reflected:  # reflected taps may land on one input twice
        np.add.at(m, (rows, src - in_lo), taps)
    else:
        m[rows, src - in_lo] = taps
    return m, in_lo, in_hi


def _apply_along(m: np.ndarray, x: np.ndarray, axis: int) -> np.ndarray:
    """``m`` (n_out, n_in) applied along ``axis`` of ``x`` (a matrix product, BLAS)."""
    if axis == 0:
        return (m @ x.reshape(x.shape[0], -1)).reshape((m.shape[0],) + x.shape[1:])
    if axis == 1:
        return np.matmul(m, x)
    return x @ m.T


@dataclass(frozen=True)
class PostFilter:
    """An isotropic Gaussian post-filter of ``fwhm_mm`` on a grid of ``spacing_mm`` (z, y, x).

    See the module notes. ``fwhm_mm = 0`` is the identity.
    """

    fwhm_mm: float
    spacing_mm: tuple[float, float, float]
    truncate: float = TRUNCATE
    _kernels: tuple[np.ndarray, ...] = field(default=(), init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not (math.isfinite(self.fwhm_mm) and self.fwhm_mm >= 0):
            raise ValueError("the filter FWHM must be a finite number >= 0 mm")
        sp = tuple(float(v) for v in self.spacing_mm)
        object.__setattr__(self, "spacing_mm", sp)
        object.__setattr__(self, "_kernels", tuple(gaussian_kernel1d(self.sigma_mm / d, self.truncate) for d in sp))

    @classmethod
    def for_volume(cls, fwhm_mm: float, volume: Volume) -> "PostFilter":
        return cls(float(fwhm_mm), tuple(float(v) for v in volume.spacing_mm))  # type: ignore[arg-type]

    @property
    def sigma_mm(self) -> float:
        return float(self.fwhm_mm) / FWHM_PER_SIGMA

    @property
    def sigma_vox(self) -> tuple[float, float, float]:
        return tuple(self.sigma_mm / d for d in self.spacing_mm)  # type: ignore[return-value]

    @property
    def kernels(self) -> tuple[np.ndarray, ...]:
        """The 1-D kernels along the array axes (z, y, x)."""
        return self._kernels

    @property
    def radius_vox(self) -> tuple[int, int, int]:
        return tuple((len(k) - 1) // 2 for k in self._kernels)  # type: ignore[return-value]

    @property
    def is_identity(self) -> bool:
        return all(len(k) == 1 for k in self._kernels)

    @property
    def variance_mm2(self) -> float:
        """Variance (mm^2) the sampled kernels apply, the mean over the three axes
        (``sigma^2`` for a filter wider than about a voxel; less for narrower ones)."""
        out = []
        for k, d in zip(self._kernels, self.spacing_mm):
            x = np.arange(len(k)) - (len(k) - 1) / 2
            out.append(float(np.sum(k * x * x)) * d * d)
        return float(np.mean(out))

    def label(self) -> str:
        return f"Gaussian {self.fwhm_mm:g} mm FWHM"

    # ------------------------------------------------------------------ filtering
    def input_box(self, box: Box, shape: Sequence[int]) -> Box:
        """The array box a filtered ``box`` is computed from (grown by the radius, clipped)."""
        return tuple(slice(max(0, b.start - r), min(int(n), b.stop + r)) for b, r, n in zip(box, self.radius_vox, shape))  # type: ignore[return-value]

    def filter_box(self, data: np.ndarray, box: Box) -> np.ndarray:
        """The filtered image on ``box`` (float32, the box's shape), from the unfiltered ``data``.

        Equal to ``scipy.ndimage.gaussian_filter(data, self.sigma_vox)[box]`` (mode
        ``reflect`` at the image's borders) up to single-precision rounding; only the box grown
        by the kernel radius is read. Each axis is one matrix product (the kernel's taps, with the
        reflected border folded in), in the order of axes that does the least work.
        """
        shape = data.shape
        if self.is_identity:
            return np.array(data[box], dtype=np.float32)
        mats = [_axis_matrix(self._kernels[a], box[a].start, box[a].stop, shape[a]) for a in range(3)]
        # single precision (the image's): matrix products of float32 run twice as fast, and
        # their rounding (about 1e-7 relative) is far below any metric's noise
        x = np.asarray(data[tuple(slice(lo, hi) for _, lo, hi in mats)], dtype=np.float32)
        sizes_in = [m.shape[1] for m, _, _ in mats]
        sizes_out = [m.shape[0] for m, _, _ in mats]

        def cost(order: tuple[int, ...]) -> int:
            cur = list(sizes_in)
            total = 0
            for a in order:
                total += sizes_out[a] * cur[0] * cur[1] * cur[2]
                cur[a] = sizes_out[a]
            return total

        for a in min(itertools.permutations(range(3)), key=cost):
            x = _apply_along(mats[a][0], x, a)
        return x.astype(np.float32)

    # ------------------------------------------------------------------ noise
    def autocorrelations(self) -> tuple[np.ndarray, ...]:
        """The 1-D autocorrelation of each axis's kernel, lags ``-2r..2r`` (the filter's
        autocorrelation is their outer product)."""
        return tuple(np.correlate(k, k, mode="full") for k in self._kernels)


def filter_autocorrelation(post_filter: PostFilter) -> np.ndarray:
    """The 3-D autocorrelation of the applied filter, ``sum_x g(x) g(x + tau)``, on its lag grid."""
    a0, a1, a2 = post_filter.autocorrelations()
    return a0[:, None, None] * a1[None, :, None] * a2[None, None, :]


def filtered_autocovariance(cov: np.ndarray, post_filter: PostFilter, tail: float = AUTOCOVARIANCE_TAIL) -> np.ndarray:
    """``C * (g * g~)``: the autocovariance of the filtered noise on a (grown) odd lag grid.

    ``cov`` is centred (lag 0 in the middle, odd sizes). The convolution is separable (one
    axis at a time, full length); lags whose magnitude stays below ``tail`` times the lag-0
    value are then dropped symmetrically, keeping the grid odd and centred.
    """
    out = np.asarray(cov, float)
    for axis, a in enumerate(post_filter.autocorrelations()):
        if len(a) == 1:
            continue
        out = np.apply_along_axis(lambda v, a=a: np.convolve(v, a, mode="full"), axis, out)
    c = tuple(n // 2 for n in out.shape)
    c0 = float(out[c])
    if c0 <= 0:
        return out
    keep = []
    for axis in range(3):
        prof = np.abs(out).max(axis=tuple(b for b in range(3) if b != axis))
        big = np.flatnonzero(prof >= tail * c0)
        half = int(max(abs(int(big[0]) - c[axis]), abs(int(big[-1]) - c[axis]))) if big.size else 0
        keep.append(slice(c[axis] - half, c[axis] + half + 1))
    return np.ascontiguousarray(out[tuple(keep)])


def filtered_noise(noise: NoiseModel, post_filter: PostFilter) -> NoiseModel:
    """The noise model of the filtered image (module notes): autocovariance ``C * (g * g~)``,
    the same background level and level law."""
    if post_filter.is_identity:
        return noise
    cov = filtered_autocovariance(noise.autocov_bq2_ml2, post_filter)
    c0 = float(cov[tuple(n // 2 for n in cov.shape)])
    return NoiseModel(
        autocov_bq2_ml2=cov,
        variance_bq2_ml2=max(c0, 0.0),
        background_bq_ml=noise.background_bq_ml,
        n_voxels=noise.n_voxels,
        spacing_mm=noise.spacing_mm,
        variance_power=noise.variance_power,
    )


#: Largest cosine between two voxel axes for which a filter along them is taken as isotropic.
ORTHOGONAL_TOLERANCE = 1e-4


def check_filterable(volume: Volume, where: str) -> None:
    """Refuse an image whose voxel axes are not orthogonal (a sheared grid, e.g. a tilted
    gantry): a Gaussian applied along such axes would not be isotropic."""
    ax = volume.axes_world
    worst = max(abs(float(ax[0] @ ax[1])), abs(float(ax[0] @ ax[2])), abs(float(ax[1] @ ax[2])))
    if worst > ORTHOGONAL_TOLERANCE:
        raise UnsupportedSeries(
            f"{where}: the voxel axes are not orthogonal (a sheared grid, e.g. from a tilted gantry); a Gaussian filter along "
            "them would not be isotropic: resample the image onto an orthogonal grid first"
        )
