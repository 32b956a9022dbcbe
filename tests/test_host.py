"""Host facts and noise checks (benchharness.measure.host, `benchharness host`)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import pytest

from benchharness.measure import host


def test_collect_facts_is_plain_json_with_the_contract_keys():
    facts = host.collect_facts()
    json.dumps(facts)  # serialisable as is
    for key in ("cpu_model", "physical_cores", "logical_cores", "memory_bytes", "os", "kernel",
                "python", "load_average_start", "frequency_governor", "boost",
                "thermal_throttle_counts", "virtualization", "battery", "not_exposed"):
        assert key in facts
    assert facts["logical_cores"] == os.cpu_count()
    assert facts["python"] == sys.version.split()[0]
    import psutil

    assert facts["memory_bytes"] == psutil.virtual_memory().total


def test_governor_read_from_sys_when_exposed():
    govs = host.governors()
    if govs is None:
        pytest.skip("this machine does not expose cpufreq governors (typical in a VM/container)")
    known = {"performance", "powersave", "ondemand", "conservative", "schedutil", "userspace"}
    assert set(govs.values()) <= known


def test_thermal_counters_read_when_exposed():
    counts = host.thermal_throttle_counts()
    if counts is None:
        pytest.skip("no thermal_throttle counters under /sys (typical in a VM/container)")
    assert all(isinstance(v, int) and v >= 0 for v in counts.values())


def test_cpu_frequency_sample_when_readable():
    mhz = host.cpu_mhz()
    if mhz is None:
        pytest.skip("the CPU frequency is not readable on this machine")
    assert 10 < mhz < 20000


def test_sample_run_conditions_matches_getloadavg():
    s = host.sample_run_conditions()
    assert set(s) == {"load_1m", "cpu_mhz"}
    assert s["load_1m"] == pytest.approx(os.getloadavg()[0], abs=0.5)


def _fake_sys(tmp_path, governor="powersave", boost="1", throttle=(3, 4), pkg=7):
    root = tmp_path / "cpu"
    for i, t in enumerate(throttle):
        d = root / f"cpu{i}"
        (d / "cpufreq").mkdir(parents=True)
        (d / "cpufreq" / "scaling_governor").write_text(governor + "\n")
        (d / "cpufreq" / "scaling_cur_freq").write_text(f"{(1800 + 200 * i) * 1000}\n")
        (d / "thermal_throttle").mkdir()
        (d / "thermal_throttle" / "core_throttle_count").write_text(f"{t}\n")
        (d / "thermal_throttle" / "package_throttle_count").write_text(f"{pkg}\n")
    (root / "cpufreq").mkdir()
    (root / "cpufreq" / "boost").write_text(boost + "\n")
    return str(root)


def test_checks_flag_governor_boost_and_throttling_with_fixes(tmp_path, monkeypatch):
    # Planted sysfs tree: powersave governor, boost on, throttle counters.
    monkeypatch.setattr(host, "CPU_SYS", _fake_sys(tmp_path))
    assert host.governors() == {"cpu0": "powersave", "cpu1": "powersave"}
    assert host.boost_state()["enabled"] is True
    assert host.thermal_throttle_counts() == {"core": 7, "package": 7}
    assert host.cpu_mhz() == pytest.approx(1900.0)
    assert host.cpu_mhz((1,)) == pytest.approx(2000.0)
    facts = {"logical_cores": 2, "load_average_start": [0.0, 0.0, 0.0],
             "memory_bytes": 100, "memory_available_bytes": 50}
    by = {w["check"]: w for w in host.check_host(facts, busy_interval_s=0)}
    assert "powersave" in by["governor"]["message"]
    assert "scaling_governor" in by["governor"]["fix"]
    assert by["boost"]["fix"].startswith("echo 0 | sudo tee")
    assert "core 7" in by["thermal"]["message"]
    assert all(w["fix"] for w in by.values())


def test_checks_quiet_on_a_tuned_fake_machine(tmp_path, monkeypatch):
    monkeypatch.setattr(host, "CPU_SYS", _fake_sys(tmp_path, "performance", "0", (0, 0), 0))
    facts = {"logical_cores": 2, "load_average_start": [0.0, 0.0, 0.0],
             "memory_bytes": 100, "memory_available_bytes": 50}
    checks = {w["check"] for w in host.check_host(facts, busy_interval_s=0)}
    assert not checks & {"governor", "boost", "thermal", "load", "memory"}


def test_load_and_memory_warnings():
    facts = {"logical_cores": 2, "load_average_start": [3.5, 2.0, 1.0],
             "memory_bytes": 8 * 2**30, "memory_available_bytes": 2**28}
    by = {w["check"]: w for w in host.check_host(facts, busy_interval_s=0)}
    assert "3.50" in by["load"]["message"]
    assert "256 MiB" in by["memory"]["message"]


def test_busy_process_is_named():
    spin = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        time.sleep(0.2)
        # a spinning process gets its share of a shared, loaded machine, which may be well
        # under 20% of a CPU: a low threshold and three looks keep the check about naming it
        seen = set()
        for _ in range(3):
            seen |= {b["pid"] for b in host.busy_processes(interval_s=0.5, threshold=3.0)}
            if spin.pid in seen:
                break
        assert spin.pid in seen
    finally:
        spin.kill()
        spin.wait()


def test_virtualization_evidence_is_consistent():
    vm = host.virtualization()
    if not vm["kind"]:
        pytest.skip("no sign of virtualization on this machine")
    assert vm["evidence"]
    w = [x for x in host.check_host(busy_interval_s=0) if x["check"] == "virtualization"]
    assert w and w[0]["fix"]


def test_host_command_json(cli):
    r = cli("host", "--json")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    assert data["facts"]["logical_cores"] == os.cpu_count()
    assert all({"check", "severity", "message", "fix"} <= set(w) for w in data["warnings"])


def test_host_command_text(cli):
    r = cli("host")
    assert r.returncode == 0, r.stderr
    assert "CPU" in r.stdout and "governor" in r.stdout


def test_facts_at_end_detect_throttling_during_run(tmp_path, monkeypatch):
    monkeypatch.setattr(host, "CPU_SYS", _fake_sys(tmp_path, throttle=(1, 1), pkg=0))
    start = {"thermal_throttle_counts": host.thermal_throttle_counts()}
    assert host.facts_at_end(start)["throttled_during_run"] is False
    (tmp_path / "cpu" / "cpu1" / "thermal_throttle" / "core_throttle_count").write_text("5\n")
    end = host.facts_at_end(start)
    assert end["throttled_during_run"] is True
    assert end["thermal_throttle_counts_end"]["core"] == 6
    assert host.facts_at_end({})["throttled_during_run"] is None


def test_host_check_modes(tmp_path, monkeypatch):
    from benchharness.errors import ExecutionError, ExperimentError
    from benchharness.experiment.file import Experiment

    def exp(line):
        return Experiment.from_text(f"experiment: t\ncommand: [\"true\"]\nfactors: {{a: [1]}}\n"
                                    f"{line}\n", path="e.yaml")

    assert host.host_check_mode(exp("")) == "warn"
    assert host.host_check_mode(exp("host_check: false")) == "off"
    assert host.host_check_mode(exp("host_check: strict")) == "strict"
    with pytest.raises(ExperimentError, match=r"e.yaml:4:13: 'host_check' is 'loud'"):
        host.host_check_mode(exp("host_check: loud"))
    assert host.preflight(exp("host_check: off")) == []
    busy = {"logical_cores": 1, "load_average_start": [9.0, 9.0, 9.0],
            "memory_bytes": 100, "memory_available_bytes": 50}
    monkeypatch.setattr(host, "busy_processes", lambda *a, **k: [])
    found = host.preflight(exp(""), busy)
    assert any(w["check"] == "load" for w in found)
    with pytest.raises(ExecutionError, match="host_check: strict.*load average is 9.00"):
        host.preflight(exp("host_check: strict"), busy)
