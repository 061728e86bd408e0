"""Averaging a network over orientations of its input (geometric self-ensemble).

A despeckling network has no preferred orientation to learn from the physics, but a
trained one is not exactly equivariant: running it on flipped (and transposed) copies
of a tile, turning each estimate back and averaging them removes part of its error
(Timofte, Rothe, Van Gool 2016, "Seven ways to improve example-based single image
super resolution", CVPR). Flips keep the meaning of rows and columns (for SAR, range
and azimuth, whose speckle correlation can differ); a transpose swaps them, so the
row and column correlations of the conditioning are swapped with it.

This module needs no torch import: it only calls methods of the tensors it is given,
so option parsers can use :data:`ORIENTATIONS` without loading torch.
"""

from __future__ import annotations

from ..errors import InputError

__all__ = ["ORIENTATIONS", "check_orientations", "average_over_orientations"]

#: Orientation counts: the tile as it is (1); with its rows, its columns and both
#: reversed (4); and those four transposed as well (8).
ORIENTATIONS = (1, 4, 8)

# Flips of the first four orientations, as dimensions of an (N, C, H, W) tensor.
_FLIPS = ((), (2,), (3,), (2, 3))


def check_orientations(orientations) -> int:
    """``orientations`` checked against :data:`ORIENTATIONS` (a one-line error naming the option otherwise)."""
    if isinstance(orientations, bool) or orientations not in ORIENTATIONS:
        raise InputError(f"option orientations must be one of {', '.join(map(str, ORIENTATIONS))}, "
                         f"got {orientations!r}")
    return int(orientations)


def average_over_orientations(run, z, cond=None, orientations: int = 1):
    """The mean of ``run(oriented z, its cond)`` turned back, over ``orientations`` orientations.

    ``run(z, cond)`` maps ``(N, C, H, W)`` to ``(N, 1, H, W)``; ``cond`` is ``(N, 3)``
    (log-speckle std, row correlation, column correlation) or None. The average is
    taken in float32 whatever the network's precision.
    """
    orientations = check_orientations(orientations)
    if orientations == 1:
        return run(z, cond)
    total = None
    for transpose in (False, True)[: orientations // 4]:
        zt, ct = z, cond
        if transpose:
            zt = z.transpose(2, 3)
            ct = None if cond is None else cond[:, [0, 2, 1]]
        for dims in _FLIPS:
            y = run(zt.flip(dims) if dims else zt, ct).float()
            y = y.flip(dims) if dims else y
            y = y.transpose(2, 3) if transpose else y
            total = y if total is None else total + y
    return total / orientations
