"""Machine facts for host.json, noise checks before a run, and per-run conditions.

Three jobs, all read-only:

* `collect_facts` — what the runs were measured on (host.json): CPU model and
  cores, memory, OS, kernel, Python, load, frequency policy, boost, thermal
  throttling counters, virtualization, battery.  Anything the machine does not
  expose is recorded as null (and listed under ``not_exposed``), never guessed.
* `check_host` — things that are known to disturb timings (load and busy
  processes, a frequency governor other than ``performance``, turbo/boost,
  thermal throttling, memory pressure, running on battery, a virtual machine
  or container), each as a warning with a fix the user can apply.  The checks
  follow common benchmarking practice (common practice; no single source).
* `sample_run_conditions` — a cheap per-run sample (1-minute load average and
  current CPU frequency) that the runner records with each run, so the analysis
  can ask whether residuals follow load (`benchharness.analysis.load_check`).

Sources: psutil, ``os.getloadavg``, /proc (cpuinfo, pressure/memory), /sys
(cpufreq, intel_pstate, thermal_throttle, dmi) and ``systemd-detect-virt``.
"""

from __future__ import annotations

import glob
import os
import platform
import shutil
import subprocess
import sys
import time
from pathlib import Path

CPU_SYS = "/sys/devices/system/cpu"
# Load per logical CPU above which timings are likely disturbed (common practice).
LOAD_PER_CPU_WARN = 0.3
BUSY_PROCESS_PERCENT = 10.0       # one process using more than this of one CPU is "busy"
MEMORY_AVAILABLE_WARN = 0.10      # less than 10 % of memory available
PSI_SOME_AVG10_WARN = 1.0         # percent of time some task stalled on memory (10 s average)

_VM_PRODUCTS = ("kvm", "qemu", "virtualbox", "vmware", "virtual machine", "xen", "bochs",
                "hvm domu", "cloud", "openstack", "google compute engine", "amazon ec2",
                "droplet", "parallels", "bhyve")


def _read(path: str) -> str | None:
    try:
        return Path(path).read_text().strip()
    except (OSError, UnicodeDecodeError):
        return None


def cpu_model() -> str | None:
    text = _read("/proc/cpuinfo") or ""
    for line in text.splitlines():
        if line.lower().startswith(("model name", "hardware", "cpu model")):
            return line.split(":", 1)[1].strip()
    return platform.processor() or None


def load_average() -> list[float] | None:
    try:
        return [round(x, 3) for x in os.getloadavg()]
    except (OSError, AttributeError):
        return None


# ---------------------------------------------------------------------------
# Readers of individual facts; each returns None when the machine hides it.

def _cpu_dirs() -> list[str]:
    return sorted(glob.glob(f"{CPU_SYS}/cpu[0-9]*"), key=lambda p: int(p.rsplit("cpu", 1)[1]))


def governors() -> dict[str, str] | None:
    """{cpu name: scaling governor} for CPUs whose cpufreq is exposed."""
    out = {}
    for d in _cpu_dirs():
        g = _read(f"{d}/cpufreq/scaling_governor")
        if g is not None:
            out[os.path.basename(d)] = g
    return out or None


def scaling_driver() -> str | None:
    for d in _cpu_dirs():
        v = _read(f"{d}/cpufreq/scaling_driver")
        if v is not None:
            return v
    return None


def boost_state() -> dict | None:
    """Turbo/boost: ``{"enabled": bool, "source": path}`` or None if not exposed."""
    v = _read(f"{CPU_SYS}/cpufreq/boost")
    if v in ("0", "1"):
        return {"enabled": v == "1", "source": f"{CPU_SYS}/cpufreq/boost"}
    v = _read(f"{CPU_SYS}/intel_pstate/no_turbo")
    if v in ("0", "1"):
        return {"enabled": v == "0", "source": f"{CPU_SYS}/intel_pstate/no_turbo"}
    return None


def thermal_throttle_counts() -> dict[str, int] | None:
    """Summed thermal throttling event counters since boot, per kind, where readable."""
    totals: dict[str, int] = {}
    found = False
    for path in glob.glob(f"{CPU_SYS}/cpu[0-9]*/thermal_throttle/*_throttle_count"):
        v = _read(path)
        if v is None or not v.isdigit():
            continue
        found = True
        name = os.path.basename(path).replace("_throttle_count", "")
        if name.startswith("package"):
            # every CPU of a package reports the same package counter; keep the max
            totals[name] = max(totals.get(name, 0), int(v))
        else:
            totals[name] = totals.get(name, 0) + int(v)
    return totals if found else None


_FREQ_FILES: tuple[str, dict] | None = None  # (CPU_SYS, cpu number -> cur_freq path)
_CPUINFO_CACHE: list = [-1.0, []]             # [when read, per-CPU MHz of /proc/cpuinfo]


def freq_files() -> dict:
    """{CPU number: its cpufreq ``scaling_cur_freq`` file} for CPUs that expose one
    (found once per process; the launcher is given this map for its own samples)."""
    global _FREQ_FILES
    if _FREQ_FILES is None or _FREQ_FILES[0] != CPU_SYS:
        found = {}
        for d in _cpu_dirs():
            path = f"{d}/cpufreq/scaling_cur_freq"
            v = _read(path)
            if v and v.isdigit():
                found[int(os.path.basename(d)[3:])] = path
        _FREQ_FILES = (CPU_SYS, found)
    return _FREQ_FILES[1]


def cpu_mhz(cpus: tuple[int, ...] | None = None) -> float | None:
    """Current CPU frequency in MHz (mean over ``cpus`` or all), where readable.

    Prefers cpufreq's ``scaling_cur_freq`` (kHz; one small read per CPU); falls
    back to the ``cpu MHz`` lines of /proc/cpuinfo (which a virtual machine may
    report as a constant), re-read at most once a second because it is costly.
    The reading itself is the launcher's (`launcher.cpu_mhz_from`), so queued
    runs, sampled there, and the harness's own samples agree.
    """
    from benchharness.execute.launcher import cpu_mhz_from

    return cpu_mhz_from(freq_files(), cpus, _CPUINFO_CACHE)


def memory_pressure() -> dict | None:
    """/proc/pressure/memory averages (percent of time stalled), or None."""
    text = _read("/proc/pressure/memory")
    if not text:
        return None
    out = {}
    for line in text.splitlines():
        parts = line.split()
        if not parts:
            continue
        kv = dict(p.split("=", 1) for p in parts[1:] if "=" in p)
        try:
            out[parts[0]] = {k: float(v) for k, v in kv.items() if k.startswith("avg")}
        except ValueError:
            continue
    return out or None


_VIRT: dict | None = None


def virtualization(refresh: bool = False) -> dict:
    """What hints at a virtual machine or container: ``{"kind": str|None, "evidence": [...]}``.

    Found once per process (it does not change while we run; the look-up starts
    ``systemd-detect-virt``); ``refresh`` looks again.
    """
    global _VIRT
    if _VIRT is None or refresh:
        _VIRT = _virtualization()
    return {"kind": _VIRT["kind"], "evidence": list(_VIRT["evidence"])}


def _virtualization() -> dict:
    evidence = []
    kind = None
    tool = shutil.which("systemd-detect-virt")
    if tool:
        try:
            r = subprocess.run([tool], capture_output=True, text=True, timeout=3)
            v = r.stdout.strip()
            if v and v != "none":
                kind = v
                evidence.append(f"systemd-detect-virt says {v}")
        except (OSError, subprocess.SubprocessError):
            pass
    product = _read("/sys/class/dmi/id/product_name")
    vendor = _read("/sys/class/dmi/id/sys_vendor")
    dmi = " ".join(x for x in (vendor, product) if x)
    if dmi and any(k in dmi.lower() for k in _VM_PRODUCTS):
        evidence.append(f"DMI product is {dmi!r}")
        kind = kind or "vm"
    cpuinfo = _read("/proc/cpuinfo") or ""
    for line in cpuinfo.splitlines():
        if line.startswith("flags") and " hypervisor" in f" {line.split(':', 1)[-1]} ":
            evidence.append("the CPU reports the 'hypervisor' flag")
            kind = kind or "vm"
            break
    if os.path.exists("/.dockerenv") and not any("docker" in e for e in evidence):
        evidence.append("/.dockerenv exists")
        kind = kind or "docker"
    return {"kind": kind, "evidence": evidence}


def battery() -> dict | None:
    import psutil

    try:
        b = psutil.sensors_battery()
    except (AttributeError, NotImplementedError, OSError):
        return None
    if b is None:
        return None
    return {"percent": round(b.percent, 1), "plugged_in": b.power_plugged}


def _os_release() -> str | None:
    text = _read("/etc/os-release") or ""
    for line in text.splitlines():
        if line.startswith("PRETTY_NAME="):
            return line.split("=", 1)[1].strip().strip('"')
    return None


# ---------------------------------------------------------------------------

def collect_facts() -> dict:
    """Facts of this machine for host.json (null where not exposed)."""
    import psutil

    from benchharness.version import __version__
    from benchharness.results.journal import utc_iso

    freq = None
    try:
        f = psutil.cpu_freq()
        if f:
            freq = {"current_mhz": f.current, "min_mhz": f.min or None, "max_mhz": f.max or None}
    except (OSError, NotImplementedError, FileNotFoundError):
        pass
    uname = platform.uname()
    govs = governors()
    gov_values = sorted(set(govs.values())) if govs else None
    vm = virtualization()
    mem = psutil.virtual_memory()
    facts = {
        "collected_at": utc_iso(),
        "benchharness_version": __version__,
        "hostname": uname.node,
        "cpu_model": cpu_model(),
        "physical_cores": psutil.cpu_count(logical=False),
        "logical_cores": psutil.cpu_count(logical=True),
        "usable_cpus": sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
        else None,
        "memory_bytes": mem.total,
        "memory_available_bytes": mem.available,
        "os": uname.system,
        "os_release": _os_release(),
        "kernel": uname.release,
        "machine": uname.machine,
        "python": sys.version.split()[0],
        "python_implementation": platform.python_implementation(),
        "python_executable": sys.executable,
        "load_average_start": load_average(),
        "cpu_frequency": freq,
        "cpu_mhz_now": cpu_mhz(),
        # one value when all CPUs agree, else the per-CPU mapping
        "frequency_governor": (gov_values[0] if gov_values and len(gov_values) == 1
                               else govs),
        "frequency_driver": scaling_driver(),
        "boost": boost_state(),
        "thermal_throttle_counts": thermal_throttle_counts(),
        "memory_pressure": memory_pressure(),
        "virtualization": vm["kind"],
        "virtualization_evidence": vm["evidence"],
        "battery": battery(),
        "aslr": _read("/proc/sys/kernel/randomize_va_space"),
        "perf_event_paranoid": _read("/proc/sys/kernel/perf_event_paranoid"),
    }
    facts["not_exposed"] = [k for k in ("frequency_governor", "boost", "thermal_throttle_counts",
                                        "memory_pressure", "battery", "cpu_mhz_now")
                            if facts[k] is None]
    return facts


def _warning(check: str, severity: str, message: str, fix: str) -> dict:
    return {"check": check, "severity": severity, "message": message, "fix": fix}


class BusySampler:
    """Busy-process sampling split in two, so the wait can overlap other work.

    `start` takes the first CPU-time reading of every other process; `result`
    takes the second one at least ``interval_s`` later (sleeping only for what
    is left) and returns the processes above ``threshold`` % of one CPU over
    the whole elapsed interval. Processes started after `start` (our own
    subprocesses, for instance) are not sampled.
    """

    def __init__(self, interval_s: float = 0.1, threshold: float = BUSY_PROCESS_PERCENT,
                 exclude: set[int] | None = None):
        self.interval_s = interval_s
        self.threshold = threshold
        self.exclude = exclude
        self._procs = None
        self._t0 = None
        self._busy = None
        self._thread = None

    def start_in_background(self) -> "BusySampler":
        """`start` in a thread (reading every process takes a few tens of ms)."""
        import threading

        self._thread = threading.Thread(target=self._start_quietly, name="busy-sample",
                                        daemon=True)
        self._thread.start()
        return self

    def _start_quietly(self) -> None:
        try:
            self.start()
        except Exception:  # noqa: BLE001 - `result` then samples in the foreground
            self._procs = None

    def _join(self) -> None:
        if self._thread is not None:
            self._thread.join()
            self._thread = None

    def start(self) -> "BusySampler":
        import psutil

        me = os.getpid()
        skip = set(self.exclude or ()) | {me}
        try:
            # our own chain (the shell, a CI runner) is not "other work"
            skip |= {p.pid for p in psutil.Process(me).parents()}
        except psutil.Error:
            pass
        procs = []
        for p in psutil.process_iter(["pid", "name"]):
            if p.pid in skip:
                continue
            try:
                p.cpu_percent(None)
                procs.append(p)
            except psutil.Error:
                continue
        self._procs = procs
        self._t0 = time.monotonic()
        return self

    @property
    def due(self) -> float:
        """`time.monotonic` value from which `result` does not sleep (about, while
        the first reading is still being taken in the background)."""
        return (self._t0 if self._t0 is not None else time.monotonic()) + self.interval_s

    def exclude_pids(self, pids) -> None:
        """Leave these processes out of the result (e.g. our own launcher)."""
        self._join()
        if self._procs is not None and pids:
            drop = set(pids)
            self._procs = [p for p in self._procs if p.pid not in drop]

    def result(self) -> list[dict]:
        self._join()
        if self._busy is not None:
            return self._busy
        if self._procs is None:
            self.start()
        left = self.interval_s - (time.monotonic() - self._t0)
        if left > 0:
            time.sleep(left)
        import psutil

        busy = []
        for p in self._procs:
            try:
                pct = p.cpu_percent(None)
            except psutil.Error:
                continue
            if pct >= self.threshold:
                busy.append({"pid": p.pid, "name": p.info.get("name") or "?",
                             "cpu_percent": round(pct, 1)})
        busy.sort(key=lambda d: -d["cpu_percent"])
        self._busy = busy
        self._procs = None
        return busy


def busy_processes(interval_s: float = 0.1, threshold: float = BUSY_PROCESS_PERCENT,
                   exclude: set[int] | None = None) -> list[dict]:
    """Processes using more than ``threshold`` % of one CPU over ``interval_s``."""
    return BusySampler(interval_s, threshold, exclude).start().result()


def check_host(facts: dict | None = None, busy_interval_s: float = 0.1,
               busy_sampler: BusySampler | None = None) -> list[dict]:
    """Warnings about this machine's state, each ``{check, severity, message, fix}``.

    ``severity`` is ``warning`` (likely to disturb timings; fixable) or
    ``note`` (worth knowing when reading the results). ``busy_sampler``: a
    `BusySampler` started earlier (its wait then overlaps the caller's work).
    """
    facts = facts or collect_facts()
    return (_competing_work(facts, busy_interval_s, busy_sampler) + _clock_warnings()
            + _memory_warnings(facts) + _power_and_guest_warnings())


def _competing_work(facts: dict, busy_interval_s: float,
                    busy_sampler: BusySampler | None) -> list[dict]:
    """Other work on the machine: a high load average, processes busy right now."""
    out: list[dict] = []
    ncpu = facts.get("logical_cores") or os.cpu_count() or 1
    load = facts.get("load_average_start") or load_average()
    if load is not None and load[0] / ncpu > LOAD_PER_CPU_WARN:
        out.append(_warning(
            "load", "warning",
            f"1-minute load average is {load[0]:.2f} on {ncpu} logical CPUs; other work "
            "competes with the benchmark for CPU time and caches",
            "wait for the machine to go quiet, stop other jobs, or run on a dedicated host"))
    if busy_sampler is not None:
        busy = busy_sampler.result()
    else:
        busy = busy_processes(busy_interval_s) if busy_interval_s > 0 else []
    if busy:
        top = ", ".join(f"{b['name']} (pid {b['pid']}, {b['cpu_percent']:.0f}%)" for b in busy[:5])
        out.append(_warning(
            "busy_processes", "warning", f"busy processes: {top}",
            "stop or pause these processes (kill -STOP PID, resume later with kill -CONT PID) "
            "or pin the benchmark to other CPUs with `pin:`"))
    return out


def _clock_warnings() -> list[dict]:
    """What moves the clock speed: the frequency governor, turbo/boost, thermal throttling."""
    out: list[dict] = []
    govs = governors()
    if govs is None:
        out.append(_warning(
            "governor", "note",
            "the CPU frequency governor is not exposed (no /sys/devices/system/cpu/*/cpufreq; "
            "common in virtual machines and containers); frequency changes cannot be ruled out",
            "on bare metal, load the cpufreq driver; in a VM, ask for dedicated CPUs"))
    else:
        other = sorted({g for g in govs.values() if g != "performance"})
        if other:
            out.append(_warning(
                "governor", "warning",
                f"CPU frequency governor is {', '.join(other)} (not performance); the clock "
                "speed changes with load, which adds noise and a warm-up effect",
                "sudo cpupower frequency-set -g performance  (or: echo performance | sudo tee "
                f"{CPU_SYS}/cpu*/cpufreq/scaling_governor)"))

    boost = boost_state()
    if boost is not None and boost["enabled"]:
        if boost["source"].endswith("no_turbo"):
            fix = f"echo 1 | sudo tee {CPU_SYS}/intel_pstate/no_turbo"
        else:
            fix = f"echo 0 | sudo tee {CPU_SYS}/cpufreq/boost"
        out.append(_warning(
            "boost", "warning",
            "turbo/boost is on: the clock rises above nominal while the chip is cool and idle "
            "and falls as it heats, so timings depend on what ran before",
            fix + "  (undo after benchmarking)"))

    thr = thermal_throttle_counts()
    if thr and any(v > 0 for v in thr.values()):
        desc = ", ".join(f"{k} {v}" for k, v in sorted(thr.items()))
        out.append(_warning(
            "thermal", "warning",
            f"the CPUs have been thermally throttled since boot ({desc} events); throttling "
            "during a run slows it unpredictably",
            "improve cooling, lower the machine's other load, and compare host.json counters "
            "before and after the run (the runner records them)"))
    return out


def _memory_warnings(facts: dict) -> list[dict]:
    """Little memory available, or tasks stalled waiting for memory (pressure stall info)."""
    out: list[dict] = []
    total = facts.get("memory_bytes") or 0
    avail = facts.get("memory_available_bytes")
    if total and avail is not None and avail / total < MEMORY_AVAILABLE_WARN:
        out.append(_warning(
            "memory", "warning",
            f"only {avail / 2**20:.0f} MiB of {total / 2**20:.0f} MiB memory is available; "
            "page cache eviction and swapping distort timings",
            "close memory-hungry programs or run on a machine with more free memory"))
    psi = memory_pressure()
    if psi and psi.get("some", {}).get("avg10", 0.0) > PSI_SOME_AVG10_WARN:
        out.append(_warning(
            "memory_pressure", "warning",
            f"tasks stalled on memory {psi['some']['avg10']:.1f}% of the last 10 s "
            "(/proc/pressure/memory)",
            "free memory (stop other jobs) before benchmarking"))
    return out


def _power_and_guest_warnings() -> list[dict]:
    """Running on battery, and running as a guest under virtualization."""
    out: list[dict] = []
    bat = battery()
    if bat is not None and bat.get("plugged_in") is False:
        out.append(_warning(
            "battery", "warning",
            f"running on battery ({bat['percent']:.0f}%); power saving lowers and varies the "
            "clock speed",
            "plug in the charger and choose a performance power profile"))

    vm = virtualization()
    if vm["kind"]:
        out.append(_warning(
            "virtualization", "note",
            f"running under virtualization ({vm['kind']}: {'; '.join(vm['evidence'])}); other "
            "guests share the hardware, so timings are noisier and may drift",
            "compare only runs from the same host, use more replicates, or benchmark on bare "
            "metal for final figures"))
    return out


def sample_run_conditions(cpus: tuple[int, ...] | None = None) -> dict:
    """Cheap per-run sample: ``{"load_1m": float|None, "cpu_mhz": float|None}`` (the
    launcher's own readers, so runs sampled there and here agree)."""
    from benchharness.execute.launcher import load_1m

    return {"load_1m": load_1m(), "cpu_mhz": cpu_mhz(cpus)}


def facts_at_end(start: dict) -> dict:
    """Facts to add to host.json when a run ends: load, throttling during the run, memory."""
    import psutil

    out: dict = {"load_average_end": load_average(), "cpu_mhz_end": cpu_mhz()}
    end = thermal_throttle_counts()
    out["thermal_throttle_counts_end"] = end
    before = start.get("thermal_throttle_counts")
    if end is not None and isinstance(before, dict):
        out["throttled_during_run"] = any(end.get(k, 0) > before.get(k, 0) for k in end)
    else:
        out["throttled_during_run"] = None
    try:
        out["memory_available_bytes_end"] = psutil.virtual_memory().available
    except (OSError, RuntimeError):
        pass
    return out


HOST_CHECK_MODES = ("warn", "off", "strict")


def host_check_mode(exp) -> str:
    """The experiment's ``host_check:`` — ``warn`` (default), ``off`` or ``strict``.

    ``true`` means ``warn`` and ``false`` means ``off``; ``strict`` refuses to
    start while any check gives a warning (notes never block).
    """
    node = (getattr(exp, "sections", {}) or {}).get("host_check")
    if node is None:
        return "warn"
    from benchharness.experiment import yamlnodes as yn

    text = yn.scalar_text(node, "'host_check'")
    if text in yn.TRUE_WORDS:
        return "warn"
    if text in yn.FALSE_WORDS:
        return "off"
    if text in HOST_CHECK_MODES:
        return text
    raise yn.node_error(node, f"'host_check' is {text!r}; use warn, off or strict")


def preflight(exp, facts: dict | None = None,
              busy_sampler: BusySampler | None = None) -> list[dict]:
    """Run the host checks an experiment asks for; raise in ``strict`` mode on a warning."""
    mode = host_check_mode(exp)
    if mode == "off":
        return []
    found = check_host(facts, busy_sampler=busy_sampler)
    blocking = [w for w in found if w["severity"] == "warning"]
    if mode == "strict" and blocking:
        from benchharness.errors import ExecutionError

        first = blocking[0]
        more = f" (and {len(blocking) - 1} more; see `benchharness host`)" if len(blocking) > 1 \
            else ""
        raise ExecutionError(f"host check (host_check: strict): {first['message']}; fix: "
                             f"{first['fix']}{more}")
    return found
