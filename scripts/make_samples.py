"""Regenerate the bundled sample scenes in ``sample_patches/`` (deterministic).

The scenario is invented: the *Oskarvel Delta*, an imaginary river lowland, imaged by
an imaginary C-band radar during the imaginary "Grey Heron" flood-watch campaign. The
scenes are procedural (:mod:`despeck.synthetic`), on an invented local survey grid
with 10 m pixels, so no file here locates or depicts a real place.

Files written (all GeoTIFF on the same grid unless said otherwise):

- ``oskarvel_reference.tif``  clean reflectivity (linear intensity) with a nodata border;
- ``oskarvel_1look.tif``      1-look intensity speckle;
- ``oskarvel_4look_db.tif``   4-look intensity, stored in dB;
- ``oskarvel_correlated_amplitude.tif`` 1-look speckle with a sensor-like spatial
  correlation (tapered, oversampled spectrum), stored as amplitude;
- ``oskarvel_slc.tif``        256 x 256 single-look complex crop (CFloat32), correlated;
- ``oskarvel_date1.tif``, ``oskarvel_date2.tif``  a two-date 1-look pair with independent
  speckle; one field is flooded on the second date;
- ``oskarvel_areas.geojson``  homogeneous areas as polygons in map coordinates;
- ``oskarvel_bench.yaml``     a scene list for ``despeck bench`` (areas and point targets).

Usage::

    python scripts/make_samples.py [--out sample_patches]

The seeds used here (2031 and up) are never used to make training data.
"""

from __future__ import annotations

import argparse
import json
import pathlib
import sys

import numpy as np
import rasterio
import yaml
from rasterio.crs import CRS
from rasterio.transform import from_origin

from despeck import raster, speckle
from despeck.synthetic import make_scene

SEED = 2031
SIZE = 512
PIXEL = 10.0  # metres
ORIGIN = (412000.0, 6188000.0)  # invented local grid, not a real projection
GRID = CRS.from_wkt(
    'LOCAL_CS["Oskarvel Delta survey grid (fictional)",UNIT["metre",1],'
    'AXIS["Easting",EAST],AXIS["Northing",NORTH]]'
)
NODATA = 0.0


def _nodata_border(shape):
    """A slanted swath edge on the left and a strip at the top, as at the edge of a real scene."""
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    return (cols < 18 + rows * 0.05) | (rows < 6)


def _write_reference(path, reference, valid):
    data = np.where(valid, reference, NODATA).astype(np.float32)
    profile = dict(driver="GTiff", width=SIZE, height=SIZE, count=1, dtype="float32", crs=GRID,
                   transform=from_origin(*ORIGIN, PIXEL, PIXEL), nodata=NODATA, tiled=True,
                   blockxsize=256, blockysize=256, compress="deflate", predictor=3)
    tmp = path.with_name(path.name + ".tmp")
    with rasterio.open(tmp, "w", **profile) as dst:
        dst.write(data, 1)
        dst.set_band_description(1, "sigma0 VV, clean reference (fictional)")
        dst.update_tags(SCENARIO="Oskarvel Delta, Grey Heron flood-watch campaign (fictional)",
                        UNITS="intensity", LOOKS="clean")
    tmp.replace(path)


def _box_polygon(box, transform):
    r0, c0, r1, c1 = box
    corners = [(r0, c0), (r0, c1), (r1, c1), (r1, c0), (r0, c0)]
    return [list(transform * (c, r)) for r, c in corners]


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", default=str(pathlib.Path(__file__).resolve().parents[1] / "sample_patches"))
    args = parser.parse_args(argv)
    out = pathlib.Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)

    reference, layout = make_scene((SIZE, SIZE), rng=rng, return_layout=True)
    valid = ~_nodata_border(reference.shape)
    ref_path = out / "oskarvel_reference.tif"
    _write_reference(ref_path, reference, valid)
    like = raster.read_scene(ref_path, units="intensity")

    def write(name, intensity, units, description, looks, valid_mask=valid):
        path = out / name
        raster.write_scene(path, intensity, like, units=units, valid=valid_mask, overwrite=True)
        with rasterio.open(path, "r+") as dst:
            dst.set_band_description(1, description)
            dst.update_tags(LOOKS=str(looks), UNITS=units)
        return path

    write("oskarvel_1look.tif", speckle.simulate_intensity(reference, 1, rng=rng), "intensity",
          "sigma0 VV, 1 look (simulated)", 1)
    write("oskarvel_4look_db.tif", speckle.simulate_intensity(reference, 4, rng=rng), "db",
          "sigma0 VV in dB, 4 looks (simulated)", 4)
    correlated = speckle.simulate_correlated_intensity(reference, 1, rng=rng)
    write("oskarvel_correlated_amplitude.tif", correlated, "amplitude",
          "amplitude VV, 1 look, spatially correlated speckle (simulated)", 1)

    # Two dates, independent speckle; on date 2 the largest homogeneous field is flooded.
    flooded = np.zeros_like(valid)
    box = max(layout.homogeneous_boxes, key=lambda b: (b[2] - b[0]) * (b[3] - b[1]))
    flooded[box[0] : box[2], box[1] : box[3]] = True
    date2 = np.where(flooded, np.float32(10 ** (-2.2)), reference)
    write("oskarvel_date1.tif", speckle.simulate_intensity(reference, 1, rng=rng), "intensity",
          "sigma0 VV, 1 look, date 1 (simulated)", 1)
    write("oskarvel_date2.tif", speckle.simulate_intensity(date2, 1, rng=rng), "intensity",
          "sigma0 VV, 1 look, date 2 with a flooded field (simulated)", 1)

    # A single-look complex crop (centre 256 x 256), written as CFloat32.
    r0 = c0 = SIZE // 4
    slc = speckle.simulate_correlated_slc(reference[r0 : r0 + 256, c0 : c0 + 256], rng=rng)
    slc_path = out / "oskarvel_slc.tif"
    tmp = slc_path.with_name(slc_path.name + ".tmp")
    transform = from_origin(ORIGIN[0] + c0 * PIXEL, ORIGIN[1] - r0 * PIXEL, PIXEL, PIXEL)
    with rasterio.open(tmp, "w", driver="GTiff", width=256, height=256, count=1, dtype="complex64",
                       crs=GRID, transform=transform, tiled=True, blockxsize=256, blockysize=256,
                       compress="deflate") as dst:
        dst.write(slc, 1)
        dst.set_band_description(1, "VV single-look complex, correlated speckle (simulated)")
        dst.update_tags(UNITS="complex", LOOKS="1")
    tmp.replace(slc_path)

    # Homogeneous areas: the largest few boxes away from the flooded field, as GeoJSON polygons
    # in map coordinates and as pixel boxes in the bench scene list.
    boxes = [b for b in layout.homogeneous_boxes if b != box and valid[b[0] : b[2], b[1] : b[3]].all()]
    boxes = sorted(boxes, key=lambda b: -(b[2] - b[0]) * (b[3] - b[1]))[:8]
    points = [p for p in layout.points if valid[p]]
    transform = like.transform
    features = [{"type": "Feature", "properties": {"name": f"field-{i + 1}"},
                 "geometry": {"type": "Polygon", "coordinates": [_box_polygon(b, transform)]}}
                for i, b in enumerate(boxes)]
    (out / "oskarvel_areas.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": features},
                                                            indent=1))
    bench = {
        "scenes": [
            {"name": "oskarvel-1look", "image": "oskarvel_1look.tif", "reference": "oskarvel_reference.tif",
             "looks": 1, "units": "intensity", "reference_units": "intensity", "areas": "oskarvel_areas.geojson",
             "points": [list(p) for p in points]},
            {"name": "oskarvel-4look-db", "image": "oskarvel_4look_db.tif", "reference": "oskarvel_reference.tif",
             "looks": 4, "units": "db", "reference_units": "intensity", "areas": [list(b) for b in boxes], "points": [list(p) for p in points]},
        ],
        "crop": [128, 128, 256],
    }
    (out / "oskarvel_bench.yaml").write_text(
        "# Scene list for `despeck bench` on the fictional Oskarvel Delta samples.\n"
        "# Made by scripts/make_samples.py; paths are relative to this file.\n"
        + yaml.safe_dump(bench, sort_keys=False))
    total = sum(p.stat().st_size for p in out.iterdir() if p.is_file())
    print(f"wrote {len(list(out.iterdir()))} files to {out} ({total / 1e6:.1f} MB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
