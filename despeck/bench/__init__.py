"""The benchmark harness: run classical filters and trained models on scenes and write a report.

A benchmark is a list of scenes and a list of methods. Each scene is a raster (or an
array), optionally with a clean reference of the same grid, homogeneous areas (pixel
boxes or a GeoJSON file of polygons in map coordinates; found automatically
otherwise) and point targets (``(row, col)``; found automatically otherwise). Each
method is a classical filter with its options or a trained model file. The report
folder holds ``report.md`` (tables, figures, conventions and cautions),
``results.csv`` and ``results.json`` with the same numbers, PNG figures, and the
marker file :data:`REPORT_MARKER` naming every file despeck wrote there (with its
size and SHA-256). Runs are deterministic except for the timing columns.

The report is written to a hidden temporary folder beside the destination and
renamed into place only when complete. An existing destination is replaced only
when asked (``overwrite``) and only when it is a report despeck wrote: it must hold
the marker and nothing but the unchanged files the marker names, no input of the run,
and must not be (or contain) the current directory.

Scene list files (YAML or JSON, paths relative to the file)::

    scenes:
      - name: north-polder            # optional, default the image's file name
        image: polder_1look.tif
        reference: polder_clean.tif   # optional clean reflectivity, same grid
        reference_units: intensity    # optional, default detected (independent of units)
        looks: 1                      # optional, default the file's looks tag, else estimated
        units: intensity              # optional, default detected
        areas: [[10, 10, 60, 60]]     # optional: boxes (row0, col0, row1, col1) or a .geojson file
        points: [[120, 44]]           # optional
    methods: [lee, "lee:window=9", "model:weights/small.safetensors"]
    crop: [0, 0, 256]                 # optional (row, col, size) of the figure crops

Method specifications: ``NAME`` or ``NAME:key=value,key=value`` for a filter of
:data:`despeck.filters.FILTERS` (``window``, ``looks`` and the filter's own
options), ``model:PATH`` or a path ending in ``.safetensors`` for a model file
(``model:PATH,orientations=8``, or a mapping ``{model: PATH, orientations: 8}``, runs it
averaged over orientations as ``despeck apply --orientations`` does).

The package is split by responsibility: :mod:`~despeck.bench.spec` (what to run: method
specifications and scene list files), :mod:`~despeck.bench.scenes` (reading and checking
scenes), :mod:`~despeck.bench.run` (running and measuring), :mod:`~despeck.bench.report`
(results files, report.md, the marker and the safe replacement) and
:mod:`~despeck.bench.figures` (PNG figures).
"""

from .report import CAUTIONS, REPORT_MARKER
from .run import run_benchmark
from .scenes import areas_from_vector
from .spec import DEFAULT_METHODS, BenchScene, Method, load_scene_list, parse_method, parse_option_value

__all__ = ["BenchScene", "Method", "parse_method", "parse_option_value", "load_scene_list", "run_benchmark",
           "DEFAULT_METHODS", "CAUTIONS", "REPORT_MARKER", "areas_from_vector"]
