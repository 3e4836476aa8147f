"""Uncertainty of every metric: noise autocovariance, effective samples, propagation, Monte Carlo."""

import collections
import math

import numpy as np
import pytest

from phantometry import noise as U
from phantometry.phantoms import body as BODY
from phantometry.metrics import nu2 as NU2
from phantometry.metrics import recovery as RC
from phantometry.rois import centres_in_sphere
from phantometry.errors import PhantomNotFound
from phantometry.fill import FillRecord
from phantometry.locate import Placement
from phantometry.measure import measure_volume
from phantometry.rois import disc_weights, sample_plane
from phantometry.synth import FWHM_PER_SIGMA, SynthSpec, correlated_unit_noise, gaussian_kernel_1d, synthesize
from phantometry.templates import load_template
from phantometry.volume import Volume

TPL = load_template("iec-body")


def _gaussian_noise_model(shape_lags=(3, 3, 3), sigma_vox=1.2, variance=4.0, background=100.0, power=1.0):
    g = np.meshgrid(*[np.arange(-l, l + 1) for l in shape_lags], indexing="ij")
    rho = np.exp(-(g[0] ** 2 + g[1] ** 2 + g[2] ** 2) / (4 * sigma_vox**2))
    return U.NoiseModel(variance * rho, variance, background, 1000, (2.0, 2.0, 2.0), power)


# ----------------------------------------------------------------------------- noise model
@pytest.fixture(scope="module")
def noisy_body():
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=8.0, noise_cv=0.1, sphere_ratio=4.0, seed=3))
    placement = Placement(TPL, res.rotation, res.translation_mm, 5300.0, 530.0)
    return res, placement


def test_autocovariance_matches_the_synthesizer_kernel(noisy_body):
    # Mathematics: white noise filtered by a separable kernel k has the autocorrelation
    # (k * k)(tau) / sum k^2 per axis; the synthesizer's background voxel SD is cv x b.
    res, placement = noisy_body
    nm = U.estimate_noise(res.volume, placement, TPL)
    assert nm.sd_bq_ml == pytest.approx(0.1 * 5300, rel=0.05)
    assert nm.background_bq_ml == pytest.approx(5300, rel=0.01)
    k = gaussian_kernel_1d(8.0 / FWHM_PER_SIGMA / 4.0)
    ac = np.correlate(k, k, "full") / np.sum(k * k)
    c = len(k) - 1
    L = nm.half_lags
    rho = nm.correlation
    for lag in (1, 2):
        for axis in range(3):
            idx = list(L)
            idx[axis] += lag
            assert rho[tuple(idx)] == pytest.approx(ac[c + lag], abs=0.03), (axis, lag)
    assert nm.correlation_volume_voxels == pytest.approx(ac.sum() ** 3, rel=0.15)
    fw = nm.correlation_fwhm_mm()
    # the autocorrelation of a Gaussian of FWHM F is a Gaussian of FWHM sqrt(2) F (mathematics)
    assert np.mean(fw) == pytest.approx(math.sqrt(2) * 8.0, rel=0.15)


def test_noise_estimate_refuses_a_phantom_outside_the_image(noisy_body):
    res, _ = noisy_body
    away = Placement(TPL, res.rotation, res.translation_mm + np.array([2000.0, 0, 0]), 5300.0, 530.0)
    with pytest.raises(PhantomNotFound, match="background voxels"):
        U.estimate_noise(res.volume, away, TPL)


# ----------------------------------------------------------------------------- quadratic forms
def test_quadratic_form_equals_brute_force_double_sum():
    nm = _gaussian_noise_model()
    a = np.random.default_rng(0).normal(size=(5, 6, 4))
    idx = np.array(np.nonzero(np.ones(a.shape, bool))).T
    lag = idx[:, None, :] - idx[None, :, :]
    L = np.array(nm.half_lags)
    inside = np.all(np.abs(lag) <= L, axis=-1)
    lag_c = np.clip(lag + L, 0, 2 * L)
    C = np.where(inside, nm.autocov_bq2_ml2[lag_c[..., 0], lag_c[..., 1], lag_c[..., 2]], 0.0)
    brute = float(a.ravel() @ C @ a.ravel())
    assert nm.quadratic_form(a) == pytest.approx(brute, rel=1e-10)


def test_white_noise_mean_and_kish_effective_samples():
    # Mathematics: the mean of n independent values of variance s^2 has variance s^2 / n; the
    # effective sample size of weights w is (sum w)^2 / sum w^2 (Kish, Survey Sampling, 1965, recalled).
    white = U.NoiseModel(np.full((1, 1, 1), 9.0), 9.0, 100.0, 1000, (2.0, 2.0, 2.0))
    w = np.ones((4, 5, 6))
    assert white.weighted_mean_variance(w) == pytest.approx(9.0 / w.size)
    w2 = np.random.default_rng(1).uniform(0, 1, (4, 5, 6))
    assert white.effective_samples(w2) == pytest.approx(w2.sum() ** 2 / (w2**2).sum())
    # correlated noise: fewer independent samples in a large uniform ROI, about n / sum(rho)
    corr = _gaussian_noise_model()
    big = np.ones((30, 30, 30))
    assert corr.effective_samples(big) == pytest.approx(big.size / corr.correlation_volume_voxels, rel=0.25)


def test_level_law_linear_form_matches_exact_for_smooth_levels():
    # For p = 1 the variance is sum a_x a_y C sqrt(L_x L_y) / b; the linear form replaces the
    # geometric by the arithmetic mean of nearby levels: equal for a smooth level (mathematics).
    nm = _gaussian_noise_model(background=100.0)
    shape = (8, 9, 10)
    z = np.arange(shape[0])[:, None, None] * np.ones(shape)
    level = 200.0 + 15.0 * z  # smooth ramp, Bq/mL
    vol = Volume(level.astype(np.float32), np.diag([2.0, 2.0, 2.0, 1.0]))
    box = tuple(slice(0, n) for n in shape)
    a = np.ones(shape) / np.prod(shape)
    exact = nm.quadratic_form(a * np.sqrt(level / 100.0))
    assert U._scaled_quadratic_form(nm, vol, box, a, True) == pytest.approx(exact, rel=0.005)


def test_plane_roi_spreads_exactly_onto_voxels():
    rng = np.random.default_rng(1)
    data = rng.normal(size=(30, 40, 40)).astype(np.float32)
    aff = np.diag([2.0, 2.0, 3.0, 1.0])
    aff[:3, 3] = [-40, -40, -45]
    vol = Volume(data, aff)
    u = np.array([1, 0.2, 0.1]) / np.linalg.norm([1, 0.2, 0.1])
    v = np.cross([0.1, -0.1, 1], u)
    v /= np.linalg.norm(v)
    plane = sample_plane(vol, np.array([1.3, -2.1, 0.7]), u, v, 20)
    b2, w2 = disc_weights(plane, plane.centre_uv_mm + [1.1, -0.4], 17)
    b3, w3 = U.plane_voxel_weights(vol, plane, b2, w2)
    assert (w3 * data[b3]).sum() == pytest.approx((w2 * plane.values[b2]).sum(), rel=1e-9)
    assert w3.sum() == pytest.approx(w2.sum(), rel=1e-12)


def test_simulated_noise_has_the_model_autocovariance():
    nm = _gaussian_noise_model(variance=4.0)
    z = U.simulate_noise(nm, (14, 14, 14), 300, np.random.default_rng(2))
    assert np.var(z) == pytest.approx(4.0, rel=0.05)
    lag1 = np.mean(z[:, 1:, :, :] * z[:, :-1, :, :])
    assert lag1 == pytest.approx(nm.autocov_bq2_ml2[4, 3, 3], rel=0.08)


@pytest.mark.parametrize("shape", [(9, 8, 11), (8, 9, 10)])  # odd and even last axis (with a Nyquist plane)
def test_spectral_synthesis_reproduces_every_lag_of_the_model(shape):
    # Known truth: the model autocovariance itself. Fourier components drawn directly in the
    # half spectrum must give the covariance C(tau) at lags along every axis and diagonals,
    # the zero and Nyquist planes of the last axis included (they stand for themselves only).
    nm = _gaussian_noise_model(shape_lags=(3, 2, 4), sigma_vox=0.9)
    z = U.simulate_noise(nm, shape, 12000, np.random.default_rng(5)).astype(np.float64)
    assert z.shape == (12000, *shape)
    c = nm.autocov_bq2_ml2
    centre = np.array(c.shape) // 2
    for lag in [(0, 0, 0), (1, 0, 0), (0, 1, 0), (0, 0, 1), (1, 1, 0), (1, -1, 2), (0, 2, 0), (2, 0, 0)]:
        a = tuple(slice(max(0, -l), n - max(0, l)) for l, n in zip(lag, shape))
        b = tuple(slice(max(0, l), n - max(0, -l)) for l, n in zip(lag, shape))
        emp = float(np.mean(z[(slice(None), *a)] * z[(slice(None), *b)]))
        assert emp == pytest.approx(float(c[tuple(centre + lag)]), abs=0.03 * float(c[tuple(centre)])), lag
    assert np.abs(np.mean(z, axis=0)).max() < 0.1  # zero mean at every voxel (SE 2/sqrt(12000) = 0.018)
    per_voxel = z.var(axis=0)
    assert per_voxel.mean() == pytest.approx(4.0, rel=0.01)
    assert per_voxel.min() > 3.75 and per_voxel.max() < 4.25  # stationary (SE of each 0.052: within 5 SE)


def test_simulated_searches_equal_the_roi_engine_on_the_same_draws(monkeypatch):
    # Reference: the ROI engine's own searches (phantometry.rois.max_in_sphere,
    # isocontour_mean, peak_search) run on every simulated image; the simulation's SDs of
    # RC max / mean / peak must equal the SDs of those results (same voxels, same rules).
    from phantometry.metrics.resolution import blurred_ball_profile
    from phantometry.rois import isocontour_mean, max_in_sphere, peak_search

    nm = _gaussian_noise_model(sigma_vox=0.8, variance=400.0, power=0.0)  # constant noise level
    aff = np.diag([2.0, 2.0, 2.0, 1.0])
    aff[:3, 3] = [-40.0, -40.0, -36.0]
    shape = (37, 41, 41)
    centre = np.array([1.3, -0.7, 0.4])
    diameter, bg = 17.0, 100.0

    def model_fn(points):
        r = np.linalg.norm(np.asarray(points, float) - centre, axis=-1)
        return bg + 300.0 * blurred_ball_profile(r, diameter / 2, 2.5)

    kk, jj, ii = np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij")
    vol = Volume(np.zeros(shape, np.float32), aff)
    truth = model_fn(vol.index_to_world(np.stack([kk, jj, ii], axis=-1)))
    fields = []
    real = U.noise_fields

    def recording(*args):
        out = real(*args)
        fields.append(out.copy())
        return out

    monkeypatch.setattr(RC, "noise_fields", recording)
    sds = RC.bootstrap_search_sd(nm, vol, centre, diameter, bg, model_fn, n_draws=40, seed=3)
    box, _ = centres_in_sphere(vol, centre, diameter / 2 + 12.41 / 2 + 2 * 2.0)
    draws = np.concatenate(fields, axis=-1)
    assert draws.shape[-1] == 40
    stats = collections.defaultdict(list)
    for n in range(40):
        img = truth.copy()
        img[box] += draws[..., n]
        v = vol.with_data(img.astype(np.float32))
        stats["max"].append(max_in_sphere(v, centre, diameter)[0])
        stats["mean"].append(isocontour_mean(v, centre, diameter, bg, 0.5)[0])
        stats["peak"].append(peak_search(v, centre, diameter, 12.41)[0])
    for key in ("max", "mean", "peak"):
        assert sds[key] == pytest.approx(float(np.std(stats[key], ddof=1)), rel=1e-4), key


# ----------------------------------------------------------------------------- propagation
def test_sd_standard_error_by_simulation():
    # Large-sample normal theory (common practice): SE of a sample SD of K values is SD / sqrt(2 (K - 1)).
    samples = np.random.default_rng(4).normal(0, 2.0, (20000, 60))
    sds = samples.std(axis=1, ddof=1)
    assert sds.std() == pytest.approx(U.sd_standard_error(2.0, 60), rel=0.03)
    assert math.isnan(U.sd_standard_error(1.0, 1))


def _numeric_u(f, xs, us, h=1e-6):
    # the GUM law of propagation (JCGM 100:2008): u^2 = sum (df/dx_i u_i)^2, derivatives numerically
    total = 0.0
    for i in range(len(xs)):
        xp, xm = list(xs), list(xs)
        xp[i] += h * max(1.0, abs(xs[i]))
        xm[i] -= h * max(1.0, abs(xs[i]))
        total += ((f(*xp) - f(*xm)) / (xp[i] - xm[i]) * us[i]) ** 2
    return math.sqrt(total)


def test_propagation_formulas_follow_the_gum_law():
    ch, uh, cb, ub, r = 15000.0, 400.0, 5300.0, 25.0, 4.0
    qh = lambda a, b: (a / b - 1) / (r - 1) * 100  # NEMA NU 2 Q_H (recalled)
    qc = lambda a, b: (1 - a / b) * 100  # NEMA NU 2 Q_C (recalled)
    assert NU2.u_percent_contrast_hot(ch, uh, cb, ub, r) == pytest.approx(_numeric_u(qh, [ch, cb], [uh, ub]), rel=1e-5)
    assert NU2.u_percent_contrast_cold(900.0, 60.0, cb, ub) == pytest.approx(_numeric_u(qc, [900.0, cb], [60.0, ub]), rel=1e-5)
    assert U.u_ratio(40.0, 3.0, cb, ub) == pytest.approx(_numeric_u(lambda a, b: a / b, [40.0, cb], [3.0, ub]), rel=1e-5)
    n_pct = 5.0
    assert NU2.u_background_variability(n_pct, 60, cb, ub) == pytest.approx(n_pct * math.sqrt(1 / 118 + (ub / cb) ** 2))


def test_switches_and_noise_free_image():
    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=8.0, noise_cv=0.0, sphere_ratio=4.0))
    fill = FillRecord.from_dict(res.fill_record)
    centres = {n: np.array(d["centre_mm"]) for n, d in res.truth["inserts"].items() if n.startswith("sphere")}
    bare = measure_volume(res.volume, TPL, fill, overrides=centres, uncertainties=False, resolution=False)
    assert all(r.uncertainty is None for r in bare.rows) and not any(r.roi == "phantom" for r in bare.rows)
    full = measure_volume(res.volume, TPL, fill, overrides=centres)
    u = {(r.roi, r.metric): r.uncertainty for r in full.rows}
    # noise-free: the estimated noise is float32 rounding only, so uncertainties are ~0
    assert u[("background", "mean_bq_ml")] < 0.05 and u[("sphere_37mm", "rc_mean")] < 1e-4
    assert u[("sphere_37mm", "centre_x_mm")] is None  # positions carry no noise uncertainty here
    assert full.noise.as_dict()["voxel_sd_bq_ml"] < 1.0


def test_uncertainties_do_not_depend_on_the_thread_count():
    # The RC simulations run one sphere per thread with a seed per sphere: the same numbers
    # whether one thread or two do the work.
    from phantometry.threads import threads

    res = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=8.0, noise_cv=0.1, sphere_ratio=4.0, seed=7))
    fill = FillRecord.from_dict(res.fill_record)
    runs = []
    for n in (1, 2):
        with threads(n):
            a = measure_volume(res.volume, TPL, fill)
        runs.append({(r.roi, r.metric): (r.value, r.uncertainty) for r in a.rows})
    assert runs[0] == runs[1]
    assert runs[0][("sphere_37mm", "rc_mean")][1] > 0


# ----------------------------------------------------------------------------- Monte Carlo
@pytest.mark.slow
def test_reported_uncertainties_match_monte_carlo(monkeypatch):
    # Known truth by simulation: 50 noise realisations (the synthesizer's noise law,
    # cv sqrt(b m) n with n correlated over the PSF width, phantometry.synth) added to one
    # noise-free 4 mm image; the reported standard uncertainty of each metric (mean over the
    # realisations) must match the SD of the metric across them within 30 % (issue 4). With
    # 50 samples the empirical SD itself scatters by about 10 %.
    monkeypatch.setattr(BODY, "BOOTSTRAP_DRAWS", 100)
    base = synthesize(SynthSpec(voxel_mm=(4.0,) * 3, psf_fwhm_mm=8.0, noise_cv=0.0, sphere_ratio=4.0))
    fill = FillRecord.from_dict(base.fill_record)
    centres = {n: np.array(d["centre_mm"]) for n, d in base.truth["inserts"].items() if n.startswith("sphere")}
    img = base.volume.data.astype(np.float64)
    b, cv = 5300.0, 0.10
    scale = cv * np.sqrt(np.clip(img, 0, None) * b)
    values, uncertainties = collections.defaultdict(list), collections.defaultdict(list)
    for seed in range(50):
        n = correlated_unit_noise(img.shape, 8.0, base.volume.spacing_mm, np.random.default_rng(1000 + seed))
        vol = base.volume.with_data((img + scale * n).astype(np.float32))
        a = measure_volume(vol, TPL, fill, overrides=centres)
        for r in a.rows:
            if r.uncertainty is not None:
                values[(r.roi, r.metric)].append(r.value)
                uncertainties[(r.roi, r.metric)].append(r.uncertainty)
    expected = {(s.name, m) for s in TPL.spheres for m in ("percent_contrast", "background_variability_pct", "rc_max", "rc_mean", "rc_peak")}
    expected |= {("lung_insert", "lung_residual_pct"), ("background", "mean_bq_ml"), ("background", "activity_recovery"), ("phantom", "effective_fwhm_mm")}
    assert expected <= set(values)
    ratios = {k: np.mean(uncertainties[k]) / np.std(values[k], ddof=1) for k in expected}
    bad = {f"{k[0]} {k[1]}": round(v, 3) for k, v in ratios.items() if not 0.7 <= v <= 1.3}
    assert not bad, bad
