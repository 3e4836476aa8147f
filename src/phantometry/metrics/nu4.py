"""NEMA NU 4-2008 image-quality metrics of the small-animal phantom (formulas recalled).

* uniformity: mean, maximum, minimum and ``%STD = SD / mean x 100`` of the voxels in a
  22.5 mm diameter, 10 mm long VOI in the uniform region;
* recovery per rod: slices over the central 10 mm of the rods are averaged, the hottest pixel
  within a circle twice the rod diameter is found, and along the axial line profile through
  it ``RC = mean(profile) / mean(uniform)``, with
  ``%STD_RC = 100 sqrt((SD_profile / mean_profile)^2 + (SD_uniform / mean_uniform)^2)``;
* spill-over ratio in each cold chamber: ``SOR = mean(VOI) / mean(uniform)`` in a 4 mm
  diameter, 7.5 mm long VOI, ``%STD_SOR`` propagated in the same way.
SDs are sample SDs (ddof = 1).
"""

from __future__ import annotations

import math

import numpy as np


def uniformity(values: np.ndarray) -> dict[str, float]:
    """Mean, max, min (Bq/mL) and %STD of the uniform-region voxels (NEMA NU 4-2008)."""
    x = np.asarray(values, float).ravel()
    if x.size < 2:
        raise ValueError("uniformity needs at least two voxels")
    mean = float(x.mean())
    return {
        "mean_bq_ml": mean,
        "max_bq_ml": float(x.max()),
        "min_bq_ml": float(x.min()),
        "sd_bq_ml": float(x.std(ddof=1)),
        "uniformity_std_pct": float(x.std(ddof=1)) / mean * 100.0,
    }


def ratio_with_std(values: np.ndarray, uniform_mean: float, uniform_sd: float) -> tuple[float, float]:
    """Ratio of a mean to the uniform mean and its %STD (NEMA NU 4-2008 propagation).

    Used for the rod recovery coefficient (``values`` = the axial line profile) and the
    spill-over ratio (``values`` = the chamber VOI voxels).

    Returns
    -------
    (ratio, std_pct)
    """
    x = np.asarray(values, float).ravel()
    if x.size < 2:
        raise ValueError("needs at least two values")
    m = float(x.mean())
    sd = float(x.std(ddof=1))
    ratio = m / uniform_mean
    rel = (sd / m) ** 2 if m != 0 else math.inf
    return ratio, 100.0 * math.sqrt(rel + (uniform_sd / uniform_mean) ** 2)
