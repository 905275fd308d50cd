"""How many CPUs this process may really use: the one rule every worker pool is sized by.

``os.cpu_count()`` counts the machine's CPUs. A process started under ``taskset`` or in a
container may use fewer: the scheduler's affinity mask names the CPUs it may run on, and a
cgroup CPU quota (``docker --cpus``, Kubernetes limits, systemd ``CPUQuota``) caps the CPU
time it gets per period. A pool sized beyond that runs its workers in turn on the same
cores, and each image waits for the others.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

#: Where the cgroup hierarchies are mounted, and where the kernel says which group we are in.
CGROUP_ROOT = Path("/sys/fs/cgroup")
SELF_CGROUP = Path("/proc/self/cgroup")


def affinity_cpus() -> int:
    """CPUs in this process's affinity mask (``os.cpu_count()`` where there is no mask)."""
    if hasattr(os, "sched_getaffinity"):
        try:
            return max(1, len(os.sched_getaffinity(0)))
        except OSError:
            pass
    return max(1, os.cpu_count() or 1)


def cgroup_cpu_limit(root: Path = CGROUP_ROOT, self_cgroup: Path = SELF_CGROUP) -> float | None:
    """CPUs' worth of time the cgroup quota grants this process, or None when unlimited.

    Reads cgroup v2 ``cpu.max`` ("QUOTA PERIOD" or "max PERIOD") and cgroup v1
    ``cpu.cfs_quota_us`` / ``cpu.cfs_period_us`` (quota -1: unlimited), in the process's
    own group and in every group above it, since each level's quota applies; the tightest
    one wins. A group folder that is not visible (a container sees its own group as the
    root of the mount) is skipped, so the levels that are visible still count.

    Parameters
    ----------
    root : Path
        Mount point of the cgroup file systems (``/sys/fs/cgroup``).
    self_cgroup : Path
        The ``/proc/self/cgroup`` file naming the process's groups.
    """
    limits = [
        quota / period
        for folder in _candidate_folders(root, self_cgroup)
        if (pair := _quota_and_period(folder)) is not None
        for quota, period in [pair]
    ]
    return min(limits) if limits else None


def usable_cpus(root: Path = CGROUP_ROOT, self_cgroup: Path = SELF_CGROUP) -> int:
    """CPUs this process may use: its affinity mask, capped by the cgroup CPU quota; at least 1.

    A fractional quota is rounded up (1.5 CPUs' worth of time keeps two workers busy
    most of the time, and one would leave half a CPU idle).
    """
    cpus = affinity_cpus()
    limit = cgroup_cpu_limit(root, self_cgroup)
    if limit is not None:
        cpus = min(cpus, math.ceil(limit))
    return max(1, cpus)


def _candidate_folders(root: Path, self_cgroup: Path) -> list[Path]:
    """Folders that may hold a CPU quota for this process, its own group first, then ancestors."""
    try:
        lines = self_cgroup.read_text(encoding="utf-8").splitlines()
    except OSError:
        lines = []
    bases: list[tuple[list[Path], str]] = []
    for line in lines:
        parts = line.split(":", 2)
        if len(parts) != 3:
            continue
        _, controllers, group = parts
        if controllers == "":  # cgroup v2: one unified hierarchy, mounted at root (or root/unified)
            bases.append(([root, root / "unified"], group))
        elif "cpu" in controllers.split(","):  # cgroup v1: the cpu controller's own hierarchy
            mounts = [root / "cpu", root / "cpu,cpuacct", root / "cpuacct,cpu", root / controllers]
            bases.append((list(dict.fromkeys(mounts)), group))
    if not bases:  # no /proc/self/cgroup: look at the mount roots only
        bases = [([root, root / "unified", root / "cpu", root / "cpu,cpuacct"], "/")]
    folders: list[Path] = []
    for mounts, group in bases:
        parts = [p for p in group.strip().split("/") if p and p not in (".", "..")]
        for mount in mounts:
            for depth in range(len(parts), -1, -1):
                folder = mount.joinpath(*parts[:depth])
                if folder not in folders:
                    folders.append(folder)
    return folders


def _quota_and_period(folder: Path) -> tuple[float, float] | None:
    """The (quota, period) pair stored in ``folder``, or None if absent or unlimited."""
    try:
        fields = (folder / "cpu.max").read_text(encoding="ascii").split()
    except (OSError, UnicodeDecodeError):
        fields = None
    if fields is not None:
        if len(fields) == 2 and fields[0] != "max":
            return _positive_pair(fields[0], fields[1])
        return None
    try:
        quota = (folder / "cpu.cfs_quota_us").read_text(encoding="ascii").strip()
        period = (folder / "cpu.cfs_period_us").read_text(encoding="ascii").strip()
    except (OSError, UnicodeDecodeError):
        return None
    return _positive_pair(quota, period)


def _positive_pair(quota: str, period: str) -> tuple[float, float] | None:
    try:
        q, p = float(quota), float(period)
    except ValueError:
        return None
    # v1 writes -1 for "no quota"; a zero or negative period is not a limit we can read.
    return (q, p) if q > 0 and p > 0 else None
