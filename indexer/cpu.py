"""What the CPU offers the encoder: native bf16 flags and the usable cores (no torch import)."""

from __future__ import annotations

import os
from pathlib import Path

# CPU flags (Linux /proc/cpuinfo names) of native bf16 arithmetic: AVX512-BF16 dot products
# and AMX tiles (Intel Architecture Instruction Set Extensions Programming Reference).
# Without them torch still runs bf16, but emulated, slower than fp32.
BF16_FLAGS: frozenset[str] = frozenset({"avx512_bf16", "amx_bf16"})


def cpu_flags(cpuinfo: str | None = None) -> frozenset[str]:
    """Feature flags of the CPU from ``/proc/cpuinfo`` (or the text given); empty elsewhere."""
    if cpuinfo is None:
        try:
            cpuinfo = Path("/proc/cpuinfo").read_text("utf-8", "replace")
        except OSError:  # not Linux: no flags, so auto stays on fp32
            return frozenset()
    for line in cpuinfo.splitlines():
        key, _, value = line.partition(":")
        if key.strip() in ("flags", "Features"):  # x86, arm64
            return frozenset(value.split())
    return frozenset()


def usable_cores() -> int:
    """Cores this process may run on (its affinity mask, which containers and taskset narrow)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)
