"""The layout of a finished scene: boxes of exactly constant reflectivity and isolated point targets."""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from ..synthetic import SceneLayout
from .primitives import NOISE_FLOOR_DB, lin


_MIN_BOX = 16
_MIN_POINTS = 3
_POINT_GAIN_DB = (15.0, 25.0)


def _find_boxes(scene, *, min_box=_MIN_BOX, max_half=48, max_boxes=24, per_region=3):
    """Boxes inside regions of exactly constant reflectivity (checked on the scene itself)."""
    const = ndimage.maximum_filter(scene, 3) == ndimage.minimum_filter(scene, 3)
    lab, n = ndimage.label(const)
    if n == 0:
        return []
    sizes = np.bincount(lab.ravel())
    boxes = []
    need = (min_box + 4) ** 2
    for i, sl in enumerate(ndimage.find_objects(lab), start=1):
        if sl is None or sizes[i] < need:
            continue
        m = lab[sl] == i
        for _ in range(per_region):
            dist = ndimage.distance_transform_cdt(np.pad(m, 1), metric="chessboard")[1:-1, 1:-1]
            half = min(int(dist.max()) - 2, max_half)
            if 2 * half < min_box:
                break
            r, c = np.unravel_index(np.argmax(dist), dist.shape)
            r0, c0 = r + sl[0].start - half, c + sl[1].start - half
            boxes.append((int(r0), int(c0), int(r0 + 2 * half), int(c0 + 2 * half)))
            m[max(r - half - 4, 0) : r + half + 4, max(c - half - 4, 0) : c + half + 4] = False
    boxes.sort(key=lambda b: -(b[2] - b[0]))
    return boxes[:max_boxes]


def _place_points(scene, boxes, n, rng, *, gain_db=_POINT_GAIN_DB, min_sep=12):
    """Isolated single-pixel targets on exactly constant 13x13 backgrounds, outside boxes."""
    h, w = scene.shape
    flat = ndimage.maximum_filter(scene, 13, mode="nearest") == ndimage.minimum_filter(scene, 13, mode="nearest")
    flat[:6, :] = flat[-6:, :] = False
    flat[:, :6] = flat[:, -6:] = False
    for r0, c0, r1, c1 in boxes:
        flat[max(r0 - 7, 0) : r1 + 7, max(c0 - 7, 0) : c1 + 7] = False
    idx = np.flatnonzero(flat)
    points = []
    if idx.size:
        order = idx[rng.permutation(idx.size)[: 50 * n + 200]]
        for k in order:
            r, c = divmod(int(k), w)
            if any(abs(r - pr) < min_sep and abs(c - pc) < min_sep for pr, pc in points):
                continue
            points.append((r, c))
            if len(points) >= n:
                break
    # too few constant backgrounds (rare: steep terrain, dense town): lay small flat pads
    # (a car park, a clearing) of the local median and put the target in the middle
    tries = 0
    while len(points) < min(n, _MIN_POINTS) and tries < 200:
        tries += 1
        r, c = int(rng.integers(8, h - 8)), int(rng.integers(8, w - 8))
        if any(abs(r - pr) < min_sep + 8 and abs(c - pc) < min_sep + 8 for pr, pc in points):
            continue
        near = [b for b in boxes if b[0] - 15 < r < b[2] + 15 and b[1] - 15 < c < b[3] + 15]
        if near and tries <= 100:
            continue
        for b in near:  # small scenes: give up a box rather than the targets
            boxes.remove(b)
        pad = scene[r - 7 : r + 8, c - 7 : c + 8]
        pad[:] = np.median(pad)
        points.append((r, c))
    for r, c in points:
        scene[r, c] *= lin(rng.uniform(*gain_db))
    return points


def finish_scene(scene, rng, n_points=None, points_ok=True):
    """Cast to float32 and build the layout: constant boxes first, then points."""
    h, w = scene.shape
    scene = np.maximum(scene, lin(NOISE_FLOOR_DB)).astype(np.float32)
    boxes = _find_boxes(scene)
    n = max(3, (h * w) // (160 * 160)) if n_points is None else n_points
    points = _place_points(scene, boxes, n, rng) if points_ok else []
    return scene, SceneLayout(homogeneous_boxes=boxes, points=points)
