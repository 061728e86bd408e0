"""``despeck bench``: compare classical filters and trained models and write a report folder.

Scenes come from a scene list file (``--scenes``, see :mod:`despeck.bench`) or, for one
scene, from ``--image`` and its companions. The work is :func:`despeck.bench.run_benchmark`.
"""

from __future__ import annotations

import logging

from ..errors import OptionError
from .exit_codes import OK, option_values

log = logging.getLogger(__name__)


def add_arguments(parser):
    parser.add_argument("out_dir", metavar="OUT_DIR", help="report folder to write (report.md, results.csv/json, PNGs)")
    parser.add_argument("--scenes", metavar="FILE", help="scene list (YAML or JSON) with scenes, methods and crop")
    parser.add_argument("--image", metavar="IN", help="single scene: the image raster")
    parser.add_argument("--reference", metavar="CLEAN", help="single scene: clean reference on the same grid")
    parser.add_argument("--areas", metavar="GEOJSON", help="single scene: homogeneous areas as polygons in map coordinates")
    parser.add_argument("--area", action="append", default=[], metavar="R0,C0,R1,C1",
                        help="single scene: a homogeneous pixel box (end-exclusive), repeatable")
    parser.add_argument("--point", action="append", default=[], metavar="ROW,COL",
                        help="single scene: a point target, repeatable (default: found automatically)")
    parser.add_argument("--looks", type=float, metavar="L", help="single scene: number of looks (default: the file's looks tag, else estimated)")
    parser.add_argument("--units", choices=("intensity", "amplitude", "db", "complex"),
                        help="single scene: units of the image (default: detected)")
    parser.add_argument("--reference-units", choices=("intensity", "amplitude", "db"),
                        help="single scene: units of the reference (default: detected)")
    parser.add_argument("--method", action="append", default=[], metavar="SPEC",
                        help="method, repeatable: a filter name, NAME:key=value,..., or model:PATH "
                             "(default: the list's methods, else every classical filter)")
    parser.add_argument("--crop", metavar="ROW,COL,SIZE", help="crop shown in the figures (default: centred 256)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace a report folder despeck wrote earlier (refused if it holds an input, any other "
                             "file, or the current directory)")


def _ints(text, count, option):
    try:
        values = [int(v) for v in str(text).split(",")]
    except ValueError:
        values = []
    if len(values) != count:
        raise OptionError(f"{option} expects {count} comma-separated integers, got {text!r}")
    return values


def _is_model_spec(spec) -> bool:
    text = str(spec).strip().lower()
    return text.startswith("model:") or text.endswith(".safetensors")


def check_options(args) -> None:
    """Refuse (:class:`OptionError`) inconsistent options and bad values before any file is read.

    Filter --method specifications are parsed here (name, options, window, looks); a
    ``model:PATH`` one is checked when its file is read, like --model elsewhere.
    """
    from ..bench import parse_method
    from ..speckle import check_looks

    single = [args.image, args.reference, args.areas, args.looks, args.units,
              args.reference_units] + args.area + args.point
    if args.scenes and any(v not in (None, []) for v in single):
        raise OptionError("give either --scenes or --image (with its options), not both")
    if not args.scenes and not args.image:
        raise OptionError("give a scene list with --scenes or one scene with --image")
    if args.areas and args.area:
        raise OptionError("give homogeneous areas either as --areas GEOJSON or as --area boxes, not both")
    with option_values():
        if args.looks is not None:
            check_looks(args.looks, "--looks")
        for spec in args.method:
            if not _is_model_spec(spec):
                parse_method(spec)


def run(args) -> int:
    from ..bench import BenchScene, run_benchmark

    check_options(args)
    crop = _ints(args.crop, 3, "--crop") if args.crop else None
    if args.scenes:
        scenes = args.scenes
    else:
        areas = args.areas or ([_ints(a, 4, "--area") for a in args.area] or None)
        points = [_ints(p, 2, "--point") for p in args.point] or None
        scenes = [BenchScene(image=args.image, reference=args.reference, reference_units=args.reference_units,
                             looks=args.looks, areas=areas,
                             points=points, units=args.units)]
    log.info("%s, methods: %s", f"scene list {scenes}" if args.scenes else f"scene {args.image}",
             ", ".join(args.method) if args.method else "the list's, else every classical filter")
    result = run_benchmark(scenes, args.method or None, args.out_dir, crop=crop, overwrite=args.overwrite,
                           progress=not args.quiet)
    for s in result["scenes"]:
        log.info("%s: looks %.3g (%s)", s["name"], s["looks"], s["looks_source"])
    log.info("wrote %s", result["report"])
    if not args.quiet:
        for s in result["scenes"]:
            how = s["looks_source"]
            print(f"{s['name']}: looks {s['looks']:.3g} ({how}), {s['areas']} areas ({s['areas_source']}), "
                  f"{s['points']} point targets ({s['points_source']})")
        print(f"report: {result['report']}")
    return OK
