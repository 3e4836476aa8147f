"""Shared fixtures: synthetic scans are made once per session and reused read-only."""

from __future__ import annotations

import pytest

from phantometry.synth import SynthSpec, synthesize, write_synthetic


@pytest.fixture(scope="session")
def demo_scan(tmp_path_factory):
    """A noisy synthetic IEC body scan written as DICOM, with its fill record and truth."""
    out = tmp_path_factory.mktemp("demo_scan")
    res = synthesize(SynthSpec(voxel_mm=(3.0, 3.0, 3.0), psf_fwhm_mm=6.0, noise_cv=0.1, shift_mm=(4, -6, 2), rotation_deg=(1, -2, 40), seed=5))
    paths = write_synthetic(res, out, "dicom")
    return {"result": res, **paths}
