"""Cores a container's CPU quota allows, from the cgroup files' documented formats
(docs/references.md, "Thread pools on a shared machine": the kernel's CFS bandwidth control and
cgroup v2 documentation, from memory), and the thread counts that follow from them."""

from __future__ import annotations

from pathlib import Path

import pytest

from expertloop.sampler import cores
from expertloop.shared import cpu_quota


@pytest.mark.parametrize(
    ("quota", "period", "expected"),
    [
        ("max", "100000", None),  # cgroup v2, no limit (its default "max 100000")
        ("200000", "100000", 2.0),  # `--cpus 2`
        ("150000", "100000", 1.5),  # `--cpus 1.5`
        ("50000", "100000", 0.5),
        ("-1", "100000", None),  # cgroup v1, no limit
        ("0", "100000", None),  # not a quota
        ("abc", "100000", None),
        ("100000", "0", None),
    ],
)
def test_quota_cores_from_the_documented_formats(quota, period, expected):
    assert cpu_quota.quota_cores(quota, period) == expected


@pytest.mark.parametrize(
    ("cpus", "quota", "expected"),
    [(16, 2.0, 2), (16, 1.5, 2), (16, 0.5, 1), (2, 8.0, 2), (4, None, 4)],
)
def test_usable_cores_are_the_cpus_capped_by_the_quota_rounded_up(
    cpus, quota, expected, monkeypatch
):
    monkeypatch.setattr(cpu_quota, "container_quota", lambda: None)
    assert cpu_quota.usable_cores(cpus, quota) == expected


def test_the_quota_is_read_from_cgroup_v2_then_v1(tmp_path: Path, monkeypatch):
    v2, v1_quota, v1_period = tmp_path / "cpu.max", tmp_path / "quota", tmp_path / "period"
    monkeypatch.setattr(cpu_quota, "CGROUP_V2_CPU_MAX", v2)
    monkeypatch.setattr(cpu_quota, "CGROUP_V1_QUOTA", v1_quota)
    monkeypatch.setattr(cpu_quota, "CGROUP_V1_PERIOD", v1_period)
    assert cpu_quota.container_quota() is None  # neither readable: no limit known
    v1_quota.write_text("300000\n")
    v1_period.write_text("100000\n")
    assert cpu_quota.container_quota() == 3.0
    v2.write_text("250000 100000\n")
    assert cpu_quota.container_quota() == 2.5  # v2 first
    v2.write_text("max 100000\n")
    assert cpu_quota.container_quota() is None
    assert cpu_quota.usable_cores(8) == 8


def test_the_search_runs_no_more_threads_than_the_quota_allows(monkeypatch):
    # every core free, but a quota of one core: one thread
    monkeypatch.setattr(cores, "usable_cores", lambda n: 1)
    meter = cores.CpuMeter()
    monkeypatch.setattr(meter, "free_cores", lambda: float(meter.n_cores))
    assert meter.threads() == 1
    monkeypatch.setattr(cores, "usable_cores", lambda n: n)
    unlimited = cores.CpuMeter()
    monkeypatch.setattr(unlimited, "free_cores", lambda: float(unlimited.n_cores))
    assert unlimited.threads() == unlimited.n_cores
