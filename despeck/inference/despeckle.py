"""Despeckling an array in memory or a raster file with a model: the two entry points of :mod:`despeck.inference`.

Both cut the scene into constant-shape overlapping tiles and blend their outputs
(:mod:`despeck.inference.blend`); a file reaches the blend strip by strip through
the package's streaming engine (:mod:`despeck.raster.streaming`), which also writes
the finished rows, shows the progress and publishes the output.
"""

from __future__ import annotations

import pathlib
import warnings

import numpy as np

from ..cpu import usable_cores
from ..errors import InputError
from ..models.orientations import check_orientations
from .blend import TileBlender, stream_tiles
from .condition import condition_for_model, model_mismatch_notes
from .runner import TileRunner, run_options, run_settings, torch_settings
from .tiles import InferenceWarning, SAMPLE_PIXELS, array_sample, check_model, positive_int, resolve_tiling, scene_offset

__all__ = ["despeckle_array", "despeckle_file", "check_finite", "READ_ROWS"]

#: Rows per strip a file is read in (made block-aligned by the engine): GDAL's cache keeps
#: the rest of a taller input block row, and the row buffer stays one tile plus one strip high.
READ_ROWS = 64


def despeckle_array(intensity, model, *, valid=None, tile=None, overlap=None, batch_size=None, threads=None,
                    bf16=None, log_offset=None, channels_last=None, progress=True, looks=None,
                    correlation=None, condition=None, orientations=1) -> np.ndarray:
    """Despeckle a 2-D linear intensity array with a model, tile by tile.

    Parameters
    ----------
    intensity : array_like, (H, W)
        Linear intensity (power).
    model : despeck.models.Despeckler
        Linear intensity in, linear intensity out; its ``receptive_field`` sets the
        discarded tile margins.
    valid : array_like of bool, (H, W), optional
        False for nodata pixels. Non-finite and non-positive pixels are always invalid.
    tile : int, optional
        Largest tile side (pixels); default derived from the receptive field
        (:func:`resolve_tiling`). Must be at least the receptive field.
    overlap : int, optional
        Pixels shared by neighbouring tiles, at least the receptive field minus one;
        the part beyond that is blended with raised-cosine weights.
    batch_size : int, optional
        Tiles per forward call; default about one megapixel per call.
    threads : int, optional
        Torch threads; default all cores available to this process.
    bf16 : bool, optional
        Run the network under bfloat16 autocast. Default (None): exactly when the CPU
        has native bf16 instructions and the model carries a bias table measured in
        bfloat16, so the mean backscatter stays as in float32
        (:func:`despeck.inference.runner.resolve_bf16`); False forces float32, True
        bfloat16 (warns and uses float32 on CPUs without native bf16).
    orientations : {1, 4, 8}
        Run the network on this many orientations of every tile -- as it is, with rows,
        columns or both reversed, and (8) those transposed -- and average the estimates
        in the log domain (:meth:`despeck.models.Despeckler.run_oriented`). Default 1;
        4 and 8 take that many times as long for a cleaner estimate (README: +0.09 to
        +0.35 dB PSNR for the bundled starter with 8).
    log_offset : float, optional
        Scene normalisation constant; default ``model.scene_log_offset`` of a decimated
        sample (at most one million) of the valid pixels.
    channels_last : bool, optional
        Force the memory format; default: on scenes of a megapixel or more, time both
        on a 160 x 160 crop of the first tile and keep the faster, else contiguous.
    progress : bool
        Show a progress bar (MP/s, time left).
    looks : float, optional
        The scene's number of looks. Looks-aware models need it: default, estimated on
        homogeneous blocks of the array (:mod:`despeck.looks`); a warning says when it
        cannot be and what was assumed.
    correlation : (float, float), optional
        Lag-1 intensity correlation of the speckle down rows and along columns; default,
        measured like the looks (looks-aware models only).
    condition : (float, (float, float) or None), optional
        The ``(looks, correlation)`` the model is given, already resolved for a whole
        scene (:func:`condition_for_model`) of which ``intensity`` is a part; nothing is
        measured on the array (``looks`` and ``correlation`` are then ignored). A
        correlation of None runs a looks-aware model without it.

    Returns
    -------
    numpy.ndarray of float32, (H, W)
        The estimate; invalid pixels keep their input value.

    Raises
    ------
    InputError
        Not a 2-D array, mask of another shape, no valid pixel, bad tile options.
    """
    x = np.asarray(intensity)
    if x.ndim != 2 or x.size == 0 or not np.issubdtype(x.dtype, np.number) or np.iscomplexobj(x):
        raise InputError(
            f"intensity must be a non-empty 2-D real array (H, W), got shape {x.shape} of {x.dtype}; "
            "convert complex samples to intensity first"
        )
    x = x.astype(np.float32, copy=False)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(x) & (x > 0)
    if valid is not None:
        v = np.asarray(valid)
        if v.shape != x.shape:
            raise InputError(f"valid mask shape {v.shape} differs from intensity shape {x.shape}")
        ok &= v.astype(bool)
    if not ok.any():
        raise InputError("intensity has no valid (finite, positive, not masked) pixel to despeckle")
    grid = resolve_tiling(x.shape, model, tile=tile, overlap=overlap)
    threads, use_bf16, batch_size = run_settings(model, threads, bf16, batch_size, grid)
    orientations = check_orientations(orientations)
    if log_offset is None:
        log_offset = scene_offset(model, array_sample(x, ok))
    cond_looks = cond_corr = None
    if condition is not None:
        cond_looks, cond_corr = condition
    elif getattr(model, "conditioned", False) or getattr(model, "log_bias_table", None) is not None \
            or looks is not None:
        from ..looks import describe_array

        # only looks-aware networks use the correlation: others are not warned about it
        info, corr, notes = describe_array(x, ok, looks=looks, correlation=correlation,
                                           correlation_notes=getattr(model, "conditioned", False))
        cond_looks, cond_corr, more = condition_for_model(model, info, corr, "array")
        for note in notes + more:
            warnings.warn(note, InferenceWarning, stacklevel=2)
    from ..raster.streaming import progress_bar

    result = np.empty_like(x)
    # Invalid pixels enter the tiles as 0 intensity: NaN-free, and the model's fill
    # replaces them before the network sees them.
    clean = np.where(ok, x, np.float32(0))

    bar = progress_bar(x.size, "despeckle", progress)

    def read_rows(r0, r1):
        return clean[r0:r1]

    def emit_rows(r0, r1, estimate, source):
        check_finite(estimate, source, r0, "intensity array")
        result[r0:r1] = np.where(source > 0, estimate, x[r0:r1])
        if bar is not None:
            bar.update((r1 - r0) * x.shape[1] / 1e6)

    runner = TileRunner(model, log_offset=log_offset, bf16=use_bf16, channels_last=channels_last,
                        total_pixels=x.size, looks=cond_looks, correlation=cond_corr, orientations=orientations)
    was_training = model.training
    model.eval()
    try:
        with torch_settings(threads):
            stream_tiles(grid, read_rows, emit_rows, runner, batch_size, chunk_rows=max(1, x.shape[0]))
    finally:
        runner.restore()
        model.train(was_training)
        if bar is not None:
            bar.close()
    return result




def check_finite(estimate, source, r0, name, band=None):
    """Raise :class:`InputError` if the model gave NaN or infinity for a valid input pixel.

    Such a pixel would otherwise be written as nodata, and a broken model (damaged
    weights, absurd calibration) would turn a whole scene into nodata while the run
    reported success.
    """
    if np.isfinite(estimate).all():
        return
    bad = ~np.isfinite(estimate) & (source > 0)
    if not bad.any():
        return
    rows = np.flatnonzero(bad.any(axis=1))
    where = f"rows {r0 + rows[0]}-{r0 + rows[-1]}" + (f" of band {band}" if band is not None else "")
    raise InputError(
        f"{name}: the model gave non-finite values (NaN or infinity) for {int(bad.sum())} valid pixel(s) in {where}; "
        "the model file may be damaged or unsuited to these data"
    )


def despeckle_file(in_path, out_path, model, *, units=None, out_units=None, overwrite=False, tile=None,
                   overlap=None, batch_size=None, threads=None, bf16=None, channels_last=None,
                   progress=True, looks=None, cog=False, orientations=1) -> pathlib.Path:
    """Despeckle a raster file band by band and write a GeoTIFF.

    The output keeps the input's size, CRS, transform, nodata, band descriptions and
    tags and is written to a temporary file in the destination folder, renamed only
    when complete: an interrupted run leaves nothing at ``out_path``. It also records
    what made it (:mod:`despeck.provenance`): the despeck version, the model file's
    name and SHA-256, the tiling used and the date.

    Parameters
    ----------
    in_path, out_path : str or path-like
        Input raster (anything GDAL reads) and output GeoTIFF; never the same file.
    model : despeck.models.Despeckler
    units : {'intensity', 'amplitude', 'db', 'complex'}, optional
        Units of the input; detected when unambiguous (see :func:`despeck.raster.open_scene`).
    out_units : {'intensity', 'amplitude', 'db'}, optional
        Units of the output; default the input's (intensity for complex input).
    overwrite : bool
        Replace an existing output (an input is never overwritten).
    tile : int, optional
        Tiles hold at most ``tile * tile`` pixels. When ``tile`` allows, a row of tiles
        advances by exactly one row of the output's blocks (512 rows), so each row of
        tiles completes whole blocks and the buffers stay short and wide; the tiles are
        then wider than tall.
    overlap, batch_size, threads, bf16, channels_last, progress, orientations
        As for :func:`despeckle_array`.
    looks : float, optional
        The input's number of looks; default from the file's ``looks`` tag, else
        estimated (:func:`despeck.looks.describe_speckle`). The speckle correlation is
        taken from the file's tags or measured. Both are recorded in the output's tags
        (``input_looks``, ``input_speckle_correlation_rows``/``_cols`` and their sources).
    cog : bool
        Write a Cloud-Optimised GeoTIFF with overviews (:func:`despeck.raster.open_output`).

    Returns
    -------
    pathlib.Path
        The output path.

    Raises
    ------
    RasterError, InputError
        Unreadable input, output equal to the input, output exists (without
        ``overwrite``), destination not writable, bad options. Nothing is left at
        ``out_path``.

    Warns
    -----
    InferenceWarning
        The model was trained for other units or looks than the file's.
    """
    from ..looks import describe_speckle, speckle_tags
    from ..provenance import model_provenance, provenance_tags, tiling_text
    from ..raster.streaming import open_stream

    check_model(model)
    orientations = check_orientations(orientations)
    # GDAL worker threads compress output blocks while the network runs; despeck.raster
    # caps GDAL's block cache, so written blocks do not pile up in memory.
    gdal_threads = positive_int("threads", threads) or usable_cores()
    with open_stream(in_path, out_path, units=units, out_units=out_units, overwrite=overwrite, cog=cog,
                     progress=progress, description=pathlib.Path(in_path).name, gdal_threads=gdal_threads) as stream:
        reader = stream.reader
        for note in model_mismatch_notes(model, reader):
            warnings.warn(note, InferenceWarning, stacklevel=2)
        shape = (reader.height, reader.width)
        resolve_tiling(shape, model, tile=tile, overlap=overlap)  # bad options fail before any file exists
        was_training = model.training
        model.eval()
        try:
            stream.create_output()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", InferenceWarning)  # already shown above
                # a row of tiles advances by one row of the output's blocks when the tile allows
                grid = resolve_tiling(shape, model, tile=tile, overlap=overlap, row_stride=stream.block_rows)
            threads, use_bf16, batch_size = run_settings(model, threads, bf16, batch_size, grid)
            method, model_sha = model_provenance(model)
            stream.update_tags(**provenance_tags(method, model_sha256=model_sha, tiling=tiling_text(grid),
                                                 options=run_options(use_bf16, orientations)))
            strip_rows = stream.strip_rows(READ_ROWS)
            with torch_settings(threads):
                for band in stream.bands:
                    offset = scene_offset(model, reader.sample_intensity(SAMPLE_PIXELS, band=band))
                    # only looks-aware networks use the correlation; it is still recorded
                    info, corr, notes = describe_speckle(reader, band, looks=looks,
                                                         correlation_notes=getattr(model, "conditioned", False))
                    cond_looks, cond_corr, more = condition_for_model(model, info, corr, reader.path)
                    for note in notes + more:
                        warnings.warn(note, InferenceWarning, stacklevel=2)
                    if band == 1 or reader.band_count == 1:
                        stream.update_tags(**speckle_tags(info, corr, prefix="input_"))
                    runner = TileRunner(model, log_offset=offset, bf16=use_bf16, channels_last=channels_last,
                                        total_pixels=reader.width * reader.height, looks=cond_looks,
                                        correlation=cond_corr, orientations=orientations)
                    blender = TileBlender(grid, runner, batch_size, strip_rows)
                    try:
                        stream.map_strips(_blend_strip(blender, reader, band), band=band, rows=strip_rows)
                    finally:
                        runner.restore()
                    channels_last = runner.channels_last
        finally:
            model.train(was_training)
    return pathlib.Path(out_path)


def _blend_strip(blender, reader, band):
    """The strip function of a file: its rows into the blend; finished rows checked and written as they come."""
    name_band = band if reader.band_count > 1 else None

    def run(strip):
        def emit_rows(r0, r1, estimate, source):
            check_finite(estimate, source, r0, reader.path, name_band)
            strip.emit(r0, estimate, source > 0)

        # no halo: the tiles reflect at the scene's border inside the blend's row buffer
        blender.push(strip.row0, strip.intensity, emit_rows)

    return run
