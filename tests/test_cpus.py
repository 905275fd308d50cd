"""CPUs a process may use: affinity mask, then cgroup quota (v1 and v2), read from fake cgroup trees.

The file formats are the kernel's (Documentation/admin-guide/cgroup-v2.rst, ``cpu.max``:
"$MAX $PERIOD", "max" for no limit; cgroup v1 CFS bandwidth, ``cpu.cfs_quota_us`` = -1 for
no limit), from memory.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from service import cpus
from service.cpus import affinity_cpus, cgroup_cpu_limit, usable_cpus

ROOT = Path(__file__).resolve().parents[1]


def _tree(tmp_path: Path, self_cgroup: str, files: dict[str, str]) -> tuple[Path, Path]:
    root = tmp_path / "cgroup"
    for relative, text in files.items():
        path = root / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    proc = tmp_path / "proc_self_cgroup"
    proc.write_text(self_cgroup)
    return root, proc


@pytest.fixture
def four_cpus(monkeypatch):
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1, 2, 3}, raising=False)


def test_v2_quota_in_own_group(tmp_path, four_cpus):
    root, proc = _tree(tmp_path, "0::/lab/job\n", {"lab/job/cpu.max": "150000 100000\n"})
    assert cgroup_cpu_limit(root, proc) == pytest.approx(1.5)
    assert usable_cpus(root, proc) == 2  # 1.5 CPUs of time: two workers, never more than the mask


def test_v2_tighter_quota_above_wins(tmp_path, four_cpus):
    root, proc = _tree(tmp_path, "0::/lab/job\n", {
        "lab/job/cpu.max": "max 100000\n",
        "lab/cpu.max": "100000 100000\n",
    })
    assert cgroup_cpu_limit(root, proc) == pytest.approx(1.0)
    assert usable_cpus(root, proc) == 1


def test_v2_no_limit_leaves_the_affinity_mask(tmp_path, four_cpus):
    root, proc = _tree(tmp_path, "0::/lab\n", {"lab/cpu.max": "max 100000\n"})
    assert cgroup_cpu_limit(root, proc) is None
    assert usable_cpus(root, proc) == 4


def test_container_sees_its_group_as_the_mount_root(tmp_path, four_cpus):
    # Without a cgroup namespace /proc/self/cgroup names the host's path, which the
    # container cannot see; its own quota sits at the root of the mount.
    root, proc = _tree(tmp_path, "0::/kubepods/pod1/abc\n", {"cpu.max": "200000 100000\n"})
    assert usable_cpus(root, proc) == 2


def test_v1_quota_and_period(tmp_path, four_cpus):
    root, proc = _tree(tmp_path, "4:memory:/x\n2:cpu,cpuacct:/batch\n", {
        "cpu,cpuacct/batch/cpu.cfs_quota_us": "300000\n",
        "cpu,cpuacct/batch/cpu.cfs_period_us": "100000\n",
    })
    assert cgroup_cpu_limit(root, proc) == pytest.approx(3.0)
    assert usable_cpus(root, proc) == 3


def test_v1_unlimited_quota(tmp_path, four_cpus):
    root, proc = _tree(tmp_path, "1:cpu:/\n", {"cpu/cpu.cfs_quota_us": "-1\n", "cpu/cpu.cfs_period_us": "100000\n"})
    assert cgroup_cpu_limit(root, proc) is None
    assert usable_cpus(root, proc) == 4


def test_quota_larger_than_the_mask_does_not_add_cpus(tmp_path, monkeypatch):
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {5}, raising=False)
    root, proc = _tree(tmp_path, "0::/\n", {"cpu.max": "800000 100000\n"})
    assert usable_cpus(root, proc) == 1


@pytest.mark.parametrize("text", ["", "garbage\n", "100000 0\n", "-5 100000\n", "1 2 3\n"])
def test_unreadable_quota_is_no_limit(tmp_path, four_cpus, text):
    root, proc = _tree(tmp_path, "0::/\n", {"cpu.max": text})
    assert cgroup_cpu_limit(root, proc) is None
    assert usable_cpus(root, proc) == 4


def test_no_cgroup_files_at_all(tmp_path, four_cpus):
    assert usable_cpus(tmp_path / "absent", tmp_path / "absent_proc") == 4


def test_tiny_quota_still_gives_one_worker(tmp_path, four_cpus):
    root, proc = _tree(tmp_path, "0::/\n", {"cpu.max": "1000 100000\n"})
    assert usable_cpus(root, proc) == 1


@pytest.mark.skipif(not hasattr(os, "sched_setaffinity"), reason="needs CPU affinity (Linux)")
def test_real_affinity_mask_of_a_child_pinned_to_one_cpu():
    code = (
        "import os; os.sched_setaffinity(0, {min(os.sched_getaffinity(0))});"
        "from service.cpus import affinity_cpus, usable_cpus; print(affinity_cpus(), usable_cpus())"
    )
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["1", "1"]


def test_affinity_matches_the_kernel_mask():
    if hasattr(os, "sched_getaffinity"):
        assert affinity_cpus() == len(os.sched_getaffinity(0))
    assert 1 <= usable_cpus() <= affinity_cpus()


def test_pools_follow_the_usable_cpus(monkeypatch):
    """The batch, the web service and the library build all ask service.cpus."""
    from service import batch
    from service.analysis import AnalysisOptions
    from service.library import build
    from service.web.settings import Settings

    monkeypatch.setattr(cpus, "cgroup_cpu_limit", lambda *a, **k: None)
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {1}, raising=False)
    assert Settings(workers=None).worker_count == 1

    def no_pool(*args, **kwargs):
        raise AssertionError("a one-CPU batch must run in this process, not in a pool")

    monkeypatch.setattr(batch, "ProcessPoolExecutor", no_pool)
    monkeypatch.setattr(batch, "analyze_path", lambda path, options: {"path": path})
    assert [r["path"] for r in batch.analyze_many(["a", "b"], AnalysisOptions())] == ["a", "b"]

    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1, 2}, raising=False)
    assert Settings(workers=None).worker_count == 3
    assert build.usable_cpus is cpus.usable_cpus
