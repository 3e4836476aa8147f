"""Thread counts: phantometry's own FFT/simulation threads and the BLAS pools (threadpoolctl)."""

from __future__ import annotations

import os

import numpy as np

from phantometry import threads as th
from phantometry.compare import worker_pool


def _worker_threads() -> tuple[int, dict[str, int]]:
    np.ones((64, 64)) @ np.ones((64, 64))  # BLAS is loaded and used
    return th.fft_workers(), th.library_threads()


def test_set_threads_caps_the_blas_pools_and_restores_them():
    before = th.library_threads()
    assert before, "numpy's BLAS pool should be visible to threadpoolctl"
    try:
        th.set_threads(1)
        assert th.fft_workers() == 1
        assert set(th.library_threads().values()) == {1}
        th.set_threads(2)
        assert th.fft_workers() == 2
        assert set(th.library_threads().values()) <= {1, 2}
    finally:
        th.set_threads(None)
    assert th.library_threads() == before
    assert th.current_threads() is None


def test_worker_pool_gives_each_worker_its_share():
    n_workers = 2
    share = max(1, (os.cpu_count() or 1) // n_workers)
    pool = worker_pool(n_workers)
    try:
        results = [pool.submit(_worker_threads).result(timeout=120) for _ in range(n_workers)]
    finally:
        pool.shutdown(wait=True)
    for fft, pools in results:
        assert fft == share
        assert pools and set(pools.values()) == {share}, pools
