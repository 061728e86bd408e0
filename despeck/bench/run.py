"""Running a benchmark: every method on every scene, each output measured; then the report.

:func:`run_benchmark` checks everything that can be wrong (methods, model files, scenes,
the report folder) before computing or writing anything.
"""

from __future__ import annotations

import os
import pathlib
import time

import numpy as np

from .. import filters, metrics
from ..cpu import precision_of
from ..errors import DespeckError, InputError
from .figures import crop_box, write_figures
from .report import CAUTIONS, check_out_dir, conventions, staged_report, write_results
from .scenes import LoadedScene, load_scene, named_error
from .spec import DEFAULT_METHODS, BenchScene, Method, load_scene_list, parse_method

__all__ = ["run_benchmark"]

_INPUT_LABEL = "input (unfiltered)"


def _run_method(method: Method, scene: LoadedScene, models, workers):
    if method.kind == "filter":
        f = filters.get_filter(method.name)
        looks = method.looks if method.looks is not None else scene.looks
        start = time.perf_counter()
        out = f(scene.intensity, looks=looks, window=method.window, mask=scene.valid, workers=workers, **method.options)
        return out, time.perf_counter() - start
    from ..inference import despeckle_array

    model = models[method.path]
    start = time.perf_counter()
    out = despeckle_array(scene.intensity, model, valid=scene.valid, progress=False, **method.options)
    return np.asarray(out, dtype=np.float32), time.perf_counter() - start



def _measure(scene: LoadedScene, out, seconds, label, kind, regions):
    """Every metric of one method's output on one scene (a dict of plain floats).

    ``regions``: the reference's regions (:func:`despeck.metrics.reference_regions`),
    computed once per scene by the caller; None when the scene has no reference.
    """
    I, ok = scene.intensity, scene.valid & np.isfinite(out) & (out > 0)
    row = {"scene": scene.name, "method": label, "kind": kind, "looks": scene.looks}
    if scene.area_masks:
        row["enl"] = float(np.median(metrics.enl(out, scene.area_masks, ok)))
        per, overall = metrics.radiometric_bias_db(I, out, scene.area_masks, ok)
        row["bias_db"] = overall
        row["bias_db_per_area"] = [float(v) for v in per]
        if kind != "input":
            rs = metrics.ratio_statistics(I, out, scene.area_masks, scene.looks, ok)
            row["ratio_mean"] = rs["mean"]
            row["ratio_enl_over_looks"] = rs["enl_over_looks"]
            m = metrics.unassisted_m(I, out, scene.area_masks, ok)
            row["m"], row["r_enl_mu"], row["delta_h"] = m["M"], m["r_enl_mu"], m["delta_h"]
    ref = scene.reference if scene.reference is not None else I
    row["edge_reference"] = "clean reference" if scene.reference is not None else "noisy input"
    row["epd_h"], row["epd_v"] = metrics.epd_roa(ref, out, ok)
    row["edge_corr"] = metrics.edge_correlation(ref, out, ok)
    if scene.reference is not None:
        fd = metrics.fidelity(scene.reference, out, ok)
        row.update({k: fd[k] for k in ("psnr_db", "ssim_db", "psnr_amplitude", "ssim_amplitude", "mae_db")})
        row["db_range"] = list(fd["db_range"])
        row["amplitude_peak"] = fd["amplitude_peak"]
        for name, value in metrics.psnr_by_region(scene.reference, out, regions, ok, db_range=fd["db_range"]).items():
            row[f"psnr_db_{name}"] = value
    if scene.points:
        ret = metrics.point_retention_db(I, out, scene.points)
        row["point_retention_db"] = float(np.median(ret))
        row["point_worst_db"] = float(np.min(ret))
    if seconds is not None:
        row["seconds"] = float(seconds)
        row["mp_per_s"] = metrics.throughput_mps(I.size, seconds)
    return row


def run_benchmark(scenes, methods=None, out_dir="bench_report", *, crop=None, overwrite=False, progress=True,
                  workers=None, title="Speckle filter benchmark"):
    """Run every method on every scene and write the report folder.

    Parameters
    ----------
    scenes : path, BenchScene, or list of BenchScene / paths
        A scene list file (YAML/JSON; its ``methods`` and ``crop`` are used when the
        arguments are not given), or scenes.
    methods : list of str, dict or Method, optional
        Method specifications (default: the list file's, else every classical filter).
    out_dir : path
        Report folder; written to a temporary folder beside it and renamed when
        complete. An existing folder is refused unless ``overwrite``.
    crop : (row, col, size), optional
        Crop of the figures (default a centred crop of ``CROP_SIZE``).
    progress : bool
        Show a progress bar.
    workers : int, optional
        Threads for the classical filters.

    Returns
    -------
    dict
        What ``results.json`` holds: ``scenes``, ``results`` (one row per scene and
        method, the first of each scene being the unfiltered input), ``conventions``
        and ``report`` (the path of report.md).
    """
    from tqdm.auto import tqdm

    list_methods, list_crop, inputs = [], None, []
    if isinstance(scenes, (str, os.PathLike)) and pathlib.Path(scenes).suffix.lower() in (".yaml", ".yml", ".json"):
        inputs.append(pathlib.Path(scenes))
        scenes, list_methods, list_crop = load_scene_list(scenes)
    elif isinstance(scenes, (BenchScene, str, os.PathLike)):
        scenes = [scenes]
    scenes = [s if isinstance(s, BenchScene) else BenchScene(image=pathlib.Path(s)) for s in scenes]
    if not scenes:
        raise InputError("no scenes to benchmark")
    if methods is None or len(methods) == 0:
        methods = list_methods or list(DEFAULT_METHODS)
    methods = [m if isinstance(m, Method) else parse_method(m) for m in methods]
    labels = [m.label for m in methods]
    if len(set(labels)) != len(labels):
        dup = next(l for l in labels if labels.count(l) > 1)
        raise InputError(f"method {dup!r} is listed twice")
    crop = crop if crop is not None else list_crop
    out_dir = pathlib.Path(out_dir)
    inputs += [pathlib.Path(p) for s in scenes for p in (s.image, s.reference, s.areas) if isinstance(p, (str, os.PathLike))]
    inputs += [m.path for m in methods if m.kind == "model"]
    check_out_dir(out_dir, inputs, overwrite)

    # Check everything that can be wrong before computing or writing anything.
    models = {}
    for m in methods:
        if m.kind == "model" and m.path not in models:
            from ..models import load_model_file

            models[m.path] = load_model_file(m.path)
    loaded = [load_scene(s, i) for i, s in enumerate(scenes)]
    names = [s.name for s in loaded]
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        both = " and ".join(s.where for s in loaded if s.name == dup)
        raise InputError(f"{both} are both called {dup!r}; give the scenes distinct names")
    crops = [crop_box(s.intensity.shape, crop, s.where) for s in loaded]

    with staged_report(out_dir, inputs, overwrite) as tmp:
        rows, scene_info = [], []
        bar = tqdm(total=len(loaded) * len(methods), desc="bench", unit="run", disable=not progress)
        for si, (scene, box) in enumerate(zip(loaded, crops)):
            outputs = {}
            regions = (metrics.reference_regions(scene.reference, scene.area_masks or None, scene.valid)
                       if scene.reference is not None else None)
            rows.append(_measure(scene, scene.intensity, None, _INPUT_LABEL, "input", regions))
            for m in methods:
                bar.set_postfix_str(f"{scene.name}: {m.label}")
                try:
                    out, seconds = _run_method(m, scene, models, workers)
                    outputs[m.label] = out
                    rows.append(_measure(scene, out, seconds, m.label, m.kind, regions))
                except DespeckError as exc:
                    raise named_error(exc, f"{scene.where}: method {m.label!r}") from None
                bar.update(1)
            figures = write_figures(tmp, si, scene, outputs, box, [r for r in rows if r["scene"] == scene.name])
            scene_info.append({
                "name": scene.name, "source": scene.source, "shape": list(scene.intensity.shape),
                "looks": scene.looks, "looks_source": scene.looks_source,
                "areas": len(scene.area_masks), "areas_source": scene.areas_source,
                "area_boxes": [list(a) for a in scene.areas],
                "points": len(scene.points), "points_source": scene.points_source,
                "reference": scene.reference is not None, "crop": list(box), "figures": figures,
            })
        bar.close()
        result = {"title": title, "scenes": scene_info, "results": rows, "conventions": conventions(),
                  "methods": [_method_info(m, models) for m in methods], "cautions": CAUTIONS}
        write_results(tmp, result)
    result["report"] = str(out_dir / "report.md")
    return result


def _method_info(m: Method, models):
    if m.kind == "model":
        from ..inference import resolve_bf16

        # despeckle_array's automatic choice, as _run_method ran it
        precision = precision_of(resolve_bf16(models[m.path], None))
        return {"label": m.label, "kind": "model", "path": str(m.path), "precision": precision,
                "orientations": int(m.options.get("orientations", 1))}
    return {"label": m.label, "kind": "filter", "name": m.name, "window": m.window, "looks": m.looks,
            "options": m.options}
