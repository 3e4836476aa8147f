"""How many threads the FFT-heavy steps of one measurement may use.

One measurement on an otherwise idle machine uses every CPU for its Fourier transforms
(``scipy.fft`` ``workers``); :func:`phantometry.compare.compare` runs one measurement per
worker process and gives each its share, so the machine is not oversubscribed. The
environment variable ``PHANTOMETRY_THREADS`` sets the default.
"""

from __future__ import annotations

import contextlib
import os
import threading
from typing import Iterator

_threads: int | None = None
_blas_limits = None  # the threadpoolctl limiter set by set_threads
_local = threading.local()


def fft_workers() -> int:
    """Threads for one FFT (at least 1): this thread's :func:`threads` value, the process's
    :func:`set_threads` value, ``PHANTOMETRY_THREADS``, or the CPU count."""
    mine = getattr(_local, "threads", None)
    if mine is not None:
        return mine
    if _threads is not None:
        return _threads
    env = os.environ.get("PHANTOMETRY_THREADS", "").strip()
    if env.isdigit() and int(env) > 0:
        return int(env)
    return max(1, os.cpu_count() or 1)


def current_threads() -> int | None:
    """The value :func:`set_threads` last set in this process (``None``: the default)."""
    return _threads


def set_threads(n: int | None) -> None:
    """Set the thread count of this process (``None``: back to the default).

    Also caps the thread pools of the BLAS/LAPACK and OpenMP libraries numpy and scipy use
    (through threadpoolctl) at ``n``; ``None`` restores them. Without the cap, every worker
    process of :func:`phantometry.compare.compare` runs an OpenBLAS pool of one thread per
    CPU, and two workers on two CPUs slowed each other's resolution fit 2 to 12 times
    (measured per phase with cProfile, 128 x 128 x 90 series, 2026-12-02).
    """
    global _threads, _blas_limits
    _threads = None if n is None else max(1, int(n))
    from threadpoolctl import threadpool_limits

    if _blas_limits is not None:
        _blas_limits.restore_original_limits()
        _blas_limits = None
    if _threads is not None:
        _blas_limits = threadpool_limits(limits=_threads)


def library_threads() -> dict[str, int]:
    """Threads of each BLAS/OpenMP pool loaded in this process (``{"openblas": 1}``)."""
    from threadpoolctl import threadpool_info

    pools: dict[str, int] = {}
    for pool in threadpool_info():
        name = pool.get("internal_api", "?")
        pools[name] = max(pools.get(name, 0), int(pool.get("num_threads", 0)))
    return pools


@contextlib.contextmanager
def threads(n: int | None) -> Iterator[None]:
    """Context manager: ``n`` threads for the calling thread's block (``None``: the process value)."""
    before = getattr(_local, "threads", None)
    _local.threads = None if n is None else max(1, int(n))
    try:
        yield
    finally:
        _local.threads = before
