"""Effective resolution from the sphere data: the blurred-sphere model and its fit.

Model
-----
A PET image of a uniform hot ball is, to a good approximation, the ball convolved with the
system's point-response function. For an isotropic 3-D Gaussian of standard deviation ``s``
the blurred ball of radius ``R`` has the closed-form radial profile (mathematics: the
probability that a 3-D normal vector centred at distance ``r`` from the ball centre falls
inside the ball)

``f(r) = 0.5 [erf((R - r) / (sqrt2 s)) + erf((R + r) / (sqrt2 s))]
         - s / (r sqrt(2 pi)) [exp(-(R - r)^2 / 2s^2) - exp(-(R + r)^2 / 2s^2)]``

whose ``r -> 0`` limit is ``erf(R / (sqrt2 s)) - sqrt(2/pi) (R/s) exp(-R^2 / 2s^2)``, the
Maxwell distribution's CDF at ``R / s`` (``scipy.stats.maxwell.cdf``). A fillable sphere of
inner radius ``R`` with an inactive wall of thickness ``w`` in a background ``b`` is, by
linearity of the blur,

``v(r) = b + c f_R(r) - b f_(R + w)(r)``.

Voxels. Reconstructed voxels are taken as cell means (as the synthesizer makes them, see
:mod:`phantometry.synth`): averaging over a cell of side ``d`` adds the box variance
``d^2 / 12`` per axis, so the model uses ``s_eff^2 = s^2 + mean(d_x^2, d_y^2, d_z^2) / 12``
(the mean over the axes makes anisotropic voxels approximately isotropic) and the reported
``effective_fwhm_mm = 2 sqrt(2 ln 2) s`` describes the point-response function *without* the
voxel cell.

Fit
---
:func:`fit_sphere_profiles` fits ``v`` to every voxel whose centre lies within
``R + w + margin`` of a sphere centre (all spheres at once, hot and cold), by non-linear least
squares (Levenberg-Marquardt with closed-form derivatives, :func:`_solve`). Parameters: the FWHM
(shared), a scale ``k`` of the true sphere concentrations (the fill record's, so a calibration
error does not bias the width), the background ``b``, and each sphere's centre (3 per sphere,
so a localisation error of a fraction of a voxel does not widen the fitted edge). Each voxel's
model sums its own sphere and every neighbouring sphere (their blur tails overlap), and voxels
near other inserts (the low-density cylinder) are left out through ``exclusions``. Residuals
are weighted by the noise SD the noise model predicts for the voxel's level
(:class:`phantometry.uncertainty.NoiseModel`: ``var = sigma_b^2 (m / b)^p``).

Standard error. With a noise model the FWHM's variance is the sandwich
``g' Sigma g`` with ``g = J (J'J)^-1 e_fwhm`` on the weighted residuals and ``Sigma`` the
correlation matrix of the noise, applied as a convolution with the measured autocorrelation
(so spatially correlated noise is not mistaken for independent samples). Without one, the
residual RMS and white noise are assumed (an underestimate for correlated noise). The 95 %
interval is ``fwhm +- 1.96 SE`` (clipped at 0).

The approach (fitting the sphere profiles of the body phantom with a Gaussian-blurred sphere
model) follows the partial-volume literature on spheres (e.g. Kessler et al., J Comput Assist
Tomogr 1984;8:514-522, recalled: recovery of blurred spheres); the closed form above is exact
mathematics, tested against ``scipy.stats.maxwell.cdf`` and numerical convolution.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np
from scipy import special

from ..errors import PhantomNotFound
from ..volume import Volume

if TYPE_CHECKING:  # pragma: no cover
    from ..noise import NoiseModel

#: FWHM / sigma of a Gaussian, 2 sqrt(2 ln 2).
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_SQRT2 = math.sqrt(2.0)
_SQRT2PI = math.sqrt(2.0 * math.pi)

__all__ = [
    "FWHM_PER_SIGMA",
    "SphereObservation",
    "ResolutionFit",
    "blurred_sphere_centre",
    "blurred_ball_profile",
    "blurred_ball_profile_derivatives",
    "blurred_disc_profile",
    "effective_sigma_mm",
    "sphere_profile",
    "model_rc_max",
    "model_rc_mean",
    "model_rc_peak",
    "fit_sphere_profiles",
    "fit_effective_fwhm",
]


# =========================================================================== closed forms
def blurred_sphere_centre(radius_mm: float | np.ndarray, sigma_mm: float | np.ndarray) -> np.ndarray | float:
    """Centre value of a unit ball of radius ``R`` blurred by an isotropic 3-D Gaussian.

    ``erf(R / (sqrt2 s)) - sqrt(2/pi) (R/s) exp(-R^2 / (2 s^2))``, which equals
    ``scipy.stats.maxwell.cdf(R / s)`` (mathematics; the Maxwell distribution is the length
    of a 3-D standard normal vector). ``sigma_mm = 0`` gives 1 inside.

    Parameters
    ----------
    radius_mm : float or array, mm
    sigma_mm : float or array, mm (standard deviation of the Gaussian per axis)
    """
    R = np.asarray(radius_mm, float)
    s = np.asarray(sigma_mm, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where(s > 0, R / np.where(s > 0, s, 1.0), np.inf)
        val = np.where(np.isinf(x), 1.0, special.erf(x / _SQRT2) - math.sqrt(2.0 / math.pi) * x * np.exp(-0.5 * np.minimum(x, 1e3) ** 2))
    return float(val) if val.ndim == 0 else val


def blurred_ball_profile(r_mm: np.ndarray, radius_mm: float | np.ndarray, sigma_mm: float) -> np.ndarray:
    """Radial profile ``f(r)`` of a unit ball of radius ``R`` blurred by an isotropic Gaussian.

    The closed form of the module docstring; for ``r < 1e-4 s`` the ``r -> 0`` limit
    (:func:`blurred_sphere_centre`) is used, which avoids the 0/0 of the formula.

    Parameters
    ----------
    r_mm : array
        Distance from the ball centre, mm (>= 0).
    radius_mm : float or array broadcastable with ``r_mm``, mm.
    sigma_mm : float
        Gaussian standard deviation, mm; 0 gives the unblurred indicator (1 inside, 0.5 on
        the surface, 0 outside).

    Returns
    -------
    ndarray, values in [0, 1].
    """
    r = np.abs(np.asarray(r_mm, float))
    R = np.asarray(radius_mm, float)
    s = float(sigma_mm)
    if s <= 0:
        return np.where(r < R, 1.0, np.where(r == R, 0.5, 0.0)) + 0.0 * r
    a = (R - r) / (_SQRT2 * s)
    b = (R + r) / (_SQRT2 * s)
    small = r < 1e-4 * s
    r_safe = np.where(small, 1.0, r)
    val = 0.5 * (special.erf(a) + special.erf(b)) - s / (r_safe * _SQRT2PI) * (np.exp(-a * a) - np.exp(-b * b))
    if np.any(small):
        val = np.where(small, blurred_sphere_centre(R + 0.0 * r, s), val)
    return np.clip(val, 0.0, 1.0)


def blurred_ball_profile_derivatives(r_mm: np.ndarray, radius_mm: float | np.ndarray, sigma_mm: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``f(r)`` of :func:`blurred_ball_profile` with its derivatives ``df/dr`` and ``df/ds``.

    Differentiating the closed form (mathematics), with ``E_- = exp(-(R - r)^2 / 2s^2)`` and
    ``E_+ = exp(-(R + r)^2 / 2s^2)``:

    ``df/dr = -R (E_- + E_+) / (r s sqrt(2 pi)) + s (E_- - E_+) / (r^2 sqrt(2 pi))``

    and, since ``f`` depends on ``r / s`` and ``R / s`` only, ``s df/ds = -(r df/dr + R df/dR)``
    with ``df/dR = R (E_- - E_+) / (r s sqrt(2 pi))``:

    ``df/ds = [R (E_- + E_+) - (s^2 + R^2) (E_- - E_+) / r] / (s^2 sqrt(2 pi))``.

    At ``r -> 0``: ``df/dr = 0`` and ``df/ds = -sqrt(2/pi) R^3 exp(-R^2 / 2s^2) / s^4`` (the
    derivative of the Maxwell CDF at ``R / s``). ``(E_- - E_+) / r`` is evaluated as
    ``2 exp(-(R^2 + r^2) / 2s^2) sinh(R r / s^2) / r`` where ``R r / s^2`` is small, so
    neither form loses precision. Tested against finite differences.

    Returns
    -------
    (f, df_dr, df_ds) : arrays broadcast from ``r_mm`` and ``radius_mm``; derivatives per mm.
    """
    r = np.abs(np.asarray(r_mm, float))
    R = np.asarray(radius_mm, float)
    s = float(sigma_mm)
    if s <= 0:
        raise ValueError("blurred_ball_profile_derivatives needs sigma_mm > 0")
    a = (R - r) / (_SQRT2 * s)
    b = (R + r) / (_SQRT2 * s)
    e_minus = np.exp(-a * a)
    e_plus = np.exp(-b * b)
    small = r < 1e-4 * s
    r_safe = np.where(small, 1.0, r)
    x = R * r / (s * s)
    near = x < 1e-3  # cancellation in E_- - E_+: use the sinh form (x < 1e-3 gives sinh(x)/x to 1e-7)
    diff_over_r = np.where(
        near,
        2.0 * np.exp(-(R * R + r * r) / (2 * s * s)) * (R / (s * s)) * (1.0 + x * x / 6.0),
        (e_minus - e_plus) / r_safe,
    )
    f = 0.5 * (special.erf(a) + special.erf(b)) - s / _SQRT2PI * diff_over_r
    df_dr = (-R * (e_minus + e_plus) / (r_safe * s) + s * diff_over_r / r_safe) / _SQRT2PI
    df_ds = (R * (e_minus + e_plus) - (s * s + R * R) * diff_over_r) / (s * s * _SQRT2PI)
    if np.any(small):
        centre = np.exp(-R * R / (2 * s * s))
        f = np.where(small, blurred_sphere_centre(R + 0.0 * r, s), f)
        df_dr = np.where(small, 0.0, df_dr)
        df_ds = np.where(small, -math.sqrt(2.0 / math.pi) * R**3 * centre / s**4, df_ds)
    return np.clip(f, 0.0, 1.0), df_dr, df_ds


def blurred_disc_profile(rho_mm: np.ndarray, radius_mm: float, sigma_mm: float) -> np.ndarray:
    """Radial profile of a unit infinite cylinder (a disc in 2-D) blurred by an isotropic Gaussian.

    The probability that a 2-D normal vector of SD ``s`` centred at distance ``rho`` from the
    axis falls inside the disc of radius ``R``: ``|X|^2 / s^2`` is non-central chi-square with
    2 degrees of freedom and non-centrality ``(rho / s)^2`` (mathematics), so the profile is
    ``scipy.stats.ncx2.cdf((R / s)^2, 2, (rho / s)^2)``, evaluated with the same function's
    ``scipy.special.chndtr`` (no import of ``scipy.stats``; tested against ``ncx2``); at the
    axis it is ``1 - exp(-R^2 / (2 s^2))``.
    """
    rho = np.abs(np.asarray(rho_mm, float))
    s = float(sigma_mm)
    if s <= 0:
        return np.where(rho < radius_mm, 1.0, 0.0) + 0.0 * rho
    return np.clip(special.chndtr((radius_mm / s) ** 2, 2, (rho / s) ** 2), 0.0, 1.0)


def effective_sigma_mm(fwhm_mm: float, voxel_mm: Sequence[float] | float = 0.0) -> float:
    """Standard deviation of the point response including the voxel cell, mm.

    ``s_eff^2 = (FWHM / (2 sqrt(2 ln 2)))^2 + mean(d^2) / 12`` (the box of side ``d`` has
    variance ``d^2 / 12``; the mean over the axes treats anisotropic voxels as isotropic).
    """
    d = np.atleast_1d(np.asarray(voxel_mm, float))
    return math.sqrt((float(fwhm_mm) / FWHM_PER_SIGMA) ** 2 + float(np.mean(d * d)) / 12.0)


def sphere_profile(
    r_mm: np.ndarray,
    radius_mm: float,
    sphere_bq_ml: float,
    background_bq_ml: float,
    sigma_mm: float,
    wall_mm: float = 0.0,
) -> np.ndarray:
    """Blurred image of a fillable sphere with an inactive wall in a uniform background.

    ``v(r) = b + c f_R(r) - b f_(R + w)(r)`` (linearity of the blur), Bq/mL.

    Parameters
    ----------
    r_mm : array, distance from the sphere centre, mm.
    radius_mm : inner radius R, mm.
    sphere_bq_ml, background_bq_ml : concentrations c and b, Bq/mL.
    sigma_mm : effective Gaussian SD (see :func:`effective_sigma_mm`), mm.
    wall_mm : inactive (cold) wall thickness w, mm.
    """
    v = background_bq_ml + sphere_bq_ml * blurred_ball_profile(r_mm, radius_mm, sigma_mm)
    return v - background_bq_ml * blurred_ball_profile(r_mm, radius_mm + wall_mm, sigma_mm)


def model_rc_max(
    diameter_mm: float | np.ndarray,
    fwhm_mm: float,
    *,
    activity_ratio: float,
    wall_mm: float = 0.0,
    voxel_mm: Sequence[float] | float = 0.0,
) -> np.ndarray | float:
    """Model RC max: the blurred sphere's centre value over the true sphere concentration.

    ``RC = F(R / s) + (1 - F((R + w) / s)) / ratio`` with ``F`` the Maxwell CDF
    (:func:`blurred_sphere_centre`) and ``s`` the effective SD including the voxel cell. The
    hottest voxel of a noisy image lies above this (noise) and a voxel centre off the sphere
    centre below it (sampling); the model is the noise-free value at the centre.
    """
    s = effective_sigma_mm(fwhm_mm, voxel_mm)
    R = 0.5 * np.asarray(diameter_mm, float)
    val = blurred_sphere_centre(R, s) + (1.0 - blurred_sphere_centre(R + wall_mm, s)) / float(activity_ratio)
    return float(val) if np.ndim(val) == 0 else np.asarray(val)


def model_rc_mean(
    diameter_mm: float | np.ndarray,
    fwhm_mm: float,
    *,
    activity_ratio: float,
    wall_mm: float = 0.0,
    voxel_mm: Sequence[float] | float = 0.0,
    fraction: float = 0.5,
) -> np.ndarray | float:
    """Model RC mean of the background-adapted isocontour VOI (A50 for ``fraction = 0.5``).

    The VOI of the noise-free blurred sphere is the ball ``r < r_T`` where the profile
    falls to ``T = b + fraction (v(0) - b)``; its mean ``3 / r_T^3 integral_0^r_T v(r) r^2 dr``
    is computed on a fine radial grid (trapezoid rule, 4000 nodes) and divided by the true
    concentration. A continuous-space value: voxelisation makes the measured VOI a few
    voxels, so measured values scatter about it for small spheres.
    """
    s = effective_sigma_mm(fwhm_mm, voxel_mm)
    ratio = float(activity_ratio)
    diam = np.atleast_1d(np.asarray(diameter_mm, float)).ravel()
    R = 0.5 * diam[:, None]
    # one radial grid per diameter (rows), all diameters at once
    r = np.linspace(0.0, 1.0, 4000)[None, :] * (R + wall_mm + 6.0 * s + 1.0)
    v = sphere_profile(r, R, ratio, 1.0, s, wall_mm)
    thr = 1.0 + fraction * (v[:, :1] - 1.0)
    below = v < thr
    i = np.where(below.any(axis=1), np.argmax(below, axis=1), 0)
    rows = np.arange(len(diam))
    out = v[:, 0] / ratio  # no crossing (or at the centre): the centre value
    ok = i > 0
    if np.any(ok):
        ii = i[ok]
        rk, vk, tk = r[ok], v[ok], thr[ok, 0]
        sel = rows[: int(ok.sum())]
        # linear interpolation of the crossing between nodes i-1 and i
        r_t = rk[sel, ii - 1] + (vk[sel, ii - 1] - tk) / (vk[sel, ii - 1] - vk[sel, ii]) * (rk[sel, ii] - rk[sel, ii - 1])
        keep = np.arange(r.shape[1])[None, :] < ii[:, None]
        # trapezoid rule of v r^2 over the nodes before the crossing plus the last partial panel
        f = vk * rk * rk
        panels = 0.5 * (f[:, 1:] + f[:, :-1]) * np.diff(rk, axis=1)
        inner = np.sum(np.where(keep[:, 1:], panels, 0.0), axis=1)
        last = 0.5 * (f[sel, ii - 1] + tk * r_t * r_t) * (r_t - rk[sel, ii - 1])
        out = out.copy()
        out[ok] = 3.0 * (inner + last) / r_t**3 / ratio
    return float(out[0]) if np.ndim(diameter_mm) == 0 else out.reshape(np.shape(diameter_mm))


def model_rc_peak(
    diameter_mm: float | np.ndarray,
    fwhm_mm: float,
    *,
    activity_ratio: float,
    wall_mm: float = 0.0,
    voxel_mm: Sequence[float] | float = 0.0,
    peak_diameter_mm: float = 12.41,
) -> np.ndarray | float:
    """Model RC peak: mean of the blurred sphere over a ``peak_diameter_mm`` ball at its centre.

    ``3 / r_p^3 integral_0^r_p v(r) r^2 dr`` over the true concentration (trapezoid rule, 2000
    nodes); the peak sphere of PERCIST (1 mL, 12.41 mm) sits at the centre of a symmetric
    blurred sphere, where the mean is highest.
    """
    s = effective_sigma_mm(fwhm_mm, voxel_mm)
    ratio = float(activity_ratio)
    rp = 0.5 * float(peak_diameter_mm)
    r = np.linspace(0.0, rp, 2000)
    diam = np.atleast_1d(np.asarray(diameter_mm, float)).ravel()
    trap = np.trapezoid if hasattr(np, "trapezoid") else np.trapz
    v = sphere_profile(r[None, :], 0.5 * diam[:, None], ratio, 1.0, s, wall_mm)  # all diameters at once
    out = 3.0 * trap(v * r * r, r, axis=1) / rp**3 / ratio
    return float(out[0]) if np.ndim(diameter_mm) == 0 else out.reshape(np.shape(diameter_mm))


# =========================================================================== the fit
@dataclass(frozen=True)
class SphereObservation:
    """One sphere of the fit: where it is and what it holds.

    Attributes
    ----------
    name : str
    centre_mm : (3,) world mm (the starting point; refined by the fit)
    diameter_mm : inner diameter, mm
    wall_mm : inactive wall thickness, mm
    true_bq_ml : true concentration (fill record, decay-corrected), Bq/mL; 0 for cold spheres
    """

    name: str
    centre_mm: np.ndarray
    diameter_mm: float
    wall_mm: float
    true_bq_ml: float


@dataclass
class ResolutionFit:
    """Result of :func:`fit_sphere_profiles`.

    Attributes
    ----------
    fwhm_mm : effective FWHM of the point-response function (voxel cell removed), mm
    se_mm : its standard error, mm
    ci95_mm : (low, high), fwhm +- 1.96 SE, low clipped at 0
    sigma_eff_mm : fitted SD including the voxel cell, mm
    sphere_scale : fitted sphere concentration / true (1 for a perfect calibration and fill)
    background_bq_ml : fitted background level, Bq/mL
    centres_mm : name -> refined centre, world mm
    rms_residual_bq_ml : RMS of the unweighted residuals, Bq/mL
    n_voxels : voxels used
    se_method : ``"noise autocorrelation"`` or ``"white residuals"``
    rms_weighted_residual : RMS of the residuals in units of the predicted noise SD (about 1
        when the model describes the image; None without a noise model)
    """

    fwhm_mm: float
    se_mm: float
    ci95_mm: tuple[float, float]
    sigma_eff_mm: float
    sphere_scale: float
    background_bq_ml: float
    centres_mm: dict[str, np.ndarray]
    rms_residual_bq_ml: float
    n_voxels: int
    voxel_mm: tuple[float, float, float]
    se_method: str
    spheres: list[SphereObservation] = field(default_factory=list)
    rms_weighted_residual: float | None = None

    def as_dict(self) -> dict:
        """JSON-ready summary."""
        return {
            "fwhm_mm": round(self.fwhm_mm, 4),
            "standard_error_mm": round(self.se_mm, 4),
            "ci95_mm": [round(self.ci95_mm[0], 4), round(self.ci95_mm[1], 4)],
            "sigma_eff_mm": round(self.sigma_eff_mm, 4),
            "voxel_mm": list(self.voxel_mm),
            "sphere_scale": round(self.sphere_scale, 5),
            "background_bq_ml": round(self.background_bq_ml, 3),
            "centres_mm": {k: [round(float(x), 3) for x in v] for k, v in self.centres_mm.items()},
            "rms_residual_bq_ml": round(self.rms_residual_bq_ml, 4),
            "rms_weighted_residual": None if self.rms_weighted_residual is None else round(self.rms_weighted_residual, 4),
            "n_voxels": self.n_voxels,
            "standard_error_method": self.se_method,
            "model": "uniform spheres with inactive walls in a uniform background, convolved with an isotropic 3-D Gaussian; voxel cells add d^2/12",
        }

    def model_at(self, points_mm: np.ndarray) -> np.ndarray:
        """The fitted noise-free image (Bq/mL) at world points (..., 3): background plus every sphere."""
        pts = np.asarray(points_mm, float)
        b = self.background_bq_ml
        out = np.full(pts.shape[:-1], b, dtype=float)
        for s in self.spheres:
            rel = pts - self.centres_mm[s.name]
            r = np.sqrt(np.einsum("...i,...i->...", rel, rel))
            R = 0.5 * s.diameter_mm
            # beyond R + wall + 10 sigma both profiles are below 1e-22: evaluated where they are not
            near = r < R + s.wall_mm + 10.0 * self.sigma_eff_mm
            if not near.any():
                continue
            rn = r[near]
            out[near] += (self.sphere_scale * max(0.0, s.true_bq_ml) * blurred_ball_profile(rn, R, self.sigma_eff_mm)
                          - b * blurred_ball_profile(rn, R + s.wall_mm, self.sigma_eff_mm))
        return out

    def note(self) -> str:
        lo, hi = self.ci95_mm
        return (
            f"95 % interval {lo:.2f}-{hi:.2f} mm; blurred-sphere fit to {len(self.spheres)} spheres, "
            f"{self.n_voxels} voxels, sphere scale {self.sphere_scale:.3f}, SE from {self.se_method}"
        )


def _voxels_near(volume: Volume, centre: np.ndarray, radius: float) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices and world mm of voxel centres within ``radius`` of ``centre``."""
    corners = np.array([[centre[0] + sx * radius, centre[1] + sy * radius, centre[2] + sz * radius]
                        for sx in (-1, 1) for sy in (-1, 1) for sz in (-1, 1)])
    idx = volume.world_to_index(corners)
    shape = np.array(volume.shape)
    lo = np.clip(np.floor(idx.min(axis=0)).astype(int), 0, shape - 1)
    hi = np.clip(np.ceil(idx.max(axis=0)).astype(int), 0, shape - 1)
    ranges = [np.arange(a, b + 1) for a, b in zip(lo, hi)]
    kk, jj, ii = np.meshgrid(*ranges, indexing="ij")
    kji = np.stack([kk.ravel(), jj.ravel(), ii.ravel()], axis=1)
    world = volume.index_to_world(kji.astype(float))
    keep = np.einsum("ij,ij->i", world - centre, world - centre) <= radius * radius
    flat = np.ravel_multi_index(tuple(kji[keep].T), volume.shape)
    return flat, world[keep]


#: Fewest (voxel, sphere) pairs evaluated at a time by the blurred-sphere model (blocks grow
#: with the image: 1/256 of its voxel count, so their working memory stays a small fraction of it).
PAIR_BLOCK = 2048


@dataclass
class _Problem:
    values: np.ndarray  # (N,) Bq/mL
    world: np.ndarray  # (N, 3)
    flat: np.ndarray  # (N,) flat voxel indices
    pair_vox: np.ndarray  # (M,) voxel index of each (voxel, sphere) pair
    pair_sph: np.ndarray  # (M,) sphere index
    radius: np.ndarray  # (S,)
    wall: np.ndarray  # (S,)
    true: np.ndarray  # (S,)
    voxel_var: float  # mean d^2 / 12
    block: int = PAIR_BLOCK  # pairs per block of :meth:`evaluate`
    _cache: tuple | None = None

    def sigma(self, fwhm: float) -> float:
        return math.sqrt((fwhm / FWHM_PER_SIGMA) ** 2 + self.voxel_var)

    def distances(self, centres: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        rel = self.world[self.pair_vox] - centres[self.pair_sph]
        return np.sqrt(np.einsum("ij,ij->i", rel, rel)), rel

    def parts(self, fwhm: float, centres: np.ndarray, dr: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
        """Per-voxel sums  S_c = sum_j c_j f_Rj  and  S_b = sum_j f_(Rj+wj)  (unit concentrations)."""
        s = self.sigma(fwhm)
        r, _ = self.distances(centres)
        r = r + dr
        R = self.radius[self.pair_sph]
        fc = self.true[self.pair_sph] * blurred_ball_profile(r, R, s)
        fb = blurred_ball_profile(r, R + self.wall[self.pair_sph], s)
        n = len(self.values)
        return np.bincount(self.pair_vox, fc, n), np.bincount(self.pair_vox, fb, n)

    def model(self, p: np.ndarray) -> np.ndarray:
        return self.evaluate(p)[0]

    def evaluate(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Model values (N,) and their Jacobian (N, 3 + 3 S) at ``p = (fwhm, k, b, centres...)``.

        Closed-form derivatives (:func:`blurred_ball_profile_derivatives`); the last result is
        kept, since the solver asks for the residuals and the Jacobian at the same point.
        """
        key = np.asarray(p, float).tobytes()
        if self._cache is not None and self._cache[0] == key:
            return self._cache[1], self._cache[2]
        fwhm, k, b = (float(v) for v in p[:3])
        centres = np.asarray(p[3:], float).reshape(-1, 3)
        s = self.sigma(fwhm)
        ds_dfwhm = (fwhm / FWHM_PER_SIGMA**2) / s
        n = len(self.values)
        n_s = len(self.radius)
        sc = np.zeros(n)
        sb = np.zeros(n)
        d_s = np.zeros(n)
        J = np.zeros((n, 3 + 3 * n_s), dtype=np.float32)  # single precision: half the memory; sums in double (_gram)
        # (voxel, sphere) pairs in blocks (a loop over blocks, not voxels): the working arrays
        # of the profiles and their derivatives stay small whatever the number of voxels
        for a in range(0, len(self.pair_vox), self.block):
            pv = self.pair_vox[a : a + self.block]
            ps = self.pair_sph[a : a + self.block]
            rel = self.world[pv] - centres[ps]
            r = np.sqrt(np.einsum("ij,ij->i", rel, rel))
            R = self.radius[ps]
            c = self.true[ps]
            fc, fc_r, fc_s = blurred_ball_profile_derivatives(r, R, s)
            fb, fb_r, fb_s = blurred_ball_profile_derivatives(r, R + self.wall[ps], s)
            sc += np.bincount(pv, c * fc, n)
            sb += np.bincount(pv, fb, n)
            d_s += np.bincount(pv, k * c * fc_s - b * fb_s, n)
            dvdr = k * c * fc_r - b * fb_r
            rel /= np.maximum(r, 1e-9)[:, None]  # unit vectors
            cols = 3 + 3 * ps
            for axis in range(3):  # d r / d centre = -unit; each (voxel, sphere) pair is one entry
                J[pv, cols + axis] -= dvdr * rel[:, axis]
        model = b + k * sc - b * sb
        J[:, 0] = d_s * ds_dfwhm
        J[:, 1] = sc
        J[:, 2] = 1.0 - sb
        self._cache = (key, model, J)
        return model, J


def _unpack_start(spheres: Sequence[SphereObservation]) -> np.ndarray:
    return np.array([np.asarray(s.centre_mm, float) for s in spheres])


def fit_sphere_profiles(
    volume: Volume,
    spheres: Sequence[SphereObservation],
    background_bq_ml: float,
    *,
    exclusions: Sequence[Callable[[np.ndarray], np.ndarray]] = (),
    noise: "NoiseModel | None" = None,
    margin_mm: float | None = None,
    fit_centres: bool = True,
    fwhm_start_mm: float = 8.0,
    where: str | None = None,
) -> ResolutionFit:
    """Fit the blurred-sphere model to the voxels around the spheres (see module notes).

    Parameters
    ----------
    volume : Volume in Bq/mL.
    spheres : the spheres to fit (hot ones with their true concentration, cold ones with 0).
    background_bq_ml : starting value of the background, Bq/mL (the measured C_B).
    exclusions : callables ``fn(points_mm (n, 3)) -> bool (n,)``; True marks voxels to leave
        out (near inserts the model does not describe).
    noise : noise model (:func:`phantometry.uncertainty.estimate_noise`); gives the residual
        weights and the standard error with correlated noise.
    margin_mm : voxels within ``R + w + margin`` of a sphere centre are fitted; default
        12 mm, refitted with ``max(3.5 s_eff, 2 voxels, 6 mm)`` when 12 mm is under
        ``2.5 s_eff`` or over ``6 s_eff + 2 voxels``.
    fit_centres : refine each sphere centre (default True).
    fwhm_start_mm : starting value of the FWHM, mm.
    where : how to name the image in messages.

    Returns
    -------
    ResolutionFit

    Raises
    ------
    PhantomNotFound
        When no sphere is hot (nothing to fit the scale to is fine, but a flat image is not)
        or too few voxels remain.
    """
    where = where or volume.source or "image"
    if not spheres:
        raise PhantomNotFound(f"{where}: no spheres to fit the effective resolution to")
    spacing = np.asarray(volume.spacing_mm, float)
    voxel_var = float(np.mean(spacing**2)) / 12.0
    start_centres = _unpack_start(spheres)
    margin = 12.0 if margin_mm is None else float(margin_mm)
    fit = _fit_once(volume, spheres, start_centres, background_bq_ml, exclusions, noise, margin, fit_centres, fwhm_start_mm, voxel_var, where)
    if margin_mm is None:
        # refit when the first region was too tight for the blur found (or far too wide)
        better = max(3.5 * fit.sigma_eff_mm, 2.0 * float(spacing.max()), 6.0)
        if margin < 2.5 * fit.sigma_eff_mm or margin > 6.0 * fit.sigma_eff_mm + 2.0 * float(spacing.max()):
            fit = _fit_once(volume, spheres, start_centres, fit.background_bq_ml, exclusions, noise, better, fit_centres,
                            max(fit.fwhm_mm, 0.5), voxel_var, where)
    return fit


def _fit_once(volume, spheres, start_centres, background, exclusions, noise, margin, fit_centres, fwhm_start, voxel_var, where) -> ResolutionFit:
    flats, worlds = [], []
    for s, c in zip(spheres, start_centres):
        f, w = _voxels_near(volume, c, 0.5 * s.diameter_mm + s.wall_mm + margin)
        flats.append(f)
        worlds.append(w)
    flat = np.concatenate(flats)
    world = np.concatenate(worlds)
    del flats, worlds
    flat, first = np.unique(flat, return_index=True)
    world = world[first]
    keep = np.ones(len(flat), bool)
    for fn in exclusions:
        keep &= ~np.asarray(fn(world), dtype=bool)
    flat, world = flat[keep], world[keep]
    values = volume.data.reshape(-1)[flat].astype(np.float64)
    finite = np.isfinite(values)
    flat, world, values = flat[finite], world[finite], values[finite]
    n_par = 3 + (3 * len(spheres) if fit_centres else 0)
    if len(values) < 4 * n_par:
        raise PhantomNotFound(f"{where}: too few voxels around the spheres ({len(values)}) to fit the effective resolution")
    radius = np.array([0.5 * s.diameter_mm for s in spheres])
    wall = np.array([s.wall_mm for s in spheres])
    true = np.array([max(0.0, s.true_bq_ml) for s in spheres])
    # (voxel, sphere) pairs: own sphere and neighbours whose blur can reach the voxel
    reach = radius + wall + margin + 8.0
    near = np.stack([np.einsum("vk,vk->v", world - c, world - c) < r * r for c, r in zip(start_centres, reach)], axis=1)
    pv, ps = (i.astype(np.int32) for i in np.nonzero(near))
    del near
    prob = _Problem(values, world, flat, pv, ps, radius, wall, true, voxel_var, block=max(PAIR_BLOCK, volume.data.size // 256))
    hot = bool(np.any(true > 0))

    def unpack(q: np.ndarray) -> np.ndarray:
        if fit_centres:
            return q
        return np.concatenate([q, start_centres.ravel()])

    def jac_model(p: np.ndarray) -> np.ndarray:
        J = prob.evaluate(p)[1]
        prob._cache = None  # the caller scales J in place
        if not hot:
            J[:, 1] = 0.0
        return J if fit_centres else J[:, :3]

    weights = np.ones(len(values))
    sigma_b = None
    if noise is not None and noise.variance_bq2_ml2 > 0:
        sigma_b = math.sqrt(noise.variance_bq2_ml2)

    def residual(q: np.ndarray) -> np.ndarray:
        return (prob.model(unpack(q)) - values) * weights

    def jac(q: np.ndarray) -> np.ndarray:
        J = jac_model(unpack(q))[:, : len(q)]
        J *= weights[:, None].astype(np.float32)
        return J

    x0 = np.concatenate([[fwhm_start, 1.0, background], start_centres.ravel() if fit_centres else []])
    free = np.ones(len(x0), bool)
    if not hot:
        free[1] = False  # no hot sphere: the sphere scale is not identifiable
    # Levenberg-Marquardt; the FWHM enters squared, so its sign is immaterial
    sol = _solve(residual, jac, x0, free, tol=1e-5 if sigma_b is not None else 1e-8)
    if sigma_b is not None:
        # weighted refit: 1 / the noise SD the level law predicts at the fitted (noise-free) level
        weights = 1.0 / noise.sd_at(prob.model(unpack(sol)))  # type: ignore[union-attr]
        sol = _solve(residual, jac, sol, free, tol=1e-7)
    sol[0] = abs(sol[0])
    p = unpack(sol)
    fwhm = float(p[0])
    moved = np.linalg.norm(p[3:].reshape(-1, 3) - start_centres, axis=1)
    if not np.all(np.isfinite(p)) or fwhm > 40.0 or moved.max() > max(4.0, 2.0 * float(np.max(volume.spacing_mm))) or (hot and not 0.2 < p[1] < 5.0):
        raise PhantomNotFound(
            f"{where}: the blurred-sphere fit found no plausible solution (FWHM {fwhm:.1f} mm, sphere scale {p[1]:.2f}, "
            f"a centre moved {moved.max():.1f} mm); check the fill record and the sphere positions"
        )
    m = prob.model(p)
    resid = values - m
    rms = float(np.sqrt(np.mean(resid**2)))
    rms_weighted = float(np.sqrt(np.mean((resid * weights) ** 2))) if sigma_b is not None else None
    Jw = jac(sol)
    active = np.ones(Jw.shape[1], bool)
    if not hot:
        active[1] = False
    Ja = Jw if active.all() else Jw[:, active]
    JtJ, _ = _gram(Ja)
    try:
        JtJ_inv = np.linalg.inv(JtJ)
    except np.linalg.LinAlgError:
        JtJ_inv = np.linalg.pinv(JtJ)
    g = (Ja @ JtJ_inv[:, 0].astype(Ja.dtype)).astype(np.float64)  # d fwhm / d (weighted residual)
    if sigma_b is not None:
        var = noise.quadratic_form_flat(g, flat, volume.shape)  # type: ignore[union-attr]
        method = "noise autocorrelation"
    else:
        dof = max(1, len(values) - Ja.shape[1])
        s2 = float(np.sum((resid * weights) ** 2) / dof)
        var = s2 * float(JtJ_inv[0, 0])
        method = "white residuals"
    se = math.sqrt(max(var, 0.0))
    centres = p[3:].reshape(-1, 3)
    return ResolutionFit(
        fwhm_mm=fwhm,
        se_mm=se,
        ci95_mm=(max(0.0, fwhm - 1.96 * se), fwhm + 1.96 * se),
        sigma_eff_mm=prob.sigma(fwhm),
        sphere_scale=float(p[1]),
        background_bq_ml=float(p[2]),
        centres_mm={s.name: centres[i].copy() for i, s in enumerate(spheres)},
        rms_residual_bq_ml=rms,
        n_voxels=int(len(values)),
        voxel_mm=tuple(float(v) for v in volume.spacing_mm[::-1]),  # type: ignore[arg-type]
        se_method=method,
        spheres=list(spheres),
        rms_weighted_residual=rms_weighted,
    )


def _gram(J: np.ndarray, r: np.ndarray | None = None, rows: int = 2048) -> tuple[np.ndarray, np.ndarray | None]:
    """``J'J`` (and ``J'r``) summed in double precision over blocks of rows of a (single precision) ``J``."""
    n_par = J.shape[1]
    A = np.zeros((n_par, n_par))
    g = None if r is None else np.zeros(n_par)
    for a in range(0, J.shape[0], rows):
        block = J[a : a + rows].astype(np.float64)
        A += block.T @ block
        if g is not None:
            g += block.T @ r[a : a + rows]
    return A, g


def _solve(residual, jac, x0: np.ndarray, free: np.ndarray, tol: float = 1e-8, max_iter: int = 200) -> np.ndarray:
    """Levenberg-Marquardt on the free parameters, by the normal equations.

    Marquardt's method (Marquardt, J Soc Ind Appl Math 1963;11:431-441): the step solves
    ``(J'J + lambda diag(J'J)) dx = -J'r``; a step that lowers the sum of squares is taken and
    ``lambda`` shrinks, else ``lambda`` grows. With a few dozen parameters and tens of
    thousands of residuals the 21 x 21 normal equations are far cheaper than a QR of ``J``
    at every step; the parameters are well scaled by ``diag(J'J)``. Stops when the relative
    decrease of the sum of squares or the scaled step falls below ``tol``.
    """
    x = np.array(x0, float)

    all_free = bool(np.all(free))

    def evaluate(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        full = x.copy()
        full[free] = q
        r = residual(full)
        J = jac(full)
        return r, (J if all_free else J[:, free])

    q = x[free].copy()
    r, J = evaluate(q)
    cost = float(r @ r)
    lam = 1e-3
    for _ in range(max_iter):
        A, g = _gram(J, r)
        J = None  # the normal equations hold what is needed; no second Jacobian beside the next one
        diag = np.diag(A).copy()
        diag = np.maximum(diag, 1e-12 * max(float(diag.max()), 1e-300))
        improved = False
        while lam < 1e12:
            try:
                step = -np.linalg.solve(A + lam * np.diag(diag), g)
            except np.linalg.LinAlgError:
                lam *= 10.0
                continue
            q_new = q + step
            r_new = J_new = None  # a rejected trial's Jacobian goes before the next is made
            r_new, J_new = evaluate(q_new)
            cost_new = float(r_new @ r_new)
            if np.isfinite(cost_new) and cost_new <= cost:
                improved = True
                break
            lam *= 4.0
        if not improved:
            break
        decrease = (cost - cost_new) / max(cost, 1e-300)
        scaled_step = float(np.linalg.norm(step * np.sqrt(diag)))
        scaled_x = float(np.linalg.norm(q * np.sqrt(diag)))
        q, r, J, cost = q_new, r_new, J_new, cost_new
        lam = max(lam / 3.0, 1e-12)
        if decrease < tol or scaled_step < tol * (scaled_x + tol):
            break
    x[free] = q
    return x.copy()


def fit_effective_fwhm(
    volume: Volume,
    spheres: Sequence[SphereObservation],
    background_bq_ml: float,
    **kwargs,
) -> tuple[float, float, float]:
    """Effective FWHM of the point-response function from the sphere data, with a 95 % interval.

    A thin wrapper over :func:`fit_sphere_profiles` (same parameters).

    Returns
    -------
    (fwhm_mm, ci95_low_mm, ci95_high_mm)
    """
    fit = fit_sphere_profiles(volume, spheres, background_bq_ml, **kwargs)
    return fit.fwhm_mm, fit.ci95_mm[0], fit.ci95_mm[1]
