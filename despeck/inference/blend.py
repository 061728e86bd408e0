"""The overlap-blend of a tile grid over a scene that arrives in strips of full rows.

A scene reaches a model as strips of full-width rows, in order (from
:mod:`despeck.raster.streaming` for files, or one strip holding a whole array).
:class:`TileBlender` keeps the rows the next rows of tiles still need in a row buffer,
cuts the tiles out of it (reflecting beyond the scene's border, :mod:`despeck.tiling`),
runs them through the model in batches, blends their outputs with the tile grid's
weights and hands on every output row as soon as no later tile adds to it. The row
buffer holds about one tile height plus one strip and the blend accumulator one tile
height, of the scene's width: neither depends on the number of scene rows.
"""

from __future__ import annotations

import numpy as np

from ..raster.streaming import shift_rows_up
from ..tiling import TileGrid

__all__ = ["read_plan", "TileBlender", "stream_tiles"]


def read_plan(rows_axis, chunk_rows):
    """For each row of tiles: the first scene row still needed and the row to read up to."""
    count = rows_axis.count
    ranges = [rows_axis.source_range(i) for i in range(count)]
    keep = [0] * count
    low = rows_axis.length
    for i in reversed(range(count)):
        low = min(low, ranges[i][0])
        keep[i] = low
    upto = [min(rows_axis.length, -(-hi // chunk_rows) * chunk_rows) for _, hi in ranges]
    for i in range(1, count):
        upto[i] = max(upto[i], upto[i - 1])
    return keep, upto


class TileBlender:
    """Runs every tile of ``grid`` through ``runner`` as the scene's rows arrive, and emits finished rows in order.

    Parameters
    ----------
    grid : despeck.tiling.TileGrid
        The scene's tile grid.
    runner : callable
        ``runner(tiles)`` maps a batch ``(n, rows, cols)`` of float32 tiles to outputs of
        the same shape (:class:`despeck.inference.runner.TileRunner`).
    batch_size : int
        Tiles per call of ``runner``.
    chunk_rows : int
        Rows of the strips :meth:`push` will get (the last may be shorter); sizes the row buffer.
    """

    def __init__(self, grid: TileGrid, runner, batch_size, chunk_rows):
        self.grid, self.runner, self.batch_size = grid, runner, int(batch_size)
        rows, cols = grid.rows, grid.cols
        self.width = grid.shape[1]
        self.keep, self.upto = read_plan(rows, max(1, int(chunk_rows)))
        capacity = max(u - k for k, u in zip(self.keep, self.upto))
        self.buf = np.empty((capacity, self.width), dtype=np.float32)
        self.b0 = self.b1 = 0  # scene rows held in buf[: b1 - b0]
        self.acc = np.zeros((rows.tile, self.width), dtype=np.float32)
        self.a0 = 0  # scene row of acc[0]
        self.done = 0  # scene rows emitted
        self.next = 0  # next row of tiles to run
        tr, tc = grid.tile_shape
        self.batch_in = np.empty((self.batch_size, tr, tc), dtype=np.float32)
        self.col_index = [cols.source_index(j) for j in range(cols.count)]
        self.col_weight = cols.accumulated_weight.astype(np.float32)[None, :]

    def _drop_before(self, row):
        """Forget buffered rows before scene row ``row`` (no later tile needs them)."""
        drop = row - self.b0
        if drop > 0:
            shift_rows_up(self.buf, drop, self.b1 - row)
            self.b0 = row

    def push(self, r0, rows, emit_rows):
        """Take scene rows ``r0 .. r0 + len(rows)`` (full width, 0 at invalid pixels), run the tiles they complete.

        Rows must arrive in order. ``emit_rows(r0, r1, estimate, source)`` receives
        finished rows and their input (``estimate`` is only meaningful where
        ``source > 0``; both are views into buffers reused afterwards).
        """
        n = rows.shape[0]
        if r0 != self.b1 or rows.shape[1:] != (self.width,):
            raise RuntimeError(f"rows {r0}-{r0 + n - 1} of shape {rows.shape} do not follow row {self.b1 - 1} "
                               f"of a {self.width}-pixel-wide scene")  # a caller's bug
        if self.next < len(self.keep):
            self._drop_before(self.keep[self.next])
        if self.b1 + n - self.b0 > self.buf.shape[0]:  # strips taller than the plan's: grow the buffer
            grown = np.empty((self.b1 + n - self.b0, self.width), dtype=np.float32)
            grown[: self.b1 - self.b0] = self.buf[: self.b1 - self.b0]
            self.buf = grown
        self.buf[self.b1 - self.b0 : self.b1 - self.b0 + n] = rows
        self.b1 += n
        while self.next < len(self.keep) and self.upto[self.next] <= self.b1:
            self._drop_before(self.keep[self.next])
            self._run_row(self.next, emit_rows)
            self.next += 1

    def _run_row(self, i, emit_rows):
        grid, rows, cols = self.grid, self.grid.rows, self.grid.cols
        buf, acc = self.buf, self.acc
        row_index = rows.source_index(i) - self.b0
        for j0 in range(0, cols.count, self.batch_size):
            js = range(j0, min(cols.count, j0 + self.batch_size))
            for n, j in enumerate(js):
                self.batch_in[n] = buf[np.ix_(row_index, self.col_index[j])]
            out = self.runner(self.batch_in[: len(js)])
            for n, j in enumerate(js):
                grid.blend_into(acc, out[n], i, j, row_offset=self.a0)
        finished, done, a0 = rows.finished(i), self.done, self.a0
        if finished > done:
            # Normalise in place, one axis at a time: no full-width temporaries.
            estimate = acc[done - a0 : finished - a0]
            estimate /= rows.accumulated_weight[done:finished, None].astype(np.float32)
            estimate /= self.col_weight
            emit_rows(done, finished, estimate, buf[done - self.b0 : finished - self.b0])
            shift = finished - a0
            shift_rows_up(acc, shift, rows.tile - shift)
            acc[rows.tile - shift :] = 0
            self.a0, self.done = finished, finished


def stream_tiles(grid: TileGrid, read_rows, emit_rows, runner, batch_size, chunk_rows=1):
    """Pull the scene through a :class:`TileBlender` in strips of ``chunk_rows``.

    ``read_rows(r0, r1)`` returns the intensity of scene rows ``[r0, r1)``, full width,
    with 0 at invalid pixels; ``emit_rows`` is as for :meth:`TileBlender.push`.
    """
    blender = TileBlender(grid, runner, batch_size, chunk_rows)
    length = grid.shape[0]
    for r0 in range(0, length, chunk_rows):
        r1 = min(length, r0 + chunk_rows)
        blender.push(r0, read_rows(r0, r1), emit_rows)
