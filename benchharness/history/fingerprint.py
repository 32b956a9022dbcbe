"""The host fingerprint: which machine a results folder was measured on.

Owns: picking the stable facts out of ``host.json`` -- CPU model, core counts,
total memory, operating system, Python version -- and hashing them (SHA-256 of
their canonical JSON, first 16 hex digits). Facts that change while a machine
stays the same (load, free memory, current frequency, uptime) are left out, so
the fingerprint changes only when the machine (or its OS or Python) does; total
memory is rounded to 0.5 GiB, as it can differ by a few pages between boots. Two
folders with the same fingerprint are treated as one continuous series; a
change of fingerprint is a known break in a history.
"""

from __future__ import annotations

import hashlib
import json
import re

#: the keys benchharness.measure.host.collect_facts writes, per component
KNOWN_KEYS = {
    "cpu_model": ("cpu_model",),
    "cores": ("physical_cores", "logical_cores"),
    "memory": ("memory_bytes",),
    "os": ("os", "os_release", "kernel", "machine"),
    "python": ("python", "python_implementation"),
}

_VOLATILE = re.compile(r"avail|free|used|percent|load|freq|uptime|boot|time|temp|swap|"
                       r"pressure|executable|path|pid|hostname_|user|usable", re.I)

#: component -> pattern over flattened (dotted, lower-case) host.json keys
_COMPONENTS = {
    "cpu_model": re.compile(r"(cpu.*model|model.*name|processor|cpu_brand|^cpu$)"),
    "cores": re.compile(r"(cores|cpu_count|logical|physical|ncpu)"),
    "memory": re.compile(r"(mem)"),
    "os": re.compile(r"(^|[._])(os|system|platform|kernel|release|distro|machine)($|[._])"),
    "python": re.compile(r"python"),
}


def _flatten(obj, prefix: str = "") -> dict[str, str]:
    out: dict[str, str] = {}
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.update(_flatten(v, f"{prefix}{str(k).lower()}."))
    elif isinstance(obj, (list, tuple)):
        # lists (per-CPU values, load averages) are not identity facts
        pass
    elif obj is not None:
        out[prefix[:-1]] = str(obj)
    return out


def _memory_text(key: str, value: str) -> str:
    """Total memory to the nearest 0.5 GiB: the exact total can differ by a few
    pages from boot to boot on the same (virtual) machine."""
    try:
        v = float(value)
    except ValueError:
        return value
    if key.endswith(("_kib", "_kb", ".kib", ".kb")):
        v *= 1024
    elif key.endswith(("_mib", "_mb", ".mib", ".mb")):
        v *= 1024 ** 2
    elif key.endswith(("_gib", "_gb", ".gib", ".gb")):
        v *= 1024 ** 3
    return f"{round(v / 2 ** 29) / 2:g} GiB"


def host_facts(host: dict) -> dict[str, dict[str, str]]:
    """The identity facts of a host.json, grouped by component.

    A host.json written by benchharness is read by its known keys; one from
    elsewhere by key patterns (leaving out the volatile facts).
    """
    host = host or {}
    if any(k in host for keys in KNOWN_KEYS.values() for k in keys):
        known: dict[str, dict[str, str]] = {}
        for comp, keys in KNOWN_KEYS.items():
            chosen = {k: (_memory_text(k, str(host[k])) if comp == "memory" else str(host[k]))
                      for k in keys if host.get(k) is not None}
            if chosen:
                known[comp] = chosen
        return known
    flat = _flatten(host)
    facts: dict[str, dict[str, str]] = {}
    for comp, pat in _COMPONENTS.items():
        chosen = {}
        for key in sorted(flat):
            if pat.search(key) and not _VOLATILE.search(key.replace("python", "")):
                if comp == "python" and not re.search(r"version|implementation|^python$", key):
                    continue
                chosen[key] = (_memory_text(key, flat[key]) if comp == "memory"
                               else flat[key])
        if chosen:
            facts[comp] = chosen
    return facts


def host_fingerprint(host: dict) -> str:
    """16 hex digits identifying the machine; ``unknown`` when host.json says nothing usable."""
    facts = host_facts(host)
    if not facts:
        return "unknown"
    blob = json.dumps(facts, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()[:16]
