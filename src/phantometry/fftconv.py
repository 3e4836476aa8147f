"""Linear convolution of real arrays by FFT (``scipy.fft``).

The same results as ``scipy.signal.fftconvolve`` for real N-D arrays (tested against it),
without importing ``scipy.signal`` (and the ``scipy.stats`` it pulls in), which costs most of
a second at every start of the command line and of every comparison worker.
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sfft

from .threads import fft_workers


def fft_convolve(a: np.ndarray, kernel: np.ndarray, mode: str = "full") -> np.ndarray:
    """``a * kernel`` (linear convolution) with ``mode`` ``"full"``, ``"same"`` or ``"valid"``.

    ``"same"`` is centred on ``a`` as ``scipy.signal.fftconvolve`` centres it; ``"valid"`` keeps
    the positions where the kernel lies wholly inside ``a`` (``a`` at least as large as the
    kernel on every axis). Computed in float64 (float32 when both inputs are float32).
    """
    a = np.asarray(a)
    k = np.asarray(kernel)
    if a.ndim != k.ndim:
        raise ValueError("fft_convolve: the array and the kernel must have the same number of axes")
    single = a.dtype == np.float32 and k.dtype == np.float32
    dtype = np.float32 if single else np.float64
    full_shape = [int(n + m - 1) for n, m in zip(a.shape, k.shape)]
    fast = [sfft.next_fast_len(n, real=True) for n in full_shape]
    spec = sfft.rfftn(a.astype(dtype, copy=False), fast, workers=fft_workers())
    spec *= sfft.rfftn(k.astype(dtype, copy=False), fast, workers=fft_workers())
    full = sfft.irfftn(spec, fast, workers=fft_workers())
    del spec
    if mode == "full":
        box = tuple(slice(0, n) for n in full_shape)
    elif mode == "same":
        box = tuple(slice((m - 1) // 2, (m - 1) // 2 + n) for n, m in zip(a.shape, k.shape))
    elif mode == "valid":
        if any(m > n for n, m in zip(a.shape, k.shape)):
            raise ValueError("fft_convolve: mode 'valid' needs the array at least as large as the kernel")
        box = tuple(slice(m - 1, n) for n, m in zip(a.shape, k.shape))
    else:
        raise ValueError(f"fft_convolve: unknown mode {mode!r} (full, same or valid)")
    return np.ascontiguousarray(full[box])
