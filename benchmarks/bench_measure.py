"""Benchmark the body-phantom analysis on a large series.

Synthesises one invented IEC body phantom scan of 256 x 256 x 400 voxels at 2 mm, writes it as
DICOM once, then in one run times:

(a) the analysis after loading (``measure_volume``: localisation, every ROI, every metric);
(b) the end-to-end ``measure`` (load, analyse, write CSV/JSON/overlay) divided by a bare loop
    of ``pydicom.dcmread(f).pixel_array`` over the same files.

Goals: (a) <= 1.0 s on 2 cores, (b) <= 1.3. Prints the measured numbers; asserts nothing.

Usage::

    python benchmarks/bench_measure.py [--matrix 256] [--slices 400] [--repeats 3]
"""

from __future__ import annotations

import argparse
import gc
import tempfile
import time
from pathlib import Path

import pydicom

from phantometry.fill import FillRecord
from phantometry.io.dicom import load_dicom
from phantometry.measure import measure, measure_volume
from phantometry.synth import SynthSpec, synthesize, write_synthetic
from phantometry.templates import load_template


def best_of(n: int, fn) -> float:
    times = []
    for _ in range(n):
        gc.collect()
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--matrix", type=int, default=256)
    ap.add_argument("--slices", type=int, default=400)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        res = synthesize(SynthSpec(voxel_mm=(2.0, 2.0, 2.0), matrix=(args.matrix, args.matrix, args.slices), noise_cv=0.1, rotation_deg=(2, -1, 25), shift_mm=(5, -3, 40)))
        paths = write_synthetic(res, tmp / "scan", "dicom")
        print(f"synthesised and wrote {args.matrix}x{args.matrix}x{args.slices} in {time.perf_counter() - t0:.1f} s")
        files = sorted(Path(paths["image"]).glob("*.dcm")) or sorted(p for p in Path(paths["image"]).iterdir() if p.is_file())
        tpl = load_template("iec-body")
        fill = FillRecord.from_dict(res.fill_record)
        volume = load_dicom(paths["image"])
        t_analysis = best_of(args.repeats, lambda: measure_volume(volume, tpl, fill))
        t_core = best_of(args.repeats, lambda: measure_volume(volume, tpl, fill, uncertainties=False, resolution=False))
        volume = None  # release it before the end-to-end timing
        t_bare = best_of(args.repeats, lambda: [pydicom.dcmread(f).pixel_array for f in files])
        t_e2e = best_of(args.repeats, lambda: measure([paths["image"]], template="iec-body", fill=paths["fill"], out=tmp / "out", overwrite=True))
        print(f"(a) analysis after loading: {t_analysis:.3f} s (goal <= 1.0 s)")
        print(f"    of which localisation + NU 2 + RC metrics alone: {t_core:.3f} s "
              f"(uncertainties and FWHM fit: {t_analysis - t_core:.3f} s)")
        print(f"    bare pydicom read of {len(files)} files: {t_bare:.3f} s")
        print(f"(b) end-to-end measure: {t_e2e:.3f} s; ratio to bare read {t_e2e / t_bare:.2f} (goal <= 1.3)")


if __name__ == "__main__":
    main()
