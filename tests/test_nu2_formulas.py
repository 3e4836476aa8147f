"""NEMA NU 2 image-quality formulas worked by hand.

Formulas as recalled from NEMA NU 2 (image quality section); the hand-worked numbers below
are arithmetic on those formulas.
"""

import numpy as np
import pytest

from phantometry.metrics.nu2 import background_variability, lung_residual, percent_contrast_cold, percent_contrast_hot


@pytest.mark.parametrize(
    "c_h, c_b, ratio, expected",
    [
        # (16000/5000 - 1) / (4 - 1) * 100 = 2.2 / 3 * 100 = 73.333...
        (16000.0, 5000.0, 4.0, 73.3333333333),
        # (45000/5000 - 1) / (10 - 1) * 100 = 8/9*100 = 88.888...
        (45000.0, 5000.0, 10.0, 88.8888888889),
        # sphere equal to background: no contrast
        (5000.0, 5000.0, 4.0, 0.0),
    ],
)
def test_hot_contrast_by_hand(c_h, c_b, ratio, expected):
    assert percent_contrast_hot(c_h, c_b, ratio) == pytest.approx(expected, abs=1e-8)


def test_hot_contrast_refuses_ratio_at_or_below_one():
    with pytest.raises(ValueError):
        percent_contrast_hot(2.0, 1.0, 1.0)


@pytest.mark.parametrize("c_c, c_b, expected", [(1500.0, 5000.0, 70.0), (0.0, 5000.0, 100.0), (5000.0, 5000.0, 0.0)])
def test_cold_contrast_by_hand(c_c, c_b, expected):
    # (1 - 1500/5000) * 100 = 70
    assert percent_contrast_cold(c_c, c_b) == pytest.approx(expected)


def test_background_variability_by_hand():
    # means 9, 10, 11, 10: mean 10, sample SD sqrt((1+0+1+0)/3) = 0.8165, N = 8.165 %
    n_pct, c_b, sd = background_variability([9.0, 10.0, 11.0, 10.0])
    assert c_b == pytest.approx(10.0)
    assert sd == pytest.approx(np.sqrt(2 / 3))
    assert n_pct == pytest.approx(100 * np.sqrt(2 / 3) / 10)


def test_background_variability_uses_k_minus_one():
    rng = np.random.default_rng(3)
    m = rng.normal(100, 5, 60)
    n_pct, c_b, sd = background_variability(m)
    assert sd == pytest.approx(np.std(m, ddof=1))  # sample SD, K - 1 (NEMA NU 2, recalled)
    assert sd != pytest.approx(np.std(m, ddof=0))


def test_lung_residual_by_hand():
    # slices 500, 600, 700 Bq/mL over C_B 5000: 10, 12, 14 % -> mean 12 %
    avg, per = lung_residual([500.0, 600.0, 700.0], 5000.0)
    assert per.tolist() == pytest.approx([10.0, 12.0, 14.0])
    assert avg == pytest.approx(12.0)
