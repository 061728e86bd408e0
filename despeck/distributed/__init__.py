"""Despeckling on a Dask cluster: many scenes one task each, or one huge scene chunk by chunk.

Optional: needs ``pip install despeck[dask]`` (``dask[distributed]``, ``xarray``,
``rioxarray``); importing this package without them raises one line saying so.

- :mod:`~despeck.distributed.files` -- **many scenes**: :func:`apply_many` runs one task
  per file on a ``dask.distributed`` cluster (:func:`open_client`), each streaming its
  scene with :func:`despeck.inference.despeckle_file` exactly as ``despeck apply`` does;
  idempotent and resumable, one line per failed file.
- :mod:`~despeck.distributed.dataarray` -- **one huge scene**: :func:`despeckle_dataarray`
  despeckles an ``xarray.DataArray`` lazily with :func:`dask.array.map_overlap`, the
  scene-level offset, looks and correlation taken once for the whole scene, and
  :func:`write_dataarray` writes the result through despeck's own writer.

The package re-exports the public names.
"""

from __future__ import annotations

try:  # the extra's packages, checked once here so that a missing one is reported in one line
    import dask.array  # noqa: F401
    import distributed  # noqa: F401
    import rioxarray  # noqa: F401
    import xarray  # noqa: F401
except ImportError as exc:  # pragma: no cover - the extra is installed in the test environment
    raise ImportError(f"despeck.distributed needs the dask extra ({exc.name} is missing): "
                      "pip install 'despeck[dask]'") from None

from .files import FileResult, apply_many, open_client
from .dataarray import DEFAULT_CHUNK, despeckle_dataarray, write_dataarray

__all__ = ["FileResult", "apply_many", "open_client", "despeckle_dataarray", "write_dataarray", "DEFAULT_CHUNK"]
