"""``despeck apply``: despeckle one scene or a batch of scenes with a trained model.

Inputs are files, folders (every GeoTIFF directly inside) or glob patterns. Each
output is written to a temporary file beside its destination and renamed when
complete and read back; existing outputs are skipped unless ``--overwrite``, so an
interrupted batch run restarts where it stopped. An input that cannot be read or an
output that cannot be written fails that file only (one line each, a summary at the
end; exit status 3 when other outputs are complete, 1 when none is); an output
folder that can take no file (read-only, full) stops every later output into it at
once. Several ``apply`` runs may share a batch: an output another run is writing is
skipped (``--busy``), and one another run finished meanwhile is skipped as well
(checked when the output is claimed, not only at the start). ``--shard K/N`` gives a
job array's task K its part of the sorted inputs. The work itself is
:func:`despeck.inference.despeckle_file`.
"""

from __future__ import annotations

import argparse
import glob
import logging
import os
import pathlib
import signal
import sys
import time
import warnings

from ..cpu import PRECISIONS, bf16_argument
from ..errors import DespeckError, InputError, ModelFileError, OptionError
from ..models.orientations import ORIENTATIONS
from . import check_threads, one_line_warnings
from .exit_codes import batch_status, option_values, raise_terminated

log = logging.getLogger(__name__)

# Files a folder input contributes (other rasters can still be named one by one).
_RASTER_SUFFIXES = {".tif", ".tiff"}

DEFAULT_SUFFIX = "_despeckled"


def add_arguments(parser):
    parser.add_argument("inputs", nargs="+", metavar="IN",
                        help="input rasters: files, folders (their .tif/.tiff files) or glob patterns")
    parser.add_argument("--model", metavar="FILE",
                        help="model file (.safetensors) or a bundled model's name: starter (the default) or "
                             "starter-fast (an earlier, smaller starter: about 1.3-1.6x faster, 0.1-1.2 dB lower PSNR)")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--out", metavar="PATH", help="output file (one input only)")
    where.add_argument("--out-dir", metavar="DIR",
                       help="folder for the outputs (default: beside each input)")
    parser.add_argument("--suffix", default=DEFAULT_SUFFIX,
                        help=f"added to each input's name to make its output's (default {DEFAULT_SUFFIX!r})")
    parser.add_argument("--units", choices=("intensity", "amplitude", "db", "complex"),
                        help="units of the inputs (default: detected, else linear intensity)")
    parser.add_argument("--out-units", choices=("intensity", "amplitude", "db"),
                        help="units of the outputs (default: the input's)")
    parser.add_argument("--looks", metavar="L",
                        help="number of looks of the inputs (default: the file's 'looks' tag, else estimated "
                             "on homogeneous areas; the speckle correlation is always measured unless recorded)")
    parser.add_argument("--tile", type=int, metavar="N",
                        help="tile size: at most N x N pixels per tile (default: from the model's receptive field)")
    parser.add_argument("--overlap", type=int, metavar="N",
                        help="pixels shared by neighbouring tiles (default: the receptive field minus one plus "
                             "a blend zone; less than the receptive field minus one works but warns)")
    parser.add_argument("--threads", type=int, metavar="N", help="CPU threads (default: all cores)")
    parser.add_argument("--precision", choices=("auto", *PRECISIONS), default="auto",
                        help="number format of the network, as in training's trainer.precision: bf16 runs the "
                             "network about 2.5x faster than 32 (float32) on CPUs with native bfloat16 "
                             "instructions (avx512_bf16, amx_bf16); for the bundled starter it changed PSNR by "
                             "0.014 dB at most, the mean by 0.003 dB at most and single pixels by up to 0.6 dB. "
                             "auto (default): bf16 where the CPU has them and the model carries a bfloat16 bias "
                             "calibration, else 32. The output's despeck_options tag records which ran")
    parser.add_argument("--bf16", dest="precision", action="store_const", const="bf16", help=argparse.SUPPRESS)
    parser.add_argument("--orientations", type=int, choices=ORIENTATIONS, default=1, metavar="{1,4,8}",
                        help="run the network on this many orientations of every tile (as it is; rows, columns or "
                             "both reversed; 8: those transposed too) and average: that many times the time for "
                             "a cleaner estimate (bundled starter, 8: +0.09 to +0.35 dB PSNR on the project's "
                             "scene matrix, mean kept within 0.03 dB; README). Default 1. The despeck_options tag "
                             "records it")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace existing outputs (inputs are never overwritten)")
    parser.add_argument("--busy", choices=("skip", "fail"), default="skip",
                        help="an output another despeck process is writing at the same time: skip it with a "
                             "warning (default; exit status 0) or count it as failed (exit status 1, or 3 when "
                             "other outputs are complete)")
    parser.add_argument("--shard", metavar="K/N",
                        help="process only part K of N (1 <= K <= N) of the inputs, for job arrays: the inputs are "
                             "sorted by path, duplicates removed, and the file at position i (from 0) goes to part "
                             "i %% N + 1; every file belongs to exactly one part")
    parser.add_argument("--cog", action="store_true",
                        help="write Cloud-Optimised GeoTIFFs with overviews (GDAL's COG driver)")
    parser.add_argument("--dask", nargs="?", const="local", metavar="ADDRESS",
                        help="run one task per file on a Dask cluster: the scheduler's ADDRESS (tcp://host:8786), "
                             "or 'local' (the default without ADDRESS) for single-threaded worker processes on this "
                             "machine; --threads is then the threads of each task (default 1). Needs despeck[dask]")
    parser.add_argument("--quiet", action="store_true", help="no progress bars or per-file lines")


def parse_shard(text) -> tuple[int, int]:
    """``"K/N"`` -> ``(K, N)`` with whole numbers ``1 <= K <= N``; OptionError otherwise."""
    parts = str(text).strip().split("/")
    try:
        if len(parts) != 2:
            raise ValueError
        k, n = (int(p.strip()) for p in parts)
    except ValueError:
        raise OptionError(f"--shard expects K/N with whole numbers (e.g. 2/8), got {text!r}") from None
    if n < 1 or not 1 <= k <= n:
        raise OptionError(f"--shard K/N needs 1 <= K <= N, got {text!r}")
    return k, n


def shard(items, k, n) -> list:
    """Part ``k`` of ``n`` (1-based) of ``items``: sorted by path, duplicates removed, every ``n``-th from ``k - 1``.

    The parts of ``k = 1 .. n`` hold every item exactly once, and the same items
    give the same parts on every machine (the order of the arguments does not matter).
    """
    ordered = sorted({str(p): p for p in items}.items())
    return [p for i, (_, p) in enumerate(ordered) if i % n == k - 1]


def starter_model_path() -> pathlib.Path:
    """Where the bundled starter model lives inside the installed package."""
    from ..models.bundled import bundled_model_path

    return bundled_model_path("starter")


def expand_inputs(patterns) -> list[pathlib.Path]:
    """Files named by ``patterns`` (files, folders, globs), in order, without duplicates.

    Raises
    ------
    InputError
        A pattern matches nothing, or no input is left at all.
    """
    found, seen = [], set()
    for pattern in patterns:
        path = pathlib.Path(pattern).expanduser()
        if path.is_dir():
            matches = sorted(p for p in path.iterdir() if p.is_file() and p.suffix.lower() in _RASTER_SUFFIXES)
            if not matches:
                raise InputError(f"{pattern}: folder holds no .tif/.tiff files")
        elif path.exists():
            matches = [path]
        elif glob.has_magic(str(pattern)):
            matches = sorted(pathlib.Path(p) for p in glob.glob(os.path.expanduser(str(pattern)), recursive=True))
            matches = [p for p in matches if p.is_file()]
            if not matches:
                raise InputError(f"{pattern}: no input file matched")
        else:
            raise InputError(f"{pattern}: no such file or folder")
        for p in matches:
            key = os.path.realpath(p)
            if key not in seen:
                seen.add(key)
                found.append(p)
    if not found:
        raise InputError("no input matched")
    return found


def plan_outputs(inputs, *, out=None, out_dir=None, suffix=DEFAULT_SUFFIX) -> list[pathlib.Path]:
    """Output path of each input; refuses (:class:`OptionError`) --out with several inputs and clashing outputs."""
    if out is not None and len(inputs) != 1:
        raise OptionError(f"--out names one file but {len(inputs)} inputs matched; use --out-dir")
    if out is None and not suffix and out_dir is None:
        raise OptionError("--suffix is empty and no --out-dir given: outputs would replace the inputs")
    outputs = []
    for path in inputs:
        if out is not None:
            outputs.append(pathlib.Path(out).expanduser())
            continue
        folder = pathlib.Path(out_dir).expanduser() if out_dir is not None else path.parent
        outputs.append(folder / f"{path.stem}{suffix}.tif")
    by_target = {}
    input_keys = {os.path.realpath(p): p for p in inputs}
    for src, dst in zip(inputs, outputs):
        key = os.path.realpath(dst)
        if key in input_keys:
            raise OptionError(f"{dst}: output would overwrite the input {input_keys[key]}; change --suffix or --out-dir")
        if key in by_target:
            raise OptionError(f"{by_target[key]} and {src} would both be written to {dst}; use separate --out-dir runs")
        by_target[key] = src
    return outputs


def model_file(option) -> pathlib.Path:
    """The model file ``--model`` names (a path or a bundled model's name), or the bundled starter's."""
    from ..models import resolve_model_path

    return resolve_model_path(option) if option is not None else starter_model_path()


def load_model(option):
    """The model from ``--model`` (a file or a bundled model's name), or the bundled starter model."""
    from ..models import load_model_file

    path = model_file(option)
    if option is None:
        if not path.exists():
            raise ModelFileError(
                f"no --model given and the bundled starter model is not installed ({path}); pass --model FILE"
            )
    return load_model_file(path)


class SkippedOutput(UserWarning):
    """An output left alone because another despeck process is writing it (one line per output)."""


def _same_note(text, category):
    # The same note about many files is shown once: compared without its leading "path: ".
    # Skipped outputs are one line each.
    if issubclass(category, SkippedOutput):
        return text
    return text.split(": ", 1)[1] if ": " in text else text


def check_options(args) -> None:
    """Refuse (:class:`OptionError`) bad --threads and --looks values before any file is read."""
    from ..speckle import check_looks

    check_threads(args.threads)
    looks = getattr(args, "looks", None)
    if looks is not None and str(looks).strip().lower() != "auto":
        with option_values():
            check_looks(looks, "--looks")


def _log_written(dst) -> None:
    """Log (INFO) the looks and tiling an output records (its ``input_looks*`` and ``despeck_tiling`` tags)."""
    if not log.isEnabledFor(logging.INFO):
        return
    import rasterio

    from ..provenance import PREFIX

    try:
        with rasterio.open(dst) as ds:
            tags = ds.tags()
    except (OSError, rasterio.errors.RasterioError) as exc:  # the output was verified; say why and go on
        log.debug("%s: tags not read back (%s)", dst, exc)
        return
    log.info("%s: input looks %s (%s), %s", dst, tags.get("input_looks", "?"), tags.get("input_looks_source", "?"),
             tags.get(f"{PREFIX}tiling", "tiling not recorded"))


def run(args) -> int:
    # OpenMP threads that spin at barriers lose their time slice to other processes on
    # a busy machine and every parallel region then waits for them (measured: a 2-thread
    # forward pass 3-10 times slower on a shared 2-core machine). Sleeping waiters cost
    # almost nothing on an idle one. Only effective before torch is first imported; an
    # explicit setting in the environment wins.
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
    from ..inference import resolve_tiling

    check_options(args)
    part = parse_shard(args.shard) if getattr(args, "shard", None) is not None else None
    inputs = expand_inputs(args.inputs)
    # Outputs are planned on the whole list, so every shard refuses the same clashes.
    outputs = plan_outputs(inputs, out=args.out, out_dir=args.out_dir, suffix=args.suffix)
    if part is not None:
        output_of = {str(src): dst for src, dst in zip(inputs, outputs)}
        total = len(inputs)
        inputs = shard(inputs, *part)
        outputs = [output_of[str(src)] for src in inputs]
        if not args.quiet:
            print(f"shard {part[0]}/{part[1]}: {len(inputs)} of {total} input(s)")
    model = load_model(args.model)
    log.info("model %s: receptive field %d pixels", model_file(args.model), model.receptive_field)
    if not getattr(args, "dask", None):
        from ..cpu import usable_cores

        log.info("%d thread(s)%s", args.threads or usable_cores(),
                 "" if args.threads else " (every core this process may use)")
    # SIGTERM becomes an exception so the writer's context manager removes its temporary file.
    previous = signal.signal(signal.SIGTERM, raise_terminated)
    try:
        with one_line_warnings(key=_same_note):
            # Check the tile options once, before any file is touched.
            side = 2 * max(model.receptive_field, args.tile or 1)
            with option_values():
                resolve_tiling((side, side), model, tile=args.tile, overlap=args.overlap)
            if getattr(args, "dask", None):
                counts = _run_dask(args, inputs, outputs)
            else:
                counts = _run_all(args, inputs, outputs, model)
    finally:
        signal.signal(signal.SIGTERM, previous)
    if not args.quiet and len(inputs) > 1:
        extra = "".join(f", {counts[k]} {k}" for k in ("busy", "not attempted") if counts[k])
        print(f"{counts['written']} written, {counts['skipped']} skipped, {counts['failed']} failed{extra}")
    return batch_status(complete=counts["written"] + counts["skipped"],
                        incomplete=counts["failed"] + counts["not attempted"])


def _one_line(exc) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


def _run_dask(args, inputs, outputs) -> dict:
    """Like :func:`_run_all`, one task per file on a Dask cluster (:func:`despeck.distributed.apply_many`)."""
    try:
        from ..distributed import apply_many
    except ImportError as exc:
        raise InputError(f"--dask: {exc}") from None
    counts = dict.fromkeys(("written", "skipped", "busy", "failed", "not attempted"), 0)

    def show(result):
        for note in result.warnings:
            warnings.warn(note)
        status = "failed" if result.status == "busy" and args.busy == "fail" else result.status
        counts[status] += 1
        if status == "failed":
            print(f"despeck: error: {result.message}", file=sys.stderr)
        elif status == "busy":
            warnings.warn(f"{result.message}; skipped", SkippedOutput, stacklevel=1)
        elif not args.quiet:
            what = (f"({result.seconds:.1f} s on {result.worker or 'a worker'})" if status == "written"
                    else f"{result.message or 'exists'}, skipped")
            print(f"{result.input} -> {result.output} {what}")
        if status == "written":
            _log_written(result.output)

    model_path = model_file(args.model)
    apply_many(inputs, outputs, model_path, args.dask, threads=args.threads or 1, overwrite=args.overwrite,
               units=args.units, out_units=args.out_units, tile=args.tile, overlap=args.overlap,
               bf16=bf16_argument(args.precision), looks=getattr(args, "looks", None), cog=getattr(args, "cog", False),
               on_result=show, orientations=args.orientations)
    return counts


def _run_all(args, inputs, outputs, model) -> dict:
    """Despeckle each input; return the counts of outputs written, skipped, busy, failed, not attempted.

    A file that fails (unreadable or cut-off input, a write that fails) is reported in
    one line and the batch goes on. An output folder that can take no file at all
    (read-only, no permission, disk full) fails the output in one line and every
    later output into the same folder is not attempted: it could not succeed. An output
    another despeck process is writing is skipped with a warning (``--busy skip``) or
    counted as failed (``--busy fail``).
    """
    from rasterio.errors import RasterioError

    from ..inference import despeckle_file
    from ..raster import OutputBusyError, OutputFolderError

    counts = dict.fromkeys(("written", "skipped", "busy", "failed", "not attempted"), 0)
    unusable = set()  # output folders that can take no file
    for k, (src, dst) in enumerate(zip(inputs, outputs)):
        folder = os.path.abspath(dst.parent)
        if folder in unusable:
            counts["not attempted"] += 1
            continue
        if dst.exists() and not args.overwrite:
            counts["skipped"] += 1
            if not args.quiet:
                print(f"{src} -> {dst}: exists, skipped (use --overwrite to redo)")
            continue
        start = time.perf_counter()
        try:
            despeckle_file(
                src, dst, model, units=args.units, out_units=args.out_units, overwrite=args.overwrite,
                tile=args.tile, overlap=args.overlap, threads=args.threads, bf16=bf16_argument(args.precision),
                progress=not args.quiet, looks=getattr(args, "looks", None), cog=getattr(args, "cog", False),
                orientations=args.orientations,
            )
        except OutputBusyError as exc:
            if args.busy == "fail":
                counts["failed"] += 1
                print(f"despeck: error: {exc}", file=sys.stderr)
            else:
                counts["busy"] += 1
                warnings.warn(f"{exc}; skipped", SkippedOutput, stacklevel=1)
            continue
        except OutputFolderError as exc:
            counts["failed"] += 1
            unusable.add(folder)
            rest = sum(1 for d in outputs[k + 1:] if os.path.abspath(d.parent) == folder)
            tail = f"; stopped: the {rest} remaining output(s) for this folder were not attempted" if rest else ""
            print(f"despeck: error: {exc}{tail}", file=sys.stderr)
            continue
        except (DespeckError, OSError, RasterioError) as exc:
            if dst.exists() and not args.overwrite:
                # another process finished this output while we were starting on it
                counts["skipped"] += 1
                if not args.quiet:
                    print(f"{src} -> {dst}: written meanwhile by another process, skipped")
                continue
            # One bad scene must not stop a batch; the exit status reports it.
            counts["failed"] += 1
            text = _one_line(exc) if isinstance(exc, DespeckError) else f"{src}: {_one_line(exc)}"
            print(f"despeck: error: {text}", file=sys.stderr)
            continue
        counts["written"] += 1
        if not args.quiet:
            print(f"{src} -> {dst} ({time.perf_counter() - start:.1f} s)")
        _log_written(dst)
    return counts
