"""Loaders and writers for image files (DICOM, NIfTI)."""
