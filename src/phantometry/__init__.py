"""phantometry: quantitative image-quality analysis of PET phantom scans.

Results support, and do not replace, a qualified medical physicist; follow local regulations
and the scanner maker's acceptance procedures.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("phantometry")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0.0.0+unknown"

from .errors import PhantometryError, PhantomNotFound, UnsupportedSeries  # noqa: E402
from .volume import Volume  # noqa: E402

__all__ = ["PhantometryError", "PhantomNotFound", "UnsupportedSeries", "Volume", "__version__"]
