"""despeck: train and run small speckle-reduction networks for SAR imagery on a CPU.

Layers, lowest first (a module imports only from its own layer or below):

1. :mod:`despeck.speckle` (speckle statistics and simulation) and
   :mod:`despeck.raster` (GeoTIFF/GDAL reading and writing) -- numpy, scipy, rasterio;
2. :mod:`despeck.filters` and :mod:`despeck.metrics` -- classical filters and quality
   metrics, numpy/scipy only;
3. :mod:`despeck.models` and :mod:`despeck.training` -- networks, losses, trainer (torch);
4. :mod:`despeck.tiling`, :mod:`despeck.inference` and :mod:`despeck.bench`;
5. :mod:`despeck.cli` -- the ``despeck`` command.
"""

import logging as _logging

__version__ = "0.1.0"

# A library says nothing unless its user configures logging (common practice);
# ``despeck -v`` does so for the command line (despeck.cli.verbose_logging).
_logging.getLogger(__name__).addHandler(_logging.NullHandler())
