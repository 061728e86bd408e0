"""What this process may use of the CPU: usable cores, native bfloat16, the model and its flags.

The one owner of these questions: training and inference choose their thread counts
from :func:`usable_cores` and refuse or allow bfloat16 with :func:`bf16_supported`;
the benchmarks print :func:`cpu_description` beside their timings.

The CPU's feature flags come from the kernel (``/proc/cpuinfo``: the ``flags`` lines on
x86, ``Features`` on Arm; Linux kernel documentation, common practice). Where there is
no such file (not Linux), the flags are empty and :func:`bf16_supported` asks oneDNN
through torch instead; torch is imported only then.
"""

from __future__ import annotations

import functools
import os
import platform

__all__ = ["usable_cores", "cpu_flags", "cpu_model", "bf16_supported", "cpu_description", "DESCRIBED_FLAGS",
           "BF16_FLAGS", "PRECISIONS", "PRECISION_NAMES", "precision_of", "bf16_argument"]

#: Flags that say how fast small convolutions can run; :func:`cpu_description` reports each.
DESCRIBED_FLAGS = ("avx2", "avx512f", "avx512_bf16", "amx_tile", "amx_bf16", "amx_int8")

#: Number formats despeck runs networks in, named as Lightning names them: float32 and
#: bfloat16. Training's ``trainer.precision`` takes one; ``despeck apply --precision``
#: takes one or ``auto`` (:func:`despeck.inference.runner.resolve_bf16`).
PRECISIONS = ("32", "bf16")
#: The plain name of each precision, for reports.
PRECISION_NAMES = {"32": "float32", "bf16": "bfloat16"}


def precision_of(bf16: bool) -> str:
    """The precision (``"32"`` or ``"bf16"``) a resolved bfloat16 flag stands for."""
    return "bf16" if bf16 else "32"


def bf16_argument(precision: str):
    """A precision or ``"auto"`` as inference's ``bf16`` argument: None (automatic), False or True."""
    return None if precision == "auto" else precision == "bf16"

#: Flags of native bfloat16 arithmetic: AVX512-BF16 or AMX-BF16 on x86, BF16 (Armv8.6) on Arm.
BF16_FLAGS = frozenset({"avx512_bf16", "amx_bf16", "bf16"})


def usable_cores() -> int:
    """CPU cores this process may run on: its affinity set where the OS tells, else all CPUs (>= 1)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def _parse_cpuinfo(text: str) -> tuple[str | None, frozenset]:
    model, flags = None, set()
    for line in text.splitlines():
        key, sep, value = line.partition(":")
        if not sep:
            continue
        key = key.strip()
        if key == "model name" and model is None:
            model = value.strip() or None
        elif key in ("flags", "Features"):
            flags.update(value.split())
    return model, frozenset(flags)


@functools.lru_cache(maxsize=1)
def _kernel_cpuinfo() -> tuple[str | None, frozenset]:
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="ignore") as fh:
            return _parse_cpuinfo(fh.read())
    except OSError:
        return None, frozenset()


def cpu_flags(cpuinfo: str | None = None) -> frozenset:
    """Feature flags of the CPU as the kernel reports them (empty where it does not).

    Parameters
    ----------
    cpuinfo : str, optional
        Text in the format of ``/proc/cpuinfo``; by default that file is read (once per process).
    """
    return _parse_cpuinfo(cpuinfo)[1] if cpuinfo is not None else _kernel_cpuinfo()[1]


def cpu_model(cpuinfo: str | None = None) -> str | None:
    """The CPU's model name (``model name`` in ``/proc/cpuinfo``), or None where it is not reported."""
    return _parse_cpuinfo(cpuinfo)[0] if cpuinfo is not None else _kernel_cpuinfo()[0]


def bf16_supported(flags=None) -> bool:
    """Whether this CPU has native bfloat16 arithmetic (AVX512-BF16 or AMX-BF16 on x86, BF16 on Arm).

    Without native instructions bf16 is emulated and slower than float32, so training
    refuses ``precision: bf16`` and inference falls back to float32.

    Parameters
    ----------
    flags : set of str, optional
        CPU flags to decide from; by default :func:`cpu_flags`. When there are none (no
        ``/proc/cpuinfo``), oneDNN's own check through torch decides.
    """
    flags = cpu_flags() if flags is None else frozenset(flags)
    if flags:
        return bool(flags & BF16_FLAGS)
    try:
        import torch

        return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())
    except Exception:  # noqa: BLE001 - torch missing or its private check gone: assume emulation
        return False


def cpu_description() -> dict:
    """The CPU as benchmarks report it beside their timings.

    Returns
    -------
    dict with ``machine`` (architecture), ``model`` (model name or None), ``flags``
    (each of :data:`DESCRIBED_FLAGS` -> bool), ``bf16_native`` (:func:`bf16_supported`)
    and ``cores_available`` (:func:`usable_cores`).
    """
    flags = cpu_flags()
    return {
        "machine": platform.machine(),
        "model": cpu_model(),
        "flags": {f: f in flags for f in DESCRIBED_FLAGS},
        "bf16_native": bf16_supported(),
        "cores_available": usable_cores(),
    }
