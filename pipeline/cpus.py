"""The CPUs this process may use: what ``workers: auto`` starts (no dependency, read by the
config and the benchmark)."""
from __future__ import annotations

import os


def usable_cpus(cgroup_root: str = "/sys/fs/cgroup") -> int:
    """CPUs this process may use: the CPUs it may run on (its affinity mask, which taskset,
    cpusets and batch schedulers narrow), further capped by a CPU quota of its cgroup (a
    container started with ``--cpus 2`` on a 64-core host). ``os.cpu_count()`` reports the
    host's CPUs, which would start one worker per host CPU there."""
    if hasattr(os, "process_cpu_count"):  # Python 3.13+: the affinity mask
        n = os.process_cpu_count() or 1
    elif hasattr(os, "sched_getaffinity"):
        n = len(os.sched_getaffinity(0)) or 1
    else:  # pragma: no cover - macOS, Windows
        n = os.cpu_count() or 1
    quota = cgroup_cpu_quota(cgroup_root)
    return max(1, min(n, quota) if quota else n)


def cgroup_cpu_quota(root: str = "/sys/fs/cgroup") -> int | None:
    """Whole CPUs granted by this process's cgroup CPU quota (rounded up), or None without one.

    cgroup v2: ``cpu.max`` holds ``"<quota> <period>"`` or ``"max <period>"`` (kernel
    documentation, Documentation/admin-guide/cgroup-v2.rst); v1: ``cpu.cfs_quota_us`` (-1: none)
    over ``cpu.cfs_period_us`` (Documentation/scheduler/sched-bwc.rst)."""
    def read(*parts: str) -> str | None:
        try:
            with open(os.path.join(root, *parts), encoding="ascii") as fh:
                return fh.read().strip()
        except (OSError, UnicodeDecodeError):
            return None
    try:
        v2 = read("cpu.max")
        if v2 is not None:
            quota, period = (v2.split() + ["100000"])[:2]
            return None if quota == "max" else max(1, -(-int(quota) // int(period)))
        quota_us, period_us = read("cpu", "cpu.cfs_quota_us"), read("cpu", "cpu.cfs_period_us")
        if quota_us is None or period_us is None or int(quota_us) <= 0:
            return None
        return max(1, -(-int(quota_us) // int(period_us)))
    except (ValueError, ZeroDivisionError):  # a file of another shape: no quota is assumed
        return None
