"""How many cores this process may use: the CPUs it may run on, capped by a container's CPU
quota.

A container started with a CPU limit (`docker run --cpus 2`, a Kubernetes CPU limit) still sees
every CPU of its host in its affinity mask, but the kernel lets it use only the quota's worth of
CPU time per period; more threads than that are throttled together. cgroup v2 states the quota
in `cpu.max` ("max 100000" for none, "200000 100000" for two cores), cgroup v1 in
`cpu.cfs_quota_us` (-1 for none) and `cpu.cfs_period_us` (the Linux kernel's CFS bandwidth
control documentation).
"""

from __future__ import annotations

import math
import os
from pathlib import Path

CGROUP_V2_CPU_MAX = Path("/sys/fs/cgroup/cpu.max")
CGROUP_V1_QUOTA = Path("/sys/fs/cgroup/cpu/cpu.cfs_quota_us")
CGROUP_V1_PERIOD = Path("/sys/fs/cgroup/cpu/cpu.cfs_period_us")


def quota_cores(quota: str, period: str) -> float | None:
    """Cores a CFS quota allows (quota / period), None for no quota ("max" or -1) or text that
    is not a quota."""
    try:
        if quota.strip() == "max" or int(quota) < 0:
            return None
        allowed = int(quota) / int(period)
    except (ValueError, ZeroDivisionError):
        return None
    return allowed if allowed > 0 else None


def _read(path: Path) -> str | None:
    try:
        return path.read_text()
    except OSError:
        return None


def container_quota() -> float | None:
    """Cores this process's cgroup may use, or None when no quota is set or none can be read."""
    v2 = _read(CGROUP_V2_CPU_MAX)
    if v2 is not None:
        parts = v2.split()
        return quota_cores(parts[0], parts[1]) if len(parts) == 2 else None
    quota, period = _read(CGROUP_V1_QUOTA), _read(CGROUP_V1_PERIOD)
    if quota is None or period is None:
        return None
    return quota_cores(quota, period)


def usable_cores(cpus: int | None = None, quota: float | None = None) -> int:
    """The CPUs this process may run on (`cpus`, default: its affinity mask), capped by a
    container's quota rounded up (`quota`, default: read from the cgroup); at least one."""
    if cpus is None:
        cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None
        cpus = cpus or os.cpu_count() or 1
    if quota is None:
        quota = container_quota()
    if quota is not None:
        cpus = min(cpus, math.ceil(quota))
    return max(1, cpus)
