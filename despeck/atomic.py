"""Write-then-rename helpers, so a crash never leaves a half-written file at a destination.

Every output of the package (rasters, model files, reports, configs) is first written to
a hidden temporary file in the destination folder (same file system, so the rename is
atomic) and renamed into place only when complete. ``tempfile.mkstemp`` creates files
readable by their owner only; :func:`publish` gives them the permissions an ordinary
new file would have (``0o666`` less the umask) before the rename.
"""

from __future__ import annotations

import os
import pathlib
import tempfile

__all__ = ["sibling_temp", "publish"]


def sibling_temp(path) -> pathlib.Path:
    """Create an empty hidden temporary file beside ``path`` and return its path."""
    path = pathlib.Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    return pathlib.Path(tmp)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def publish(tmp, path) -> pathlib.Path:
    """Give ``tmp`` ordinary new-file (or folder) permissions and rename it to ``path`` (atomically)."""
    os.chmod(tmp, (0o777 if os.path.isdir(tmp) else 0o666) & ~_umask())
    os.replace(tmp, path)
    return pathlib.Path(path)
