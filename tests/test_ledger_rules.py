"""Control limits, the four drift rules (each alone, on hand-made sequences) and the trend chart.

Rules as stated by the Western Electric Statistical Quality Control Handbook (1956) and
Nelson, J Qual Technol 16:237-239 (1984): 1 point beyond 3 sigma; 2 of 3 beyond 2 sigma on
one side; 6 in a row steadily rising or falling; 8 in a row on one side of the mean.
"""

from __future__ import annotations

import statistics
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from phantometry.ledger import RULES, Trend, TrendFlag, TrendPoint, control_limits, drift_flags
from phantometry.ledger.chart import save_trend_chart, trend_figure
from phantometry.ledger.rules import (
    RULE_2OF3_BEYOND_2SIGMA,
    RULE_6_TRENDING,
    RULE_8_ONE_SIDE,
    RULE_BEYOND_3SIGMA,
    ControlLimits,
)

MEAN, SIGMA = 10.0, 1.0


def fired(values, mean=MEAN, sigma=SIGMA):
    return [(f.index, f.rule) for f in drift_flags(np.asarray(values, float), mean, sigma)]


def test_control_limits_are_mean_and_sample_sd():
    values = [0.71, 0.74, 0.69, 0.73, 0.70, 0.75, 0.72, None, float("nan")]
    lim = control_limits(values, source="baseline #1")
    clean = [v for v in values if v is not None and v == v]
    # reference: Python's statistics module (sample standard deviation, n - 1)
    assert lim.mean == pytest.approx(statistics.mean(clean), rel=1e-12)
    assert lim.sigma == pytest.approx(statistics.stdev(clean), rel=1e-12)
    assert lim.n == 7 and lim.source == "baseline #1"
    assert lim.warning_high == pytest.approx(lim.mean + 2 * lim.sigma)
    assert lim.action_low == pytest.approx(lim.mean - 3 * lim.sigma)
    assert control_limits([1.0]) is None and control_limits([]) is None


def test_rule_beyond_3_sigma_alone():
    # hand-made: only index 3 (above) and index 6 (below) lie beyond 3 sigma; signs alternate,
    # so no run rule can fire, and no two points beyond 2 sigma share a window of three
    seq = [10.2, 9.6, 10.4, 13.5, 9.8, 10.1, 6.7, 10.3, 9.9]
    assert fired(seq) == [(3, RULE_BEYOND_3SIGMA), (6, RULE_BEYOND_3SIGMA)]
    # exactly 3 sigma is not beyond
    assert fired([10.2, 9.6, 13.0, 9.8]) == []
    desc = drift_flags(np.array(seq), MEAN, SIGMA)
    assert "above" in desc[0].description and "below" in desc[1].description


def test_rule_two_of_three_beyond_2_sigma_alone():
    # indices 1 and 3 beyond +2 sigma (inside 3 sigma), one normal point between: fires at 3
    seq = [10.1, 12.5, 9.6, 12.4, 9.7, 10.2]
    assert fired(seq) == [(3, RULE_2OF3_BEYOND_2SIGMA)]
    flag = drift_flags(np.array(seq), MEAN, SIGMA)[0]
    assert flag.first_index == 1 and "above" in flag.description
    # two adjacent below -2 sigma: fires at the second
    assert fired([10.1, 7.5, 7.6, 10.3]) == [(2, RULE_2OF3_BEYOND_2SIGMA)]
    # opposite sides do not count
    assert fired([10.1, 12.5, 7.5, 10.2]) == []
    # three apart (not within a window of three) do not count
    assert fired([12.5, 9.7, 10.2, 12.4, 9.8]) == []


def test_rule_six_in_a_row_trending_alone():
    # six strictly rising points crossing the mean, all within 1 sigma
    rising = [9.1, 9.4, 9.8, 10.1, 10.5, 10.9]
    assert fired(rising) == [(5, RULE_6_TRENDING)]
    assert "rising" in drift_flags(np.array(rising), MEAN, SIGMA)[0].description
    assert fired(rising[:5]) == []  # five are not enough
    # a seventh rising point flags again (the run goes on)
    assert fired(rising + [10.95]) == [(5, RULE_6_TRENDING), (6, RULE_6_TRENDING)]
    # a tie breaks the run
    assert fired([9.1, 9.4, 9.8, 9.8, 10.5, 10.9]) == []
    falling = rising[::-1]
    f = drift_flags(np.array(falling), MEAN, SIGMA)
    assert [(x.index, x.rule) for x in f] == [(5, RULE_6_TRENDING)] and "falling" in f[0].description
    # the trend rule needs no limits at all
    assert fired(rising, mean=None, sigma=None) == [(5, RULE_6_TRENDING)]


def test_rule_eight_on_one_side_alone():
    # eight points above the mean, within 1 sigma, going up and down (no 6-run)
    above = [10.5, 10.2, 10.7, 10.1, 10.4, 10.3, 10.6, 10.2]
    assert fired(above) == [(7, RULE_8_ONE_SIDE)]
    assert fired(above[:7]) == []
    assert fired(above + [10.4]) == [(7, RULE_8_ONE_SIDE), (8, RULE_8_ONE_SIDE)]
    below = [2 * MEAN - v for v in above]
    f = drift_flags(np.array(below), MEAN, SIGMA)
    assert [(x.index, x.rule) for x in f] == [(7, RULE_8_ONE_SIDE)] and "below" in f[0].description
    # a point exactly on the mean breaks the run
    assert fired(above[:4] + [MEAN] + above[4:]) == []
    # without sigma the one-side rule still runs (it needs only the mean)
    assert fired(above, sigma=None) == [(7, RULE_8_ONE_SIDE)]


def test_no_sigma_rules_without_spread():
    assert fired([10.0, 14.0, 14.0], sigma=0.0) == []
    assert fired([10.0, 14.0, 14.0], sigma=None) == []


def test_every_rule_is_named():
    assert set(RULES) == {RULE_BEYOND_3SIGMA, RULE_2OF3_BEYOND_2SIGMA, RULE_6_TRENDING, RULE_8_ONE_SIDE}
    with pytest.raises(ValueError):
        drift_flags(np.array([1.0, np.nan]), 0.0, 1.0)


def _trend():
    t0 = datetime(2026, 1, 5, 9, 0, tzinfo=timezone.utc)
    values = [0.70, 0.72, 0.71, 0.69, 0.73, 0.70, 0.72, 0.71, 0.80, 0.71]
    points = [
        TrendPoint(i + 1, f"uid-{i}", t0 + timedelta(days=30 * i), v, "1", 0.01, 0.60, 0.85, "pass", i < 8)
        for i, v in enumerate(values)
    ]
    lim = control_limits(values[:8], source="baseline #1")
    flagged = points[8]
    flags = [TrendFlag(flagged.analysis_id, flagged.acquired_at, flagged.value, RULE_BEYOND_3SIGMA, "beyond 3 sigma, above the mean", flagged.acquired_at)]
    return Trend("Larkspur Valley Hospital (invented)", "LVH-PET1", "OSEM 3i21s", "sphere_10mm", "rc_max", "1", points, lim, flags)


def test_chart_draws_limits_bands_and_flags(tmp_path):
    tr = _trend()
    lim: ControlLimits = tr.limits
    fig = trend_figure(tr)
    ax = fig.axes[0]
    by_gid = {a.get_gid(): a for a in ax.get_children() if a.get_gid()}
    expected = {
        "mean": lim.mean,
        "warning_high": lim.mean + 2 * lim.sigma,
        "warning_low": lim.mean - 2 * lim.sigma,
        "action_high": lim.mean + 3 * lim.sigma,
        "action_low": lim.mean - 3 * lim.sigma,
    }
    for gid, y in expected.items():
        assert np.allclose(by_gid[gid].get_ydata(), y), gid
    assert np.allclose(by_gid["values"].get_ydata(), [p.value for p in tr.points])
    assert np.allclose(by_gid["band_low"].get_ydata(), 0.60) and np.allclose(by_gid["band_high"].get_ydata(), 0.85)
    assert len(by_gid["baseline_points"].get_ydata()) == 8
    offsets = by_gid["flagged"].get_offsets()
    assert offsets.shape == (1, 2) and offsets[0, 1] == pytest.approx(0.80)
    texts = [t.get_text() for t in fig.texts]
    assert any("1 = 1 point beyond 3 sigma" in t for t in texts)
    out = save_trend_chart(tr, tmp_path / "sub" / "trend.png")
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000
    assert not list((tmp_path / "sub").glob(".*tmp*"))


def test_chart_and_statistics_know_only_the_result_types():
    # the chart draws a Trend and never reaches the store (the two once imported each other);
    # the modules the store calls never import it back
    from test_layers import GRAPH

    inside = lambda m: {t for t in GRAPH[m] if t.startswith("phantometry.ledger.")}  # noqa: E731
    assert inside("phantometry.ledger.chart") == {"phantometry.ledger.types", "phantometry.ledger.rules", "phantometry.ledger.outfiles"}
    assert inside("phantometry.ledger.trends") == {"phantometry.ledger.types", "phantometry.ledger.rules"}
    assert inside("phantometry.ledger.types") == {"phantometry.ledger.rules"}
    users_of_store = {m for m, ts in GRAPH.items() if "phantometry.ledger.store" in ts}
    assert users_of_store == {"phantometry.ledger", "phantometry.ledger.measure_record"}
