"""Small-animal phantom (NEMA NU 4-2008 image quality): localisation and metrics against
outside truth."""

import math

import numpy as np
import pytest
from scipy import stats

from phantometry.errors import PhantomNotFound
from phantometry.fill import FillRecord
from phantometry.locate import locate_small_animal
from phantometry.measure import measure_volume
from phantometry.metrics.nu4 import ratio_with_std, uniformity
from phantometry.synth import FWHM_PER_SIGMA, SynthSpec, synthesize
from phantometry.phantoms import check_template, load_template

TPL = load_template("small-animal")


def _spec(**kw):
    base = dict(phantom="small-animal", voxel_mm=(0.5,) * 3, psf_fwhm_mm=1.8, background_kbq_ml=150.0, noise_cv=0.0)
    base.update(kw)
    return SynthSpec(**base)


def _vals(analysis):
    return {(r.roi, r.metric): r.value for r in analysis.rows}


def test_template_is_sound():
    # NEMA NU 4-2008 phantom (recalled): rods 1-5 mm, two 8 mm chambers, 30 mm x 50 mm body
    assert [r.diameter_mm for r in TPL.rods] == [1, 2, 3, 4, 5]
    assert {c.name for c in TPL.chambers} == {"cold_water", "cold_air"}
    assert all(c.diameter_mm == 8 for c in TPL.chambers)
    assert TPL.body.diameter_mm == 30 and TPL.body_length_mm == 50
    assert check_template(TPL) == []


def test_localisation_over_random_poses():
    rng = np.random.default_rng(7)
    errs = []
    for trial in range(4):
        res = synthesize(_spec(noise_cv=0.15, seed=trial, shift_mm=tuple(rng.uniform(-5, 5, 3)),
                               rotation_deg=(rng.uniform(-5, 5), rng.uniform(-5, 5), rng.uniform(0, 360)), flip=bool(trial % 2)))
        pl = locate_small_animal(res.volume, TPL, solid_section="solid_section", rod_profile_z_mm=(-15.0, -5.0))
        errs += [float(np.linalg.norm(pl.insert_centre(n) - np.array(d["centre_mm"]))) for n, d in res.truth["inserts"].items()]
    assert np.mean(errs) < 0.3 and np.max(errs) < 0.6


def test_rod_recovery_matches_gaussian_disc_closed_form():
    # A long rod of radius R blurred by a 2-D Gaussian: the value at distance rho from its axis
    # is the noncentral chi-square CDF ncx2.cdf(R^2/s^2, 2, rho^2/s^2) (scipy.stats, reference
    # library); at rho = 0 it is 1 - exp(-R^2 / 2 s^2) = chi(2).cdf(R/s). The voxels are cell
    # means, so s^2 = sigma^2 + d^2/12 (phantometry.synth). Noise-free rc_rod agrees within 2 %.
    vox, fwhm = 0.5, 1.8
    res = synthesize(_spec(voxel_mm=(vox,) * 3, psf_fwhm_mm=fwhm, shift_mm=(0.3, -0.2, 0.1)))
    vals = _vals(measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record)))
    s = math.sqrt((fwhm / FWHM_PER_SIGMA) ** 2 + vox**2 / 12)
    assert stats.ncx2.cdf((2.0 / s) ** 2, 2, 0.0) == pytest.approx(1 - math.exp(-(2.0**2) / (2 * s * s)), rel=1e-9)
    assert stats.chi(2).cdf(2.0 / s) == pytest.approx(1 - math.exp(-(2.0**2) / (2 * s * s)), rel=1e-9)
    for rod in TPL.rods:
        truth = res.truth["inserts"][rod.name]
        peak = np.array([vals[(rod.name, f"centre_{a}_mm")] for a in "xyz"])
        d = peak - np.array(truth["centre_mm"])
        ax = np.array(truth["axis"])
        rho = float(np.linalg.norm(d - (d @ ax) * ax))
        assert rho < vox  # the peak pixel is the one on the rod axis
        expected = stats.ncx2.cdf((rod.diameter_mm / 2 / s) ** 2, 2, (rho / s) ** 2)
        assert vals[(rod.name, "rc_rod")] == pytest.approx(expected, rel=0.02), rod.name


@pytest.mark.parametrize("vox, fwhm", [(1.0, 5.0), (1.5, 6.0)])
def test_spillover_matches_cold_cylinder_closed_form(vox, fwhm):
    # Centre region of a long cold cylinder (radius R = 4 mm + 1 mm cold wall) in uniform
    # activity: 1 - ncx2.cdf(R^2/s^2, 2, rho^2/s^2), exp(-R^2/2s^2) on the axis (closed form of
    # the Gaussian integral over a disc), averaged over the 4 mm VOI. Within 10 % (the chambers
    # are 15 mm long, not infinite).
    res = synthesize(_spec(voxel_mm=(vox,) * 3, psf_fwhm_mm=fwhm, shift_mm=(0.3, -0.2, 0.1)))
    vals = _vals(measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record)))
    s = math.sqrt((fwhm / FWHM_PER_SIGMA) ** 2 + vox**2 / 12)
    rho = np.sqrt(np.linspace(0, 4, 4001))  # radii uniform over the area of a 2 mm disc
    expected = float(np.mean(1 - stats.ncx2.cdf((5.0 / s) ** 2, 2, (rho / s) ** 2)))
    assert math.exp(-(5.0**2) / (2 * s * s)) == pytest.approx(1 - stats.ncx2.cdf((5.0 / s) ** 2, 2, 0.0), rel=1e-9)
    for chamber in ("cold_water", "cold_air"):
        assert vals[(chamber, "spillover_ratio")] == pytest.approx(expected, rel=0.10)


def test_uniformity_reflects_noise_level():
    res = synthesize(_spec(noise_cv=0.12, seed=3, voxel_mm=(0.6,) * 3))
    vals = _vals(measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record)))
    assert vals[("uniform_region", "mean_bq_ml")] == pytest.approx(150_000, rel=0.02)
    assert vals[("uniform_region", "uniformity_std_pct")] == pytest.approx(12.0, rel=0.15)
    assert vals[("uniform_region", "max_bq_ml")] > vals[("uniform_region", "mean_bq_ml")] > vals[("uniform_region", "min_bq_ml")]
    assert vals[("uniform_region", "activity_recovery")] == pytest.approx(1.0, abs=0.02)


def test_std_propagation_by_hand():
    # NEMA NU 4-2008 (recalled): %STD = 100 sqrt((SD_p/mean_p)^2 + (SD_U/mean_U)^2)
    # profile 8, 10, 12: mean 10, sample SD 2 -> 0.2; uniform mean 20, SD 3 -> 0.15
    ratio, std = ratio_with_std([8.0, 10.0, 12.0], 20.0, 3.0)
    assert ratio == pytest.approx(0.5)
    assert std == pytest.approx(100 * math.sqrt(0.2**2 + 0.15**2))  # 25 %
    u = uniformity([1.0, 2.0, 3.0, 4.0])
    assert u["mean_bq_ml"] == 2.5 and u["max_bq_ml"] == 4 and u["min_bq_ml"] == 1
    assert u["uniformity_std_pct"] == pytest.approx(np.std([1, 2, 3, 4], ddof=1) / 2.5 * 100)


def test_body_template_on_small_animal_scan_suggests_the_right_one():
    res = synthesize(_spec(voxel_mm=(0.8,) * 3))
    with pytest.raises(PhantomNotFound, match="try --template small-animal"):
        measure_volume(res.volume, load_template("iec-body"), FillRecord.from_dict(res.fill_record))


def test_small_animal_template_on_body_scan_suggests_the_right_one():
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, noise_cv=0.05))
    with pytest.raises(PhantomNotFound, match="try --template iec-body"):
        measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))


def test_rods_outside_field_of_view():
    # the grid stops short of the rod section
    res = synthesize(_spec(voxel_mm=(0.8,) * 3, matrix=(50, 50, 48), shift_mm=(0, 0, 17)))
    with pytest.raises(PhantomNotFound, match="field of view|outside"):
        measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))


def test_coarse_voxels_warn_but_measure():
    res = synthesize(_spec(voxel_mm=(1.2,) * 3, psf_fwhm_mm=2.5))
    a = measure_volume(res.volume, TPL, FillRecord.from_dict(res.fill_record))
    assert any("coarse for the 1 mm rod" in w for w in a.warnings)
    assert ("rod_1mm", "rc_rod") in _vals(a)


def test_check_finds_uniform_voi_over_a_chamber():
    from phantometry.templates import template_from_dict

    data = TPL.model_dump(mode="json", exclude={"source_path"})
    data["analysis"]["uniform_voi"]["centre_z_mm"] = 15
    problems = check_template(template_from_dict(data, check=False))
    assert any("uniform_voi" in p and "cold_water" in p for p in problems)
