"""``despeck simulate``: speckle a clean reference raster, keeping its georeferencing.

White speckle is Gamma(L, 1/L) per pixel; ``--correlated`` averages L single looks
of a circular Gaussian field convolved with a band-limited, Hamming-tapered,
oversampled system response (see :class:`despeck.speckle.SpeckleField`). The scene
is processed strip by strip, so it never needs to fit in memory, and the same seed
gives the same output.
"""

from __future__ import annotations

import logging
import signal
import warnings

from .. import raster, speckle
from ..errors import OptionError
from .exit_codes import OK, option_values, raise_terminated

log = logging.getLogger(__name__)


def add_arguments(parser):
    parser.add_argument("clean", metavar="CLEAN", help="clean reference raster (reflectivity)")
    parser.add_argument("output", metavar="OUT", help="speckled GeoTIFF to write")
    parser.add_argument("--looks", "-L", type=float, required=True, help="number of looks L > 0 (at least 1 with --correlated; fractional values weight the looks)")
    parser.add_argument("--correlated", action="store_true",
                        help="spatially correlated speckle from a band-limited, tapered system response")
    parser.add_argument("--oversampling", type=float, default=1.25,
                        help="sampling rate over bandwidth of the simulated system, >= 1 (default 1.25; with --correlated)")
    parser.add_argument("--taper", default="hamming", choices=sorted(speckle.TAPERS),
                        help="spectral weighting of the simulated system (default hamming; with --correlated)")
    parser.add_argument("--seed", type=int, default=None, help="random seed (default: fresh; the seed used is printed)")
    parser.add_argument("--units", choices=raster.UNITS, default=None,
                        help="units of CLEAN's values (default: detected, else linear intensity)")
    parser.add_argument("--out-units", choices=raster.OUTPUT_UNITS, default=None,
                        help="units of the output (default: those of CLEAN)")
    parser.add_argument("--overwrite", action="store_true", help="replace OUT if it exists (never CLEAN)")
    parser.add_argument("--cog", action="store_true",
                        help="write a Cloud-Optimised GeoTIFF with overviews (GDAL's COG driver)")
    parser.add_argument("--quiet", "-q", action="store_true", help="no progress bar or summary")


def run(args) -> int:
    with option_values():  # bad values are usage errors (exit status 2), refused before CLEAN is read
        looks = speckle.check_looks(args.looks, "--looks")
        if args.correlated and looks < 1:
            raise OptionError(f"--looks must be at least 1 with --correlated (single looks are summed), "
                              f"got {args.looks:g}")
        if args.seed is not None and args.seed < 0:
            raise OptionError(f"--seed must be a non-negative integer, got {args.seed}")
        seed = args.seed
        if seed is None:
            import numpy as np

            seed = int(np.random.SeedSequence().entropy % (2**63))
        field = speckle.SpeckleField(looks, seed=seed, correlated=args.correlated,
                                     oversampling=args.oversampling, taper=args.taper)
    log.info("%s speckle, looks %g (given by --looks), seed %d, halo %d pixels",
             "correlated" if args.correlated else "white", looks, seed, field.halo)

    def apply(intensity, valid, row, col):
        return field.speckle(intensity, row, col)

    kind = "correlated" if args.correlated else "white"
    tags = {"speckle": f"{kind}, looks={args.looks:g}, seed={seed}"}
    # The looks and the speckle correlation as despeck.looks reads them back (theory of
    # the simulated system; 0 for white speckle).
    from ..looks import LooksInfo, SpeckleCorrelation, speckle_tags

    if args.correlated:
        tags["speckle"] += f", oversampling={args.oversampling:g}, taper={args.taper}"
        lag = tuple(speckle.intensity_correlation_theory(oversampling=args.oversampling, taper=args.taper))
        corr = SpeckleCorrelation(lag, lag, "simulated", "of the simulated system")
    else:
        corr = SpeckleCorrelation((0.0, 0.0), (0.0, 0.0), "simulated", "white speckle")
    tags.update(speckle_tags(LooksInfo(looks, "simulated"), corr))
    from ..provenance import provenance_tags

    settings = {"speckle": kind, "looks": f"{args.looks:g}", "seed": seed}
    if args.correlated:
        settings.update(oversampling=f"{args.oversampling:g}", taper=args.taper)
    tags.update(provenance_tags("simulate", options=settings))
    # SIGTERM becomes an exception, so the writer removes its temporary file and claim.
    previous = signal.signal(signal.SIGTERM, raise_terminated)
    try:
        with warnings.catch_warnings():  # shown by the command's one-line printer
            warnings.simplefilter("always", raster.UnitsWarning)
            path = raster.process_file(
                args.clean, args.output, apply, halo=field.halo, units=args.units, out_units=args.out_units,
                overwrite=args.overwrite, progress=not args.quiet, description="simulate", tags=tags,
                cog=getattr(args, "cog", False),
            )
    finally:
        signal.signal(signal.SIGTERM, previous)
    log.info("wrote %s", path)
    if not args.quiet:
        print(f"wrote {path} ({kind} speckle, {args.looks:g} looks, seed {seed})")
    return OK
