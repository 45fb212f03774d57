"""The screener: from a few museum records of sister taxa and a stack of rasters to a
ranked plan of survey sites for unknown populations and undescribed lineages.

Stages are plain functions and small classes over typed values; only
:mod:`screener.cli`, :mod:`screener.pipeline` and :mod:`screener.outputs` touch files.
"""

import logging

__version__ = "0.1.0"

logging.getLogger(__name__).addHandler(logging.NullHandler())

__all__ = ["__version__"]
