"""Which tile grid a model gets on a scene: the model's checks, tile size and overlap, the scene's log offset.

The geometry itself (tiles, margins, blend weights) is :mod:`despeck.tiling`; this
module reads what a model needs from it (receptive field, size multiple) and checks
the user's ``tile`` and ``overlap`` once, on the way from ``--tile`` to the grid.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import torch

from ..errors import InputError
from ..tiling import TileGrid, default_tiling

__all__ = [
    "InferenceWarning",
    "MAX_TILE",
    "SAMPLE_PIXELS",
    "check_model",
    "size_multiple",
    "positive_int",
    "resolve_tiling",
    "max_overlap",
    "scene_offset",
    "array_sample",
]

#: Upper bound of the scene sample used for the log offset (same as the file reader's).
SAMPLE_PIXELS = 1_000_000


class InferenceWarning(UserWarning):
    """The model may not suit the input (units, looks), or a speed option was unavailable."""


# --------------------------------------------------------------------------- checks

def check_model(model):
    """The model's receptive field (a positive odd int), or :class:`InputError` if it is no Despeckler."""
    rf = getattr(model, "receptive_field", None)
    if not isinstance(model, torch.nn.Module) or isinstance(rf, bool) or not isinstance(rf, (int, np.integer)):
        raise InputError(
            f"model must be a despeck.models.Despeckler (an nn.Module with an integer receptive_field), "
            f"got {type(model).__name__}"
        )
    if rf < 1 or rf % 2 == 0:
        raise InputError(f"model receptive_field must be a positive odd integer, got {rf}")
    return int(rf)


def size_multiple(model) -> int:
    """Side multiple at which every tile sees the same pooling grid (1 for plain CNNs)."""
    for obj in (model, getattr(model, "network", None)):
        if obj is None:
            continue
        m = getattr(obj, "size_multiple", None)
        if isinstance(m, (int, np.integer)) and m >= 1:
            return int(m)
        levels = getattr(obj, "levels", None)
        if isinstance(levels, (int, np.integer)) and levels >= 0:
            return 2 ** int(levels)
    return 1


def positive_int(name, value, minimum=1):
    """``value`` as an int of at least ``minimum`` (None stays None), or :class:`InputError` naming ``name``."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        else:
            raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def resolve_tiling(shape, model, *, tile=None, overlap=None, row_stride=None) -> TileGrid:
    """The tile grid used for a scene of ``shape`` with ``model``.

    Parameters
    ----------
    shape : tuple of int
        Scene ``(rows, cols)``.
    model : Despeckler
        Supplies ``receptive_field`` (and the size multiple of multi-scale networks).
    tile : int, optional
        Largest tile side in pixels; default from :func:`despeck.tiling.default_tiling`.
        Along each axis the tiler then takes the smallest side, not above this, that
        needs no more tiles, so little work is spent on padding past the scene border.
    overlap : int, optional
        Pixels shared by neighbouring tiles. With at least the receptive field minus one,
        half the receptive field is discarded at each tile edge and the rest blended, and
        a plain CNN's tiled output equals its whole-scene output. A smaller overlap is
        allowed (with a warning): a quarter of it is discarded at each edge and the middle
        half blended. For networks that downsample (U-Nets) it is rounded up to their
        size multiple so every tile sees the same pooling grid as the whole scene.
    row_stride : int, optional
        Fix the rows advanced per row of tiles (see :meth:`TileGrid.fitted`); used when
        it fits in ``tile``, which then bounds the tile's area.

    Raises
    ------
    InputError
        Tile smaller than the receptive field or above :data:`MAX_TILE`; overlap not
        below the tile, or above what any tiling of this model needs
        (:func:`max_overlap`).
    """
    rf = check_model(model)
    multiple = size_multiple(model)
    d_tile, d_overlap = default_tiling(rf, multiple)
    tile = positive_int("tile", tile)
    overlap = positive_int("overlap", overlap, 0)
    margin = rf // 2
    if tile is not None and tile < rf:
        raise InputError(f"tile ({tile}) is smaller than the model's receptive field ({rf} pixels); use at least {rf}")
    if tile is not None and tile > MAX_TILE:
        raise InputError(f"tile ({tile}) is larger than the {MAX_TILE}-pixel maximum (a tile's activations must fit "
                         f"in memory; the default is about {d_tile})")
    if overlap is not None and overlap > max_overlap(model):
        raise InputError(f"overlap ({overlap}) is larger than this model can use ({max_overlap(model)} pixels at most; "
                         f"the default is {d_overlap})")
    if overlap is None:
        overlap = d_overlap
        if tile is not None and overlap >= tile:
            overlap = _round_up(rf - 1, multiple)
    elif multiple > 1:
        # Keeps every tile on the same pooling grid as the whole scene.
        overlap = _round_up(overlap, multiple)
    if overlap < rf - 1:
        # Networks with a large nominal receptive field (U-Nets) are usually applied with
        # less: discard a quarter of the overlap at each edge and blend the middle half.
        margin = overlap // 4
        warnings.warn(
            f"overlap ({overlap}) is smaller than the model's receptive field minus one ({rf - 1}): "
            "tiles will differ slightly from whole-scene inference near their edges; blending hides the seams",
            InferenceWarning, stacklevel=3,
        )
    if tile is None:
        tile = max(d_tile, overlap + 8 * multiple)
    if overlap >= tile:
        raise InputError(f"overlap ({overlap}) must be smaller than the tile size ({tile})")
    if row_stride is not None and (row_stride % multiple or row_stride + overlap > tile):
        row_stride = None
    return TileGrid.fitted(shape, tile, overlap, margin, multiple=multiple, row_stride=row_stride)


def _round_up(value, multiple):
    return -(-int(value) // multiple) * multiple


#: Largest tile side accepted (pixels). The default tiles are 720-1024 pixels; a
#: 4096-pixel tile already needs about 2.7 GB of activations for a 40-channel network
#: (330 MB per megapixel, see :func:`despeck.tiling.default_tiling`).
MAX_TILE = 4096


def max_overlap(model) -> int:
    """Largest overlap accepted for ``model``: four times its default overlap, at least 256 pixels.

    The default overlap already holds the receptive field and a blend zone; a larger
    one only recomputes more of every tile, and since tiles are at least the overlap
    plus a few pixels, an absurd value would make absurdly large tiles.
    """
    rf = check_model(model)
    _, d_overlap = default_tiling(rf, size_multiple(model))
    return int(max(4 * d_overlap, 256))


def scene_offset(model, sample):
    """The scene-level log offset ``model`` computes from a sample of valid intensities (None if it has none)."""
    fn = getattr(model, "scene_log_offset", None)
    if fn is None:
        return None
    return float(fn(sample))


def array_sample(intensity, valid):
    """The scene sample of the log offset: the valid pixels of every ``step``-th row and column.

    ``step`` keeps the decimated grid at about one million pixels at most. Works on any
    array that slices like numpy (a dask array gives a lazy sample), so a scene split
    into chunks is normalised with exactly the offset :func:`despeck.inference.despeckle_array` takes.
    """
    step = max(1, math.ceil(math.sqrt(intensity.size / SAMPLE_PIXELS)))
    sub, ok = intensity[::step, ::step], valid[::step, ::step]
    return sub[ok].astype(np.float64)
