"""Optional hardware counters through Linux ``perf stat``.

With ``perf: [cycles, instructions, cache-misses]`` (or ``perf: true`` for
those three) in the experiment file, each timed run is wrapped as

    perf stat -x , -o FILE -e EVENTS -- COMMAND...

and the counts become extra responses in ``runs.csv``: ``perf_cycles``,
``perf_instructions``, ``perf_cache_misses`` (event names with ``-`` turned
into ``_``; counts per run).  perf's machine-readable output (``-x``) is one
line per event: ``value,unit,event,run time,percentage,...``; ``<not
supported>`` or ``<not counted>`` in the value field means the counter gave
nothing.

Whether counters work is probed once with ``perf stat -e instructions true``:
perf may be absent, the kernel may forbid it (``perf_event_paranoid``), or a
virtual machine may not pass the PMU through.  Where it does not work, the
runner runs the command unwrapped and records a note instead of counts.
Wrapping adds perf's own start-up (of the order of milliseconds, common
practice) to ``wall_s``; compare wrapped runs with wrapped runs only.
"""

from __future__ import annotations

import functools
import os
import shutil
import subprocess
from dataclasses import dataclass

DEFAULT_EVENTS = ("cycles", "instructions", "cache-misses")
_EVENT_OK = set("abcdefghijklmnopqrstuvwxyz0123456789-_.:/=,")


@dataclass(frozen=True)
class PerfConfig:
    events: tuple[str, ...] = DEFAULT_EVENTS

    def columns(self) -> tuple[str, ...]:
        return tuple(column_name(e) for e in self.events)


def column_name(event: str) -> str:
    base = event.split(":", 1)[0]
    return "perf_" + "".join(c if c.isalnum() else "_" for c in base.lower()).strip("_")


def parse_perf(node) -> PerfConfig | None:
    """``perf: true | false | [event, ...]`` (errors FILE:LINE:COL)."""
    import yaml

    from benchharness.experiment import yamlnodes as yn

    if isinstance(node, yaml.SequenceNode):
        events = tuple(yn.as_str(n, "'perf' event") for n in yn.sequence_items(node, "'perf'"))
        if not events:
            raise yn.node_error(node, "'perf' is an empty list; name events such as cycles, "
                                      "instructions, cache-misses (or write perf: true)")
        for n, e in zip(node.value, events):
            if not set(e.lower()) <= _EVENT_OK:
                raise yn.node_error(n, f"'perf' event {e!r} has characters perf does not use")
        return PerfConfig(events)
    return PerfConfig() if yn.as_bool(node, "'perf'") else None


@functools.lru_cache(maxsize=1)
def perf_support() -> tuple[bool, str]:
    """``(works, note)``: whether ``perf stat`` counts instructions on this machine."""
    perf = shutil.which("perf")
    if not perf:
        return False, "hardware counters unavailable: the `perf` program is not installed"
    try:
        r = subprocess.run([perf, "stat", "-x", ",", "-e", "instructions", "true"],
                           capture_output=True, text=True, timeout=20)
    except (OSError, subprocess.SubprocessError) as exc:
        return False, f"hardware counters unavailable: perf could not run ({exc})"
    counts = parse_perf_output(r.stderr)
    if r.returncode == 0 and counts.get("instructions") is not None:
        return True, "perf stat counts instructions"
    paranoid = _read("/proc/sys/kernel/perf_event_paranoid")
    detail = (r.stderr.strip().splitlines() or ["no output"])[-1][:200]
    hint = ""
    if paranoid is not None and paranoid.lstrip("-").isdigit() and int(paranoid) > 2:
        hint = (f"; kernel.perf_event_paranoid is {paranoid} (sudo sysctl "
                "kernel.perf_event_paranoid=2 allows counting your own processes)")
    return False, ("hardware counters unavailable: perf stat reports no instruction count "
                   f"({detail}){hint}; in a virtual machine the CPU's counters are often not "
                   "passed through")


def _read(path: str) -> str | None:
    try:
        with open(path) as fh:
            return fh.read().strip()
    except OSError:
        return None


def wrap(argv: tuple[str, ...] | None, shell_command: str | None, config: PerfConfig,
         out_file: str) -> tuple[str, ...]:
    """The argv that runs the command under ``perf stat`` writing counts to ``out_file``."""
    perf = shutil.which("perf") or "perf"
    inner = tuple(argv) if argv is not None else ("/bin/sh", "-c", shell_command or "")
    return (perf, "stat", "-x", ",", "-o", out_file, "-e", ",".join(config.events), "--",
            *inner)


def parse_perf_output(text: str) -> dict[str, float | None]:
    """``{event: count or None}`` from ``perf stat -x ,`` output."""
    out: dict[str, float | None] = {}
    for line in text.splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        parts = line.split(",")
        if len(parts) < 3:
            continue
        value, event = parts[0], parts[2]
        if not event:
            continue
        try:
            out[event] = float(value)
        except ValueError:
            out[event] = None       # <not supported>, <not counted>
    return out


def read_counts(out_file: str, config: PerfConfig) -> tuple[dict[str, float | None], str]:
    """Counts per column from perf's output file (removed afterwards) and a reason if any."""
    try:
        with open(out_file, encoding="utf-8", errors="replace") as fh:
            text = fh.read()
    except OSError:
        return {c: None for c in config.columns()}, "perf wrote no counts"
    finally:
        try:
            os.unlink(out_file)
        except OSError:
            pass
    counts = parse_perf_output(text)
    values, missing = {}, []
    for e in config.events:
        v = counts.get(e)
        if v is None:
            # perf may print the event with a modifier suffix (cycles:u)
            v = next((x for k, x in counts.items() if k.split(":")[0] == e), None)
        values[column_name(e)] = v
        if v is None:
            missing.append(e)
    return values, (f"perf counted nothing for {', '.join(missing)}" if missing else "")
