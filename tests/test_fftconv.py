"""FFT convolution helper against the reference library (scipy.signal.fftconvolve)."""

import numpy as np
import pytest
from scipy import signal

from phantometry.fftconv import fft_convolve


@pytest.mark.parametrize("mode", ["full", "same", "valid"])
@pytest.mark.parametrize("a_shape, k_shape", [((9, 12, 10), (3, 5, 4)), ((20, 7, 15), (7, 7, 7)), ((6, 6, 6), (6, 1, 3))])
def test_matches_scipy_signal_fftconvolve(mode, a_shape, k_shape):
    rng = np.random.default_rng(sum(a_shape) + sum(k_shape))
    a = rng.normal(size=a_shape)
    k = rng.random(k_shape)
    ref = signal.fftconvolve(a, k, mode=mode)
    out = fft_convolve(a, k, mode=mode)
    assert out.shape == ref.shape
    np.testing.assert_allclose(out, ref, rtol=1e-10, atol=1e-10 * np.abs(ref).max())


def test_single_precision_inputs_stay_single():
    a = np.ones((8, 8, 8), np.float32)
    k = np.ones((3, 3, 3), np.float32)
    out = fft_convolve(a, k, mode="same")
    assert out.dtype == np.float32
    assert out[4, 4, 4] == pytest.approx(27.0, rel=1e-5)


def test_bad_mode_and_shapes_are_refused():
    with pytest.raises(ValueError, match="unknown mode"):
        fft_convolve(np.ones((4, 4)), np.ones((2, 2)), mode="wrap")
    with pytest.raises(ValueError, match="at least as large"):
        fft_convolve(np.ones((2, 4)), np.ones((3, 3)), mode="valid")
    with pytest.raises(ValueError, match="same number of axes"):
        fft_convolve(np.ones((4, 4)), np.ones(3))
