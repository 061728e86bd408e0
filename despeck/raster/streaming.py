"""Streaming a scene through a function tile by tile, with a halo of context around each tile."""

from __future__ import annotations

import pathlib

import numpy as np
from rasterio.windows import Window

from ..errors import InputError
from .reader import SceneReader, open_scene
from .windows import as_window
from .writer import open_output

__all__ = ["read_with_halo", "process_file"]


def read_with_halo(reader: SceneReader, window, halo: int, band=1):
    """Read ``window`` grown by ``halo`` pixels on every side, mirrored at the scene's border.

    Returns ``(intensity, valid)`` of shape ``(h + 2 halo, w + 2 halo)``. Pixels
    outside the scene repeat the scene's edge mirror-wise (``numpy.pad`` mode
    'symmetric'), so a neighbourhood operation sees plausible context there.
    """
    halo = int(halo)
    w = as_window(window, reader.width, reader.height, reader.path)
    r0, c0 = int(w.row_off) - halo, int(w.col_off) - halo
    r1, c1 = int(w.row_off + w.height) + halo, int(w.col_off + w.width) + halo
    rr0, cc0 = max(0, r0), max(0, c0)
    rr1, cc1 = min(reader.height, r1), min(reader.width, c1)
    intensity, valid = reader.read(Window(cc0, rr0, cc1 - cc0, rr1 - rr0), band=band)
    pads = ((rr0 - r0, r1 - rr1), (cc0 - c0, c1 - cc1))
    if any(p for pair in pads for p in pair):
        if max(pads[0]) > intensity.shape[0] or max(pads[1]) > intensity.shape[1]:
            # mirroring cannot reach that far on a tiny scene; repeat the edge instead
            mode = "edge"
        else:
            mode = "symmetric"
        intensity = np.pad(intensity, pads, mode=mode)
        valid = np.pad(valid, pads, mode=mode)
    return intensity, valid


def process_file(in_path, out_path, func, *, halo=0, units=None, out_units=None, overwrite=False,
                 progress=True, description="processing", tags=None, cog=False) -> pathlib.Path:
    """Stream a scene through ``func`` tile by tile and write the result like the input.

    For each SAR band and each 512 x 512 tile of the output,
    ``func(intensity, valid, row, col)`` receives the tile's input grown by ``halo``
    pixels on every side (see :func:`read_with_halo`) and the scene position of the
    tile's top-left pixel, and returns the tile's output intensity (shape of the tile)
    or ``(intensity, valid)``. Pixels invalid in the input stay nodata in the output.
    Memory use depends on the tile and halo sizes, not on the scene's size. The
    output appears at ``out_path`` only when every tile is written.

    Parameters
    ----------
    in_path, out_path : path-like
    func : callable
    halo : int
        Context pixels ``func`` needs around each tile.
    units, out_units : str, optional
        Input units (detected if None) and output units (default: the input's,
        intensity for complex input).
    overwrite : bool
    progress : bool
        Show a progress bar (tqdm) on standard error.
    description : str
        Label of the progress bar.
    tags : dict, optional
        Metadata tags to add to the output.
    cog : bool
        Write a Cloud-Optimised GeoTIFF with overviews (see :func:`open_output`).
    """
    from tqdm import tqdm

    halo = int(halo)
    if halo < 0:
        raise InputError(f"halo must be >= 0, got {halo}")
    with open_scene(in_path, units=units) as reader:
        with open_output(out_path, reader, units=out_units, overwrite=overwrite, cog=cog) as writer:
            if tags:
                writer.update_tags(**tags)
            windows = writer.block_windows()
            total = len(windows) * reader.band_count
            with tqdm(total=total, desc=description, unit="tile", disable=not progress, leave=False) as bar:
                for band in range(1, reader.band_count + 1):
                    for w in windows:
                        intensity, valid = read_with_halo(reader, w, halo, band=band)
                        result = func(intensity, valid, int(w.row_off), int(w.col_off))
                        out, out_valid = result if isinstance(result, tuple) else (result, None)
                        inner = valid[halo:halo + int(w.height), halo:halo + int(w.width)]
                        keep = inner if out_valid is None else (inner & np.asarray(out_valid, dtype=bool))
                        writer.write(out, w, band=band, valid=keep)
                        bar.update(1)
            return writer.path
