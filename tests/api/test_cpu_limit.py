"""The light lane's default size follows the CPUs the process may use: affinity and CPU quota.

A container given 2 CPUs by a quota (``docker run --cpus 2``, compose's ``cpus``, a Kubernetes
CPU limit) still sees every core of its host in its affinity mask, so one light-lane solver per
core meant tens of processes per worker on a large host, each holding its share of the memory
limit, for the CPU of two.  The quota is read from the control group files the kernel documents
(``admin-guide/cgroup-v2``, "cpu.max": "$MAX $PERIOD", "max" for none; cgroup v1
``cpu.cfs_quota_us`` and ``cpu.cfs_period_us``, -1 for none), here laid out in a folder of the
test's own.
"""

from __future__ import annotations

import os

import pytest

from service.api import compute
from service.api.compute import cgroup_cpu_limit, default_solver_processes


def _v2(tmp_path, levels: dict[str, str], own: str) -> tuple:
    for path, text in levels.items():
        folder = tmp_path / "fs" / path.strip("/")
        folder.mkdir(parents=True, exist_ok=True)
        (folder / "cpu.max").write_text(text + "\n")
    proc = tmp_path / "cgroup"
    proc.write_text(f"0::{own}\n")
    return tmp_path / "fs", proc


@pytest.mark.parametrize(
    ("levels", "own", "cpus"),
    [
        ({"/": "max 100000"}, "/", None),
        ({"/": "200000 100000"}, "/", 2.0),  # a container's own namespace: its group is the root
        ({"/": "150000 100000"}, "/", 1.5),
        ({"/": "max 100000", "/pod/api": "50000 100000"}, "/pod/api", 0.5),
        ({"/pod": "300000 100000", "/pod/api": "max 100000"}, "/pod/api", 3.0),  # a parent's limit holds too
        ({"/pod": "300000 100000", "/pod/api": "100000 100000"}, "/pod/api", 1.0),
        ({}, "/", None),
    ],
)
def test_cgroup_v2_quota(tmp_path, levels, own, cpus):
    root, proc = _v2(tmp_path, levels, own)
    assert cgroup_cpu_limit(root=root, own=proc) == cpus


@pytest.mark.parametrize(("quota", "cpus"), [("-1", None), ("400000", 4.0), ("50000", 0.5)])
def test_cgroup_v1_quota(tmp_path, quota, cpus):
    folder = tmp_path / "fs" / "cpu,cpuacct"
    folder.mkdir(parents=True)
    (folder / "cpu.cfs_quota_us").write_text(quota + "\n")
    (folder / "cpu.cfs_period_us").write_text("100000\n")
    proc = tmp_path / "cgroup"
    proc.write_text("4:memory:/docker/abc\n2:cpu,cpuacct:/docker/abc\n0::/\n")
    assert cgroup_cpu_limit(root=tmp_path / "fs", own=proc) == cpus


@pytest.mark.parametrize("text", ["", "garbage", "max", "0 100000", "100000 0", "-5 100000"])
def test_an_unreadable_quota_is_no_limit(tmp_path, text):
    root, proc = _v2(tmp_path, {"/": text}, "/")
    assert cgroup_cpu_limit(root=root, own=proc) is None


@pytest.mark.parametrize(("limit", "expected"), [(None, 8), (2.0, 2), (1.5, 2), (0.5, 1), (32.0, 8)])
def test_the_light_lane_has_a_process_per_cpu_it_may_use(monkeypatch, limit, expected):
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: set(range(8)), raising=False)
    monkeypatch.setattr(compute, "cgroup_cpu_limit", lambda: limit)
    assert default_solver_processes() == expected
