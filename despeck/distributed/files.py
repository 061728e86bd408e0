"""Many scenes on a Dask cluster, one task per file.

**Many scenes** (:func:`apply_many`): one task per file on a ``dask.distributed``
cluster -- the address of a running scheduler, a :class:`distributed.Client`, or a
local cluster of single-threaded worker processes started for the call and bound to
``127.0.0.1``. Each task loads the model file itself and streams its scene with
:func:`despeck.inference.despeckle_file`, exactly as ``despeck apply`` does, so outputs
are the same files. Runs are idempotent and resumable: outputs that exist are skipped
(before submitting and again when a task claims its output, :mod:`despeck.atomic`), so
several clusters or ``apply`` runs may share a folder without writing an output twice.
A file that fails is reported with its one-line error; the other files go on.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import os
import pathlib
import threading
import time
import uuid
import warnings

import distributed

from ..errors import DespeckError, InputError

__all__ = ["FileResult", "apply_many", "open_client"]


@contextlib.contextmanager
def open_client(client=None, *, workers=None, threads_per_worker=1, processes=True):
    """A ``distributed.Client`` for ``client``: itself, a scheduler address, or a new local cluster.

    Parameters
    ----------
    client : distributed.Client, str or None
        A client (used as is, not closed), the address of a running scheduler
        (``tcp://host:8786``), or None / ``"local"`` for a local cluster bound to
        127.0.0.1 that is shut down on exit.
    workers : int, optional
        Workers of a local cluster; default the usable cores divided by
        ``threads_per_worker``.
    threads_per_worker : int
        Threads of each local worker (tasks running at once in it).
    processes : bool
        Local workers are processes (default) or threads of this process.

    Raises
    ------
    InputError
        The scheduler cannot be reached.
    """
    if isinstance(client, distributed.Client):
        yield client
        return
    if client is None or str(client).strip().lower() == "local":
        from ..cpu import usable_cores

        n = workers or max(1, usable_cores() // max(1, int(threads_per_worker)))
        with distributed.LocalCluster(n_workers=int(n), threads_per_worker=int(threads_per_worker),
                                      processes=processes, protocol="tcp", host="127.0.0.1", dashboard_address=None,
                                      silence_logs=logging.ERROR) as cluster, \
                distributed.Client(cluster) as new:
            yield new
        return
    try:
        new = distributed.Client(str(client), timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise InputError(f"dask scheduler {client}: cannot connect ({' '.join(str(exc).split())[:160]})") from None
    try:
        yield new
    finally:
        new.close()


@dataclasses.dataclass
class FileResult:
    """What happened to one input of :func:`apply_many`.

    ``status`` is ``written``, ``skipped`` (the output exists), ``busy`` (another
    process is writing it) or ``failed`` (``message`` says why, in one line);
    ``warnings`` are the task's warnings (one line each).
    """

    input: pathlib.Path
    output: pathlib.Path
    status: str
    seconds: float = 0.0
    message: str = ""
    warnings: list = dataclasses.field(default_factory=list)
    worker: str = ""


_models = threading.local()


def _task_model(path):
    """The model of ``path`` for this worker thread, loaded once per thread and file version."""
    from ..models import load_model_file

    st = os.stat(path)
    key = (os.path.realpath(path), st.st_mtime_ns, st.st_size)
    cache = getattr(_models, "cache", None)
    if cache is None or cache[0] != key:
        cache = _models.cache = (key, load_model_file(path))
    return cache[1]


def _one_line(exc) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


def _apply_one(src, dst, model_path, options) -> FileResult:
    """One task: despeckle ``src`` into ``dst`` (runs on a worker)."""
    from rasterio.errors import RasterioError

    from ..atomic import OutputBusyError
    from ..inference import despeckle_file

    src, dst = pathlib.Path(src), pathlib.Path(dst)
    overwrite = bool(options.get("overwrite"))
    worker = ""
    with contextlib.suppress(ValueError):
        worker = distributed.get_worker().address
    if dst.exists() and not overwrite:
        return FileResult(src, dst, "skipped", worker=worker)
    start = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            despeckle_file(src, dst, _task_model(model_path), progress=False, **options)
            status, message = "written", ""
        except OutputBusyError as exc:
            status, message = "busy", _one_line(exc)
        except (DespeckError, OSError, RasterioError) as exc:
            if dst.exists() and not overwrite:
                status, message = "skipped", "written meanwhile by another process"
            else:
                status = "failed"
                message = _one_line(exc) if isinstance(exc, DespeckError) else f"{src}: {_one_line(exc)}"
    notes = list(dict.fromkeys(" ".join(str(w.message).split()) for w in caught))
    return FileResult(src, dst, status, time.perf_counter() - start, message, notes, worker)


def apply_many(inputs, outputs, model_path, client=None, *, threads=1, overwrite=False, units=None,
               out_units=None, tile=None, overlap=None, bf16=None, looks=None, cog=False,
               on_result=None, orientations=1) -> list[FileResult]:
    """Despeckle many scenes on a Dask cluster, one task per file.

    Parameters
    ----------
    inputs, outputs : sequence of path-like
        Input rasters and their outputs, pairwise (e.g. from ``despeck apply``'s
        planning); outputs that exist are skipped unless ``overwrite``.
    model_path : path-like
        Model file (``.safetensors``); each worker loads it (once per thread).
    client : distributed.Client, str or None
        Where to run: a client, a scheduler address, or None / ``"local"`` for a local
        cluster of single-threaded worker processes, one per usable core divided by
        ``threads``, started for this call (see :func:`open_client`).
    threads : int
        Torch threads of each task (default 1: the cluster's workers are the parallelism).
    overwrite, units, out_units, tile, overlap, bf16, looks, cog, orientations
        As for :func:`despeck.inference.despeckle_file`; ``bf16`` None is resolved once,
        here, on this machine, so every file runs alike (a worker without native bf16
        warns and runs in float32).
    on_result : callable, optional
        Called with each :class:`FileResult` as it arrives (in completion order).

    Returns
    -------
    list of FileResult
        In the order of ``inputs``. A task that could not run at all (a worker lost
        repeatedly) is reported as failed too; nothing is raised for one file.

    Raises
    ------
    InputError
        ``inputs`` and ``outputs`` differ in length, the model file is missing, or the
        scheduler cannot be reached.
    """
    inputs = [pathlib.Path(p) for p in inputs]
    outputs = [pathlib.Path(p) for p in outputs]
    if len(inputs) != len(outputs):
        raise InputError(f"apply_many: {len(inputs)} inputs but {len(outputs)} outputs")
    model_path = pathlib.Path(model_path).expanduser().resolve()
    if not model_path.is_file():
        raise InputError(f"model file {model_path} does not exist")
    if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
        raise InputError(f"threads must be a whole number >= 1, got {threads!r}")
    from ..inference import check_orientations

    orientations = check_orientations(orientations)
    if bf16 is None:
        from ..inference import resolve_bf16
        from ..models import load_model_file

        bf16 = resolve_bf16(load_model_file(model_path), None)
    options = dict(overwrite=overwrite, units=units, out_units=out_units, tile=tile, overlap=overlap,
                   threads=threads, bf16=bf16, looks=looks, cog=cog, orientations=orientations)
    results = [None] * len(inputs)

    def report(i, result):
        results[i] = result
        if on_result is not None:
            on_result(result)

    todo = []
    for i, (src, dst) in enumerate(zip(inputs, outputs)):
        if dst.exists() and not overwrite:
            report(i, FileResult(src, dst, "skipped"))
        else:
            todo.append(i)
    if not todo:
        return results
    run = uuid.uuid4().hex[:8]
    from ..cpu import usable_cores

    # A local cluster gets one single-threaded worker per ``threads`` usable cores, so
    # tasks of ``threads`` torch threads each never oversubscribe the machine.
    with open_client(client, workers=max(1, usable_cores() // threads), threads_per_worker=1) as c:
        futures = {}
        for i in todo:
            f = c.submit(_apply_one, str(inputs[i]), str(outputs[i]), str(model_path), options,
                         key=f"despeck-apply-{run}-{i}", pure=False, retries=0)
            futures[f] = i
        for f in distributed.as_completed(list(futures)):
            i = futures[f]
            try:
                result = f.result()
            except Exception as exc:  # noqa: BLE001 - a lost worker or a bug: that file fails, the rest go on
                result = FileResult(inputs[i], outputs[i], "failed",
                                    message=f"{inputs[i]}: the task failed ({type(exc).__name__}: {_one_line(exc)})")
            report(i, result)
    return results
