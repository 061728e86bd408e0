"""How this process uses GDAL: block cache, native error printers, decode threads, GDAL's own messages.

Settings that concern the whole process rather than one file; the reader and the
writer call them before they open a dataset.
"""

from __future__ import annotations

import contextlib
import os

import rasterio

__all__ = ["GDAL_CACHE_MB", "limit_gdal_cache", "quiet_native_error_printers", "decode_threads", "error_detail"]

#: Size of GDAL's block cache (MiB) while despeck reads and writes, unless the
#: environment sets GDAL_CACHEMAX. GDAL's default (5 % of RAM) lets a streamed pass
#: over a large scene grow to that size; a pass reads and writes each block about
#: once, so a modest cache costs nothing and keeps memory flat.
GDAL_CACHE_MB = 64

def limit_gdal_cache(megabytes=None) -> None:
    """Cap GDAL's block cache at ``megabytes`` (default :data:`GDAL_CACHE_MB`).

    Called by :func:`open_scene` and :func:`open_output`. Without ``megabytes`` it
    leaves alone a cache size chosen by the user, in the environment
    (``GDAL_CACHEMAX``) or in an active ``rasterio.Env``, and a cache already smaller
    than the cap.
    """
    from rasterio.env import get_gdal_config, getenv, hasenv, set_gdal_config

    cap = int(float(GDAL_CACHE_MB if megabytes is None else megabytes) * 2**20)
    if megabytes is None:
        if os.environ.get("GDAL_CACHEMAX") or (hasenv() and "GDAL_CACHEMAX" in getenv()):
            return
        current = get_gdal_config("GDAL_CACHEMAX")
        if isinstance(current, int) and current <= cap:
            return
    set_gdal_config("GDAL_CACHEMAX", cap)


_NATIVE_PRINTERS_QUIET = False


def quiet_native_error_printers() -> bool:
    """Stop GDAL's and libtiff's C-level default error printers writing raw lines to stderr.

    rasterio routes GDAL errors of the calling thread through Python (they become
    exceptions and despeck's one-line messages), but GDAL's compression worker threads
    (``GDAL_NUM_THREADS``) and libtiff's own default handler print straight to the
    terminal, e.g. ``_tiffWriteProc: File too large.`` before despeck's message on a full
    disk. Those failures are still caught (every written file is read back before it is
    published), so the process-wide fallbacks are made quiet: GDAL's global handler
    becomes ``CPLQuietErrorHandler`` (rasterio's per-thread handlers are untouched) and
    libtiff's default error and warning handlers are removed. Works with the libraries
    bundled in rasterio's wheels; elsewhere it does nothing and returns False.
    """
    global _NATIVE_PRINTERS_QUIET
    if _NATIVE_PRINTERS_QUIET:
        return True
    import ctypes
    import glob

    libdir = os.path.join(os.path.dirname(rasterio.__file__), os.pardir, "rasterio.libs")
    done = False
    try:
        for path in glob.glob(os.path.join(libdir, "libgdal-*.so*")):
            gdal = ctypes.CDLL(path)
            gdal.CPLSetErrorHandler.restype = ctypes.c_void_p
            gdal.CPLSetErrorHandler.argtypes = [ctypes.c_void_p]
            gdal.CPLSetErrorHandler(ctypes.cast(gdal.CPLQuietErrorHandler, ctypes.c_void_p).value)
            done = True
        for path in glob.glob(os.path.join(libdir, "libtiff-*.so*")):
            tiff = ctypes.CDLL(path)
            for name in ("TIFFSetErrorHandler", "TIFFSetWarningHandler"):
                fn = getattr(tiff, name)
                fn.restype = ctypes.c_void_p
                fn.argtypes = [ctypes.c_void_p]
                fn(None)
            done = True
    except (OSError, AttributeError):  # pragma: no cover - other GDAL builds
        return False
    _NATIVE_PRINTERS_QUIET = done
    return done


def decode_threads():
    """Let GDAL decode the blocks of one read on all cores, unless the user chose a number."""
    from rasterio.env import getenv, hasenv

    if os.environ.get("GDAL_NUM_THREADS") or (hasenv() and "GDAL_NUM_THREADS" in getenv()):
        return contextlib.nullcontext()
    return rasterio.Env(GDAL_NUM_THREADS="ALL_CPUS")


def error_detail(exc) -> str:
    """The most specific message in an error's chain of causes, on one line.

    rasterio reports a failed read or write as "Read failed. See previous exception
    for details."; the causes hold GDAL's own message (e.g. the bytes missing).
    """
    messages, seen = [], exc
    while seen is not None and len(messages) < 10:
        text = " ".join(str(getattr(seen, "strerror", None) or seen).split())
        if text:
            messages.append(text)
        seen = seen.__cause__ or seen.__context__
    useful = [m for m in messages if "see previous exception" not in m.lower()]
    return (useful or messages or [type(exc).__name__])[-1]
