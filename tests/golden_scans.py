"""Seeded synthetic scans whose every number is kept as a regression record.

``python tests/golden_scans.py`` (re)writes ``tests/data/golden_numbers.json``; the test
``tests/test_golden_numbers.py`` measures the same scans and compares. Re-record only when a
change is meant to change numbers, and say why in the commit message.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from phantometry.fill import FillRecord
from phantometry.measure import measure_volume
from phantometry.synth import SynthSpec, synthesize
from phantometry.templates import load_template

GOLDEN_PATH = Path(__file__).parent / "data" / "golden_numbers.json"

#: name -> (template, SynthSpec keyword arguments, band sets)
SCANS: dict[str, tuple[str, dict, list[str]]] = {
    "body-noisy": ("iec-body", dict(voxel_mm=(4.0,) * 3, psf_fwhm_mm=6.5, sphere_ratio=10.0, background_kbq_ml=2.0, noise_cv=0.12,
                                    shift_mm=(5.0, -7.0, 3.0), rotation_deg=(1.5, -1.0, 33.0), seed=21), ["eanm-fdg-2015"]),
    "body-noisy-slices": ("iec-body", dict(voxel_mm=(4.0,) * 3, psf_fwhm_mm=6.5, sphere_ratio=4.0, noise_cv=0.15,
                                           shift_mm=(2.0, 3.0, -1.3), rotation_deg=(0.0, 0.0, -25.0), seed=8), []),
    "body-noise-free": ("iec-body", dict(voxel_mm=(4.0,) * 3, psf_fwhm_mm=6.0, sphere_ratio=4.0, noise_cv=0.0,
                                         shift_mm=(-3.0, 4.0, -2.0), rotation_deg=(0.0, 2.0, -70.0), flip=True, seed=1), []),
    "small-animal-noisy": ("small-animal", dict(phantom="small-animal", voxel_mm=(0.5,) * 3, psf_fwhm_mm=1.8, background_kbq_ml=150.0,
                                                noise_cv=0.1, shift_mm=(1.0, -0.5, 0.7), rotation_deg=(2.0, 1.0, 50.0), seed=3), []),
    "small-animal-noise-free": ("small-animal", dict(phantom="small-animal", voxel_mm=(0.5,) * 3, psf_fwhm_mm=1.8, background_kbq_ml=150.0,
                                                     noise_cv=0.0, shift_mm=(0.3, -0.2, 0.1), seed=0), []),
    "inserts-noisy": ("site-rod-cylinder", dict(phantom="site-rod-cylinder", voxel_mm=(3.0,) * 3, noise_cv=0.1, sphere_ratio=4.0,
                                                shift_mm=(6.0, -4.0, 2.0), rotation_deg=(1.0, -2.0, 120.0), seed=4), []),
    "inserts-noise-free": ("site-rod-cylinder", dict(phantom="site-rod-cylinder", voxel_mm=(3.0,) * 3, noise_cv=0.0, sphere_ratio=4.0,
                                                     seed=0), []),
}


def measure_scan(name: str) -> dict[str, list]:
    """Every (roi, metric) -> [value, uncertainty] of one golden scan."""
    template, kw, bands = SCANS[name]
    res = synthesize(SynthSpec(**kw))
    analysis = measure_volume(res.volume, load_template(template), FillRecord.from_dict(res.fill_record), bands=bands or None)
    return {f"{r.roi}/{r.metric}": [r.value, r.uncertainty, r.verdict] for r in analysis.rows}


def record() -> None:
    data = {name: measure_scan(name) for name in SCANS}
    GOLDEN_PATH.parent.mkdir(parents=True, exist_ok=True)
    GOLDEN_PATH.write_text(json.dumps(data, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    print(f"wrote {GOLDEN_PATH} ({sum(len(v) for v in data.values())} numbers of {len(data)} scans)")


if __name__ == "__main__":
    sys.exit(record())
