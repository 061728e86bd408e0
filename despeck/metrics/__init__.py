"""Quality metrics for despeckled SAR images: smoothing, radiometry, edges, fidelity, targets.

Pure numpy/scipy/scikit-image functions on linear intensity arrays (float, same shape) with an
optional boolean ``valid`` mask. Most need *homogeneous areas*: pixel boxes
``(row0, col0, row1, col1)`` (end-exclusive) or boolean masks, given by the user
(:func:`areas_from_boxes`, or masks of polygons in map coordinates that
:func:`despeck.bench.scenes.areas_from_vector` reads from a GeoJSON file) or found
automatically (:func:`find_homogeneous_areas`). Metrics that
compare with a reference say which reference they use: the clean reflectivity when
the data are simulated, the noisy input otherwise. The metrics read no files.

The package's modules:

- :mod:`~despeck.metrics.images` -- the checks every metric makes of its images;
- :mod:`~despeck.metrics.areas` -- homogeneous areas: boxes, masks, found automatically;
- :mod:`~despeck.metrics.radiometric` -- ENL, radiometric bias, ratio image, the M estimator;
- :mod:`~despeck.metrics.edges` -- EPD-ROA and edge correlation;
- :mod:`~despeck.metrics.fidelity` -- masked PSNR/SSIM (scikit-image) in dB and amplitude;
- :mod:`~despeck.metrics.regions` -- flat, edge and texture regions of a reference, PSNR in each;
- :mod:`~despeck.metrics.points` -- point targets and their retention;
- :mod:`~despeck.metrics.speed` -- throughput.

The package re-exports the public names.

References
----------
Argenti, F., Lapini, A., Bucciarelli, T., Alparone, L. (2013). A tutorial on speckle
reduction in synthetic aperture radar images. IEEE GRSM 1(3), 6-35.
doi:10.1109/MGRS.2013.2277512
"""

from __future__ import annotations

from .areas import MIN_AREA_PIXELS, areas_from_boxes, check_areas, find_homogeneous_areas
from .radiometric import enl, glcm_homogeneity, radiometric_bias_db, ratio_image, ratio_statistics, unassisted_m
from .edges import EPD_WINDOW, edge_correlation, epd_roa
from .fidelity import DB_RANGE_PERCENTILES, fidelity, fidelity_db, psnr, reference_db_range, ssim, to_db
from .points import find_point_targets, point_retention_db
from .regions import EDGE_STEP_DB, REGION_NAMES, psnr_by_region, reference_regions
from .speed import throughput_mps

__all__ = [
    "MIN_AREA_PIXELS", "areas_from_boxes", "find_homogeneous_areas", "check_areas", "enl",
    "radiometric_bias_db", "ratio_image", "ratio_statistics", "glcm_homogeneity", "unassisted_m",
    "EPD_WINDOW", "epd_roa", "edge_correlation", "psnr", "ssim", "to_db", "DB_RANGE_PERCENTILES",
    "reference_db_range", "fidelity_db", "fidelity", "find_point_targets", "point_retention_db",
    "REGION_NAMES", "EDGE_STEP_DB", "reference_regions", "psnr_by_region", "throughput_mps"
]
