"""The files of a comparison folder: ``comparison.csv``, ``ranking.csv`` (with bands),
``key_numbers.csv``, ``summary.json``, the phantom kind's comparison charts (drawn by the warm
workers when there are any) and, on request, ``report.html``."""

from __future__ import annotations

from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

from .. import __version__
from ..ranking import NOT_RANKED, ComparisonResult, comparison_csv, key_numbers_csv, key_numbers_json, ranking_csv
from ..results import CAUTION, to_json


def summary_json(result: ComparisonResult) -> dict[str, Any]:
    """The ``summary.json`` document."""
    return {
        "tool": {"name": "phantometry", "version": __version__},
        "caution": CAUTION,
        "template": result.template_name,
        "fill_record": result.fill,
        "bands": result.band_names,
        "workers": result.workers,
        "series_total": len(result.outcomes),
        "series_failed": len(result.failed),
        "warnings": result.warnings,
        "series": [
            {
                "setting": o.job.number,
                "label": o.label,
                "status": "measured" if o.ok else "error",
                "series_uid": o.job.series_uid,
                "series_number": o.job.series_number,
                "series_description": o.job.series_description,
                "source": o.job.where,
                "reconstruction": (o.series or {}).get("reconstruction"),
                "error": o.error,
                "error_type": o.error_type,
                "warnings": o.warnings,
                "folder": f"series/{o.job.folder_name}" if o.ok else None,
                "seconds": round(o.seconds, 3),
                **({"harmonisation": o.harmonisation} if result.harmonised else {}),
            }
            for o in result.outcomes
        ],
        "ranked": result.ranked,
        "ranking_note": None if result.ranked else NOT_RANKED,
        "ranking": [
            {"rank": e.rank, "setting": e.number, "label": e.label, "meets_all_bands": e.meets_all_bands,
             "rows_checked": e.checked, "rows_failed": e.failed, "distance_from_band_centres": e.distance, "reasons": e.reasons}
            for e in result.ranking
        ],
        "key_numbers": key_numbers_json(result),
    }


def write_files(result: ComparisonResult, tmp: Path, report: bool, executor: ProcessPoolExecutor | None = None) -> None:
    """Write the comparison's own files into the folder ``tmp`` (being staged).

    Parameters
    ----------
    result : ComparisonResult
        Labelled and ranked; its ``charts`` are set here.
    tmp : Path
        The folder being written.
    report : bool
        Also write ``report.html``.
    executor : ProcessPoolExecutor, optional
        The comparison's warm worker pool: the charts are drawn there side by side.
    """
    from ..fill import FillRecord
    from ..phantoms import kind_of
    from ..phantoms.base import ComparedSetting

    (tmp / "comparison.csv").write_text(comparison_csv(result.outcomes), encoding="utf-8")
    if result.ranked:  # ranking needs bands
        (tmp / "ranking.csv").write_text(ranking_csv(result), encoding="utf-8")
    (tmp / "key_numbers.csv").write_text(key_numbers_csv(result), encoding="utf-8")
    (tmp / "summary.json").write_text(to_json(summary_json(result)), encoding="utf-8")
    settings = [ComparedSetting(o.job.number, o.label, o.rows, error=None if o.ok else (o.error or "not measured")) for o in result.outcomes]
    tpl = result.template
    if result.succeeded and tpl is not None:
        charts = kind_of(tpl).comparison_charts(tpl, FillRecord.from_dict(result.fill), settings)
        result.charts = [(c.file_name, c.caption) for c in charts]
        futures = []
        if executor is not None:  # the workers are warm: draw the charts side by side
            try:
                futures = [executor.submit(c.function, *c.args, tmp / c.file_name, **c.kwargs) for c in charts]
                for f in futures:
                    f.result()
            except Exception:
                futures = []
        if not futures:
            for c in charts:
                c.draw(tmp)
    if report:
        from ..report import write_compare_report

        write_compare_report(result, tmp / "report.html", folder=tmp)


__all__ = ["summary_json", "write_files"]
