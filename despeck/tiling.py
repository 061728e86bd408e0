"""Tile geometry and blending weights for running a network over scenes of any size.

A scene is cut into square tiles of one constant size that overlap their neighbours.
Each tile carries a discarded *margin* of half the model's receptive field on every
side (the pixels the network computes from padding rather than from the scene), and
next to it a *blend zone* where the outputs of two neighbouring tiles are mixed with
separable raised-cosine weights normalised by the accumulated weight, so no seam can
appear. The grid starts half a margin before the first scene pixel and the scene is
extended by reflection beyond its true borders, so every tile has the same shape and
the weights are never tapered at a true scene border. Everything here is pure index
arithmetic on numpy arrays, with no I/O and no torch: :mod:`despeck.inference` reads,
batches and writes around it.

Along one axis of length ``n`` with tile size ``T``, overlap ``O``, margin ``M`` and
stride ``S = T - O``, tile ``k`` covers scene positions ``[k*S - M, k*S - M + T)``; its
output is used (non-zero weight) on ``[k*S, k*S + T - 2*M)``; the last ``B = O - 2*M``
of those positions are shared with tile ``k + 1`` and blended. Positions before 0 and
from ``n`` on are filled by reflection about the border pixels (``numpy.pad`` mode
``"reflect"``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from .errors import InputError

__all__ = [
    "reflect_index",
    "raised_cosine_ramp",
    "AxisTiling",
    "TileGrid",
    "default_tiling",
]


def reflect_index(index, length: int) -> np.ndarray:
    """Map positions outside ``[0, length)`` back inside by mirror reflection.

    The mirror excludes the border pixel itself, as ``numpy.pad(mode="reflect")`` does,
    and repeats for positions further away than the scene is long (a period of
    ``2 * (length - 1)``).

    Parameters
    ----------
    index : array_like of int
        Positions, possibly negative or ``>= length``.
    length : int
        Scene length along the axis (``>= 1``).

    Returns
    -------
    numpy.ndarray of int64
        Positions in ``[0, length)``.
    """
    index = np.asarray(index, dtype=np.int64)
    if length < 1:
        raise InputError(f"axis length must be at least 1, got {length}")
    if length == 1:
        return np.zeros_like(index)
    period = 2 * (length - 1)
    folded = np.mod(index, period)
    return np.where(folded >= length, period - folded, folded)


def raised_cosine_ramp(width: int) -> np.ndarray:
    """Rising half of a raised-cosine (Hann) window, sampled at pixel centres.

    ``ramp[i] = sin^2(pi * (i + 0.5) / (2 * width))``, so every value lies strictly
    between 0 and 1 and ``ramp + ramp[::-1] == 1``: a tile fading out and its neighbour
    fading in over the same pixels always add up to one.

    Parameters
    ----------
    width : int
        Number of pixels in the blend zone (``>= 0``).

    Returns
    -------
    numpy.ndarray of float64, shape (width,)
    """
    if width < 0:
        raise InputError(f"blend width must be >= 0, got {width}")
    phase = (np.arange(width, dtype=np.float64) + 0.5) * (math.pi / (2 * max(width, 1)))
    return np.sin(phase) ** 2


@dataclass(frozen=True)
class AxisTiling:
    """Positions and weights of the tiles along one axis.

    Parameters
    ----------
    length : int
        Scene length along this axis.
    tile : int
        Tile size in pixels.
    overlap : int
        Pixels shared by two neighbouring tiles, margins included.
    margin : int
        Pixels at each tile edge whose output is discarded (weight 0), normally
        ``receptive_field // 2``.
    """

    length: int
    tile: int
    overlap: int
    margin: int

    def __post_init__(self):
        for name in ("length", "tile", "overlap", "margin"):
            value = getattr(self, name)
            if not isinstance(value, (int, np.integer)) or isinstance(value, bool):
                raise InputError(f"{name} must be an integer, got {value!r}")
        if self.length < 1:
            raise InputError(f"scene length must be at least 1 pixel, got {self.length}")
        if self.margin < 0 or self.overlap < 0:
            raise InputError(f"overlap and margin must be >= 0, got overlap {self.overlap}, margin {self.margin}")
        if self.overlap >= self.tile:
            raise InputError(f"overlap ({self.overlap}) must be smaller than the tile size ({self.tile})")
        if self.overlap < 2 * self.margin:
            raise InputError(
                f"overlap ({self.overlap}) must be at least the model's receptive field minus one "
                f"({2 * self.margin}) so that no tile edge reaches the output"
            )

    @property
    def stride(self) -> int:
        """Distance between the starts of two neighbouring tiles."""
        return self.tile - self.overlap

    @property
    def blend(self) -> int:
        """Width of the zone where two neighbouring tiles' outputs are mixed."""
        return self.overlap - 2 * self.margin

    @property
    def count(self) -> int:
        """Number of tiles needed so that their used parts cover the whole axis."""
        used = self.tile - 2 * self.margin
        return 1 + max(0, -(-(self.length - used) // self.stride))

    def start(self, k: int) -> int:
        """Scene position of the first pixel of tile ``k`` (negative for the first tile)."""
        return k * self.stride - self.margin

    def source_index(self, k: int) -> np.ndarray:
        """Scene positions (reflected into the scene) that fill tile ``k``."""
        return reflect_index(np.arange(self.start(k), self.start(k) + self.tile), self.length)

    def source_range(self, k: int) -> tuple[int, int]:
        """Half-open range of scene positions tile ``k`` reads, reflection included."""
        index = self.source_index(k)
        return int(index.min()), int(index.max()) + 1

    def used_range(self, k: int) -> tuple[int, int]:
        """Half-open range of scene positions that receive tile ``k``'s output."""
        lo = k * self.stride
        return min(lo, self.length), min(lo + self.tile - 2 * self.margin, self.length)

    def finished(self, k: int) -> int:
        """Positions below this value receive no output from tiles after ``k``."""
        if k >= self.count - 1:
            return self.length
        return min((k + 1) * self.stride, self.length)

    def weights(self, k: int) -> np.ndarray:
        """Blending weights of tile ``k`` (float64, length ``tile``).

        Zero on the margins, a raised-cosine ramp over the blend zone shared with a
        neighbour, one elsewhere. The first tile does not ramp up and the last does not
        ramp down: at a true scene border the output is never tapered.
        """
        w = np.zeros(self.tile, dtype=np.float64)
        m, b = self.margin, self.blend
        w[m : self.tile - m] = 1.0
        ramp = raised_cosine_ramp(b)
        if k > 0 and b:
            w[m : m + b] = ramp
        if k < self.count - 1 and b:
            w[self.tile - m - b : self.tile - m] = ramp[::-1]
        return w

    @cached_property
    def accumulated_weight(self) -> np.ndarray:
        """Sum of all tiles' weights at each scene position (float64, length ``length``)."""
        total = np.zeros(self.length, dtype=np.float64)
        for k in range(self.count):
            lo, hi = self.used_range(k)
            offset = lo - self.start(k)
            total[lo:hi] += self.weights(k)[offset : offset + hi - lo]
        return total


@dataclass(frozen=True)
class TileGrid:
    """The grid of constant-shape tiles that covers a scene.

    Parameters
    ----------
    shape : tuple of int
        Scene shape ``(rows, cols)``.
    tile : int or tuple of int
        Tile shape ``(rows, cols)`` (an int for square tiles). Every tile has exactly
        this shape; tiles running past a scene border are filled by reflection.
    overlap : int
        Pixels shared by neighbouring tiles, margins included; at least ``2 * margin``.
    margin : int
        Pixels discarded at each tile edge, normally ``receptive_field // 2``.

    Notes
    -----
    The 2-D weight of a tile is the outer product of its row and column weights, so the
    accumulated weight is the outer product of the two axes' accumulated weights and the
    blended output is ``sum(w * out) / accumulated_weight`` without a 2-D weight buffer.
    """

    shape: tuple[int, int]
    tile: object
    overlap: int
    margin: int = 0

    def __post_init__(self):
        if len(self.shape) != 2:
            raise InputError(f"scene shape must be (rows, cols), got {self.shape!r}")
        object.__setattr__(self, "shape", (int(self.shape[0]), int(self.shape[1])))
        tile = self.tile if isinstance(self.tile, (tuple, list)) else (self.tile, self.tile)
        if len(tile) != 2:
            raise InputError(f"tile must be an int or (rows, cols), got {self.tile!r}")
        for t in tile:
            if isinstance(t, bool) or not isinstance(t, (int, np.integer)) or t < 1:
                raise InputError(f"tile size must be a positive integer, got {self.tile!r}")
            if t <= 2 * self.margin:
                raise InputError(
                    f"tile size ({t}) must be larger than the model's receptive field minus one ({2 * self.margin})"
                )
        object.__setattr__(self, "tile", (int(tile[0]), int(tile[1])))
        # Validates overlap against tile and margin.
        self.rows  # noqa: B018
        self.cols  # noqa: B018

    @classmethod
    def fitted(cls, shape, tile: int, overlap: int, margin: int = 0, multiple: int = 1,
               row_stride: int | None = None) -> "TileGrid":
        """A grid whose tiles are no larger than ``tile`` but waste little past the border.

        Along each axis, the number of tiles needed with side ``tile`` is kept and the
        side shrunk to the smallest multiple of ``lcm(8, multiple)`` (capped at
        ``tile``) that still covers the scene. A 8192-pixel axis with ``tile=1024``
        and ``overlap=32`` needs 9 tiles either way; shrinking them to 944 pixels cuts
        the pixels computed by 15 %. With ``multiple > 1`` the cap is first rounded
        down to a multiple of it, so tile sides and strides (for an overlap that is a
        multiple too) keep every tile on the same pooling grid.

        Parameters
        ----------
        shape : tuple of int
            Scene ``(rows, cols)``.
        tile : int
            Largest tile side. With ``row_stride`` it bounds the tile's area instead
            (``tile ** 2`` pixels).
        overlap, margin : int
            As for :class:`TileGrid`.
        multiple : int
            Side multiple of networks that downsample.
        row_stride : int, optional
            Fix the row stride (tile rows are ``row_stride + overlap``), e.g. to the
            output file's block height so every row of tiles finishes whole rows of
            blocks and memory holds short, wide strips; columns are then fitted with
            sides up to ``tile ** 2 // (row_stride + overlap)``.
        """
        multiple = max(1, int(multiple))
        step = math.lcm(8, multiple)

        def fit(length, cap):
            if multiple > 1 and cap - cap % multiple > overlap:
                cap -= cap % multiple
            axis = AxisTiling(int(length), int(cap), int(overlap), int(margin))
            c = axis.count
            needed = -(-(int(length) + 2 * margin + (c - 1) * overlap) // c)
            side = max(_round_up(needed, step), _round_up(overlap + 1, step))
            return int(min(side, cap))

        if row_stride is None:
            sides = (fit(shape[0], tile), fit(shape[1], tile))
        else:
            tile_rows = int(row_stride) + int(overlap)
            if int(shape[0]) + 2 * margin <= tile_rows:
                tile_rows = fit(shape[0], tile_rows)  # one row of tiles: just cover the scene
            sides = (tile_rows, fit(shape[1], max(overlap + step, tile * tile // tile_rows)))
        return cls(tuple(shape), sides, overlap, margin)

    @cached_property
    def rows(self) -> AxisTiling:
        return AxisTiling(self.shape[0], self.tile[0], self.overlap, self.margin)

    @cached_property
    def cols(self) -> AxisTiling:
        return AxisTiling(self.shape[1], self.tile[1], self.overlap, self.margin)

    @property
    def tile_shape(self) -> tuple[int, int]:
        return self.tile

    def __len__(self) -> int:
        return self.rows.count * self.cols.count

    def tiles(self):
        """Yield ``(i, j)`` tile indices row by row."""
        for i in range(self.rows.count):
            for j in range(self.cols.count):
                yield i, j

    def weight(self, i: int, j: int) -> np.ndarray:
        """2-D blending weight of tile ``(i, j)``, float32 of shape :attr:`tile_shape`."""
        return np.outer(self.rows.weights(i), self.cols.weights(j)).astype(np.float32)

    def extract(self, image: np.ndarray, i: int, j: int, row_offset: int = 0) -> np.ndarray:
        """Cut tile ``(i, j)`` out of ``image``, reflecting beyond the scene borders.

        Parameters
        ----------
        image : numpy.ndarray
            The scene, or a full-width strip of it whose first row is scene row
            ``row_offset`` and which contains :meth:`AxisTiling.source_range` of row tile ``i``.
        i, j : int
            Tile indices.
        row_offset : int, optional
            Scene row of ``image[0]``.
        """
        rows = self.rows.source_index(i) - row_offset
        cols = self.cols.source_index(j)
        if rows.min() < 0 or rows.max() >= image.shape[0]:
            raise InputError(
                f"strip rows {row_offset}..{row_offset + image.shape[0]} do not contain tile row {i} "
                f"(needs {self.rows.source_range(i)})"
            )
        return image[np.ix_(rows, cols)]

    def blend_into(self, accumulator: np.ndarray, output: np.ndarray, i: int, j: int, row_offset: int = 0):
        """Add ``weight(i, j) * output`` to the used part of ``accumulator`` in place.

        ``accumulator`` is the scene (or a full-width strip of it starting at scene row
        ``row_offset``); divide by :meth:`accumulated_weight` once all tiles touching a
        pixel have been added.
        """
        r0, r1 = self.rows.used_range(i)
        c0, c1 = self.cols.used_range(j)
        if r1 <= r0 or c1 <= c0:
            return
        tr, tc = r0 - self.rows.start(i), c0 - self.cols.start(j)
        wr = self.rows.weights(i)[tr : tr + r1 - r0].astype(np.float32)
        wc = self.cols.weights(j)[tc : tc + c1 - c0].astype(np.float32)
        part = output[tr : tr + r1 - r0, tc : tc + c1 - c0]
        accumulator[r0 - row_offset : r1 - row_offset, c0:c1] += part * wr[:, None] * wc[None, :]

    def accumulated_weight(self, row_start: int = 0, row_stop: int | None = None) -> np.ndarray:
        """Accumulated weight of scene rows ``row_start:row_stop`` (float32, full width)."""
        wr = self.rows.accumulated_weight[row_start:row_stop]
        return np.outer(wr, self.cols.accumulated_weight).astype(np.float32)


def _round_up(value: int, multiple: int) -> int:
    return -(-int(value) // multiple) * multiple


def default_tiling(receptive_field: int, multiple: int = 1) -> tuple[int, int]:
    """Default ``(tile, overlap)`` for a network with the given receptive field.

    The overlap is the receptive field minus one (the two discarded margins) plus a blend
    zone of ``max(8, receptive_field // 4)`` pixels, rounded up to ``multiple``. The tile
    is 720 pixels (up to 1024 for overlaps over 90 pixels, at least two overlaps),
    rounded up to ``lcm(8, multiple)``:
    about half a megapixel per tile keeps the recomputed overlap to a few per cent for
    the registry's networks, while activations stay small (a 40-channel network in
    channels-last needs about 330 MB per megapixel) and peak memory hardly depends on
    the scene's size (measured with ``benchmarks/bench_inference.py``).

    Parameters
    ----------
    receptive_field : int
        Odd receptive field of the network in pixels.
    multiple : int, optional
        Size multiple the network needs (``2**depth`` for a U-Net).

    Returns
    -------
    tile, overlap : int
    """
    if isinstance(receptive_field, bool) or not isinstance(receptive_field, (int, np.integer)) or receptive_field < 1:
        raise InputError(f"receptive field must be a positive integer, got {receptive_field!r}")
    multiple = max(1, int(multiple))
    overlap = _round_up(receptive_field - 1 + max(8, receptive_field // 4), multiple)
    tile = _round_up(max(720, min(1024, 8 * overlap), 2 * overlap), math.lcm(8, multiple))
    return int(tile), int(overlap)
