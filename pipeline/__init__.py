"""polecast: the Sun's polar magnetic field from full-disk magnetograms.

Data flow (each arrow a pure function over plain data)::

    FITS -reader-> Frame -projection/measure-> FrameRecord -store-> ledger
    ledger -aggregator-> PolarSeries -reversal-> reversal epochs
    sunspot series -cycles-> cycle landmarks
    PolarSeries + landmarks -precursor-> value -regression-> Forecast -report-> figures + HTML
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("polecast")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
