"""``measure --record``: refuse a duplicate before any work, record once the results are written.

:func:`phantometry.measure.measure` takes a :class:`RecordRequest` as ``record=``. It calls
:meth:`RecordRequest.check_inputs` right after the template and fill record are loaded (the
series is identified from the DICOM headers, or for NIfTI from ``--acquired-at``, without
reading pixels), :meth:`RecordRequest.check_volume` once the image is loaded (for the cases
the headers alone could not settle), and :meth:`RecordRequest.record` after the result folder
is written. A series + template + settings already in the ledger is thus refused (exit code 2)
before the pixels are read and before any folder is written, unless ``replace``.

A store that does not exist yet cannot hold a duplicate: the checks then open nothing and
create nothing; :meth:`RecordRequest.record` creates it.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

from ..errors import PhantometryError
from .labels import clean_label
from .schema import NoLedgerStore, analyses, check_text, display_url, resolve_url, scanners, sites
from .store import Ledger
from .types import RecordResult

if TYPE_CHECKING:  # pragma: no cover
    from ..phantoms.base import Analysis
    from ..volume import Volume


@dataclass
class RecordRequest:
    """What ``measure --record`` asks for: the ledger (URL or file; None for the default) and labels.

    Attributes
    ----------
    result : RecordResult or None
        Set by :meth:`record`.
    """

    url: str | os.PathLike | None = None
    site: str | None = None
    scanner: str | None = None
    protocol: str | None = None
    replace: bool = False
    result: RecordResult | None = field(default=None, init=False)
    _checked: bool = field(default=False, init=False, repr=False)

    @property
    def display_url(self) -> str:
        """The ledger URL without its password."""
        return display_url(resolve_url(self.url))

    # ------------------------------------------------------------------ checks
    def _check_labels(self) -> None:
        where = "--record"
        for value, what, table, column in ((self.site, "site", sites, "name"), (self.scanner, "scanner", scanners, "name"),
                                           (self.protocol, "protocol", analyses, "protocol")):
            if value is not None:
                check_text(table, {column: clean_label(value, what, where)}, f"{where}: --{what}")

    def _check(self, *, series_uid: str | None, acquired_at: datetime | None, template: str, fill: Any, where: str) -> None:
        if self.replace:
            return
        try:
            ledger = Ledger(self.url, create=False)
        except NoLedgerStore:  # nothing recorded yet: no duplicate possible, and nothing is created
            return
        with ledger:
            ledger.check_not_recorded(series_uid=series_uid, acquired_at=acquired_at, template=template,
                                      fill_record=fill.to_dict() if fill is not None else None, where=where)
        self._checked = True

    def check_inputs(self, inputs: Sequence[str | os.PathLike] | str | os.PathLike, *, series: str | None = None,
                     acquired_at: datetime | None = None, template: str, fill: Any) -> None:
        """Refuse a duplicate before the image is read (labels are checked too).

        The series is identified from the DICOM headers when that is unambiguous (one PET
        series, or ``series`` given as a full UID or a series number); a NIfTI file is
        identified by ``acquired_at``. Otherwise :meth:`check_volume` decides after loading.

        Raises
        ------
        LedgerError
            The analysis is already recorded (and not ``replace``), a label is too long, or
            the ledger cannot be opened.
        """
        self._check_labels()
        paths = [Path(p) for p in ([inputs] if isinstance(inputs, (str, os.PathLike)) else inputs)]
        where = ", ".join(map(str, paths))
        if len(paths) == 1 and paths[0].name.lower().endswith((".nii", ".nii.gz")):
            if acquired_at is not None:
                self._check(series_uid=None, acquired_at=acquired_at, template=template, fill=fill, where=where)
            return
        uid = _dicom_series_uid(paths, series)
        if uid is not None:
            self._check(series_uid=uid, acquired_at=None, template=template, fill=fill, where=where)

    def check_volume(self, volume: Volume, *, template: str, fill: Any) -> None:
        """Refuse a duplicate once the image is loaded, if :meth:`check_inputs` could not tell."""
        if self._checked:
            return
        self._check(series_uid=volume.series_uid, acquired_at=volume.acquired_at, template=template, fill=fill,
                    where=str(volume.source or "image"))

    # ------------------------------------------------------------------ recording
    def record(self, analysis: Analysis) -> RecordResult:
        """Record the measured analysis (creating the store if needed); sets :attr:`result`."""
        with Ledger(self.url) as ledger:
            self.result = ledger.record_analysis(analysis, site=self.site, scanner=self.scanner, protocol=self.protocol,
                                                 replace=self.replace)
        return self.result


def _dicom_series_uid(paths: list[Path], series: str | None) -> str | None:
    """The Series Instance UID the loader will pick, from the headers only; None when unsure."""
    from ..io.dicom import discover_series

    try:
        infos = discover_series(paths)
    except PhantometryError:  # the loader reports it, with its own words
        return None
    if series is None:
        chosen = [i for i in infos if i.modality == "PT"]
    else:
        key = str(series).strip()
        if key.isdigit():
            chosen = [i for i in infos if i.series_number == int(key)]
        else:
            chosen = [i for i in infos if i.series_uid == key]
    return chosen[0].series_uid if len(chosen) == 1 else None


__all__ = ["RecordRequest"]
