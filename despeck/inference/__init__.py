"""Tiled, streamed application of a trained despeckler to arrays and raster files.

:func:`despeckle_array` runs a :class:`despeck.models.Despeckler` over an in-memory
intensity array; :func:`despeckle_file` runs it over a raster file of any size and
writes a GeoTIFF with the input's georeferencing, nodata, band descriptions and tags.
Both cut the scene into constant-shape overlapping tiles (:mod:`despeck.tiling`),
feed them to the network in batches and blend the results, and both feed the blend
strips of full-width rows: a file's strips come from the package's streaming engine
(:mod:`despeck.raster.streaming`), which also writes each finished row of output
blocks and forgets it, so memory depends on the scene's width and the tile size,
never on its height.

Every tile of a scene is normalised with one scene-level log offset (the mean log
intensity of a decimated sample of valid pixels), so tiles are processed identically
and blending has nothing to hide for a purely convolutional network. Invalid pixels
(nodata, non-finite, non-positive) are excluded from the network's input by the
Despeckler's documented fill -- the scene's log offset, i.e. a normalised value of 0
-- and are restored as the input value (arrays) or nodata (files) in the output.

Files are tiled in short, wide tiles whose rows advance by exactly one row of output
blocks, so each row of tiles completes whole blocks and the buffers hold about one
tile height of the scene's width; GDAL worker threads compress output blocks while
the network runs.

The package's modules:

- :mod:`~despeck.inference.tiles` -- the model's checks, tile size and overlap (:func:`resolve_tiling`), the scene's log offset;
- :mod:`~despeck.inference.runner` -- batches of tiles through the model: threads, memory format, bfloat16;
- :mod:`~despeck.inference.blend` -- the row buffer and overlap-blend of the tile grid over strips of rows;
- :mod:`~despeck.inference.condition` -- looks and speckle correlation the model is told, and mismatch notes;
- :mod:`~despeck.inference.despeckle` -- :func:`despeckle_array` and :func:`despeckle_file`.
"""

from __future__ import annotations

from ..cpu import bf16_supported  # re-exported: callers know it here
from .condition import condition_for_model, model_mismatch_notes
from .despeckle import despeckle_array, despeckle_file
from ..models.orientations import check_orientations  # re-exported beside the other run settings
from .runner import resolve_bf16
from .tiles import MAX_TILE, InferenceWarning, array_sample, max_overlap, resolve_tiling

__all__ = [
    "despeckle_array",
    "despeckle_file",
    "bf16_supported",
    "resolve_bf16",
    "check_orientations",
    "resolve_tiling",
    "max_overlap",
    "MAX_TILE",
    "model_mismatch_notes",
    "InferenceWarning",
    "array_sample",
    "condition_for_model",
]
