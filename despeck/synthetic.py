"""Procedural clean reflectivity scenes for demos, training and benchmarks.

Real SAR users rarely have speckle-free references, so the package makes its own:
scenes built from the kinds of objects a radar analyst sees on a lowland landscape --
agricultural parcels with different backscatter, a meandering river, textured woodland,
a built-up block with bright facades, roads, and isolated bright point scatterers.
Values are linear backscatter (sigma nought, power) in realistic ranges: open water
around -22 dB, fields -16 to -8 dB, woodland about -8 dB, built-up areas and point
targets well above 0 dB. The ranges are common practice for C-band imagery, chosen
for plausibility, not taken from a measured data set.

Every scene comes with a layout: pixel boxes that are homogeneous by construction
(untextured parcels, for ENL and bias) and the positions of isolated point targets,
so benchmarks can measure smoothing, radiometric bias and point-target retention
against a known truth.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, spatial

from .errors import InputError

__all__ = ["SceneLayout", "make_scene"]

# Class name -> (mean backscatter range in dB, texture number of looks or None).
# Texture is a Gamma-distributed multiplicative term (K-distributed clutter); None means
# the parcel is homogeneous by construction.
_CLASSES = {
    "water": ((-24.0, -19.0), None),
    "bare": ((-17.0, -13.0), None),
    "crop": ((-13.0, -8.0), None),
    "meadow": ((-15.0, -10.0), 12.0),
    "woodland": ((-9.0, -6.5), 4.0),
}
_CLASS_WEIGHTS = {"water": 0.08, "bare": 0.22, "crop": 0.32, "meadow": 0.18, "woodland": 0.20}


@dataclass
class SceneLayout:
    """What a synthetic scene contains, in pixel coordinates.

    Attributes
    ----------
    homogeneous_boxes : list of (row0, col0, row1, col1)
        Boxes (end-exclusive) lying inside untextured parcels, at least ``min_box`` wide.
    points : list of (row, col)
        Isolated bright point scatterers on homogeneous background.
    """

    homogeneous_boxes: list = field(default_factory=list)
    points: list = field(default_factory=list)


def _db(x):
    return 10.0 ** (np.asarray(x) / 10.0)


def _smooth_noise(shape, sigma, rng):
    n = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="wrap")
    return n / (n.std() + 1e-12)


def _parcels(shape, parcel_size, rng):
    """Voronoi parcels with gently warped boundaries; returns an int label image."""
    h, w = shape
    n_seeds = max(4, int(h * w / parcel_size**2))
    seeds = rng.uniform(0, 1, size=(n_seeds, 2)) * (h, w)
    rows, cols = np.mgrid[0:h, 0:w].astype(np.float32)
    warp = 0.08 * parcel_size
    rows += warp * _smooth_noise(shape, parcel_size / 4, rng).astype(np.float32)
    cols += warp * _smooth_noise(shape, parcel_size / 4, rng).astype(np.float32)
    tree = spatial.cKDTree(seeds)
    _, labels = tree.query(np.stack([rows.ravel(), cols.ravel()], axis=1), workers=1)
    return labels.reshape(shape).astype(np.int32), n_seeds


def make_scene(
    shape=(512, 512),
    *,
    rng,
    parcel_size: float = 64.0,
    river: bool = True,
    built_up: bool = True,
    roads: bool = True,
    n_points: int | None = None,
    point_gain_db=(15.0, 25.0),
    min_box: int = 16,
    return_layout: bool = False,
):
    """Make a clean reflectivity scene (linear sigma nought, float32).

    Parameters
    ----------
    shape : (int, int)
        Rows and columns, each at least 64.
    rng : numpy.random.Generator or int
        Random generator or seed; the same seed gives the same scene.
    parcel_size : float
        Typical parcel width in pixels.
    river, built_up, roads : bool
        Whether to draw a meandering river, a built-up block and straight roads.
    n_points : int, optional
        Number of isolated point targets (default: one per 128x128 pixels).
    point_gain_db : (float, float)
        Range of point-target brightness above the local background, dB.
    min_box : int
        Smallest homogeneous box reported in the layout.
    return_layout : bool
        Also return a :class:`SceneLayout`.
    """
    if not isinstance(rng, np.random.Generator):
        rng = np.random.default_rng(rng)
    h, w = (int(shape[0]), int(shape[1]))
    if h < 64 or w < 64:
        raise InputError(f"synthetic scenes need at least 64x64 pixels, got {h}x{w}")

    labels, n_parcels = _parcels((h, w), parcel_size, rng)
    names = list(_CLASSES)
    probs = np.array([_CLASS_WEIGHTS[n] for n in names])
    parcel_class = rng.choice(len(names), size=n_parcels, p=probs / probs.sum())
    parcel_db = np.array([rng.uniform(*_CLASSES[names[c]][0]) for c in parcel_class])
    scene = _db(parcel_db)[labels]

    textured = np.zeros(n_parcels, dtype=bool)
    for c, name in enumerate(names):
        tex_looks = _CLASSES[name][1]
        if tex_looks is None:
            continue
        in_class = parcel_class[labels] == c
        if not in_class.any():
            continue
        textured |= parcel_class == c
        # Spatially correlated Gamma texture with unit mean: low-pass a Gamma field and
        # renormalise, so woodland looks like clumps of crowns rather than white noise.
        tex = ndimage.gaussian_filter(rng.gamma(tex_looks, 1 / tex_looks, size=(h, w)), 1.2)
        tex = 1.0 + (tex - tex.mean()) * (1.0 / np.sqrt(tex_looks)) / (tex.std() + 1e-12)
        scene = np.where(in_class, scene * np.clip(tex, 0.05, None), scene)

    disturbed = np.zeros((h, w), dtype=bool)
    rows, cols = np.mgrid[0:h, 0:w]
    if river:
        transpose = rng.random() < 0.5
        length, across = (w, h) if not transpose else (h, w)
        t = np.arange(length)
        centre = across * rng.uniform(0.3, 0.7) + across * 0.12 * np.sin(
            2 * np.pi * t / (length * rng.uniform(0.5, 1.2)) + rng.uniform(0, 2 * np.pi)
        )
        centre += 3 * np.cumsum(ndimage.gaussian_filter1d(rng.standard_normal(length), 20))
        width = rng.uniform(0.03, 0.06) * across
        a, b = (rows, cols) if not transpose else (cols, rows)
        dist = np.abs(a - centre[b])
        river_mask = dist < width / 2
        bank = (dist >= width / 2) & (dist < width / 2 + 2)
        scene = np.where(river_mask, _db(rng.uniform(-25, -21)), scene)
        scene = np.where(bank, scene * _db(3.0), scene)  # brighter, rougher banks
        disturbed |= river_mask | bank | (dist < width / 2 + 4)

    if roads:
        for _ in range(rng.integers(1, 3)):
            if rng.random() < 0.5:
                r0 = rng.integers(h // 8, h - h // 8)
                m = np.abs(rows - r0) < 1.5
            else:
                c0 = rng.integers(w // 8, w - w // 8)
                m = np.abs(cols - c0) < 1.5
            scene = np.where(m, _db(-20.0), scene)
            disturbed |= ndimage.binary_dilation(m, iterations=3)

    if built_up:
        bh, bw = int(h * rng.uniform(0.12, 0.2)), int(w * rng.uniform(0.12, 0.2))
        r0, c0 = rng.integers(0, h - bh), rng.integers(0, w - bw)
        block = np.zeros((h, w), dtype=bool)
        block[r0 : r0 + bh, c0 : c0 + bw] = True
        spacing = int(rng.integers(6, 10))
        facades = block & (((rows - r0) % spacing == 0) | ((cols - c0) % (spacing + 3) == 0))
        scene = np.where(block, _db(rng.uniform(-6, -2)), scene)
        scene = np.where(facades, _db(rng.uniform(3, 8)), scene)
        disturbed |= ndimage.binary_dilation(block, iterations=4)

    scene = scene.astype(np.float64)
    layout = SceneLayout()

    # Homogeneous boxes: inside untextured parcels, away from any drawn object.
    clean_parcel = ~textured[labels] & ~disturbed
    for lab, sl in enumerate(ndimage.find_objects(labels + 1)):
        if sl is None:
            continue
        m = (labels[sl] == lab) & clean_parcel[sl]
        if not m.any():
            continue
        dist = ndimage.distance_transform_cdt(np.pad(m, 1), metric="chessboard")[1:-1, 1:-1]
        half = int(dist.max()) - 2  # keep a margin of two pixels from the boundary
        if 2 * half < min_box:
            continue
        r, c = np.unravel_index(np.argmax(dist), dist.shape)
        r, c = r + sl[0].start, c + sl[1].start
        half = min(half, 48)
        layout.homogeneous_boxes.append((int(r - half), int(c - half), int(r + half), int(c + half)))

    # Isolated point targets on homogeneous background, at least 12 pixels apart and
    # outside the ENL boxes so they do not bias ENL.
    n_points = max(1, (h * w) // (128 * 128)) if n_points is None else int(n_points)
    candidates = clean_parcel.copy()
    for r0, c0, r1, c1 in layout.homogeneous_boxes:
        candidates[max(r0 - 6, 0) : r1 + 6, max(c0 - 6, 0) : c1 + 6] = False
    # six pixels from any parcel boundary, so the background around a point is one parcel
    near_boundary = ndimage.maximum_filter(labels, 13) != ndimage.minimum_filter(labels, 13)
    candidates = ndimage.binary_erosion(candidates & ~near_boundary, iterations=1)
    free = np.argwhere(candidates)
    rng.shuffle(free)
    for r, c in free:
        if len(layout.points) >= n_points:
            break
        if any(abs(r - pr) < 12 and abs(c - pc) < 12 for pr, pc in layout.points):
            continue
        scene[r, c] *= _db(rng.uniform(*point_gain_db))
        layout.points.append((int(r), int(c)))

    scene = scene.astype(np.float32)
    return (scene, layout) if return_layout else scene
