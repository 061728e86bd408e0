"""``despeck filter``: run one classical speckle filter on a raster and write the result.

The work is :func:`despeck.filters.filter_raster`; this module parses options and
refuses bad values of them (exit status 2) before the input is read.
"""

from __future__ import annotations

import logging

from ..errors import OptionError
from . import check_threads
from .exit_codes import OK, option_values

log = logging.getLogger(__name__)


def add_arguments(parser):
    from ..filters import DEFAULT_WINDOWS, FILTERS

    parser.add_argument("method", metavar="METHOD", help=f"filter: {', '.join(FILTERS)}")
    parser.add_argument("input", metavar="IN", help="input raster")
    parser.add_argument("output", metavar="OUT", help="output GeoTIFF (never the input)")
    parser.add_argument("--looks", type=float, metavar="L",
                        help="number of looks of the input (default: estimated from the scene, and reported)")
    parser.add_argument("--window", type=int, metavar="N",
                        help="window size, odd >= 3 (default per method: "
                             + ", ".join(f"{k} {v}" for k, v in DEFAULT_WINDOWS.items()) + ")")
    parser.add_argument("--option", action="append", default=[], metavar="KEY=VALUE",
                        help="method-specific option, repeatable (e.g. damping=2 for frost, xi=0.8 for improved-sigma)")
    parser.add_argument("--band", type=int, metavar="N",
                        help="filter only SAR band N (from 1); default: every band, like apply")
    parser.add_argument("--threads", type=int, metavar="N", help="CPU threads (default: all cores)")
    parser.add_argument("--units", choices=("intensity", "amplitude", "db", "complex"),
                        help="units of the input (default: detected, else linear intensity)")
    parser.add_argument("--out-units", choices=("intensity", "amplitude", "db"),
                        help="units of the output (default: the input's; intensity for complex input)")
    parser.add_argument("--cog", action="store_true",
                        help="write a Cloud-Optimised GeoTIFF with overviews (GDAL's COG driver)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output (never the input)")


def parse_options(items) -> dict:
    """``['key=value', ...]`` -> dict with numbers and booleans converted."""
    from ..bench import parse_option_value

    options = {}
    for item in items or ():
        key, eq, value = str(item).partition("=")
        if not eq or not key.strip():
            raise OptionError(f"--option expects KEY=VALUE, got {item!r}")
        options[key.strip().replace("-", "_")] = parse_option_value(value)
    return options


def check_options(args) -> dict:
    """The method options of ``args``, after refusing (:class:`OptionError`) bad option values.

    Checked before the input is read: the method's name and option names, --window,
    --looks, --band and --threads. Values only the filter can judge for a scene (an
    option's range, looks outside the improved sigma filter's domain) are refused when
    the filter is set up for the scene (exit status 1).
    """
    from ..filters import check_options as check_method_options
    from ..filters import check_window, filter_entry
    from ..speckle import check_looks

    check_threads(args.threads)
    if args.band is not None and args.band < 1:
        raise OptionError(f"--band must be a band number from 1, got {args.band}")
    options = parse_options(args.option)
    with option_values():
        entry = filter_entry(args.method)
        check_method_options(entry.name, options)
        check_window(entry.window(args.window), "--window")
        if args.looks is not None:
            check_looks(args.looks, "--looks")
    return options


def run(args) -> int:
    from ..cpu import usable_cores
    from ..filters import filter_raster

    options = check_options(args)
    log.info("%s: %d thread(s)%s", args.method, args.threads or usable_cores(),
             "" if args.threads else " (every core this process may use)")
    info = filter_raster(
        args.method, args.input, args.output, looks=args.looks, window=args.window, units=args.units,
        out_units=args.out_units, overwrite=args.overwrite, progress=not args.quiet, band=args.band,
        cog=getattr(args, "cog", False), workers=args.threads, **options,
    )
    for entry in info["bands"]:
        log.info("band %d: looks %.3g (%s), window %d", entry["band"], entry["looks"],
                 entry.get("looks_source", "option"), info["window"])
    log.info("wrote %s", info["output"])
    if not args.quiet:
        for entry in info["bands"]:
            how = ("given" if not entry["looks_estimated"] else
                   "recorded in the file's looks tag" if entry.get("looks_source") == "tag" else "estimated from the scene")
            extra = "".join(f", {k}={v:.6g}" if isinstance(v, float) else f", {k}={v}"
                            for k, v in entry["options"].items())
            label = f"band {entry['band']}: " if len(info["bands"]) > 1 or args.band is not None else ""
            print(f"{info['method']}: {label}window {info['window']}, looks {entry['looks']:.3g} ({how}){extra} "
                  f"-> {info['output']}")
    return OK
