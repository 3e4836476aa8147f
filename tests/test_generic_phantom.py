"""A user-defined phantom (the invented in-house cylinder shipped as a worked example)."""

import math

import numpy as np
import pytest
from scipy import stats

from phantometry.fill import FillRecord
from phantometry.locate import locate_generic
from phantometry.measure import measure, measure_volume
from phantometry.synth import FWHM_PER_SIGMA, SynthSpec, synthesize, write_synthetic
from phantometry.phantoms import check_template, load_template

TPL = load_template("site-rod-cylinder")


def test_example_template_is_found_and_sound():
    assert TPL.source_path.endswith("examples/site-rod-cylinder.yaml")
    assert check_template(TPL) == []


def test_localisation_of_user_phantom():
    rng = np.random.default_rng(11)
    errs = []
    for trial in range(3):
        res = synthesize(SynthSpec(phantom="site-rod-cylinder", voxel_mm=(4,) * 3, noise_cv=0.1, seed=trial,
                                   shift_mm=tuple(rng.uniform(-15, 15, 3)),
                                   rotation_deg=(rng.uniform(-5, 5), rng.uniform(-5, 5), rng.uniform(0, 360)), flip=bool(trial % 2)))
        conc = {n: d["concentration_bq_ml"] for n, d in res.truth["inserts"].items()}
        pl = locate_generic(res.volume, TPL, concentrations=conc)
        errs += [float(np.linalg.norm(pl.insert_centre(n) - np.array(d["centre_mm"]))) for n, d in res.truth["inserts"].items()]
    assert np.mean(errs) < 0.5 and np.max(errs) < 1.0


def test_rod_recovery_matches_closed_form():
    # Long rod of radius R with a cold wall w in background b, blurred by a 2-D Gaussian: at
    # distance rho from the axis the value is c P(R) + b (1 - P(R + w)), with
    # P(R) = ncx2.cdf(R^2/s^2, 2, rho^2/s^2) (scipy.stats, reference library); averaged over
    # the VOI (0.8 x the diameter). s^2 = sigma^2 + d^2/12 (voxel cell means).
    vox, fwhm, ratio = 2.0, 6.0, 4.0
    res = synthesize(SynthSpec(phantom="site-rod-cylinder", voxel_mm=(vox,) * 3, psf_fwhm_mm=fwhm, sphere_ratio=ratio, noise_cv=0))
    a = measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))
    vals = {(r.roi, r.metric): r.value for r in a.rows}
    s = math.sqrt((fwhm / FWHM_PER_SIGMA) ** 2 + vox**2 / 12)
    for ins in TPL.inserts:
        r_in, w = ins.diameter_mm / 2, ins.wall_mm
        rho = np.sqrt(np.linspace(0, (0.8 * r_in) ** 2, 2001))  # uniform over the VOI disc area
        P = lambda R: stats.ncx2.cdf((R / s) ** 2, 2, (rho / s) ** 2)  # noqa: E731
        if ins.role == "rod":
            expected = float(np.mean(ratio * P(r_in) + (1 - P(r_in + w)))) / ratio
            assert vals[(ins.name, "rc_mean")] == pytest.approx(expected, rel=0.02), ins.name
        else:
            expected = float(np.mean(1 - P(r_in + w)))
            assert vals[(ins.name, "spillover_ratio")] == pytest.approx(expected, abs=0.01)
    assert vals[("reference", "activity_recovery")] == pytest.approx(1.0, abs=0.01)


def test_user_template_from_a_folder_by_name(tmp_path):
    import yaml

    data = yaml.safe_load(open(TPL.source_path))
    data["name"] = "my-cylinder"
    (tmp_path / "tpl").mkdir()
    (tmp_path / "tpl" / "my-cylinder.yaml").write_text(yaml.safe_dump(data))
    res = synthesize(SynthSpec(phantom="site-rod-cylinder", voxel_mm=(4,) * 3, noise_cv=0.05))
    paths = write_synthetic(res, tmp_path / "scan")
    a = measure([paths["image"]], template="my-cylinder", fill=paths["fill"], out=tmp_path / "out", templates_dirs=[str(tmp_path / "tpl")])
    assert a.template.name == "my-cylinder"
    assert (tmp_path / "out" / "overlay.png").exists()
