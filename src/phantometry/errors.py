"""Exceptions of phantometry.

Every error a user can cause derives from :class:`PhantometryError`. The command line turns
one into a single line on stderr and exit code 2; anything else is a bug (exit code 1).
Messages name the file and the problem and say what to do.
"""

from __future__ import annotations


class PhantometryError(Exception):
    """Base class of every expected, user-facing error."""


class InputError(PhantometryError):
    """A file or argument the user gave cannot be used (missing, unreadable, malformed)."""


class NoPETSeries(InputError):
    """No PET image series was found where one was expected."""


class AmbiguousSeries(InputError):
    """Several PET series were found and none was chosen."""


class UnsupportedSeries(InputError):
    """A series was found but cannot be analysed (modality, units, geometry, encoding)."""


class GeometryError(UnsupportedSeries):
    """Slices are missing, duplicated or unevenly spaced, or the orientation is unusable."""


class UnitsError(UnsupportedSeries):
    """The pixel units are unknown or cannot be converted to Bq/mL with what is given."""


class FillRecordError(InputError):
    """The fill record (phantom preparation YAML) is invalid."""


class TemplateError(InputError):
    """An ROI template is invalid or cannot be found."""


class PhantomNotFound(PhantometryError):
    """The phantom described by the template could not be located in the image."""


class PhantomNotPlaced(PhantomNotFound):
    """The phantom's body is in the image but its inserts could not be placed; the message
    names the likely cause, as the image shows it, and how to place the phantom by hand."""


class BandError(InputError):
    """An acceptance-band file is invalid or does not fit the template."""


class LedgerError(PhantometryError):
    """The trend ledger refused an operation (duplicate record, bad query, schema)."""


class OutputError(PhantometryError):
    """An output cannot be written (no space, file-size limit, permission, a file in the way)."""


class OutputRefused(OutputError):
    """An output path is refused before any work: it would replace or touch what the user owns."""


class ImageTooLarge(InputError):
    """An image is larger than the voxel limit ($PHANTOMETRY_MAX_VOXELS) or the memory available."""
