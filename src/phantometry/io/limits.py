"""Limits checked on image headers before any voxel memory is allocated.

A header states the image size; the loaders compare that claim with the limit below and with
the bytes the file actually holds before allocating an array, so a damaged or hostile header
(a 600-byte NIfTI claiming 2000 x 2000 x 1000 voxels, DICOM Rows and Columns of 65535) ends in
one error line instead of exhausting the machine's memory.

The limit is ``$PHANTOMETRY_MAX_VOXELS`` voxels, by default :data:`DEFAULT_MAX_VOXELS`
(500 million, 2 GB as float32): about four times the largest whole-body clinical PET volume,
e.g. a 440 x 440 matrix over 645 slices of a long axial field-of-view scanner is 125 million
voxels (recalled, typical of such reconstructions). Set the variable higher for a genuinely
larger image, if the machine has the memory.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence

from ..errors import ImageTooLarge, InputError

__all__ = ["DEFAULT_MAX_VOXELS", "MAX_VOXELS_ENV", "check_voxel_count", "max_voxels"]

MAX_VOXELS_ENV = "PHANTOMETRY_MAX_VOXELS"
DEFAULT_MAX_VOXELS = 500_000_000


def max_voxels() -> int:
    """The voxel limit: ``$PHANTOMETRY_MAX_VOXELS`` if set, else :data:`DEFAULT_MAX_VOXELS`.

    Raises
    ------
    InputError
        When the variable is set to something other than a positive whole number.
    """
    text = os.environ.get(MAX_VOXELS_ENV, "").strip()
    if not text:
        return DEFAULT_MAX_VOXELS
    try:
        value = int(text.replace("_", ""))
    except ValueError:
        value = 0
    if value <= 0:
        raise InputError(f"${MAX_VOXELS_ENV} is {text[:40]!r}; set it to a positive whole number of voxels, or unset it")
    return value


def check_voxel_count(shape: Sequence[int], where: str, what: str) -> int:
    """Refuse an image of more than :func:`max_voxels` voxels; returns the voxel count.

    Parameters
    ----------
    shape : the claimed dimensions.
    where : the file named in the message.
    what : what the dimensions are called in the header (e.g. ``"Rows x Columns x slices"``).

    Raises
    ------
    ImageTooLarge
    """
    total = math.prod(int(n) for n in shape)
    limit = max_voxels()
    if total > limit:
        raise ImageTooLarge(
            f"{where}: {what} {' x '.join(str(int(n)) for n in shape)} = {total:,} voxels, more than the limit of "
            f"{limit:,}; the header is damaged, or raise ${MAX_VOXELS_ENV} for a genuinely larger image"
        )
    return total
