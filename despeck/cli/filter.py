"""``despeck filter``: run one classical speckle filter on a raster and write the result.

The work is :func:`despeck.filters.filter_raster`; this module only parses options.
"""

from __future__ import annotations

from ..errors import InputError


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
            raise InputError(f"--option expects KEY=VALUE, got {item!r}")
        options[key.strip().replace("-", "_")] = parse_option_value(value)
    return options


def run(args) -> int:
    from ..filters import filter_raster

    info = filter_raster(
        args.method, args.input, args.output, looks=args.looks, window=args.window, units=args.units,
        out_units=args.out_units, overwrite=args.overwrite, progress=not args.quiet, band=args.band,
        cog=getattr(args, "cog", False), **parse_options(args.option),
    )
    if not args.quiet:
        for entry in info["bands"]:
            how = "estimated from the scene" if entry["looks_estimated"] else "given"
            extra = "".join(f", {k}={v:.6g}" if isinstance(v, float) else f", {k}={v}"
                            for k, v in entry["options"].items())
            label = f"band {entry['band']}: " if len(info["bands"]) > 1 or args.band is not None else ""
            print(f"{info['method']}: {label}window {info['window']}, looks {entry['looks']:.3g} ({how}){extra} "
                  f"-> {info['output']}")
    return 0
