"""What made an output: the provenance tags every written scene carries.

``apply``, ``filter`` and ``simulate`` record in each output's dataset-level metadata
(GeoTIFF tags, read back with ``rasterio`` ``ds.tags()`` or ``gdalinfo``):

``despeck_version``
    The despeck version that wrote the file.
``despeck_method``
    The filter's name, the model file's name (``apply``), or the simulation.
``despeck_model_sha256``
    SHA-256 of the model file's bytes (``apply`` with a model loaded from a file).
``despeck_created``
    When the output was made, UTC, ISO 8601 to the second (``2031-05-04T10:22:07Z``).
``despeck_tiling``
    Tile shape, overlap and discarded margin used by ``apply``.
``despeck_options``
    Method settings (a filter's window and options).

The looks and speckle correlation of the *input* and how they were obtained are
written by :mod:`despeck.looks` (``input_looks``, ``input_speckle_correlation_*``);
the input's own speckle tags are not copied to outputs
(:data:`despeck.raster.SPECKLE_TAGS`). This module only builds the tags; the
writers add them.
"""

from __future__ import annotations

import datetime
import hashlib

__all__ = ["provenance_tags", "file_sha256", "model_provenance", "tiling_text", "without_provenance", "PREFIX"]

#: Prefix of every provenance tag.
PREFIX = "despeck_"


def file_sha256(path) -> str:
    """Hex SHA-256 of a file's bytes, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def model_provenance(model) -> tuple[str, str | None]:
    """``(method, sha256)`` of a model: its file's name and hash when it was loaded from a file.

    :func:`despeck.models.load_model_file` records ``source_file`` and
    ``source_sha256`` on the model it returns; a model built in memory is named by
    its network's architecture and has no hash.
    """
    name = getattr(model, "source_file", None)
    if name:
        return str(name), getattr(model, "source_sha256", None)
    network = getattr(model, "network", model)
    name = getattr(network, "architecture", None) or type(network).__name__
    return f"{name} (in memory, not from a model file)", None


def tiling_text(grid) -> str:
    """``"tile RxC, overlap O, margin M"`` of a :class:`despeck.tiling.TileGrid`."""
    tile = grid.tile if isinstance(grid.tile, (tuple, list)) else (grid.tile, grid.tile)
    return f"tile {int(tile[0])}x{int(tile[1])}, overlap {int(grid.overlap)}, margin {int(grid.margin)}"


def provenance_tags(method, *, model_sha256=None, tiling=None, options=None, created=None) -> dict:
    """The provenance tags of one output (see the module notes).

    Parameters
    ----------
    method : str
        Filter name, model file name or simulation.
    model_sha256 : str, optional
        Hash of the model file (:func:`file_sha256`).
    tiling : str, optional
        Tiling used (:func:`tiling_text`).
    options : dict or str, optional
        Method settings; a dict is written as ``key=value`` pairs in its order.
    created : datetime.datetime, optional
        Creation time (default now); converted to UTC.

    Returns
    -------
    dict of str
    """
    from . import __version__

    when = created or datetime.datetime.now(datetime.timezone.utc)
    if when.tzinfo is None:
        when = when.replace(tzinfo=datetime.timezone.utc)
    when = when.astimezone(datetime.timezone.utc).replace(microsecond=0)
    tags = {
        f"{PREFIX}version": __version__,
        f"{PREFIX}method": str(method),
        f"{PREFIX}created": when.strftime("%Y-%m-%dT%H:%M:%SZ"),
    }
    if model_sha256:
        tags[f"{PREFIX}model_sha256"] = str(model_sha256)
    if tiling:
        tags[f"{PREFIX}tiling"] = str(tiling)
    if options:
        text = options if isinstance(options, str) else ", ".join(f"{k}={v}" for k, v in dict(options).items())
        tags[f"{PREFIX}options"] = text
    return tags


def _is_provenance(key) -> bool:
    return str(key).strip().lower().startswith(PREFIX)


def without_provenance(tags) -> dict:
    """``tags`` without provenance tags (an input's record of what made it is not the output's)."""
    return {k: v for k, v in dict(tags or {}).items() if not _is_provenance(k)}
