"""Procedural radar-like scene families: clean reflectivity for training and evaluation.

:mod:`despeck.synthetic` draws one kind of lowland landscape. This package draws several
*families* of scenes that look like side-looking radar images, each with its own physics
approximation:

``terrain``
    A fractal elevation model (spectral synthesis, power-law spectrum) seen side-looking:
    backscatter follows the local incidence angle (Muhleman's law), slopes facing the
    radar are foreshortened (compressed into fewer range pixels, hence brighter), slopes
    facing away steeper than the grazing angle and the ground they hide are in radar
    shadow at the noise floor; vegetation adds Gamma texture; valley floors are flat
    fields and lakes.
``forest``
    K-distributed clutter (correlated Gamma texture, texture looks about 2-10) in stands,
    clearings and tracks, with the forest edge facing the radar slightly brighter and a
    shadow behind the edge facing away.
``fields``
    Agricultural parcels at several scales (rectangular strips and Voronoi cells), row-crop
    texture in some, roads (dark asphalt, or bright where lined with fences and barriers)
    and hedges with shadows.
``urban``
    Street grids with buildings: L-shaped double-bounce lines at the walls facing the
    radar (+10 to +30 dB), layover of the walls onto the street in front, shadows behind,
    bright point scatterers on roofs and streets, parks.
``water``
    Sea, lakes and rivers at very low backscatter (-25 to -18 dB) with wind-roughened
    patches, shorelines and ships.
``mixed``
    A landscape of zones drawn from the other families.
``wetland`` (evaluation only)
    Open channels, flooded forest brightened by trunk-water double bounce, reed marsh and
    mudflats. It is never in :data:`TRAINING_FAMILIES`.

Geometry convention: rows are azimuth, columns are range, the radar looks from the left
(near range at column 0) towards increasing column.

Values are linear sigma nought (power), float32. The backscatter levels (water -25 to
-18 dB, bare soil -17 to -12 dB, crops -14 to -8 dB, forest -8 to -5 dB, double bounce
and man-made points far above 0 dB, noise floor -28 dB) are common practice for C-band
imagery, chosen for plausibility, not fitted to a measured data set.

Every scene has a :class:`despeck.synthetic.SceneLayout`: boxes (>= 16 px) found on the
finished scene where the reflectivity is exactly constant (untextured surfaces by
construction) and isolated point targets 15-25 dB above a constant background, for
bias, ENL and point-retention measurements.

Train and test splits draw the family parameters (incidence angle, relief, parcel
scales, building density, texture looks, ...) from disjoint ranges
(:func:`split_ranges`, :func:`draw_parameters`), so evaluation scenes are never
training-like copies; the ``wetland`` family is evaluation-only.

The package's modules, lowest first:

- :mod:`~despeck.scene_families.primitives` -- shared terrain and texture building
  blocks (random fields, fractal surfaces, Gamma texture, Muhleman's law, partitions,
  edge effects, land cover);
- :mod:`~despeck.scene_families.splits` -- the family names and the train/test
  parameter ranges (:func:`split_ranges`, :func:`draw_parameters`);
- :mod:`~despeck.scene_families.layout` -- constant boxes and point targets of a
  finished scene;
- :mod:`~despeck.scene_families.terrain` -- ``terrain`` (:func:`ground_to_slant`);
- :mod:`~despeck.scene_families.land` -- ``forest`` and ``fields``;
- :mod:`~despeck.scene_families.urban` -- ``urban``;
- :mod:`~despeck.scene_families.water` -- ``water`` and ``wetland``;
- :mod:`~despeck.scene_families.registry` -- :func:`make_family_scene`: each family by
  name, ``mixed`` landscapes of the others.

The package re-exports the public names.

References
----------
Muhleman, D. O. (1964). Radar scattering from Venus and the Moon. The Astronomical
Journal, 69, 34-41. (Law sigma0 ~ cos(t) / (sin(t) + 0.111 cos(t))^3; constants from
memory.)
Oliver, C., Quegan, S. (1998). Understanding Synthetic Aperture Radar Images. Artech
House. (K-distributed clutter: Gamma texture times speckle; radar geometry: layover,
foreshortening, shadow.)
Voss, R. F. (1988). Fractals in nature: from characterization to simulation. In The
Science of Fractal Images, Springer. (Spectral synthesis of fractional Brownian
surfaces, power spectrum ~ k^-beta.)
"""

from __future__ import annotations

from .primitives import NOISE_FLOOR_DB, fractal_surface, gamma_texture, muhleman_backscatter  # noqa: F401
from .splits import (  # noqa: F401 - SPLITS and NOISE_FLOOR_DB stay importable from here, as before
    EVALUATION_FAMILIES,
    SCENE_FAMILIES,
    SPLITS,
    TRAINING_FAMILIES,
    draw_parameters,
    split_ranges,
)
from .terrain import ground_to_slant
from .registry import make_family_scene

__all__ = [
    "SCENE_FAMILIES", "TRAINING_FAMILIES", "EVALUATION_FAMILIES", "make_family_scene", "draw_parameters",
    "split_ranges", "fractal_surface", "gamma_texture", "muhleman_backscatter", "ground_to_slant"
]
