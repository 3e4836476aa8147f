"""Regression record: every metric value and uncertainty of seeded synthetic scans (each
phantom kind, noisy and noise-free) stays what it was when recorded (tests/golden_scans.py).

Moving code must not change numbers: values agree to 1e-9 relative; uncertainties too (the
Monte Carlo ones use the same seeds). A change that is meant to change numbers re-records the
file (``python tests/golden_scans.py``) and says why in its commit message.
"""

from __future__ import annotations

import json
import math

import pytest

from golden_scans import GOLDEN_PATH, SCANS, measure_scan

GOLDEN = json.loads(GOLDEN_PATH.read_text(encoding="utf-8"))


def _close(a, b) -> bool:
    if a is None or b is None:
        return a is None and b is None
    if isinstance(a, str) or isinstance(b, str):
        return a == b
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) and math.isnan(b)
    return a == pytest.approx(b, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("name", sorted(SCANS))
def test_numbers_unchanged(name):
    got = measure_scan(name)
    want = GOLDEN[name]
    assert sorted(got) == sorted(want), f"rows differ: missing {sorted(set(want) - set(got))}, new {sorted(set(got) - set(want))}"
    bad = [(k, got[k], want[k]) for k in want if not all(_close(a, b) for a, b in zip(got[k], want[k]))]
    assert not bad, f"{len(bad)} of {len(want)} numbers changed, e.g. {bad[:5]}"
