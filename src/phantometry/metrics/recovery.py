"""Recovery coefficients of hot spheres against the true (decay-corrected) concentration.

* ``rc_max``: hottest voxel in the sphere VOI / true concentration;
* ``rc_mean``: mean of the background-adapted 50 % isocontour VOI (threshold
  ``0.5 x (max + background)``) / true concentration, the "A50" of the EANM FDG PET/CT
  procedure guidelines v2.0 and its accreditation specification (Boellaard et al., Eur J Nucl
  Med Mol Imaging 2015;42:328-354);
* ``rc_peak``: highest mean of a 1 mL sphere (12.41 mm diameter) whose centre lies within the
  sphere / true concentration (PERCIST, Wahl et al., J Nucl Med 2009;50 Suppl 1:122S-150S).

Uncertainty
-----------
The three are found by *searching* the image (the hottest voxel, the isocontour VOI whose
threshold is set by that hottest voxel, the best-placed 1 mL sphere): extreme-value
statistics whose spread linear propagation misses (it underestimated RC mean by 20-50 % in
our Monte Carlo check, because the threshold moves with the noise). Their uncertainty is
propagated by Monte Carlo instead (JCGM 101:2008, GUM Supplement 1): :data:`BOOTSTRAP_DRAWS`
noise fields with the image's estimated autocovariance and level law
(:mod:`phantometry.noise`) are added to a noise-free image of the spheres (the fitted
blurred-sphere model, :mod:`phantometry.metrics.resolution`), the three searches are repeated
on each draw, and the SD over the draws is the standard uncertainty
(:func:`bootstrap_search_sd`, :class:`SearchSimulation`: every sphere takes its box out of one
shared stack of draws, made in chunks with fixed seeds, so results are reproducible).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from scipy import ndimage, sparse

from ..noise import NoiseModel, noise_fields, spectral_filter, level_map
from ..rois import box_world, centres_in_sphere, isocontour_mean, max_in_sphere, peak_search, sphere_weights
from ..volume import Volume


def recovery_coefficients(
    volume: Volume,
    centre_mm: np.ndarray,
    diameter_mm: float,
    true_bq_ml: float,
    background_bq_ml: float,
    *,
    peak_diameter_mm: float = 12.41,
    isocontour_fraction: float = 0.5,
) -> dict[str, float]:
    """RC max, mean (A50) and peak of one hot sphere (dimensionless).

    Parameters
    ----------
    centre_mm : (3,) world mm of the sphere centre.
    diameter_mm : inner diameter, mm.
    true_bq_ml : true concentration in the sphere at the image reference time, Bq/mL.
    background_bq_ml : measured background concentration, Bq/mL (for the A50 threshold).
    """
    if true_bq_ml <= 0:
        raise ValueError("recovery coefficients need a positive true concentration")
    vmax, _ = max_in_sphere(volume, centre_mm, diameter_mm)
    mean50, n_vox, _ = isocontour_mean(volume, centre_mm, diameter_mm, background_bq_ml, isocontour_fraction)
    peak, _ = peak_search(volume, centre_mm, diameter_mm, peak_diameter_mm)
    return {
        "rc_max": vmax / true_bq_ml,
        "rc_mean": mean50 / true_bq_ml,
        "rc_peak": peak / true_bq_ml,
        "isocontour_voxels": float(n_vox),
    }


# =========================================================================== uncertainty by simulation
class _Target:
    """One sphere of a search simulation: its box, masks, noise-free model and peak matrix."""

    def __init__(self, noise: NoiseModel, volume: Volume, centre_mm: np.ndarray, diameter_mm: float, model_fn, peak_diameter_mm: float):
        r = 0.5 * float(diameter_mm)
        r_peak = 0.5 * float(peak_diameter_mm)
        step = float(np.max(volume.spacing_mm))
        c = np.asarray(centre_mm, float)
        box, _ = centres_in_sphere(volume, c, r + r_peak + 2.0 * step)
        world = box_world(volume, box)
        rel = world - c
        dist2 = np.einsum("...i,...i->...", rel, rel)
        search = dist2 <= r * r
        grown = dist2 <= (r + step) ** 2
        if not search.any():  # no voxel centre within the sphere: the nearest voxel (as rois does)
            nearest = np.unravel_index(int(np.argmin(dist2)), dist2.shape)
            search = np.zeros(dist2.shape, bool)
            search[nearest] = True
            grown = grown | search
        model = level_map(volume, box) if model_fn is None else np.asarray(model_fn(world), float)
        self.scale = noise.scale_at(model).astype(np.float32)
        self.model = model.astype(np.float32)
        self.shape = shape = np.array(search.shape)
        # the peak: partial-volume weights of the peak sphere about a voxel centre, as a sparse
        # (candidates x box voxels) matrix of the 1 mL means, so only the candidates are computed
        mid = np.array(volume.shape) // 2
        kw = sphere_weights(volume, volume.index_to_world(mid.astype(float)), peak_diameter_mm)
        kern = kw.weights.astype(np.float64)
        lo_k = mid - np.array([sl.start for sl in kw.box])  # the kernel's centre voxel in its box
        hi_k = np.array(kern.shape) - 1 - lo_k
        valid = np.zeros(search.shape, bool)
        valid[tuple(slice(int(l), int(n - h)) for l, h, n in zip(lo_k, hi_k, shape))] = True
        peak_cand = search & valid  # the whole peak sphere inside the box
        if not peak_cand.any():
            peak_cand = search  # (weights beyond the box count as zero)
        offsets = np.argwhere(kern > 0) - lo_k  # in C order, so each row's columns ascend
        kvals = (kern[kern > 0] / float(kern.sum())).astype(np.float32)
        cand = np.argwhere(peak_cand).astype(np.int32)
        strides = (int(shape[1] * shape[2]), int(shape[2]), 1)
        if peak_cand is search and not (search & valid).any():
            # some peak spheres reach beyond the box: keep only their entries inside it
            inside = np.ones((len(cand), len(offsets)), bool)
            for axis in range(3):  # three axes, not voxels
                q = cand[:, None, axis] + offsets[None, :, axis]
                inside &= (q >= 0) & (q < shape[axis])
            counts = inside.sum(axis=1)
        else:
            inside = None
            counts = np.full(len(cand), len(offsets))
        # built directly in compressed-row form with 32-bit indices: no coordinate-list copy
        cols = (cand @ np.array(strides, np.int32))[:, None] + (offsets @ np.array(strides))[None, :].astype(np.int32)
        indptr = np.zeros(len(cand) + 1, np.int32)
        np.cumsum(counts, out=indptr[1:])
        if inside is None:
            data = np.broadcast_to(kvals, cols.shape).ravel()
            indices = cols.ravel()
        else:
            data = np.broadcast_to(kvals, cols.shape)[inside]
            indices = cols[inside]
        del cols
        self.peak_matrix = sparse.csr_matrix((data, indices, indptr), shape=(len(cand), search.size))
        # the max and the isocontour VOI look only within the grown sphere: its bounding box
        nz = np.argwhere(grown)
        self.crop = tuple(slice(int(l), int(h) + 1) for l, h in zip(nz.min(axis=0), nz.max(axis=0)))
        self.grown_c = grown[self.crop]
        self.search_idx = np.flatnonzero(search[self.crop])

    def statistics(self, field: np.ndarray, background: float, fraction: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Max, isocontour mean and peak (Bq/mL) of every draw; ``field`` (*box, n) noise at background level."""
        n = field.shape[-1]
        structure = np.zeros((3, 3, 3, 3), bool)
        structure[..., 1] = True  # the 26-neighbourhood of a voxel, within its own draw (last axis)
        s0, s1, s2 = (int(v) for v in self.shape)
        sims = field[:s0, :s1, :s2] * self.scale[..., None]  # contiguous; draws on the last axis
        sims += self.model[..., None]
        peaks = np.asarray(self.peak_matrix @ sims.reshape(-1, n)).max(axis=0)
        sub = np.ascontiguousarray(sims[self.crop])
        del sims
        sub_flat = sub.reshape(-1, n)
        draw = np.arange(n)
        arg = self.search_idx[np.argmax(sub_flat[self.search_idx], axis=0)]
        vmax = sub_flat[arg, draw]
        thr = (background + fraction * (vmax - background)).astype(np.float32)
        # every draw labelled at once: 26-connected within a draw, never across
        labels, _ = ndimage.label(self.grown_c[..., None] & (sub >= thr), structure=structure)
        labels = labels.reshape(-1, n)
        voi = labels == labels[arg, draw][None]
        del labels
        sums = np.where(voi, sub_flat, np.float32(0)).sum(axis=0, dtype=np.float64)
        return vmax.astype(np.float64), sums / voi.sum(axis=0), peaks.astype(np.float64)


class SearchSimulation:
    """The RC max / mean / peak simulation of several spheres (see :func:`bootstrap_search_sd`).

    All spheres share one stack of noise draws on a box large enough for the largest (a
    sub-box of a stationary field has the same law), so the synthesis is paid once. The draws
    come in chunks, each with its own seed derived from ``seed`` and the chunk number:
    :meth:`run_chunk` may run in any thread and order, and the results do not depend on it.
    """

    def __init__(
        self,
        noise: NoiseModel,
        volume: Volume,
        spheres: Sequence[tuple[np.ndarray, float]],
        background_bq_ml: float,
        model_fn=None,
        *,
        fraction: float = 0.5,
        peak_diameter_mm: float = 12.41,
        n_draws: int = 200,
        seed: int = 0,
        chunks_at_least: int = 4,
    ):
        if not spheres:
            raise ValueError("SearchSimulation: no spheres")
        self.noise = noise
        self.background = float(background_bq_ml)
        self.fraction = float(fraction)
        self.seed = int(seed)
        self.targets = [_Target(noise, volume, c, d, model_fn, peak_diameter_mm) for c, d in spheres]
        self.shape = tuple(int(v) for v in np.max([t.shape for t in self.targets], axis=0))
        # draws per chunk: at most 2 million voxels of the synthesis grid, and an eighth of the
        # image, so the simulation's working memory stays below the volume's (the spectra and
        # the per-sphere arrays are smaller than the grid; measured by
        # benchmarks/bench_compare.py); at least ``chunks_at_least`` chunks, so threads can
        # share the work
        budget = min(2_000_000, max(volume.data.size // 8, 50_000))
        size = int(np.prod(spectral_filter(noise, self.shape).size))
        per_chunk = max(1, min(int(budget // size), -(-int(n_draws) // max(1, int(chunks_at_least)))))
        self.chunks = [(i, min(per_chunk, n_draws - start)) for i, start in enumerate(range(0, int(n_draws), per_chunk))]

    def run_chunk(self, index: int, n: int) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """(max, mean, peak) per sphere for the ``n`` draws of chunk ``index``."""
        rng = np.random.default_rng([self.seed, int(index)])
        field = noise_fields(self.noise, self.shape, n, rng)
        return [t.statistics(field, self.background, self.fraction) for t in self.targets]

    def standard_deviations(self, results: Sequence[list[tuple[np.ndarray, np.ndarray, np.ndarray]]]) -> list[dict[str, float]]:
        """SD over all draws of the chunks' results (in chunk order), per sphere."""
        out = []
        for k in range(len(self.targets)):
            cols = [np.concatenate([chunk[k][j] for chunk in results]) for j in range(3)]
            out.append({key: float(np.std(col, ddof=1)) for key, col in zip(("max", "mean", "peak"), cols)})
        return out


def bootstrap_search_sd(
    noise: NoiseModel,
    volume: Volume,
    centre_mm: np.ndarray,
    diameter_mm: float,
    background_bq_ml: float,
    model_fn=None,
    *,
    fraction: float = 0.5,
    peak_diameter_mm: float = 12.41,
    n_draws: int = 200,
    seed: int = 0,
) -> dict[str, float]:
    """SDs (Bq/mL) of the hottest voxel, the isocontour VOI mean and the peak, by simulation.

    The propagation of distributions by Monte Carlo (JCGM 101:2008, GUM Supplement 1) for
    the three statistics that *search* the image (extreme values, for which linear
    propagation fails): ``n_draws`` noise fields with the model's autocovariance
    (:func:`simulate_noise`), scaled by the level law, are added to the noise-free image
    ``model_fn(points_mm) -> Bq/mL`` (the fitted blurred-sphere model; None: the image
    itself, :func:`level_map`), and on each draw the searches of
    :mod:`phantometry.rois` are repeated on the same voxels: the hottest voxel centred within
    the sphere (``max_in_sphere``), the 26-connected VOI ``>= B + fraction (max - B)`` within
    the sphere grown by one voxel that holds it (``isocontour_mean``), and the highest mean
    of a ``peak_diameter_mm`` sphere centred on a voxel within the sphere (``peak_search``,
    here a sparse matrix of the candidates' 1 mL means).
    ``B`` is held at ``background_bq_ml``. The draws use ``seed``, so results are
    reproducible. Several spheres at once: :class:`SearchSimulation`.

    Returns
    -------
    dict with keys ``max``, ``mean``, ``peak``: SD over the draws, Bq/mL.
    """
    sim = SearchSimulation(noise, volume, [(np.asarray(centre_mm, float), float(diameter_mm))], background_bq_ml, model_fn,
                           fraction=fraction, peak_diameter_mm=peak_diameter_mm, n_draws=n_draws, seed=seed)
    return sim.standard_deviations([sim.run_chunk(i, n) for i, n in sim.chunks])[0]


#: Noise draws of the RC max / mean / peak simulation (its SD known to about 1/sqrt(2 n), 7 %).
BOOTSTRAP_DRAWS = 100
