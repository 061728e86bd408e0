"""Reading and writing SAR rasters: units, validity masks, block windows, safe outputs.

Every scene enters the package as float32 linear **intensity** plus a boolean
**valid** mask, whatever the file holds: linear intensity (power), amplitude,
decibels, or complex samples (a complex data type such as CInt16/CFloat32, or a
two-band file of in-phase and quadrature parts). Files are read through rasterio,
so anything GDAL opens can be read, window by window along the file's own blocks
for scenes larger than memory; multi-band files (e.g. two polarisations) are read
band by band. Outputs are tiled, DEFLATE-compressed GeoTIFFs written into a
temporary file beside the destination and renamed only when complete, carrying the
input's CRS, transform, nodata, band descriptions and tags.

Invalid pixels are nodata, non-finite and non-positive intensities; their
intensity is set to 0.0 so arrays stay NaN-free, and the writer turns them back
into the output's nodata value.

The package's modules, lowest first:

- :mod:`~despeck.raster.units` -- units and their conversion to and from intensity (numpy only);
- :mod:`~despeck.raster.detection` -- which units a file holds (metadata words, speckle statistics);
- :mod:`~despeck.raster.gdal_env` -- GDAL's block cache, native error printers, decode threads;
- :mod:`~despeck.raster.windows` -- checked windows and row strips;
- :mod:`~despeck.raster.paths` -- the output-path policy and one-line write errors;
- :mod:`~despeck.raster.reader` -- :class:`SceneReader` (intensity, or complex samples);
- :mod:`~despeck.raster.writer` -- :class:`SceneWriter`, the named output profile, read-back, COG;
- :mod:`~despeck.raster.scene` -- whole bands in memory;
- :mod:`~despeck.raster.streaming` -- the streaming engine: a scene band by band through a function
  on strips of full rows, with a halo, a progress bar and the atomic output (:func:`open_stream`).
"""

from __future__ import annotations

from ..atomic import OutputBusyError
from ..errors import RasterError  # noqa: F401 - raster errors were always reachable here
from .detection import UnitsDecision, UnitsEvidence, detect_units, unit_hints, units_evidence
from .gdal_env import GDAL_CACHE_MB, limit_gdal_cache, quiet_native_error_printers
from .paths import OutputFolderError, check_output_path
from .reader import SceneReader, open_scene
from .scene import Scene, read_scene, write_scene
from .streaming import RasterStream, Strip, open_stream, process_file, read_with_halo
from .units import OUTPUT_UNITS, UNITS, UnitsWarning, check_units, from_intensity, to_intensity
from .writer import OUTPUT_PROFILE, OUTPUT_TILE, SPECKLE_TAGS, SceneWriter, open_output

__all__ = [
    "UNITS",
    "OUTPUT_UNITS",
    "UnitsWarning",
    "UnitsDecision",
    "UnitsEvidence",
    "unit_hints",
    "units_evidence",
    "check_units",
    "to_intensity",
    "from_intensity",
    "detect_units",
    "SceneReader",
    "SceneWriter",
    "Scene",
    "open_scene",
    "open_output",
    "read_scene",
    "write_scene",
    "check_output_path",
    "OutputFolderError",
    "OutputBusyError",
    "open_stream",
    "RasterStream",
    "Strip",
    "read_with_halo",
    "process_file",
    "limit_gdal_cache",
    "quiet_native_error_printers",
    "GDAL_CACHE_MB",
    "OUTPUT_TILE",
    "OUTPUT_PROFILE",
    "SPECKLE_TAGS",
]
