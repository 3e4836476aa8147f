"""Fast listing of DICOM files: the few attributes that tell which series a file belongs to.

Listing a folder of reconstructions (``phantometry compare``, 20 series of 90 to 400 slices)
needs only a few attributes of each file, all near its start: Series and Acquisition Date and
Time (0008,0021/0022/0031/0032, shown by the series chooser), Modality (0008,0060), Timezone
Offset From UTC (0008,0201), Series Description (0008,103E), Study Instance UID (0020,000D),
Series Instance UID (0020,000E) and Series Number (0020,0011), plus the Media Storage SOP Class
UID of the file meta group. pydicom parses every element of the header to
find them (about 1 ms a file here); :func:`read_listing_header` walks the element stream of
the first few kilobytes instead and stops after Series Number (tens of microseconds).

The walk follows the data element encoding of DICOM PS3.5 section 7 (explicit and implicit
VR little endian, sequences and items of defined or undefined length, section 7.5) and the
file meta group of PS3.10 section 7.1. Whatever it does not handle exactly, it declines
(returns ``None``) and the caller reads the file with pydicom: big-endian and deflated
transfer syntaxes, private transfer syntaxes, files without the ``DICM`` prefix, element
streams that are not in ascending tag order, explicit VR values that are not a standard VR,
UN elements of undefined length, a Series Description with non-ASCII bytes (its character
set decides the text), and files that end inside an element. A test checks the result
against pydicom's reading of every file pydicom ships for its own tests.
"""

from __future__ import annotations

import os
import struct
from dataclasses import dataclass

__all__ = ["ListingHeader", "first_int", "read_listing_header"]

_PREAMBLE = 128
_FIRST_READ = 16384
_ITEM = 0xFFFEE000
_ITEM_END = 0xFFFEE00D
_SEQUENCE_END = 0xFFFEE0DD
_UNDEFINED = 0xFFFFFFFF
_LAST_WANTED = 0x00200011  # Series Number: nothing after it is needed
_PIXEL_DATA = 0x7FE00010

_WANTED = {
    0x00080021: "series_date",
    0x00080022: "acquisition_date",
    0x00080031: "series_time",
    0x00080032: "acquisition_time",
    0x00080060: "modality",
    0x00080201: "timezone_offset",
    0x0008103E: "series_description",
    0x0020000D: "study_uid",
    0x0020000E: "series_uid",
    0x00200011: "series_number",
}
#: VRs whose explicit encoding has two reserved bytes and a 32-bit length (PS3.5 table 7.1-1)
_LONG_VRS = frozenset(b"OB OD OF OL OV OW SQ SV UC UN UR UT UV".split())
_SHORT_VRS = frozenset(
    b"AE AS AT CS DA DS DT FL FD IS LO LT PN SH SL SS ST TM UI UL US".split()
)
_IMPLICIT_LE = "1.2.840.10008.1.2"
#: standard transfer syntaxes whose data set is not explicit VR little endian
_NOT_EXPLICIT_LE = {"1.2.840.10008.1.2.2", "1.2.840.10008.1.2.1.99"}
_STANDARD_PREFIX = "1.2.840.10008.1.2."

_HEADER = struct.Struct("<HHI")  # group, element, 32-bit length (implicit VR; items)
_EXPLICIT = struct.Struct("<HH2sH")  # group, element, VR, 16-bit length
_U32 = struct.Struct("<I")
_U16 = struct.Struct("<H")


@dataclass(frozen=True)
class ListingHeader:
    """What listing needs of one DICOM file (text stripped of padding; None when absent).

    Attributes
    ----------
    sop_class_uid : str or None
        Media Storage SOP Class UID (0002,0002) of the file meta group.
    series_uid, study_uid : str or None
    series_number : int or None
        Series Number (first value; None when absent or not a number).
    series_description : str or None
        Multiple values joined by ``", "``.
    modality : str or None
    timezone_offset : str or None
        Timezone Offset From UTC as written (``"+0100"``).
    series_date, series_time : str or None
        Series Date (DA) and Series Time (TM) as written, else Acquisition Date and Time
        (what the series chooser shows; not used for any computation).
    """

    sop_class_uid: str | None
    series_uid: str | None
    series_number: int | None
    series_description: str | None
    modality: str | None
    study_uid: str | None
    timezone_offset: str | None
    series_date: str | None = None
    series_time: str | None = None


class _Decline(Exception):
    """The fast walk cannot read this file exactly: let pydicom read it."""


class _NeedMore(Exception):
    """The walk ran past the bytes read so far."""


def _ascii_text(raw: bytes) -> str | None:
    text = raw.decode("latin-1").strip(" \x00")
    return text or None


def first_int(text: str | None) -> int | None:
    """The first value of an IS/DS text as an integer (None when absent or not a number)."""
    if text is None:
        return None
    try:
        return int(float(text.split("\\")[0]))
    except (ValueError, OverflowError):  # not a number, or infinite
        return None


def _description(raw: bytes) -> str | None:
    if not raw.isascii() or b"\x1b" in raw:
        raise _Decline  # the Specific Character Set decides this text
    parts = [p.strip(" \x00") for p in raw.decode("ascii").split("\\")]
    text = ", ".join(p for p in parts if p)
    return text or None


class _Walker:
    """Walks data elements of one buffer (PS3.5 section 7.1)."""

    def __init__(self, data: bytes, explicit: bool) -> None:
        self.data = data
        self.explicit = explicit

    def header(self, pos: int) -> tuple[int, bytes | None, int, int]:
        """(tag, VR or None, value length, value start) of the element at ``pos``."""
        data = self.data
        if pos + 8 > len(data):
            raise _NeedMore
        if self.explicit:
            group, element, vr, short = _EXPLICIT.unpack_from(data, pos)
            if group != 0xFFFE:  # items and delimiters have no VR (7.5)
                if vr in _SHORT_VRS:
                    return (group << 16) | element, vr, short, pos + 8
                if vr in _LONG_VRS:
                    if pos + 12 > len(data):
                        raise _NeedMore
                    return (group << 16) | element, vr, _U32.unpack_from(data, pos + 8)[0], pos + 12
                raise _Decline  # not a standard VR (or implicit VR data in an explicit file)
        group, element, length = _HEADER.unpack_from(data, pos)
        return (group << 16) | element, None, length, pos + 8

    def skip_undefined(self, pos: int, vr: bytes | None) -> int:
        """Position after a value of undefined length: a sequence of items (7.5.2)."""
        if vr is not None and vr != b"SQ":
            raise _Decline  # UN of undefined length is implicit VR inside (6.2.2); pixel data
        while True:
            tag, _, length, start = self.header(pos)
            if tag == _SEQUENCE_END:
                return start
            if tag != _ITEM:
                raise _Decline
            pos = start + length if length != _UNDEFINED else self.skip_item(start)

    def skip_item(self, pos: int) -> int:
        """Position after the elements of an item of undefined length and its delimiter."""
        while True:
            tag, vr, length, start = self.header(pos)
            if tag == _ITEM_END:
                return start
            pos = start + length if length != _UNDEFINED else self.skip_undefined(start, vr)


def _walk_meta(data: bytes) -> tuple[dict[int, bytes], int]:
    """File meta elements (always explicit VR little endian, PS3.10 7.1) and the data set start."""
    if len(data) < _PREAMBLE + 4 or data[_PREAMBLE:_PREAMBLE + 4] != b"DICM":
        raise _Decline
    walker = _Walker(data, explicit=True)
    pos = _PREAMBLE + 4
    meta: dict[int, bytes] = {}
    while True:
        if pos + 2 > len(data):
            raise _NeedMore
        if _U16.unpack_from(data, pos)[0] != 0x0002:
            return meta, pos
        tag, vr, length, start = walker.header(pos)
        if length == _UNDEFINED:
            raise _Decline
        end = start + length
        if end > len(data):
            raise _NeedMore
        meta[tag] = data[start:end]
        pos = end


def _walk(data: bytes, complete: bool) -> ListingHeader:
    meta, pos = _walk_meta(data)
    syntax = _ascii_text(meta.get(0x00020010, b"")) or ""
    if syntax == _IMPLICIT_LE:
        explicit = False
    elif syntax.startswith(_STANDARD_PREFIX) and syntax not in _NOT_EXPLICIT_LE:
        explicit = True
    else:
        raise _Decline  # big endian, deflated, private or missing transfer syntax
    walker = _Walker(data, explicit)
    found: dict[str, bytes] = {}
    previous = -1
    while True:
        if pos >= len(data):
            if complete:
                break  # the file ends after the last element
            raise _NeedMore
        tag, vr, length, start = walker.header(pos)
        if tag <= previous or tag >> 16 == 0xFFFE:
            raise _Decline  # not ascending, or a stray delimiter
        if tag > _LAST_WANTED:
            break
        previous = tag
        if length == _UNDEFINED:
            pos = walker.skip_undefined(start, vr)
            continue
        end = start + length
        if end > len(data):
            raise _NeedMore
        key = _WANTED.get(tag)
        if key is not None:
            found[key] = data[start:end]
        pos = end
    number_text = _ascii_text(found["series_number"]) if "series_number" in found else None
    return ListingHeader(
        sop_class_uid=_ascii_text(meta.get(0x00020002, b"")),
        series_uid=_ascii_text(found.get("series_uid", b"")),
        series_number=first_int(number_text),
        series_description=_description(found["series_description"]) if "series_description" in found else None,
        modality=_ascii_text(found.get("modality", b"")),
        study_uid=_ascii_text(found.get("study_uid", b"")),
        timezone_offset=_ascii_text(found.get("timezone_offset", b"")),
        series_date=_ascii_text(found.get("series_date", b"")) or _ascii_text(found.get("acquisition_date", b"")),
        series_time=_ascii_text(found.get("series_time", b"")) or _ascii_text(found.get("acquisition_time", b"")),
    )


def read_listing_header(path: str | os.PathLike) -> ListingHeader | None:
    """Read the listing attributes of one DICOM file, or decline.

    Parameters
    ----------
    path : path
        A file.

    Returns
    -------
    ListingHeader or None
        None when the file is not one this walk reads exactly (see the module notes): the
        caller then reads it with pydicom, which also tells non-DICOM and damaged files.

    Raises
    ------
    OSError
        The file cannot be opened or read.
    """
    with open(path, "rb") as f:
        data = f.read(_FIRST_READ)
        complete = len(data) < _FIRST_READ
        while True:
            try:
                return _walk(data, complete)
            except _Decline:
                return None
            except _NeedMore:
                if complete:
                    return None  # the file ends inside an element: damaged
                more = f.read()
                data += more
                complete = True
