"""Benchmark the DICOM PET loader against a bare pydicom loop over the same files.

Writes one invented series (default 256 x 256 x 400, int16, Explicit VR Little Endian) into a
temporary folder, then times, interleaved and repeated (best of each kept):

* ``load_dicom(folder)`` (discovery, sorting, checks, units, float32 volume), and
* ``[pydicom.dcmread(f).pixel_array for f in files]`` (bare reading and decoding),

and prints both times, their ratio, and the loader's peak traced memory (tracemalloc) relative
to one float32 volume. Goals: ratio <= 1.15, peak <= 2.5 volumes.

Usage::

    python benchmarks/bench_loader.py [--slices 400] [--matrix 256] [--repeats 3]
"""

from __future__ import annotations

import argparse
import gc
import sys
import tempfile
import time
import tracemalloc
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pydicom

from phantometry.io.dicom import load_dicom
from phantometry.io.dicom_write import write_dicom_series
from phantometry.volume import Volume, affine_from_axes


def _write_series(folder: Path, n_slices: int, matrix: int) -> list[Path]:
    rng = np.random.default_rng(1)
    data = rng.gamma(4.0, 2500.0, size=(n_slices, matrix, matrix)).astype(np.float32)  # invented activity
    affine = affine_from_axes([-255.0, -255.0, -400.0], [1, 0, 0], [0, 1, 0], [0, 0, 1], (2.0, 2.0, 2.0))
    volume = Volume(
        data=data,
        affine=affine,
        acquired_at=datetime(2031, 5, 14, 10, 15, tzinfo=timezone(timedelta(hours=1))),
        nuclide="F-18",
    )
    return write_dicom_series(volume, folder)


def _bare(files: list[Path]) -> list[np.ndarray]:
    return [pydicom.dcmread(f).pixel_array for f in files]


def _timed(function, *args) -> float:
    gc.collect()
    start = time.perf_counter()
    result = function(*args)
    elapsed = time.perf_counter() - start
    del result
    return elapsed


def _peak_bytes(function, *args) -> int:
    gc.collect()
    tracemalloc.start()
    try:
        result = function(*args)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    del result
    return peak


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--slices", type=int, default=400, help="number of slices (default 400)")
    parser.add_argument("--matrix", type=int, default=256, help="rows = columns (default 256)")
    parser.add_argument("--repeats", type=int, default=3, help="interleaved repetitions, best kept (default 3)")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="phantometry-bench-") as tmp:
        folder = Path(tmp)
        start = time.perf_counter()
        files = _write_series(folder, args.slices, args.matrix)
        print(f"wrote {len(files)} files of {args.matrix}x{args.matrix} in {time.perf_counter() - start:.2f} s")

        # warm the page cache and the allocator once for both contenders
        _bare(files)
        load_dicom(folder)
        loader_times, bare_times = [], []
        for _ in range(args.repeats):
            loader_times.append(_timed(load_dicom, folder))
            bare_times.append(_timed(_bare, files))
        loader_best, bare_best = min(loader_times), min(bare_times)
        volume_bytes = args.slices * args.matrix * args.matrix * 4
        loader_peak = _peak_bytes(load_dicom, folder)
        bare_peak = _peak_bytes(_bare, files)

    ratio = loader_best / bare_best
    print(f"load_dicom          best {loader_best:.3f} s  (runs: {', '.join(f'{t:.3f}' for t in loader_times)})")
    print(f"bare pydicom loop   best {bare_best:.3f} s  (runs: {', '.join(f'{t:.3f}' for t in bare_times)})")
    print(f"ratio loader / bare {ratio:.3f}  (goal <= 1.15)")
    print(
        f"peak traced memory  loader {loader_peak / 2**20:.1f} MiB = {loader_peak / volume_bytes:.2f} x float32 volume "
        f"({volume_bytes / 2**20:.1f} MiB; goal <= 2.5); bare loop {bare_peak / 2**20:.1f} MiB"
    )
    return 0 if ratio <= 1.15 and loader_peak <= 2.5 * volume_bytes else 1


if __name__ == "__main__":
    sys.exit(main())
