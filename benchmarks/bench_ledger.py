"""Benchmark the trend ledger: does a one-metric trend stay cheap as the store grows?

Fills a store (bulk insert through the ledger's own tables) with invented analyses of about
50 measurements each: 10 sites, 50 scanners, 3 protocols. One target scanner and protocol
holds 120 monthly analyses (ten years); every other analysis belongs to other scanners. In
one run it then times

(a) ``Ledger.trend(target, protocol, "sphere_10mm", "rc_max")`` (the whole call: scanner and
    protocol lookup, the indexed query, baseline limits, drift rules) at 1,000 analyses and
    again after growing the store to 10,000 analyses, and prints the ratio
    t(10,000) / t(1,000) (goal <= 2: the query walks indexes, it does not scan the store);
(b) the time to record one analysis (``Ledger.record_document``, one transaction, 50 rows)
    into the full store.

Backends: a temporary SQLite file, and PostgreSQL when ``--pg URL`` is given or
``$PHANTOMETRY_TEST_PG_URL`` is set (a temporary schema, dropped afterwards). Prints the
measured numbers; asserts nothing.

Usage::

    python benchmarks/bench_ledger.py [--analyses 10000] [--small 1000] [--repeats 15] [--pg URL] [--no-sqlite]
"""

from __future__ import annotations

import argparse
import gc
import os
import random
import statistics
import tempfile
import time
import uuid
from datetime import datetime, timedelta, timezone
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy.engine import make_url

from phantometry.ledger import Ledger
from phantometry.ledger.schema import analyses, measurements, resolve_url, scanners, sites, sqlite_url

T0 = datetime(2016, 1, 4, 9, 0, tzinfo=timezone.utc)  # invented
SPHERES = (10, 13, 17, 22, 28, 37)
METRICS = ("percent_contrast", "background_variability_pct", "rc_max", "rc_mean", "rc_peak", "centre_x_mm", "centre_y_mm", "centre_z_mm")
TARGET, PROTOCOL, N_TARGET = "BENCH-TARGET", "EARL1", 120
PROTOCOLS = ("EARL1", "EARL2", "clinical")


def rows_for(rng: random.Random) -> list[dict]:
    out = []
    for d in SPHERES:
        for m in METRICS:
            out.append({"roi": f"sphere_{d}mm", "metric": m, "value": rng.gauss(0.5 + d / 80, 0.02), "unit": "mm" if m.startswith("centre") else "1",
                        "uncertainty": 0.01, "band": None, "band_low": None, "band_high": None, "verdict": None, "note": None})
    out.append({"roi": "lung_insert", "metric": "lung_residual_pct", "value": rng.gauss(12, 1), "unit": "%", "uncertainty": None,
                "band": None, "band_low": None, "band_high": None, "verdict": None, "note": None})
    out.append({"roi": "background", "metric": "activity_recovery", "value": rng.gauss(1, 0.02), "unit": "1", "uncertainty": None,
                "band": None, "band_low": None, "band_high": None, "verdict": None, "note": None})
    return out  # 50 rows


class Filler:
    """Bulk insert of invented analyses with explicit ids, through the ledger's Core tables."""

    def __init__(self, engine: sa.Engine, seed: int = 1) -> None:
        self.engine = engine
        self.rng = random.Random(seed)
        self.next_analysis = 1
        self.next_measurement = 1
        with engine.begin() as conn:
            conn.execute(sites.insert(), [{"id": i + 1, "name": f"Bench Site {i} (invented)"} for i in range(10)])
            conn.execute(scanners.insert(), [{"id": 1, "site_id": 1, "name": TARGET}]
                         + [{"id": i + 2, "site_id": 1 + (i % 10), "name": f"BENCH-{i:02d}"} for i in range(49)])
        self.n = 0

    def add(self, specs: list[tuple[int, str, datetime]], chunk: int = 500) -> None:
        for k in range(0, len(specs), chunk):
            a_rows, m_rows = [], []
            for scanner_id, protocol, when in specs[k:k + chunk]:
                aid = self.next_analysis
                self.next_analysis += 1
                a_rows.append({"id": aid, "uid": str(uuid.uuid4()), "record_key": uuid.uuid4().hex * 2, "series_uid": f"2.25.{uuid.uuid4().int}"[:64],
                               "template": "iec-body", "acquired_at": when, "recorded_at": when + timedelta(hours=2), "scanner_id": scanner_id,
                               "protocol": protocol, "reconstruction": "OSEM", "nuclide": "F-18", "fill_record": None,
                               "settings_hash": "0" * 64, "tool_version": "bench", "verdict": None})
                for r in rows_for(self.rng):
                    m_rows.append({**r, "id": self.next_measurement, "analysis_id": aid})
                    self.next_measurement += 1
            with self.engine.begin() as conn:
                conn.execute(analyses.insert(), a_rows)
                conn.execute(measurements.insert(), m_rows)
            self.n += len(a_rows)

    def others(self, n: int) -> list[tuple[int, str, datetime]]:
        return [(self.rng.randint(2, 50), self.rng.choice(PROTOCOLS), T0 + timedelta(hours=self.rng.randint(0, 24 * 3650))) for _ in range(n)]

    def finish(self) -> None:
        with self.engine.begin() as conn:
            if conn.dialect.name == "postgresql":
                for table in ("phantometry_sites", "phantometry_scanners", "phantometry_analyses", "phantometry_measurements"):
                    conn.execute(sa.text(f"SELECT setval(pg_get_serial_sequence('{table}', 'id'), (SELECT max(id) FROM {table}))"))
            conn.execute(sa.text("ANALYZE"))


def best_of(n: int, fn) -> float:
    fn()  # warm up (connection pool, statement caches)
    times = []
    for _ in range(n):
        gc.collect()
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def doc(i: int) -> dict:
    rng = random.Random(1000 + i)
    when = T0 + timedelta(days=3700 + i)
    return {
        "tool": {"version": "bench"},
        "series": {"series_uid": f"2.25.999{i}{rng.randrange(10**9)}", "acquired_at": when.isoformat(), "scanner": {"station": TARGET}},
        "template": {"name": "iec-body"},
        "fill_record": {"nuclide": "F-18", "background": {"concentration_kbq_ml": 5.3, "measured_at": when.isoformat()},
                        "spheres": {"ratio_to_background": 4.0}, "site": "Bench Site 0 (invented)"},
        "measurements": rows_for(rng),
    }


def run(url: str, label: str, n_small: int, n_large: int, repeats: int) -> dict:
    ledger = Ledger(url)
    filler = Filler(ledger.engine)
    t_fill = time.perf_counter()
    target = [(1, PROTOCOL, T0 + timedelta(days=30 * i)) for i in range(N_TARGET)]
    filler.add(target + filler.others(n_small - N_TARGET))
    filler.finish()
    fill_small = time.perf_counter() - t_fill
    ledger.set_baseline(TARGET, PROTOCOL, analysis_ids=list(range(1, 13)))
    trend = lambda: ledger.trend(TARGET, PROTOCOL, "sphere_10mm", "rc_max")  # noqa: E731
    assert len(trend().points) == N_TARGET
    t_small = best_of(repeats, trend)
    t_fill = time.perf_counter()
    filler.add(filler.others(n_large - n_small))
    filler.finish()
    fill_large = time.perf_counter() - t_fill
    assert len(trend().points) == N_TARGET
    t_large = best_of(repeats, trend)
    rec_times = []
    for i in range(20):
        t0 = time.perf_counter()
        ledger.record_document(doc(i), protocol=PROTOCOL)
        rec_times.append(time.perf_counter() - t0)
    info = ledger.info()
    ledger.close()
    out = {
        "backend": label, "analyses": info["analyses"], "measurements": info["measurements"],
        "fill_s": fill_small + fill_large, "trend_small_ms": 1e3 * t_small, "trend_large_ms": 1e3 * t_large,
        "ratio": t_large / t_small, "record_ms_median": 1e3 * statistics.median(rec_times), "record_ms_max": 1e3 * max(rec_times),
    }
    return out


def pg_schema_url(base: str) -> tuple[str, callable]:
    schema = "bench_" + uuid.uuid4().hex[:10]
    admin = sa.create_engine(resolve_url(base))
    with admin.begin() as conn:
        conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))

    def drop() -> None:
        with admin.begin() as conn:
            conn.execute(sa.text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()

    url = make_url(resolve_url(base)).update_query_dict({"options": f"-csearch_path={schema}"})
    return url.render_as_string(hide_password=False), drop


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--analyses", type=int, default=10_000)
    ap.add_argument("--small", type=int, default=1_000)
    ap.add_argument("--repeats", type=int, default=15)
    ap.add_argument("--pg", default=os.environ.get("PHANTOMETRY_TEST_PG_URL"), help="PostgreSQL URL (a temporary schema is used)")
    ap.add_argument("--no-sqlite", action="store_true")
    args = ap.parse_args()
    results = []
    if not args.no_sqlite:
        with tempfile.TemporaryDirectory(prefix="phantometry-bench-ledger-") as tmp:
            path = Path(tmp) / "ledger.sqlite3"
            r = run(sqlite_url(path), "sqlite", args.small, args.analyses, args.repeats)
            r["size_mb"] = sum(p.stat().st_size for p in Path(tmp).iterdir()) / 1e6
            results.append(r)
    if args.pg:
        url, drop = pg_schema_url(args.pg)
        try:
            results.append(run(url, "postgresql", args.small, args.analyses, args.repeats))
        finally:
            drop()
    for r in results:
        print(f"[{r['backend']}] store: {r['analyses']} analyses, {r['measurements']} measurements"
              + (f", {r['size_mb']:.0f} MB" if "size_mb" in r else "") + f"; bulk fill {r['fill_s']:.1f} s")
        print(f"[{r['backend']}] trend of one metric ({N_TARGET} points): {r['trend_small_ms']:.2f} ms at {args.small} analyses, "
              f"{r['trend_large_ms']:.2f} ms at {args.analyses}; ratio {r['ratio']:.2f} (goal <= 2)")
        print(f"[{r['backend']}] record one analysis (50 rows, one transaction): median {r['record_ms_median']:.1f} ms, "
              f"max {r['record_ms_max']:.1f} ms over 20")


if __name__ == "__main__":
    main()
