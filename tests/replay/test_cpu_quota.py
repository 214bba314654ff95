"""The default of ``replay --jobs``: the cores this process may run on, and no more than a
container's CPU quota allows (rounded up, at least 1).

The quota is read from real files written here in the two layouts of the kernel's control
groups.  The formats, from the Linux kernel's documentation (written from memory):
cgroup v2 (Documentation/admin-guide/cgroup-v2.rst, "cpu.max"): one line "$MAX $PERIOD",
microseconds, "max" for no limit, "max 100000" by default; cgroup v1 CFS bandwidth
(Documentation/scheduler/sched-bwc.rst): cpu.cfs_quota_us, -1 for no limit, and
cpu.cfs_period_us.  The effective limit of a cgroup is the tightest of its own and its
ancestors' (common practice; the kernel throttles at each level).  /proc/self/cgroup
lines are "hierarchy-ID:controller-list:path" (cgroups(7)), "0::path" for v2.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import pytest

from shiftwatch.replay import cgroup_cpu_limit, default_jobs, own_cgroup_paths


def _write(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)


@pytest.mark.parametrize(("text", "cpus"), [
    ("max 100000\n", None),          # no limit (the default)
    ("150000 100000\n", 1.5),        # a container run with --cpus 1.5
    ("100000 100000\n", 1.0),
    ("50000 100000\n", 0.5),
    ("400000 100000", 4.0),          # no line end
    ("max\n", None),                 # no period: no limit all the same
    ("garbage\n", None),
    ("1.5 cpus\n", None),
    ("0 100000\n", None),            # not a quota the kernel takes
    ("150000 0\n", None),
    ("", None),
])
def test_cgroup_v2_cpu_max(tmp_path: Path, text: str, cpus: float | None) -> None:
    _write(tmp_path / "cpu.max", text)
    assert cgroup_cpu_limit(tmp_path) == cpus


@pytest.mark.parametrize(("quota", "period", "cpus"), [
    ("-1\n", "100000\n", None),      # no limit (the default)
    ("150000\n", "100000\n", 1.5),
    ("250000\n", "100000\n", 2.5),
    ("50000\n", None, None),         # no period file
    (None, "100000\n", None),        # no quota file
    ("lots\n", "100000\n", None),
    ("150000\n", "0\n", None),
])
@pytest.mark.parametrize("controller", ["cpu", "cpu,cpuacct"])
def test_cgroup_v1_cfs_quota(tmp_path: Path, controller: str, quota: str | None, period: str | None,
                             cpus: float | None) -> None:
    if quota is not None:
        _write(tmp_path / controller / "cpu.cfs_quota_us", quota)
    if period is not None:
        _write(tmp_path / controller / "cpu.cfs_period_us", period)
    assert cgroup_cpu_limit(tmp_path) == cpus


def test_no_files_at_all_is_no_limit(tmp_path: Path) -> None:
    assert cgroup_cpu_limit(tmp_path) is None
    assert cgroup_cpu_limit(tmp_path / "missing") is None


def test_the_tightest_limit_on_the_way_up_counts(tmp_path: Path) -> None:
    # a v2 slice of 3 CPUs holding a service of 1.5: 1.5; the other way round: 1.5 too
    _write(tmp_path / "cpu.max", "max 100000\n")
    _write(tmp_path / "line4.slice" / "cpu.max", "300000 100000\n")
    _write(tmp_path / "line4.slice" / "replay.service" / "cpu.max", "150000 100000\n")
    assert cgroup_cpu_limit(tmp_path, "/line4.slice/replay.service") == 1.5
    _write(tmp_path / "line4.slice" / "cpu.max", "150000 100000\n")
    _write(tmp_path / "line4.slice" / "replay.service" / "cpu.max", "max 100000\n")
    assert cgroup_cpu_limit(tmp_path, "/line4.slice/replay.service") == 1.5
    # a path that is not there under the root (a container's view of its host's path): the root's own
    assert cgroup_cpu_limit(tmp_path, "/docker/4f2a") is None


def test_a_hybrid_hierarchy_v2_under_unified_and_v1_cpu(tmp_path: Path) -> None:
    # systemd's hybrid layout: the v2 tree at /sys/fs/cgroup/unified, cpu in v1
    _write(tmp_path / "unified" / "cpu.max", "200000 100000\n")
    _write(tmp_path / "cpu" / "batch" / "cpu.cfs_quota_us", "120000\n")
    _write(tmp_path / "cpu" / "batch" / "cpu.cfs_period_us", "100000\n")
    assert cgroup_cpu_limit(tmp_path, "/", "/batch") == 1.2
    assert cgroup_cpu_limit(tmp_path, "/", "/") == 2.0


def test_own_cgroup_paths_from_proc_self_cgroup() -> None:
    v1 = "9:name=systemd:/\n4:memory:/box\n2:cpuacct,cpu:/line4/replay\n1:cpuset:/\n"
    assert own_cgroup_paths(v1) == ("/", "/line4/replay")
    assert own_cgroup_paths("0::/line4.slice/replay.service\n") == ("/line4.slice/replay.service", "/")
    assert own_cgroup_paths(v1 + "0::/user.slice\n") == ("/user.slice", "/line4/replay")
    assert own_cgroup_paths("") == ("/", "/")
    assert own_cgroup_paths("garbage\n") == ("/", "/")


@pytest.mark.parametrize(("text", "quota"), [("150000 100000\n", 1.5), ("50000 100000\n", 0.5),
                                             ("100000000 100000\n", 1000.0), ("max 100000\n", None)])
def test_the_default_jobs_is_the_smaller_of_affinity_and_quota(tmp_path: Path, text: str,
                                                               quota: float | None) -> None:
    _write(tmp_path / "fs" / "line4.slice" / "cpu.max", text)
    _write(tmp_path / "cgroup", "0::/line4.slice\n")
    cores = len(os.sched_getaffinity(0))
    want = cores if quota is None else min(cores, max(1, math.ceil(quota)))
    assert default_jobs(tmp_path / "fs", tmp_path / "cgroup") == want
    # no such files: the cores
    assert default_jobs(tmp_path / "none", tmp_path / "none") == cores
