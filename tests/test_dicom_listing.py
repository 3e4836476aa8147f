"""The fast listing walk (phantometry.io.dicom_listing) against pydicom's own reading.

Reference library: pydicom (``dcmread`` of the same files, converted by
``phantometry.io.dicom.listing_header_of``). Encodings per DICOM PS3.5 section 7 (data
elements, sequences and items of undefined length) and PS3.10 section 7.1 (file meta group).
All written data are invented.
"""

from __future__ import annotations

import os
import shutil
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pydicom
import pydicom.data
import pytest
from pydicom.dataset import Dataset
from pydicom.sequence import Sequence
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian

from phantometry.io.dicom import _LISTING_TAGS, discover_series, listing_header_of
from phantometry.io.dicom_listing import ListingHeader, read_listing_header
from phantometry.io.dicom_write import write_dicom_series
from phantometry.volume import Volume, affine_from_axes

SCAN_TIME = datetime(2031, 5, 14, 10, 15, 0, tzinfo=timezone(timedelta(hours=1)))  # invented


def _pydicom_listing(path) -> ListingHeader:
    ds = pydicom.dcmread(path, stop_before_pixels=True, specific_tags=_LISTING_TAGS)
    return listing_header_of(ds)


def _series(tmp_path: Path, n_slices: int = 3, **kw) -> list[Path]:
    data = np.arange(n_slices * 8 * 8, dtype=np.float32).reshape(n_slices, 8, 8)
    affine = affine_from_axes([0.0, 0.0, 0.0], [1, 0, 0], [0, 1, 0], [0, 0, 1], (2.0, 2.0, 2.0))
    volume = Volume(data=data, affine=affine, acquired_at=SCAN_TIME, nuclide="F-18")
    write_dicom_series(volume, tmp_path, **kw)
    return sorted(tmp_path.glob("*.dcm"))


def _pydicom_data_files() -> list[str]:
    base = Path(pydicom.data.__file__).parent
    return sorted(str(p) for p in base.rglob("*") if p.is_file())


def test_every_file_pydicom_ships_reads_as_pydicom_reads_it():
    # every file the fast walk reads must give exactly pydicom's values; the rest it declines
    read = declined = 0
    for path in _pydicom_data_files():
        fast = read_listing_header(path)
        if fast is None:
            declined += 1
            continue
        assert fast == _pydicom_listing(path), path
        read += 1
    # pydicom 3.0 ships about 200 files (86 test files, character-set files, palettes,
    # DICOMDIR trees); most are little-endian with a file meta group
    assert read >= 100, (read, declined)


@pytest.mark.parametrize(
    "name", ["MR_small_bigendian.dcm", "ExplVR_BigEnd.dcm", "image_dfl.dcm", "no_meta.dcm", "meta_missing_tsyntax.dcm"]
)
def test_declines_what_it_does_not_read_exactly(name):
    # big endian, deflated, no file meta group, no transfer syntax (pydicom's test files)
    path = Path(pydicom.data.__file__).parent / "test_files" / name
    assert path.is_file()
    assert read_listing_header(path) is None


def test_written_series_and_implicit_vr(tmp_path):
    files = _series(tmp_path / "explicit")
    fast = read_listing_header(files[0])
    assert fast is not None and fast == _pydicom_listing(files[0])
    assert fast.modality == "PT" and fast.series_uid and fast.timezone_offset == "+0100"
    # the same file re-encoded implicit VR little endian
    ds = pydicom.dcmread(files[0])
    ds.file_meta.TransferSyntaxUID = ImplicitVRLittleEndian
    implicit = tmp_path / "implicit.dcm"
    ds.save_as(implicit, enforce_file_format=True)
    assert pydicom.dcmread(implicit).file_meta.TransferSyntaxUID == ImplicitVRLittleEndian
    assert read_listing_header(implicit) == fast
    # a big-endian file (pydicom's test file): declined, pydicom reads it for the listing
    big = tmp_path / "big"
    big.mkdir()
    shutil.copy(Path(pydicom.data.__file__).parent / "test_files" / "MR_small_bigendian.dcm", big)
    assert read_listing_header(big / "MR_small_bigendian.dcm") is None
    [info] = discover_series(big)
    assert info.series_uid == str(pydicom.dcmread(big / "MR_small_bigendian.dcm").SeriesInstanceUID)
    assert info.modality == "MR"


def _code(value: str) -> Dataset:
    item = Dataset()
    item.CodeValue = value
    item.CodingSchemeDesignator = "99INVENTED"
    item.CodeMeaning = f"invented code {value}"
    return item


@pytest.mark.parametrize("syntax", [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
@pytest.mark.parametrize("undefined", [False, True])
def test_sequences_before_the_series_attributes_are_skipped(tmp_path, syntax, undefined):
    # PS3.5 7.5: a sequence of defined or undefined length, items of defined or undefined
    # length, and a nested sequence inside an item, all before Series Instance UID
    files = _series(tmp_path / "s")
    ds = pydicom.dcmread(files[0])
    outer = _code("A1")
    outer.PurposeOfReferenceCodeSequence = Sequence([_code("B1"), _code("B2")])  # (0040,A170)
    ds.ProcedureCodeSequence = Sequence([outer, _code("A2")])  # (0008,1032)
    ds.AnatomicRegionSequence = Sequence([])  # (0008,2218): empty
    if undefined:
        for elem in (ds["ProcedureCodeSequence"], outer["PurposeOfReferenceCodeSequence"], ds["AnatomicRegionSequence"]):
            elem.is_undefined_length = True
            for item in elem.value:
                item.is_undefined_length_sequence_item = True
    ds.file_meta.TransferSyntaxUID = syntax
    path = tmp_path / "seq.dcm"
    ds.save_as(path, enforce_file_format=True)
    raw = path.read_bytes()
    assert (b"\xff\xff\xff\xff" in raw) == undefined  # the encoding asked for was written
    fast = read_listing_header(path)
    assert fast is not None
    assert fast == _pydicom_listing(path)
    assert fast.series_uid == str(ds.SeriesInstanceUID)


def test_damaged_and_foreign_files(tmp_path):
    files = _series(tmp_path / "s")
    raw = files[0].read_bytes()
    cut = tmp_path / "cut.dcm"
    cut.write_bytes(raw[:400])  # ends inside the header, before the series attributes
    assert read_listing_header(cut) is None
    text = tmp_path / "notes.txt"
    text.write_text("not DICOM\n")
    assert read_listing_header(text) is None
    # listing a folder with them: the series is found, the others do not count
    shutil.copy(cut, tmp_path / "s" / "zz_cut.dcm")
    shutil.copy(text, tmp_path / "s" / "notes.txt")
    infos = discover_series(tmp_path / "s")
    assert len(infos) == 1 and infos[0].file_count == len(files)


def test_non_ascii_description_is_read_by_pydicom(tmp_path):
    files = _series(tmp_path / "s")
    ds = pydicom.dcmread(files[0])
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.SeriesDescription = "Kalibrierung Phantom Größe 2"  # invented, Latin-1
    path = tmp_path / "latin1" / "one.dcm"
    path.parent.mkdir()
    ds.save_as(path, enforce_file_format=True)
    assert read_listing_header(path) is None  # the character set decides: declined
    assert discover_series(path.parent)[0].series_description == "Kalibrierung Phantom Größe 2"


def test_multi_valued_description_and_odd_number(tmp_path):
    files = _series(tmp_path / "s")
    ds = pydicom.dcmread(files[0])
    ds.SeriesDescription = ["QC", " recon B "]
    ds.SeriesNumber = None  # present, empty
    path = tmp_path / "mv.dcm"
    ds.save_as(path, enforce_file_format=True)
    fast = read_listing_header(path)
    assert fast is not None and fast == _pydicom_listing(path)
    assert fast.series_description == "QC, recon B" and fast.series_number is None


def test_long_private_header_is_read_past_the_first_read(tmp_path):
    # a private block of 40 kB before the series attributes (more than the first read)
    files = _series(tmp_path / "s")
    ds = pydicom.dcmread(files[0])
    block = ds.private_block(0x0009, "INVENTED PRIVATE", create=True)
    block.add_new(0x10, "OB", os.urandom(40_000))
    path = tmp_path / "private.dcm"
    ds.save_as(path, enforce_file_format=True)
    fast = read_listing_header(path)
    assert fast is not None and fast == _pydicom_listing(path)
