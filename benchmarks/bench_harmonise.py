"""Benchmark the harmonising-filter sweep against the measure analysis of the same scan.

Synthesises one invented IEC body phantom scan of 256 x 256 x 400 voxels at 2 mm (the
benchmark scan of ``bench_measure.py``, filled 10:1 as the harmonisation bands assume), then in
one run times:

(a) the ``measure`` analysis after loading (``measure_volume``: localisation, every metric,
    noise model, resolution fit, uncertainties);
(b) the whole harmonisation after loading (``harmonise_volume``: that analysis without its
    uncertainties, then the sweep of 41 Gaussian post-filters, 0 to 10 mm in 0.25 mm, against
    the shipped band set eanm-fdg-2015, every banded value with its uncertainty).

Goal: (b) / (a) <= 3. Prints the measured numbers; asserts nothing.

Usage::

    python benchmarks/bench_harmonise.py [--matrix 256] [--slices 400] [--repeats 3]
"""

from __future__ import annotations

import argparse
import gc
import time

from phantometry.fill import FillRecord
from phantometry.harmonise import harmonise_volume
from phantometry.measure import measure_volume
from phantometry.synth import SynthSpec, synthesize
from phantometry.templates import load_template


def best_of(n: int, fn) -> tuple[float, object]:
    times = []
    out = None
    for _ in range(n):
        gc.collect()
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--matrix", type=int, default=256)
    ap.add_argument("--slices", type=int, default=400)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--bands", default="eanm-fdg-2015")
    args = ap.parse_args()
    t0 = time.perf_counter()
    res = synthesize(SynthSpec(voxel_mm=(2.0, 2.0, 2.0), matrix=(args.matrix, args.matrix, args.slices), psf_fwhm_mm=4.0, sphere_ratio=10.0,
                               background_kbq_ml=2.0, noise_cv=0.1, rotation_deg=(2, -1, 25), shift_mm=(5, -3, 40)))
    print(f"synthesised {args.matrix}x{args.matrix}x{args.slices} in {time.perf_counter() - t0:.1f} s")
    tpl = load_template("iec-body")
    fill = FillRecord.from_dict(res.fill_record)
    volume = res.volume
    # interleaved, so both see the same machine load
    t_measure, t_harmonise = [], []
    h = None
    for _ in range(args.repeats):
        t_measure.append(best_of(1, lambda: measure_volume(volume, tpl, fill))[0])
        t, h = best_of(1, lambda: harmonise_volume(volume, tpl, fill, [args.bands]))
        t_harmonise.append(t)
    tm, th = min(t_measure), min(t_harmonise)
    print(f"(a) measure analysis after loading: {tm:.3f} s")
    print(f"(b) harmonise after loading ({len(h.steps)} filters, {h.fwhms[0]:g}-{h.max_fwhm_mm:g} mm, bands {args.bands}): {th:.3f} s")
    print(f"    ratio (b) / (a): {th / tm:.2f} (goal <= 3)")
    o = h.overall
    if o.found:
        print(f"    recommended {o.recommended_mm:g} mm, passing {o.low_mm:g}-{o.high_mm:g} mm")
    else:
        print(f"    no passing filter: {o.reason}")


if __name__ == "__main__":
    main()
