"""NEMA NU 2 image-quality metrics: percent contrast, background variability, lung residual.

Formulas as given in NEMA NU 2 (Performance Measurements of Positron Emission Tomographs),
image quality section (recalled; the standard's text was not read here):

* hot sphere j:  ``Q_H,j = (C_H,j / C_B,j - 1) / (a_H / a_B - 1) x 100``
* cold sphere j: ``Q_C,j = (1 - C_C,j / C_B,j) x 100``
* background variability: ``N_j = SD_j / C_B,j x 100`` with ``SD_j`` the sample SD
  (K - 1 in the denominator) of the K = 60 background ROI means of size j
* lung residual in slice i: ``dC_lung,i = C_lung,i / C_B x 100``

``C_B,j`` is the mean of the K background ROI means of size j; ``a_H / a_B`` the true
sphere : background activity concentration ratio.
"""

from __future__ import annotations

import math

import numpy as np


def percent_contrast_hot(sphere_mean: float, background_mean: float, activity_ratio: float) -> float:
    """Percent contrast of a hot sphere, NEMA NU 2 ``Q_H`` (%).

    Parameters
    ----------
    sphere_mean : float
        ``C_H``: mean in the sphere ROI, Bq/mL.
    background_mean : float
        ``C_B``: mean of the background ROIs of the same size, Bq/mL.
    activity_ratio : float
        ``a_H / a_B``: true sphere : background concentration ratio (> 1).
    """
    if activity_ratio <= 1:
        raise ValueError(f"hot-sphere contrast needs an activity ratio above 1, got {activity_ratio}")
    return (sphere_mean / background_mean - 1.0) / (activity_ratio - 1.0) * 100.0


def percent_contrast_cold(sphere_mean: float, background_mean: float) -> float:
    """Percent contrast of a cold sphere, NEMA NU 2 ``Q_C`` (%)."""
    return (1.0 - sphere_mean / background_mean) * 100.0


def background_variability(roi_means: np.ndarray) -> tuple[float, float, float]:
    """Background variability of K background ROI means, NEMA NU 2 ``N`` (%).

    Parameters
    ----------
    roi_means : array_like (K,)
        Mean of each background ROI of one size, Bq/mL.

    Returns
    -------
    (N_pct, C_B, SD) : background variability in %, mean of the ROI means and their sample SD
    (ddof = 1), both in Bq/mL.
    """
    m = np.asarray(roi_means, float)
    if m.size < 2:
        raise ValueError("background variability needs at least two ROIs")
    c_b = float(m.mean())
    sd = float(m.std(ddof=1))
    return sd / c_b * 100.0, c_b, sd


def lung_residual(lung_means: np.ndarray, background_mean: float) -> tuple[float, np.ndarray]:
    """Residual error in the low-density insert, NEMA NU 2 ``dC_lung`` (%).

    Parameters
    ----------
    lung_means : array_like
        Mean in the lung-insert ROI on each slice, Bq/mL.
    background_mean : float
        ``C_B``: mean of the 37 mm background ROIs, Bq/mL.

    Returns
    -------
    (average_pct, per_slice_pct)
    """
    per = np.asarray(lung_means, float) / background_mean * 100.0
    return float(per.mean()), per


# =========================================================================== standard uncertainties
# First-order propagation of the ROI-mean uncertainties (JCGM 100:2008, the GUM, law of
# propagation of uncertainty); the sphere ROI and the background ROIs are independent (at
# least 15 mm apart, beyond the noise correlation).
def u_percent_contrast_hot(c_h: float, u_h: float, c_b: float, u_b: float, ratio: float) -> float:
    """``u(Q_H)`` in % for ``Q_H = (C_H / C_B - 1) / (ratio - 1) x 100`` (first order, GUM)."""
    return 100.0 / (ratio - 1.0) * math.hypot(u_h / c_b, c_h * u_b / c_b**2)


def u_percent_contrast_cold(c_c: float, u_c: float, c_b: float, u_b: float) -> float:
    """``u(Q_C)`` in % for ``Q_C = (1 - C_C / C_B) x 100`` (first order, GUM)."""
    return 100.0 * math.hypot(u_c / c_b, c_c * u_b / c_b**2)


def u_background_variability(n_pct: float, k: int, c_b: float, u_b: float) -> float:
    """``u(N)`` in % for ``N = SD / C_B x 100`` with ``u(SD) = SD / sqrt(2 (K - 1))``."""
    if not math.isfinite(n_pct) or k < 2:
        return float("nan")
    return abs(n_pct) * math.sqrt(1.0 / (2.0 * (k - 1)) + (u_b / c_b) ** 2)
