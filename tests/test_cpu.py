"""despeck.cpu: the one owner of usable cores, native bfloat16 and the CPU's description."""

from __future__ import annotations

import os
import platform

import pytest

from despeck import cpu, inference
from despeck.training import trainer

# Excerpts in the layout of the Linux kernel's /proc/cpuinfo (x86: "flags", Arm64:
# "Features"; common practice).
X86_NATIVE = """processor\t: 0
vendor_id\t: AuthenticAMD
model name\t: Example x86 CPU
flags\t\t: fpu sse2 avx2 avx512f avx512bw avx512_bf16
"""
X86_EMULATED = """processor\t: 0
model name\t: Older x86 CPU
flags\t\t: fpu sse2 avx2 avx512f avx512bw
"""
ARM_NATIVE = """processor\t: 0
BogoMIPS\t: 243.75
Features\t: fp asimd evtstrm aes pmull sha1 sha2 crc32 atomics bf16 i8mm
CPU implementer\t: 0x41
"""


def test_usable_cores_is_the_affinity_set():
    # Python's os.sched_getaffinity (Linux) is the reference; elsewhere os.cpu_count.
    expected = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    assert cpu.usable_cores() == max(1, expected)


def test_every_caller_uses_the_one_owner():
    # The names training and inference export (and tests monkeypatch there) are cpu's own.
    assert trainer.bf16_supported is cpu.bf16_supported and inference.bf16_supported is cpu.bf16_supported
    assert trainer.usable_cores is cpu.usable_cores


def test_flags_and_model_from_cpuinfo_text():
    assert cpu.cpu_model(X86_NATIVE) == "Example x86 CPU"
    assert {"avx2", "avx512f", "avx512_bf16"} <= cpu.cpu_flags(X86_NATIVE)
    assert cpu.cpu_model(ARM_NATIVE) is None and "bf16" in cpu.cpu_flags(ARM_NATIVE)


def test_bf16_needs_native_instructions():
    # AVX512-BF16 / AMX-BF16 (Intel 64 and IA-32 Architectures Software Developer's Manual)
    # and Armv8.6 BF16 are native; AVX-512 without BF16 only emulates it.
    assert cpu.bf16_supported(cpu.cpu_flags(X86_NATIVE))
    assert cpu.bf16_supported(cpu.cpu_flags(ARM_NATIVE))
    assert not cpu.bf16_supported(cpu.cpu_flags(X86_EMULATED))
    assert not cpu.bf16_supported({"fpu", "amx_tile", "amx_int8"})


def test_description_agrees_with_torch_cpuinfo():
    # torch detects the CPU with its own library (pytorch/cpuinfo, CPUID); the kernel's
    # flags read here must tell the same story.
    torch_cpu = pytest.importorskip("torch").cpu
    if platform.machine().lower() not in ("x86_64", "amd64"):
        pytest.skip(f"torch's CPU feature checks compared here are x86 ones; this is {platform.machine()}")
    if not cpu.cpu_flags():
        pytest.skip("no /proc/cpuinfo flags on this system")
    checks = {name: getattr(torch_cpu, name, None) for name in
              ("_is_avx2_supported", "_is_avx512_bf16_supported", "_is_amx_tile_supported")}
    if any(fn is None for fn in checks.values()):
        pytest.skip(f"this torch ({torch_cpu.__name__}) lacks one of {sorted(checks)}")
    d = cpu.cpu_description()
    assert set(d["flags"]) == set(cpu.DESCRIBED_FLAGS)
    assert d["cores_available"] == cpu.usable_cores() and d["machine"] == platform.machine()
    assert d["flags"]["avx2"] == bool(checks["_is_avx2_supported"]())
    assert d["flags"]["avx512_bf16"] == bool(checks["_is_avx512_bf16_supported"]())
    assert d["flags"]["amx_tile"] == bool(checks["_is_amx_tile_supported"]())
    torch_native = bool(checks["_is_avx512_bf16_supported"]()) or (
        bool(checks["_is_amx_tile_supported"]()) and d["flags"]["amx_bf16"])
    assert d["bf16_native"] == cpu.bf16_supported() == torch_native
