"""User templates (analysis kind ``inserts``): every insert confirmed in the image by its
contrast against the template's expectation at the image's resolution; placement quality of
the reference VOI and of every insert VOI."""

from __future__ import annotations

import math

import numpy as np
import pytest
import yaml

from phantometry.bands import load_band_set
from phantometry.fill import FillRecord
from phantometry.measure import analysis_json, judge, measure_volume
from phantometry.phantoms import load_template
from phantometry.phantoms._placement import ball_overlap_fraction, disc_overlap_fraction
from phantometry.synth import SynthSpec, synthesize

TPL = load_template("site-rod-cylinder")


def _vals(a):
    return {(r.roi, r.metric): r.value for r in a.rows}


def test_every_insert_confirmed_on_the_shipped_example():
    res = synthesize(SynthSpec(phantom="site-rod-cylinder", voxel_mm=(3.0,) * 3, noise_cv=0.08, seed=9,
                               shift_mm=(4.0, -3.0, 2.0), rotation_deg=(1.0, 1.5, 75.0), flip=True))
    a = measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))
    vals = _vals(a)
    inserts = [i.name for i in TPL.inserts]
    for name in inserts:
        # measured contrast / contrast the template predicts at the found resolution: near 1
        assert 0.85 < vals[(name, "contrast_confirmation")] < 1.2, name
    checks = {c.roi_set: c for c in a.placement_checks}
    assert set(checks) == {"reference_voi", *inserts}
    assert all(c.confirmed and c.min_inside_fraction == 1.0 for c in checks.values())
    assert not any(w.startswith("WARNING") for w in a.warnings)
    doc = analysis_json(a)
    found = doc["localisation"]["body_found"]
    # the synthesizer's PSF (6 mm) with the 3 mm voxel cell: sqrt(6^2 + 2.355^2 * 9/12)
    assert found["psf_fwhm_mm"] == pytest.approx(math.sqrt(36 + 2.3548**2 * 9 / 12), rel=0.1)
    assert found["radius_mm"] == pytest.approx(100.0, abs=0.5)
    assert found["z_range_mm"][1] - found["z_range_mm"][0] == pytest.approx(180.0, abs=2.0)


def _moved_insert_template(tmp_path) -> str:
    """The example phantom as built by a maker who put the 16 mm rod somewhere else."""
    data = yaml.safe_load(open(TPL.source_path, encoding="utf-8"))
    for ins in data["inserts"]:
        if ins["name"] == "rod_16mm":
            ins["centre_mm"] = [-35.0, -35.0, 45]
    data["name"] = "site-rod-cylinder-moved"
    path = tmp_path / "site-rod-cylinder-moved.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    return str(path)


def test_misplaced_insert_is_flagged_and_its_verdicts_withheld(tmp_path):
    phantom = _moved_insert_template(tmp_path)
    res = synthesize(SynthSpec(phantom=phantom, voxel_mm=(3.0,) * 3, noise_cv=0.05, seed=3, rotation_deg=(0.0, 0.0, 30.0)))
    a = measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))
    vals = _vals(a)
    assert vals[("rod_16mm", "contrast_confirmation")] < 0.5
    assert any("insert rod_16mm is not confirmed" in w for w in a.warnings)
    checks = {c.roi_set: c for c in a.placement_checks}
    assert not checks["rod_16mm"].confirmed
    for name in ("rod_8mm", "rod_12mm", "rod_25mm", "cold_insert"):
        assert checks[name].confirmed, name
        assert vals[(name, "contrast_confirmation")] > 0.8, name
    bands = tmp_path / "rods.yaml"
    bands.write_text(yaml.safe_dump({
        "phantometry_bands": 1, "name": "rods", "title": "test bands", "template": "site-rod-cylinder",
        "source": "invented for this test", "recalled": False,
        "entries": [{"roi": "rod_16mm", "metric": "rc_mean", "low": 0.0, "high": 2.0},
                    {"roi": "rod_25mm", "metric": "rc_mean", "low": 0.0, "high": 2.0}],
    }), encoding="utf-8")
    judge(a, [load_band_set(bands)])
    verdict = {(r.roi, r.metric): r.verdict for r in a.rows}
    assert verdict[("rod_16mm", "rc_mean")] == "n/a"
    assert verdict[("rod_25mm", "rc_mean")] == "pass"


def test_overlap_fractions_against_numeric_integration():
    # lens areas / volumes of two circles / spheres (closed forms) against a Monte Carlo count
    rng = np.random.default_rng(0)
    for d, r, R in [(0.0, 1.0, 2.0), (1.5, 1.0, 2.0), (2.5, 1.0, 2.0), (0.5, 2.0, 1.0), (3.5, 1.0, 2.0)]:
        p = rng.uniform(-1, 1, (400_000, 3))
        p2 = p[np.linalg.norm(p[:, :2], axis=1) <= 1][:, :2] * r
        assert disc_overlap_fraction(d, r, R) == pytest.approx(float((np.hypot(p2[:, 0] - d, p2[:, 1]) <= R).mean()), abs=0.01)
        p3 = p[np.linalg.norm(p, axis=1) <= 1] * r
        inside = np.linalg.norm(p3 - [d, 0, 0], axis=1) <= R
        assert ball_overlap_fraction(d, r, R) == pytest.approx(float(inside.mean()), abs=0.01)
