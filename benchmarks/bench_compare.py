"""Benchmark ``phantometry compare``: parallel workers against sequential ``measure`` calls.

Writes 20 invented reconstructions of one IEC body phantom acquisition, each its own DICOM
series of 128 x 128 x 90 voxels at 2.5 mm (the body phantom is about 300 mm across), with
PSF FWHM from 4 to 11.6 mm and the voxel noise of a Gaussian filter of one white-noise
realisation (CV proportional to FWHM^-1.5). Then, in one run:

(a) sequential: one ``phantometry.measure.measure`` call per series in this process (after one
    untimed warm-up call, so this process has its imports done) -> T_seq; and again with one
    thread per measurement (``phantometry.threads.threads(1)``); and, like for like, the
    workers' own task (``phantometry.compare.measure_series``: CSV, JSON and overlay, no per-series
    recovery-curve picture) one after another with one thread for phantometry and BLAS;
(b) ``phantometry.compare.compare`` over the folder with 2 worker processes, timed from the
    call to its return (worker start-up, discovery, charts included) -> T_cmp;
    (a) and (b) interleaved ``--repeats`` times, the best of each kept (on a shared machine
    other processes only ever add time; every run is printed too);
(c) memory: ``compare`` again over a few series with ``trace_memory=True``; each worker
    reports the tracemalloc peak of its task (numpy buffers included) and its maximum
    resident set size (``resource.getrusage``); also without the overlay picture and without
    the uncertainty and resolution steps, to show where the memory goes.

Goals: speed-up T_seq / T_cmp >= 1.7; peak per worker <= 2.5 x one float32 volume.
Prints the measured numbers; asserts nothing.

Usage::

    python benchmarks/bench_compare.py [--series 20] [--workers 2] [--memory-series 4] [--repeats 3]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np


def main() -> None:
    from phantometry.compare import compare
    from phantometry.measure import measure
    from phantometry.synth import write_synthetic_family

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=20)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--memory-series", type=int, default=4)
    ap.add_argument("--repeats", type=int, default=3, help="interleaved repetitions, best kept (default 3)")
    args = ap.parse_args()
    fwhms = np.linspace(4.0, 11.6, args.series)
    settings = [
        {"fwhm_mm": float(f), "noise_cv": float(0.15 * (4.0 / f) ** 1.5), "filter": f"Gauss {f:.1f}mm",
         "method": f"OSEM {2 + n % 3}i21s"}
        for n, f in enumerate(fwhms)
    ]
    print(f"load average at start: {' '.join(open('/proc/loadavg').read().split()[:3])} on {os.cpu_count()} CPUs"
          if os.path.exists("/proc/loadavg") else f"{os.cpu_count()} CPUs")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        fam = write_synthetic_family(tmp / "recons", settings, voxel_mm=2.5, matrix=(128, 128, 90))
        volume_bytes = 128 * 128 * 90 * 4
        print(f"wrote {args.series} series of 128x128x90 (2.5 mm) in {time.perf_counter() - t0:.1f} s; "
              f"one float32 volume = {volume_bytes / 2**20:.2f} MiB")

        measure(fam["series"][0], fill=fam["fill"], out=tmp / "warm")  # imports and caches of this process
        from phantometry.threads import threads

        # the three timings interleaved, each repeated; the best of each is kept (other
        # processes on a shared machine only ever add time)
        from phantometry.compare import discover_jobs, measure_series
        from phantometry.threads import current_threads, set_threads

        jobs, _ = discover_jobs(tmp / "recons")
        seq, seq1, cmp_, seq_task = [], [], [], []
        for rep in range(args.repeats):
            t0 = time.perf_counter()
            for n, folder in enumerate(fam["series"], start=1):
                measure(folder, fill=fam["fill"], out=tmp / f"seq{rep}" / f"{n:02d}")
            seq.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            result = compare(tmp / "recons", fill=fam["fill"], out=tmp / f"cmp{rep}", workers=args.workers)
            cmp_.append(time.perf_counter() - t0)
            # the same loop with one thread per measurement (as each compare worker runs): the
            # default measure uses every CPU for its FFTs and RC simulations
            with threads(1):
                t0 = time.perf_counter()
                for n, folder in enumerate(fam["series"], start=1):
                    measure(folder, fill=fam["fill"], out=tmp / f"seq1_{rep}" / f"{n:02d}")
                seq1.append(time.perf_counter() - t0)
            # like for like: the workers' own task (measure_series: no recovery-curve picture,
            # which compare draws once for all settings) one after another in this process,
            # with one thread for phantometry and for BLAS, as in a worker
            before = current_threads()
            set_threads(1)
            try:
                t0 = time.perf_counter()
                for job in jobs:
                    measure_series(job, "iec-body", str(fam["fill"]), out_dir=str(tmp / f"task{rep}" / job.folder_name))
                seq_task.append(time.perf_counter() - t0)
            finally:
                set_threads(before)
        t_seq, t_seq1, t_cmp, t_task = min(seq), min(seq1), min(cmp_), min(seq_task)
        failed = len(result.failed)
        per_series = [o.seconds for o in result.outcomes]
        print(f"runs (s): sequential {' '.join(f'{t:.1f}' for t in seq)}; compare {' '.join(f'{t:.1f}' for t in cmp_)}; "
              f"sequential one thread {' '.join(f'{t:.1f}' for t in seq1)}; "
              f"sequential worker tasks {' '.join(f'{t:.1f}' for t in seq_task)}; best of each below")

        print(f"sequential measure x{args.series}: {t_seq:.2f} s ({t_seq / args.series:.2f} s per series)")
        print(f"compare, {args.workers} workers:      {t_cmp:.2f} s (worker time per series {np.mean(per_series):.2f} s; "
              f"{failed} failed)")
        print(f"speed-up: {t_seq / t_cmp:.2f}  (goal >= 1.7)")
        print(f"  (against sequential measure with one thread per measurement, {t_seq1:.2f} s: {t_seq1 / t_cmp:.2f})")
        print(f"  (like for like: the workers' own tasks one after another in this process, {t_task:.2f} s: "
              f"{t_task / t_cmp:.2f}; {args.workers} workers at most {args.workers:.1f})")
        if os.path.exists("/proc/loadavg"):
            print(f"load average now: {' '.join(open('/proc/loadavg').read().split()[:3])} (other processes on the machine skew the speed-up)")

        subset = fam["series"][: args.memory_series]
        if not subset:
            return
        variants = [
            ("everything (default measure)", True, {}),
            ("no overlay", False, {}),
            ("no overlay, no uncertainties, no resolution fit", False, {"uncertainties": False, "resolution": False}),
        ]
        for what, overlays, options in variants:
            try:
                mem = compare(subset, fill=fam["fill"], out=tmp / f"mem{len(what)}", workers=args.workers,
                              trace_memory=True, overlays=overlays, measure_options=options)
            except TypeError as exc:  # measure_volume without these options
                print(f"peak memory ({what}): not measured ({exc})")
                continue
            peaks = [o.peak_traced_bytes / o.volume_bytes for o in mem.outcomes if o.peak_traced_bytes and o.volume_bytes]
            rss = max(o.peak_rss_bytes or 0 for o in mem.outcomes) / 2**20
            print(f"peak traced memory per worker task, {what}: max {max(peaks):.2f} x volume "
                  f"({max(peaks) * volume_bytes / 2**20:.1f} MiB); worker max RSS {rss:.0f} MiB (interpreter and libraries included)")
        print("goal: peak per worker <= 2.5 x one float32 volume")


if __name__ == "__main__":
    main()
