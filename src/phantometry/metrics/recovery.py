"""Recovery coefficients of hot spheres against the true (decay-corrected) concentration.

* ``rc_max``: hottest voxel in the sphere VOI / true concentration;
* ``rc_mean``: mean of the background-adapted 50 % isocontour VOI (threshold
  ``0.5 x (max + background)``) / true concentration, the "A50" of the EANM FDG PET/CT
  procedure guidelines v2.0 and its accreditation specification (Boellaard et al., Eur J Nucl
  Med Mol Imaging 2015;42:328-354);
* ``rc_peak``: highest mean of a 1 mL sphere (12.41 mm diameter) whose centre lies within the
  sphere / true concentration (PERCIST, Wahl et al., J Nucl Med 2009;50 Suppl 1:122S-150S).
"""

from __future__ import annotations

import numpy as np

from ..rois import isocontour_mean, max_in_sphere, peak_search
from ..volume import Volume


def recovery_coefficients(
    volume: Volume,
    centre_mm: np.ndarray,
    diameter_mm: float,
    true_bq_ml: float,
    background_bq_ml: float,
    *,
    peak_diameter_mm: float = 12.41,
    isocontour_fraction: float = 0.5,
) -> dict[str, float]:
    """RC max, mean (A50) and peak of one hot sphere (dimensionless).

    Parameters
    ----------
    centre_mm : (3,) world mm of the sphere centre.
    diameter_mm : inner diameter, mm.
    true_bq_ml : true concentration in the sphere at the image reference time, Bq/mL.
    background_bq_ml : measured background concentration, Bq/mL (for the A50 threshold).
    """
    if true_bq_ml <= 0:
        raise ValueError("recovery coefficients need a positive true concentration")
    vmax, _ = max_in_sphere(volume, centre_mm, diameter_mm)
    mean50, n_vox, _ = isocontour_mean(volume, centre_mm, diameter_mm, background_bq_ml, isocontour_fraction)
    peak, _ = peak_search(volume, centre_mm, diameter_mm, peak_diameter_mm)
    return {
        "rc_max": vmax / true_bq_ml,
        "rc_mean": mean50 / true_bq_ml,
        "rc_peak": peak / true_bq_ml,
        "isocontour_voxels": float(n_vox),
    }
