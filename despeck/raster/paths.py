"""Output-path policy: what may be written where, and one-line errors for failed writes.

Never overwrite an input, an existing file only when asked, never a directory; the
output folder must take a new file and have free space. A folder that cannot take
any file is an :class:`OutputFolderError`, so a batch stops at the first one.
"""

from __future__ import annotations

import os
import pathlib

from ..atomic import folder_is_full, sibling_temp, write_problem
from ..errors import InputError, RasterError
from .gdal_env import error_detail

__all__ = ["OutputFolderError", "check_output_path", "write_error"]


class OutputFolderError(RasterError):
    """The output folder cannot take any file: read-only, no permission, or its disk is full.

    Unlike other write errors, the next output into the same folder would fail too, so
    a batch stops at the first one.
    """


# An output folder with less free space than this cannot take any raster (a few blocks).
_MIN_FREE_BYTES = 1 << 16

# Kinds of write_problem() that no other output into the same folder can escape.
_FOLDER_KINDS = ("read-only", "permission", "full")


def write_error(path, exc=None, partial=None, what="cannot write the output") -> RasterError:
    """A one-line error for a failed write, naming the folder when it is the cause."""
    path = pathlib.Path(path)
    folder = path.parent
    problem = write_problem(folder, exc, partial=partial)
    if problem is not None and problem.kind in _FOLDER_KINDS:
        return OutputFolderError(f"{path}: cannot write in the output folder {folder}: {problem.text}; "
                                 "nothing was written")
    reason = problem.text if problem is not None else error_detail(exc) if exc is not None else "unknown error"
    return RasterError(f"{path}: {what}: {reason}; nothing was written at the destination")


def _same_file(a: pathlib.Path, b: pathlib.Path) -> bool:
    try:
        if a.exists() and b.exists():
            return os.path.samefile(a, b)
    except OSError:
        pass
    return a.resolve() == b.resolve()


def check_output_path(output, inputs, *, overwrite=False, create_dir=True) -> pathlib.Path:
    """Check that ``output`` may be written and return it as a :class:`pathlib.Path`.

    Refuses an output that is one of ``inputs`` (never overwrite an input, even with
    ``overwrite``), an existing file unless ``overwrite``, and an existing directory.
    A missing parent directory is created when ``create_dir`` (else refused). The
    folder must take a new file (a short-lived probe file is created and removed) and
    have free space, else :class:`OutputFolderError` names the folder.
    """
    if output is None or str(output) == "":
        raise InputError("output path is empty")
    out = pathlib.Path(output).expanduser()
    if isinstance(inputs, (str, os.PathLike)):
        inputs = [inputs]
    for item in inputs or ():
        if item is None:
            continue
        if _same_file(out, pathlib.Path(item).expanduser()):
            raise InputError(f"{out}: output path is the same as the input {item}; choose another output")
    if out.is_dir():
        raise InputError(f"{out}: output path is a directory; give a file name")
    if out.exists() and not overwrite:
        raise InputError(f"{out}: output already exists; choose another path or allow overwriting")
    parent = out.parent
    if not parent.exists():
        if not create_dir:
            raise RasterError(f"{out}: output directory {parent} does not exist")
        try:
            parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputFolderError(f"{out}: cannot create output directory {parent}: {exc.strerror or exc}") from None
    elif not parent.is_dir():
        raise RasterError(f"{out}: {parent} is not a directory")
    try:
        sibling_temp(out).unlink()
    except OSError as exc:
        raise write_error(out, exc) from None
    if folder_is_full(parent, _MIN_FREE_BYTES):
        raise write_error(out)
    return out
